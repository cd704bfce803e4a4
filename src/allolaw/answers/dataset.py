"""The ``compare`` stage: LOO comparison of a dataset's models, hypotheses, curvature audit.

:func:`compare_dataset` reads every fit of a dataset and writes

* ``comparison.csv`` — PSIS-LOO of the trait likelihood for each model, ranked, with stacking
  weights (weights of the best predictive mixture, *not* posterior model probabilities),
  elpd differences with their SE, Pareto k counts and each model's check verdict;
* ``hypotheses.csv`` — :func:`allolaw.answers.hypotheses.compare_hypotheses` for every model;
* ``curvature_audit.json`` — is the spread of taxon exponents real, or one curved law seen
  through taxa that sit at different sizes? Plus the local exponent ``b(x) = b + 2c(x − x_ref)``
  of every curved model, with a band over a size grid and where it crosses each named value;
* ``breakpoint.json`` — break size (original units), exponents on both sides, the
  Savage–Dickey evidence for a change of exponent (each posterior probability beside its
  prior probability), the LOO difference against the matched model without the break
  (:func:`allolaw.model.spec.models_to_fit` adds it to the fits), and the verdict;
* ``headline.json`` — stacking weights, the exponent averaged over the fitted models beside
  the primary model's and whether they disagree, the power-scaling sensitivity of each
  model's answers (its ranges and "changes" flags are also columns of ``hypotheses.csv``),
  and for each model with a within/between split the two exponents and their difference
  (:mod:`allolaw.answers.within`; the within-species exponent's named values are rows of
  ``hypotheses.csv`` with ``parameter`` ``within_exponent``).

Each JSON says ``"applicable": false`` with a reason when the dataset has nothing to audit.

The LOO table is built in :mod:`allolaw.answers.comparison`, the audit in
:mod:`allolaw.answers.curvature`, the break summary in :mod:`allolaw.answers.breakpoint`, the
verdicts in :mod:`allolaw.answers.verdicts`.
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
from allolaw.answers.stacking import stack_fits
from allolaw.answers.verdicts import (
    break_block,
    curvature_block,
    headline_block,
    sensitivity_block,
)
from allolaw.answers.within import within_between_block, within_hypotheses
from allolaw.checks.reading import read_groups
from allolaw.config import dataset_config, hypotheses_config
from allolaw.intake.manifest import dataset_config_sha256, read_prepared
from allolaw.io import atomic_path, write_json
from allolaw.model.spec import matched_no_break, models_to_fit

__all__ = ["compare_dataset"]

log = logging.getLogger(__name__)


def compare_dataset(config: dict[str, Any], dataset: str) -> None:
    """Write comparison.csv, hypotheses.csv, curvature_audit.json, breakpoint.json, headline.json.

    A straight sequence of the stage's steps (over 80 lines on purpose).

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
    models = models_to_fit(config["models_dir"], list(ds["models"]))
    for model in models:
        path = paths.posterior_path(results, dataset, model)
        if path.is_file():
            fits[model] = read_groups(path, COMPARE_GROUPS)
        else:
            missing.append(model)
            log.warning("%s/%s: no posterior.nc; left out of the comparison", dataset, model)
    verdicts = {m: _check_verdict(results, dataset, m) for m in models}
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
    # one set of stacking weights for the table and the averaged exponent (Yao et al. 2018)
    weights = stack_fits(fits).as_dict() if fits else {}
    table["stacking_weight"] = table["model"].map(weights)
    for column in ("place", "n_high_pareto_k"):
        table[column] = table[column].astype("Int64")  # integers, empty for an absent fit
    _write_csv(paths.comparison_path(results, dataset), table[COMPARISON_COLUMNS])

    settings = hypotheses_config(config, dataset)
    parts = []
    specs = {model: _model_spec(config, model, idata) for model, idata in fits.items()}
    sensitivity = {}
    for model, idata in fits.items():
        part = compare_hypotheses(idata, specs[model], settings)
        part["model"] = model
        part["check_verdict"] = verdicts[model]
        sensitivity[model] = _sensitivity(idata, specs[model], settings)
        _add_sensitivity_columns(part, sensitivity[model])
        parts.append(part)
        within = within_hypotheses(idata, specs[model], settings)  # empty without a split
        if not within.empty:
            within["model"] = model
            within["check_verdict"] = verdicts[model]
            parts.append(within)
    hyp = pd.concat(parts, ignore_index=True) if parts else pd.DataFrame()
    if not hyp.empty:
        hyp["dataset"] = dataset
    _write_csv(paths.hypotheses_path(results, dataset), hyp)

    levels = list(prepared.get("levels", [])) if prepared else _levels_from_config(ds)
    audit = _dataset_curvature_audit(ds, fits, levels, verdicts, settings, prepared)
    write_json(paths.curvature_audit_path(results, dataset), _clean(audit))
    breaks = _dataset_breakpoints(fits, specs, settings, prepared, verdicts)
    write_json(paths.breakpoint_path(results, dataset), _clean(breaks))
    primary = ds.get("primary_model") or ds["models"][-1]
    head = headline_block(fits, hyp, primary=primary, weights=weights)
    head["sensitivity"] = sensitivity
    head["within_between"] = within_between_block(fits, hyp, verdicts)
    write_json(paths.headline_path(results, dataset), _clean(head))


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
        need = [keys["linear"], keys["curved"]] + ([keys["one_curve"]]
                                                   if keys.get("one_curve") else [])
        absent = [m for m in need if m not in fits]
        if absent:
            out = {"applicable": False, "reason": f"no fit of model(s) {', '.join(absent)}"}
        else:
            names = {"linear": keys["linear"], "curved": keys["curved"],
                     "taxa_curved": keys.get("taxa_curved", "")}
            out = audit_curvature(fits[keys["linear"]], fits[keys["curved"]],
                                  fits.get(keys.get("taxa_curved", "")), names=names)
            four = curvature_block(fits[keys["linear"]], fits[keys["curved"]],
                                   fits.get(keys.get("one_curve", "")))
            out["verdict"] = four["sentence"]
            out["four_way_verdict"] = four["verdict"]
            out["evidence"] = four["evidence"]
            out["evidence_models"] = {"taxa_linear": keys["linear"],
                                      "taxa_curved": keys["curved"],
                                      "one_curve": keys.get("one_curve") or None}
            if keys.get("one_curve"):
                names["one_curve"] = keys["one_curve"]
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
    specs: dict[str, Any],
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
            matched = matched_no_break(model)
            models[model].update(break_block(idata, specs[model], fits.get(matched),
                                             delta=delta, matched_model=matched))
            models[model]["check_verdict"] = verdicts.get(model, "not checked")
            models[model]["matched_check_verdict"] = verdicts.get(matched, "not checked")
    if not models:
        return {"applicable": False, "reason": "no model of this dataset has a breakpoint"}
    return {"applicable": True, "models": models}


