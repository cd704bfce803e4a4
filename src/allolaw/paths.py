"""The results layout: the one place that knows where each stage writes.

The Snakemake rule files mirror these paths; tests check the two agree.
"""

from __future__ import annotations

from pathlib import Path

__all__ = [
    "breakpoint_path",
    "check_path",
    "clean_path",
    "comparison_path",
    "curvature_audit_path",
    "headline_path",
    "hypotheses_path",
    "index_report_path",
    "ledger_path",
    "manifest_path",
    "posterior_path",
    "prepared_path",
    "report_path",
    "tree_path",
]


def clean_path(results: str | Path, dataset: str) -> Path:
    return Path(results) / dataset / "clean.csv"


def ledger_path(results: str | Path, dataset: str) -> Path:
    return Path(results) / dataset / "ledger.csv"


def prepared_path(results: str | Path, dataset: str) -> Path:
    return Path(results) / dataset / "prepared.json"


def tree_path(results: str | Path, dataset: str) -> Path:
    return Path(results) / dataset / "tree.nwk"


def manifest_path(results: str | Path, dataset: str) -> Path:
    return Path(results) / dataset / "manifest.json"


def posterior_path(results: str | Path, dataset: str, model: str) -> Path:
    return Path(results) / dataset / model / "posterior.nc"


def check_path(results: str | Path, dataset: str, model: str) -> Path:
    return Path(results) / dataset / "checks" / f"{model}.json"


def comparison_path(results: str | Path, dataset: str) -> Path:
    return Path(results) / dataset / "comparison.csv"


def hypotheses_path(results: str | Path, dataset: str) -> Path:
    return Path(results) / dataset / "hypotheses.csv"


def curvature_audit_path(results: str | Path, dataset: str) -> Path:
    return Path(results) / dataset / "curvature_audit.json"


def breakpoint_path(results: str | Path, dataset: str) -> Path:
    return Path(results) / dataset / "breakpoint.json"


def headline_path(results: str | Path, dataset: str) -> Path:
    return Path(results) / dataset / "headline.json"


def report_path(reports: str | Path, dataset: str) -> Path:
    return Path(reports) / f"{dataset}.html"


def index_report_path(reports: str | Path) -> Path:
    return Path(reports) / "index.html"
