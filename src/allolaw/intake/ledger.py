"""The ledger: one row per data line of every source, its fate and why; and its checks.

Every physical line of a source file is accounted for: the header line and blank lines are
counted per source in ``prepared.json`` (``header_line``, ``blank_lines_ignored``), and every
other line is one ledger row, ``kept``, ``merged`` or ``dropped``. The stage checks that
``1 + blank lines + ledger rows == physical lines`` for each file, and that
``kept + merged + dropped == ledger rows``.
"""

from __future__ import annotations

import re
from typing import Any

import pandas as pd

from allolaw.errors import UserError
from allolaw.intake.reading import Table
from allolaw.intake.rows import Rows

__all__ = ["LEDGER_COLUMNS", "build_ledger", "check_accounting", "check_drop_share",
           "reason_kind"]

LEDGER_COLUMNS = ["file", "line", "species", "fate", "merged_into", "reason"]


def build_ledger(rows: Rows, frame: pd.DataFrame) -> pd.DataFrame:
    """The ledger in input order: first usable row of a species ``kept``, others ``merged``."""
    fate = ["dropped" if r else "" for r in rows.reason]
    merged_into = [""] * len(fate)
    reason = list(rows.reason)
    notes = dict(zip(frame["row"], frame["flag_note"], strict=True))
    seen: set[str] = set()
    for i in frame["row"]:  # input order: files in config order, then line
        species = rows.species[i]
        note = f"flagged: {notes[i]}" if notes.get(i) else ""
        if species in seen:
            fate[i] = "merged"
            merged_into[i] = species
            reason[i] = "; ".join(x for x in ("replicate merged into the species mean", note) if x)
        else:
            seen.add(species)
            fate[i] = "kept"
            reason[i] = note
    ledger = pd.DataFrame(
        {"file": rows.file, "line": rows.line, "species": rows.species, "fate": fate,
         "merged_into": merged_into, "reason": reason},
        columns=LEDGER_COLUMNS,
    )
    if (ledger["fate"] == "").any():
        msg = "internal error: a usable row was neither kept nor merged"
        raise RuntimeError(msg)
    return ledger


def check_accounting(ledger: pd.DataFrame, tables: list[Table], n_species: int) -> dict[str, int]:
    """Check the ledger against the files' physical lines and the species count; return counts.

    Raises
    ------
    RuntimeError
        If any count does not add up (a bug, not a user error).
    """
    for table in tables:
        rows = int((ledger["file"] == table.file).sum())
        if 1 + table.blank_lines + rows != table.physical_lines:
            msg = (
                f"{table.file}: {table.physical_lines} physical lines but 1 header + "
                f"{table.blank_lines} blank + {rows} ledger rows"
            )
            raise RuntimeError(msg)
    counts = ledger["fate"].value_counts().to_dict()
    out = {fate: int(counts.get(fate, 0)) for fate in ("kept", "merged", "dropped")}
    if sum(out.values()) != len(ledger):
        msg = f"ledger does not add up: {len(ledger)} rows != {out}"
        raise RuntimeError(msg)
    if out["kept"] != n_species:
        msg = f"ledger has {out['kept']} kept rows but clean.csv has {n_species} species"
        raise RuntimeError(msg)
    return out


def check_drop_share(rows: Rows, tables: list[Table], *, max_share: float) -> None:
    """Stop when one reason drops more than ``max_share`` of a file's data lines.

    Raises
    ------
    UserError
        Naming the file, the reason, how many lines it dropped and the first of them.
    """
    for table in tables:
        file = table.file
        total = len(table.records)
        kinds: dict[str, list[int]] = {}
        for f, line, reason in zip(rows.file, rows.line, rows.reason, strict=True):
            if reason and f == file:
                kinds.setdefault(reason_kind(reason), []).append(line)
        for kind, lines in kinds.items():
            if len(lines) > max_share * total:
                first = rows.reason[_index(rows, file, lines[0])]
                msg = (
                    f"{file}: {len(lines)} of {total} data lines are dropped for one reason "
                    f"({kind}), more than the allowed share {max_share:g}; first, line "
                    f"{lines[0]}: {first}. Fix the table, or raise `max_dropped_share` of the "
                    "dataset if so many losses are expected"
                )
                raise UserError(msg)


def _index(rows: Rows, file: str, line: int) -> int:
    return next(i for i, (f, n) in enumerate(zip(rows.file, rows.line, strict=True))
                if f == file and n == line)


def reason_kind(reason: str) -> str:
    """The kind of a drop reason, without the cell value or line numbers.

    ``"missing value in column 'x' (cell 'NA')"`` → ``"missing value in column 'x'"``.
    """
    kind = re.split(r"[:(]", reason, maxsplit=1)[0]
    kind = re.sub(r" of line \d+", "", kind)
    return re.sub(r"^has \d+ fields, the header has \d+", "wrong number of fields", kind).strip()


def drop_reasons(ledger: pd.DataFrame) -> dict[str, Any]:
    """Counts of drop reasons by kind, for ``prepared.json``."""
    kinds = ledger.loc[ledger["fate"] == "dropped", "reason"].map(reason_kind).value_counts()
    return {str(k): int(v) for k, v in kinds.items()}
