"""The ``compare`` stage: LOO comparison of a dataset's models, hypotheses, curvature audit.

:func:`compare_dataset` reads every fit of a dataset and writes

* ``comparison.csv`` — PSIS-LOO of the trait likelihood for each model, ranked, with stacking
  weights (weights of the best predictive mixture, *not* posterior model probabilities),
  elpd differences with their SE, Pareto k counts and each model's check verdict;
* ``hypotheses.csv`` — :func:`allolaw.answers.hypotheses.compare_hypotheses` for every model;
* ``curvature_audit.json`` — is the spread of taxon exponents real, or one curved law seen
  through taxa that sit at different sizes? Plus the local exponent ``b(x) = b + 2c(x − x_ref)``
  of every curved model, with a band over a size grid and where it crosses each named value;
* ``breakpoint.json`` — break size (original units), exponents on both sides, and the
  probability that they differ by more than δ.

Each JSON says ``"applicable": false`` with a reason when the dataset has nothing to audit.

The LOO table is built in :mod:`allolaw.answers.comparison`, the audit in
:mod:`allolaw.answers.curvature`, the break summary in :mod:`allolaw.answers.breakpoint`.
"""

from __future__ import annotations

import json
import logging
import math
from pathlib import Path
from typing import Any

import arviz as az
import numpy as np
import pandas as pd

from allolaw import paths
from allolaw.answers.breakpoint import summarise_breakpoint
from allolaw.answers.comparison import COMPARE_GROUPS, COMPARISON_COLUMNS, compare_models
from allolaw.answers.curvature import audit_curvature, local_exponent
from allolaw.answers.hypotheses import compare_hypotheses
from allolaw.checks.reading import read_groups
from allolaw.config import dataset_config, hypotheses_config
from allolaw.intake.manifest import dataset_config_sha256, read_prepared
from allolaw.io import atomic_path, write_json

__all__ = ["compare_dataset"]

log = logging.getLogger(__name__)


def compare_dataset(config: dict[str, Any], dataset: str) -> None:
    """Write comparison.csv, hypotheses.csv, curvature_audit.json and breakpoint.json.

    Parameters
    ----------
    config
        Validated batch config.
    dataset
        Dataset name from the config.
    """
    ds = dataset_config(config, dataset)
    results = config["results_dir"]
    fits: dict[str, az.InferenceData] = {}
    missing: list[str] = []
    for model in ds["models"]:
        path = paths.posterior_path(results, dataset, model)
        if path.is_file():
            fits[model] = read_groups(path, COMPARE_GROUPS)
        else:
            missing.append(model)
            log.warning("%s/%s: no posterior.nc; left out of the comparison", dataset, model)
    verdicts = {m: _check_verdict(results, dataset, m) for m in ds["models"]}
    # through the manifest check: a half-written or stale prepared set is refused here too
    prepared = None  # a comparison of fits alone (no prepared set) still runs, as before
    if paths.prepared_path(results, dataset).is_file():
        prepared = read_prepared(results, dataset,
                                 config_sha256=dataset_config_sha256(config, dataset))

    table = compare_models(fits, verdicts=verdicts)
    if missing:
        absent = pd.DataFrame([{"model": m, "loo_caution": "no fit", "check_verdict": verdicts[m],
                                "note": "not fitted; not compared"} for m in missing])
        table = pd.concat([table, absent], ignore_index=True) if len(table) else absent
        table = table.reindex(columns=COMPARISON_COLUMNS)
    table["dataset"] = dataset
    for column in ("place", "n_high_pareto_k"):
        table[column] = table[column].astype("Int64")  # integers, empty for an absent fit
    _write_csv(paths.comparison_path(results, dataset), table[COMPARISON_COLUMNS])

    settings = hypotheses_config(config, dataset)
    parts = []
    for model, idata in fits.items():
        spec = _model_spec(config, model, idata)
        part = compare_hypotheses(idata, spec, settings)
        part["model"] = model
        part["check_verdict"] = verdicts[model]
        parts.append(part)
    hyp = pd.concat(parts, ignore_index=True) if parts else pd.DataFrame()
    if not hyp.empty:
        hyp["dataset"] = dataset
    _write_csv(paths.hypotheses_path(results, dataset), hyp)

    levels = list(prepared.get("levels", [])) if prepared else _levels_from_config(ds)
    audit = _dataset_curvature_audit(ds, fits, levels, verdicts, settings, prepared)
    write_json(paths.curvature_audit_path(results, dataset), _clean(audit))
    breaks = _dataset_breakpoints(fits, settings, prepared, verdicts)
    write_json(paths.breakpoint_path(results, dataset), _clean(breaks))


