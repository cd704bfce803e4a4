"""The audit report: one self-contained HTML page per dataset, and an index of the batch.

:func:`render_dataset_report` reads every result the earlier stages wrote for one dataset
(``clean.csv``, ``ledger.csv``, ``prepared.json``, each ``posterior.nc``, each check JSON,
``hypotheses.csv``, ``comparison.csv``, ``curvature_audit.json``, ``breakpoint.json``) and
renders what exists; each missing input becomes a visible warning on the page, never a silent
gap. :func:`render_index` writes ``index.html``: one row per dataset with the headline answer
and the worst check verdict, and the run time and peak memory of each Snakemake job read from
the benchmark files under ``logs/benchmarks/``.

Pages are Jinja2 templates with autoescaping on; the only strings marked safe are the SVG
figures built (and escaped) in :mod:`allolaw.report.charts`. Nothing is fetched when a page
opens: CSS and figures are inline, there is no script.
"""

from __future__ import annotations

import logging
import os
import time
from pathlib import Path
from typing import Any

from jinja2 import Environment, PackageLoader, StrictUndefined

from allolaw import __version__, paths
from allolaw.io import write_text
from allolaw.report.benchmarks import read_benchmarks
from allolaw.report.formatting import STATUS_ORDER, fmt, now, pct
from allolaw.report.summary import summarise_dataset
from allolaw.report.text import footer

__all__ = ["render_dataset_report", "render_index"]

log = logging.getLogger(__name__)


def render_dataset_report(config: dict[str, Any], dataset: str) -> Path:
    """Write ``<reports_dir>/<dataset>.html``, the audit report of one dataset.

    Parameters
    ----------
    config
        The validated batch config (:func:`allolaw.config.load_config`).
    dataset
        Dataset name under ``datasets:``.

    Returns
    -------
    pathlib.Path
        The page written (atomically).

    Raises
    ------
    UserError
        If the dataset is not in the config. Missing results are not errors: the page says
        what is missing.
    """
    start = time.perf_counter()
    summary = summarise_dataset(config, dataset, figures=True)
    html = _environment().get_template("dataset.html.j2").render(**summary)
    elapsed = time.perf_counter() - start
    html = html.replace("__RENDER_SECONDS__", f"{elapsed:.1f}")
    out = paths.report_path(config["reports_dir"], dataset)
    write_text(out, html)
    _readable(out)
    log.info("report %s: wrote %s (%.0f kB, %.1f s)", dataset, out, len(html) / 1e3, elapsed)
    return out


def render_index(config: dict[str, Any], *, logs_dir: str | Path = "logs") -> Path:
    """Write ``<reports_dir>/index.html``: one row per dataset and the batch run times.

    Parameters
    ----------
    config
        The validated batch config.
    logs_dir
        Folder holding Snakemake benchmark files under ``benchmarks/`` (the workflow writes
        ``logs/benchmarks/<dataset>/<job>.tsv``).

    Returns
    -------
    pathlib.Path
        The page written (atomically).
    """
    rows = []
    for dataset in sorted(config["datasets"]):
        s = summarise_dataset(config, dataset, figures=False)
        rows.append(
            {
                "dataset": dataset,
                "title": s["title"],
                "href": paths.report_path(".", dataset).name,
                "report_exists": paths.report_path(config["reports_dir"], dataset).is_file(),
                "headline": s["headline"],
                "curvature": (s["curvature"] or {}).get("answer"),
                "breakpoint": (s["breakpoint"] or {}).get("answer"),
                "worst": s["worst_verdict"],
                "n_missing": len(s["missing"]),
            }
        )
    bench = read_benchmarks(logs_dir)
    bench_rows = bench.to_dict("records") if not bench.empty else []
    totals = (
        {
            "jobs": len(bench),
            "seconds": float(bench["s"].sum()),
            "max_rss": float(bench["max_rss"].max()) if bench["max_rss"].notna().any() else None,
        }
        if not bench.empty
        else None
    )
    per_dataset = []
    if not bench.empty:
        for name, group in bench.groupby("dataset", sort=True):
            per_dataset.append({
                "dataset": name or "(batch)",
                "jobs": len(group),
                "seconds": float(group["s"].sum()),
                "max_rss": float(group["max_rss"].max()) if group["max_rss"].notna().any()
                else None,
            })
    html = _environment().get_template("index.html.j2").render(
        rows=rows,
        per_dataset=per_dataset,
        bench=bench_rows,
        totals=totals,
        logs_dir=str(Path(logs_dir) / "benchmarks"),
        footer=footer(config, None, []),
        generated=now(),
        version=__version__,
        fmt=fmt,
    )
    out = paths.index_report_path(config["reports_dir"])
    write_text(out, html)
    _readable(out)
    log.info("index: wrote %s", out)
    return out


def _readable(path: Path) -> None:
    # The atomic write's temporary file is private (0600); a report is for reading: 0644
    # less the umask, as for any new file.
    umask = os.umask(0)
    os.umask(umask)
    path.chmod(0o666 & ~umask)


# --- formatting -----------------------------------------------------------------------------
def _environment() -> Environment:
    env = Environment(
        loader=PackageLoader("allolaw.report", "templates"),
        autoescape=True,
        undefined=StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
    )
    env.filters["fmt"] = fmt
    env.filters["pct"] = pct
    env.filters["status_class"] = lambda s: f"st-{s}" if s in STATUS_ORDER else "st-missing"
    return env
