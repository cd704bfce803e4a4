"""Time and peak memory of ``allolaw prepare`` on 100,000 invented individual rows.

Run: ``PYTHONPATH=src python benchmarks/prepare_individuals.py [n_rows]``. Prints the wall
time of ``prepare_dataset`` alone (writing the input table is not counted) and the peak
resident memory of the whole process (``ru_maxrss``: interpreter, pandas and pint included).
Target: at most 20 s and 1 GB for 100,000 rows.
"""

from __future__ import annotations

import resource
import sys
import tempfile
import time
from pathlib import Path

from allolaw.config import validate_config
from allolaw.intake import prepare_dataset
from allolaw.testing.individuals import write_individuals_csv


def main(n_rows: int = 100_000) -> None:
    """Write the table, run the prepare stage once, print time and peak memory."""
    with tempfile.TemporaryDirectory() as folder:
        path = write_individuals_csv(Path(folder) / "individuals.csv", n_rows=n_rows, seed=1)
        source = {"file": str(path),
                  "columns": {"species": "species", "size": "mass_g", "trait": "rate_w",
                              "levels": ["genus"]},
                  "units": {"size": "g", "trait": "W"}}
        config = validate_config({
            "results_dir": str(Path(folder) / "results"),
            "datasets": {"ind": {"sources": [source], "rows_are": "individuals",
                                 "size": {"quantity": "mass", "unit": "g"},
                                 "trait": {"quantity": "power", "unit": "W"},
                                 "models": ["taxa"]}},
        })
        before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
        start = time.perf_counter()
        summary = prepare_dataset(config, "ind")
        seconds = time.perf_counter() - start
        peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    print(summary)
    print(f"rows: {n_rows}")
    print(f"prepare wall time: {seconds:.1f} s (target <= 20 s)")
    print(f"peak resident memory: {peak / 1024:.0f} MB (before prepare: {before / 1024:.0f} MB;"
          " target <= 1024 MB)")


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 100_000)
