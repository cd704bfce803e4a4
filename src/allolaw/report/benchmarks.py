"""Reading Snakemake benchmark files (run time and peak memory of each job) for the index.
"""

from __future__ import annotations

import logging
from pathlib import Path
from typing import Any

import pandas as pd

__all__ = ["read_benchmarks"]

log = logging.getLogger(__name__)


def read_benchmarks(logs_dir: str | Path = "logs") -> pd.DataFrame:
    """Read every Snakemake benchmark file ``<logs_dir>/benchmarks/**/*.tsv``.

    Returns
    -------
    pandas.DataFrame
        One row per file (the mean when a file has repeats): ``job`` (path below
        ``benchmarks/`` without ``.tsv``), ``dataset`` (first folder), ``s`` (wall seconds),
        ``max_rss`` (MB) and ``mean_load`` / ``cpu_time`` where present. Empty when there are
        no files.
    """
    root = Path(logs_dir) / "benchmarks"
    records = []
    for path in sorted(root.glob("**/*.tsv")):
        try:
            table = pd.read_csv(path, sep="\t")
        except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as err:
            log.warning("benchmark file %s unreadable: %s", path, err)
            continue
        if "s" not in table.columns or table.empty:
            continue
        rel = path.relative_to(root).with_suffix("")
        rec: dict[str, Any] = {
            "job": rel.as_posix(),
            "dataset": rel.parts[0] if len(rel.parts) > 1 else "",
            "s": float(pd.to_numeric(table["s"], errors="coerce").mean()),
        }
        for col in ("max_rss", "mean_load", "cpu_time"):
            if col in table.columns:
                rec[col] = float(pd.to_numeric(table[col], errors="coerce").mean())
            else:
                rec[col] = float("nan")
        records.append(rec)
    columns = ["job", "dataset", "s", "max_rss", "mean_load", "cpu_time"]
    return pd.DataFrame.from_records(records, columns=columns)