def _sensitivity(idata: az.InferenceData, spec: Any, settings: dict[str, Any]
                 ) -> dict[str, Any]:
    if "exponent" not in idata.posterior or not settings.get("exponents"):
        return {"applicable": False, "reason": "no population exponent or no named values"}
    try:
        return sensitivity_block(idata, spec, settings)
    except (ValueError, KeyError, np.linalg.LinAlgError) as err:
        # shown in headline.json and the report, never dropped
        log.warning("power-scaling sensitivity failed: %s", err)
        return {"applicable": False, "reason": f"power-scaling failed: {err}"}


def _add_sensitivity_columns(part: pd.DataFrame, sens: dict[str, Any]) -> None:
    """Power-scaling range of each population row's probability, and the model's flag."""
    part["power_scaling_low"] = np.nan
    part["power_scaling_high"] = np.nan
    part["power_scaling_changes"] = pd.NA
    if not sens.get("ranges") or part.empty:
        return
    taxon = part["taxon"].fillna("").astype(str)
    for name, (low, high) in sens["ranges"].items():
        rows = (part["parameter"] == "exponent") & (taxon == "") & (part["hypothesis"] == name)
        part.loc[rows, "power_scaling_low"] = low
        part.loc[rows, "power_scaling_high"] = high
        part.loc[rows, "power_scaling_changes"] = bool(sens["changes"])


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
