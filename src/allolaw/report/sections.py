"""The page's sections built from the results: data, models, tables (verdicts: report.verdicts).
"""

from __future__ import annotations

import json
import logging
from typing import Any

import numpy as np
import pandas as pd

from allolaw.report.correlation import correlation_sentences
from allolaw.report.figures import ppc_figures
from allolaw.report.formatting import STATUS_ORDER, fmt, isnan, truthy

log = logging.getLogger(__name__)


# --- sections -------------------------------------------------------------------------------
def data_section(
    prepared: dict[str, Any] | None,
    clean: pd.DataFrame | None,
    ledger: pd.DataFrame | None,
    levels: list[str],
) -> dict[str, Any]:
    out: dict[str, Any] = {"prepared": prepared is not None}
    prep = prepared or {}
    out["sources"] = prep.get("sources", [])
    out["conversions"] = prep.get("conversions", [])
    counts = dict(prep.get("counts", {}))
    if ledger is not None:
        fates = ledger["fate"].value_counts().to_dict()
        ledger_counts = {
            "input": len(ledger),
            "kept": int(fates.get("kept", 0)),
            "merged": int(fates.get("merged", 0)),
            "dropped": int(fates.get("dropped", 0)),
        }
        out["ledger_adds_up"] = ledger_counts["input"] == (
            ledger_counts["kept"] + ledger_counts["merged"] + ledger_counts["dropped"]
        )
        out["ledger_matches_prepared"] = not counts or all(
            counts.get(k) == v for k, v in ledger_counts.items()
        )
        counts = {**counts, **ledger_counts}
        dropped = ledger[ledger["fate"] == "dropped"]
        out["dropped"] = [
            {k: ("" if pd.isna(v) else v) for k, v in rec.items()}
            for rec in dropped[["file", "line", "species", "reason"]].to_dict("records")
        ]
    else:
        out["dropped"] = None
        out["ledger_adds_up"] = None
        out["ledger_matches_prepared"] = None
    out["counts"] = counts
    out["drop_reasons"] = prep.get("drop_reasons", {})
    out["intake_warnings"] = list(prep.get("warnings") or [])
    out["outliers"] = (prep.get("outliers") or {}).get("rows", [])
    out["outlier_rule"] = prep.get("outliers") or {}
    out["singletons"] = {k: v for k, v in (prep.get("singleton_taxa") or {}).items() if v}
    out["reference"] = {
        "size": prep.get("reference_size"),
        "rule": prep.get("reference_size_rule"),
    }
    if clean is not None:
        out["n_species"] = len(clean)
        out["taxa_counts"] = [
            {"level": lv, "n": int(clean[lv].astype(str).nunique())}
            for lv in levels
            if lv in clean.columns
        ]
        cols = ["species", *[lv for lv in levels if lv in clean.columns]]
        table = clean[cols].copy()
        if "log_size" in clean.columns:
            table["size"] = np.exp(clean["log_size"].astype(float))
            table["trait"] = np.exp(clean["log_trait"].astype(float))
        if "n_rows" in clean.columns:
            table["n_rows"] = clean["n_rows"]
        flags = []
        for _, row in clean.iterrows():
            f = []
            if truthy(row.get("flag_outlier")):
                f.append("outlier")
            if truthy(row.get("flag_singleton_taxon")):
                f.append("singleton taxon")
            flags.append(", ".join(f))
        table["flags"] = flags
        out["species_table"] = table.to_dict("records")
        out["species_columns"] = list(table.columns)
    else:
        out["n_species"] = None
        out["taxa_counts"] = []
        out["species_table"] = None
        out["species_columns"] = []
    return out


