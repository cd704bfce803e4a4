"""The prepare stage: read source tables, convert units, validate, aggregate species.

One dataset of the config may have several source files (CSV or TSV). Every physical line of
every file is accounted for: header, blank lines (counted in ``prepared.json``) or a data line,
which ends in the ledger as ``kept``, ``merged`` or ``dropped`` with a reason. Problems with
the structure stop with :class:`allolaw.errors.UserError` naming file, line, column and value.

Modules, in the order data passes through them:

- :mod:`~allolaw.intake.reading` — bytes, text, physical lines, records, header;
- :mod:`~allolaw.intake.cells` — missing-value words, numbers, names, safe output text;
- :mod:`~allolaw.intake.units` — the unit registry and conversions to canonical units;
- :mod:`~allolaw.intake.rows` — per-line checks and conversion;
- :mod:`~allolaw.intake.species` — taxonomy checks, outlier flags, species aggregation;
- :mod:`~allolaw.intake.ledger` — the ledger and its accounting checks;
- :mod:`~allolaw.intake.manifest` — the manifest and the readers later stages use;
- :mod:`~allolaw.intake.prepare` — the stage function that runs them in order.
"""

from allolaw.intake.cells import MISSING_STRINGS
from allolaw.intake.ledger import LEDGER_COLUMNS
from allolaw.intake.manifest import read_clean, read_prepared
from allolaw.intake.prepare import prepare_dataset
from allolaw.intake.species import aggregate_species, robust_z

__all__ = [
    "LEDGER_COLUMNS",
    "MISSING_STRINGS",
    "aggregate_species",
    "prepare_dataset",
    "read_clean",
    "read_prepared",
    "robust_z",
]