# --- dataset-level pieces --------------------------------------------------------------


def _dataset_curvature_audit(
    ds: dict[str, Any],
    fits: dict[str, az.InferenceData],
    levels: list[str],
    verdicts: dict[str, str],
    settings: dict[str, Any],
    prepared: dict[str, Any] | None,
) -> dict[str, Any]:
    named = {h["name"]: float(h["value"]) for h in settings.get("exponents", [])}
    unit = (prepared or {}).get("canonical_units", {}).get("size", "")
    local = {}
    for model, idata in fits.items():
        if "curvature" in idata.posterior and "exponent" in idata.posterior:
            local[model] = local_exponent(idata, values=named)
            local[model]["size_unit"] = unit
    keys = ds.get("curvature_audit")
    out: dict[str, Any]
    if not levels:
        out = {"applicable": False, "reason": "the dataset has no taxon levels"}
    elif not keys or "linear" not in keys or "curved" not in keys:
        out = {"applicable": False,
               "reason": "the dataset config has no curvature_audit {linear, curved} models"}
    else:
        need = [keys["linear"], keys["curved"]]
        absent = [m for m in need if m not in fits]
        if absent:
            out = {"applicable": False, "reason": f"no fit of model(s) {', '.join(absent)}"}
        else:
            names = {"linear": keys["linear"], "curved": keys["curved"],
                     "taxa_curved": keys.get("taxa_curved", "")}
            out = audit_curvature(fits[keys["linear"]], fits[keys["curved"]],
                                  fits.get(keys.get("taxa_curved", "")), names=names)
            out["check_verdicts"] = {k: verdicts.get(m, "not checked")
                                     for k, m in names.items() if m}
            failed = [m for m in names.values() if verdicts.get(m) == "fail"]
            if failed:
                out["verdict"] += (f" Caution: the checks of {', '.join(failed)} failed, so "
                                   "these numbers may not be trustworthy.")
    out["local_exponent"] = local
    return out


def _dataset_breakpoints(
    fits: dict[str, az.InferenceData],
    settings: dict[str, Any],
    prepared: dict[str, Any] | None,
    verdicts: dict[str, str],
) -> dict[str, Any]:
    unit = (prepared or {}).get("canonical_units", {}).get("size", "")
    delta = float(settings.get("interval_halfwidth", 0.03))
    models = {}
    for model, idata in fits.items():
        if "break_log_size" in idata.posterior:
            models[model] = summarise_breakpoint(idata, delta=delta, unit=unit)
            models[model]["check_verdict"] = verdicts.get(model, "not checked")
    if not models:
        return {"applicable": False, "reason": "no model of this dataset has a breakpoint"}
    return {"applicable": True, "models": models}


def _model_spec(config: dict[str, Any], model: str, idata: az.InferenceData) -> Any:
    raw = idata.attrs.get("spec")
    if raw:
        spec = json.loads(raw) if isinstance(raw, str) else dict(raw)
        spec.setdefault("name", model)
        return spec
    from allolaw.model.spec import load_spec

    return load_spec(config["models_dir"], model)


def _check_verdict(results: str | Path, dataset: str, model: str) -> str:
    report = _read_json(paths.check_path(results, dataset, model))
    return str(report.get("verdict", "not checked")) if report else "not checked"


def _read_json(path: Path) -> dict[str, Any] | None:
    if not path.is_file():
        return None
    return json.loads(path.read_text(encoding="utf-8"))


def _levels_from_config(ds: dict[str, Any]) -> list[str]:
    levels: list[str] = []
    for source in ds["sources"]:
        levels = list(source["columns"].get("levels", [])) or levels
    return levels


def _write_csv(path: Path, table: pd.DataFrame) -> None:
    with atomic_path(path) as tmp:
        table.to_csv(tmp, index=False)


def _clean(obj: Any) -> Any:
    if isinstance(obj, dict):
        return {str(k): _clean(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple):
        return [_clean(v) for v in obj]
    if isinstance(obj, float | np.floating):
        return float(obj) if math.isfinite(float(obj)) else None
    if isinstance(obj, np.integer | np.bool_):
        return obj.item()
    return obj