def model_section(
    name: str, idata: Any, check: dict[str, Any] | None, *, primary: bool, trait_unit: str,
    size_unit: str = "",
) -> dict[str, Any]:
    out: dict[str, Any] = {"name": name, "primary": primary, "fitted": idata is not None}
    attrs = dict(idata.attrs) if idata is not None else {}
    spec = _json_attr(attrs.get("spec"))
    out["spec"] = spec
    out["description"] = _describe(name, spec) if spec else None
    out["priors"] = (spec or {}).get("priors") or {}
    out["sampler"] = _json_attr(attrs.get("sampler")) or {}
    out["backend"] = attrs.get("backend")
    out["seed"] = attrs.get("seed")
    out["data_sha256"] = attrs.get("data_sha256")
    out["versions"] = _json_attr(attrs.get("versions")) or {}
    out["wall_seconds"] = attrs.get("wall_seconds")
    out["refit_attr"] = _json_attr(attrs.get("refit"))
    out["parameters"] = _parameter_summary(idata) if idata is not None else []
    out["correlations"] = (correlation_sentences(idata, size_unit=size_unit)
                           if idata is not None else [])
    out["check"] = check
    out["verdict"] = (check or {}).get("verdict", "missing")
    if check is not None:
        ppc = check.get("ppc") or {}
        out["ppc_stats"] = ppc.get("test_statistics") or []
        out["loo_pit"] = ppc.get("loo_pit")
        out["prior_predictive"] = ppc.get("prior_predictive")
        out["ppc_note"] = ppc.get("note")
        out["ppc_figs"] = ppc_figures(ppc, trait_unit)
    else:
        out["ppc_stats"], out["loo_pit"], out["prior_predictive"] = [], None, None
        out["ppc_note"], out["ppc_figs"] = None, {}
    return out


def _json_attr(value: Any) -> Any:
    if value is None:
        return None
    if isinstance(value, dict | list | bool | int | float):
        return value
    try:
        return json.loads(value)
    except (TypeError, json.JSONDecodeError):
        return value


def _describe(name: str, spec: dict[str, Any]) -> str | None:
    try:
        from allolaw.model.describing import describe_spec
        from allolaw.model.spec import parse_spec

        raw = {k: v for k, v in spec.items() if k != "name"}
        return describe_spec(parse_spec(raw, name=name, source=f"attrs of {name}"))
    except Exception as err:  # any failure: show the raw spec
        log.warning("model %s: spec could not be described (%s); showing it raw", name, err)
        return None


_SUMMARY_VARS = ("intercept", "exponent", "curvature", "exponent_above", "break_log_size",
                 "sigma", "nu")


def _parameter_summary(idata: Any) -> list[dict[str, Any]]:
    post = idata.posterior
    rows = []
    names = [v for v in _SUMMARY_VARS if v in post]
    names += sorted(v for v in post.data_vars if v.startswith(("exponent_sd__", "intercept_sd__",
                                                               "curvature_sd__", "coef__")))
    # correlations of taxon deviations, beside their SDs (report/correlation.py)
    names += sorted(v for v in post.data_vars if v.startswith("correlation_")
                    and not v.startswith("correlation_partial"))
    for var in names:
        draws = np.asarray(post[var].values, dtype=float).reshape(-1)
        q = np.quantile(draws, [0.05, 0.5, 0.95])
        rows.append({"name": var, "q05": q[0], "q50": q[1], "q95": q[2],
                     "mean": float(draws.mean()), "sd": float(draws.std(ddof=1))})
    return rows


def table_rows(
    frame: pd.DataFrame | None, *, constant: tuple[str, ...] = ("dataset",),
    hidden: tuple[str, ...] = (),
) -> dict[str, Any] | None:
    """Rows of a result CSV; ``constant`` columns are left out (and named once) when they
    hold one value; ``hidden`` ones are left out always."""
    if frame is None:
        return None
    records = [
        {k: (None if isnan(v) else v) for k, v in rec.items()}
        for rec in frame.to_dict("records")
    ]
    same = {
        c: str(frame[c].iloc[0]) for c in constant
        if c in frame.columns and len(frame)
        and (frame[c].astype(str) == str(frame[c].iloc[0])).all()
    }
    columns = [c for c in frame.columns if c not in same and c not in hidden]
    return {"columns": columns, "rows": records, "same": same}


def _flatten(obj: Any, prefix: str = "") -> list[tuple[str, Any]]:
    out: list[tuple[str, Any]] = []
    if isinstance(obj, dict):
        for k, v in obj.items():
            out += _flatten(v, f"{prefix}{k}.")
        return [(k.rstrip("."), v) for k, v in out]
    if isinstance(obj, list):
        if all(not isinstance(v, dict | list) for v in obj) and len(obj) <= 12:
            return [(prefix, ", ".join(fmt(v) for v in obj))]
        for i, v in enumerate(obj[:50]):
            out += _flatten(v, f"{prefix}{i}.")
        return out
    return [(prefix, obj)]


def worst_verdict(models: list[dict[str, Any]]) -> str:
    verdicts = [m["verdict"] for m in models] or ["missing"]
    return max(verdicts, key=lambda v: STATUS_ORDER.get(v, 2))
