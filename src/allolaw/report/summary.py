"""The data of one dataset's page: every result read, each section assembled.

:func:`summarise_dataset` reads what the earlier stages wrote and returns the template's
context; a missing input becomes a visible warning, never a silent gap.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from allolaw import __version__, paths
from allolaw.config import dataset_config, hypotheses_config
from allolaw.model.spec import models_to_fit
from allolaw.report.ancestry import ancestry_section
from allolaw.report.figures import build_figures
from allolaw.report.formatting import fmt, now, pct, unit_text
from allolaw.report.sections import (
    data_section,
    model_section,
    table_rows,
    worst_verdict,
)
from allolaw.report.text import footer, headline, methods
from allolaw.report.verdicts import average_section, breakpoint_section, curvature_section
from allolaw.report.within import within_section

__all__ = ["summarise_dataset"]


def summarise_dataset(
    config: dict[str, Any], dataset: str, *, figures: bool = True
) -> dict[str, Any]:
    """Collect everything the page of one dataset shows (the template's context).

    Parameters
    ----------
    config
        The validated batch config.
    dataset
        Dataset name.
    figures
        Build the SVG figures (off for the index, which needs only the headline).

    Returns
    -------
    dict
        ``headline`` (dict of the answers and a plain sentence), ``missing`` (one sentence per
        missing input), ``worst_verdict``, and the data, model, check, hypothesis and
        reproducibility sections.
    """
    ds = dataset_config(config, dataset)
    results = config["results_dir"]
    missing: list[str] = []
    primary = ds.get("primary_model") or list(ds["models"])[-1]
    models = models_to_fit(config["models_dir"], list(ds["models"]))

    prepared = _read_json(paths.prepared_path(results, dataset), missing, "prepared.json",
                          "run 'allolaw prepare'")
    clean = _read_csv(paths.clean_path(results, dataset), missing, "clean.csv")
    ledger = _read_csv(paths.ledger_path(results, dataset), missing, "ledger.csv")
    hyp = _read_csv(paths.hypotheses_path(results, dataset), missing, "hypotheses.csv")
    comp = _read_csv(paths.comparison_path(results, dataset), missing, "comparison.csv")
    curv = _read_json(paths.curvature_audit_path(results, dataset), missing,
                      "curvature_audit.json", "run 'allolaw compare'")
    brk = _read_json(paths.breakpoint_path(results, dataset), missing, "breakpoint.json",
                     "run 'allolaw compare'")
    head = _read_json(paths.headline_path(results, dataset), missing, "headline.json",
                      "run 'allolaw compare'")

    fits = {}
    model_info = []
    trait_unit = ((prepared or {}).get("canonical_units") or {}).get("trait") or ds["trait"]["unit"]
    size_unit = ((prepared or {}).get("canonical_units") or {}).get("size") or ds["size"]["unit"]
    for name in models:
        idata = _read_posterior(paths.posterior_path(results, dataset, name), missing, name)
        check = _read_json(paths.check_path(results, dataset, name), missing,
                           f"checks/{name}.json", "run 'allolaw check'")
        if idata is not None:
            fits[name] = idata
        model_info.append(
            model_section(name, idata, check, primary=name == primary, trait_unit=trait_unit,
                          size_unit=size_unit)
        )

    levels = list((prepared or {}).get("levels") or _config_levels(ds))
    units = _units(ds, prepared)
    context: dict[str, Any] = {
        "dataset": dataset,
        "title": ds.get("title") or dataset,
        "primary": primary,
        "models": model_info,
        "missing": missing,
        "units": units,
        "levels": levels,
        "generated": now(),
        "version": __version__,
        "fmt": fmt,
        "pct": pct,
    }
    context["data"] = data_section(prepared, clean, ledger, levels)
    context["data"]["manifest_problem"] = _manifest_problem(config, dataset, prepared)
    context["hypotheses"] = table_rows(hyp, constant=("dataset", "parameter"),
                                   hidden=("method", "note"))
    context["hypothesis_notes"] = (
        sorted(set(hyp["note"].dropna().astype(str)) - {""})
        if hyp is not None and "note" in hyp.columns else []
    )
    context["comparison"] = table_rows(comp)
    context["comparison_models"] = sorted(set(comp["model"])) if comp is not None else []
    context["curvature"] = curvature_section(curv)
    context["breakpoint"] = breakpoint_section(brk, comp)
    context["average"] = average_section(head, primary)
    context["within"] = within_section(head, primary)  # None without a within/between split
    context["worst_verdict"] = worst_verdict(model_info)
    context["headline"] = headline(
        primary, fits.get(primary), hyp, context["curvature"], context["breakpoint"],
        model_info, units, average=context["average"],
        delta=hypotheses_config(config, dataset).get("interval_halfwidth"),
    )
    context["methods"] = methods(config, dataset, model_info, hyp)
    context["footer"] = footer(config, dataset, model_info, prepared=prepared)
    context["figures"] = (
        build_figures(ds, fits, primary, clean, levels, units, config, dataset) if figures else {}
    )
    context["ancestry"] = (  # models with shared ancestry (report/ancestry.py)
        ancestry_section(fits, primary, models, clean, levels,
                         paths.tree_path(results, dataset)) if figures else [])
    return context


# --- reading --------------------------------------------------------------------------------
def _read_json(path: Path, missing: list[str], label: str, how: str) -> Any:
    if not path.is_file():
        missing.append(f"{label} is missing ({path}); {how} to produce it.")
        return None
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError) as err:
        missing.append(f"{label} could not be read ({path}): {err}.")
        return None


def _read_csv(path: Path, missing: list[str], label: str) -> pd.DataFrame | None:
    if not path.is_file():
        missing.append(f"{label} is missing ({path}).")
        return None
    try:
        return pd.read_csv(path, dtype={"species": str, "taxon": str, "level": str,
                                        "file": str, "reason": str, "merged_into": str},
                           keep_default_na=True)
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as err:
        missing.append(f"{label} could not be read ({path}): {err}.")
        return None


def _read_posterior(path: Path, missing: list[str], model: str) -> Any:
    if not path.is_file():
        missing.append(f"The fit of model '{model}' is missing ({path}); run 'allolaw fit'.")
        return None
    from allolaw.checks.reading import read_groups

    try:
        # only the groups the page uses (the predictive checks come from the check file)
        idata = read_groups(path, ("posterior", "constant_data"))
    except (OSError, ValueError, KeyError) as err:
        missing.append(f"The fit of model '{model}' could not be read ({path}): {err}.")
        return None
    return _squeeze_constants(idata)


def _squeeze_constants(idata: Any) -> Any:
    # A scalar pm.Data may come back with a length-1 dim (e.g. ``log_size_ref_dim_0`` after
    # numpyro sampling); make such constants 0-d so they read as plain numbers.
    if not hasattr(idata, "constant_data"):
        return idata
    cd = idata.constant_data
    single = [name for name, var in cd.data_vars.items()
              if var.size == 1 and var.ndim == 1 and var.dims[0] not in ("species",)]
    if single:
        values = {name: float(np.asarray(cd[name].values).reshape(-1)[0]) for name in single}
        cd = cd.drop_vars(single)
        unused = [d for d in cd.dims if d.endswith("_dim_0") and not any(
            d in v.dims for v in cd.data_vars.values())]
        cd = cd.drop_dims(unused) if unused else cd
        idata.constant_data = cd.assign({k: ((), v) for k, v in values.items()})
    return idata


def _config_levels(ds: dict[str, Any]) -> list[str]:
    levels: list[str] = []
    for source in ds["sources"]:
        levels = list(source["columns"].get("levels", [])) or levels
    return levels


def _units(ds: dict[str, Any], prepared: dict[str, Any] | None) -> dict[str, Any]:
    canon = (prepared or {}).get("canonical_units") or {}
    size_unit = canon.get("size") or ds["size"]["unit"]
    trait_unit = canon.get("trait") or ds["trait"]["unit"]
    size_label = ds["size"].get("label") or "size"
    trait_label = ds["trait"].get("label") or "trait"
    ref = (prepared or {}).get("reference_size") or ds.get("reference_size")
    return {
        "size": size_unit,
        "trait": trait_unit,
        "size_label": size_label,
        "trait_label": trait_label,
        "size_display": unit_text(size_unit),
        "trait_display": unit_text(trait_unit),
        "x_axis": f"{size_label} ({unit_text(size_unit)}, log scale)",
        "y_axis": f"{trait_label} ({unit_text(trait_unit)}, log scale)",
        "reference_size": ref,
        "log_reference_size": (prepared or {}).get("log_reference_size"),
    }


def _manifest_problem(config: dict[str, Any], dataset: str,
                      prepared: dict[str, Any] | None) -> str | None:
    # the page renders whatever exists, so a stale or half-written prepared set is shown as a
    # failure on the page instead of stopping the report (the fit and compare stages refuse it)
    if prepared is None:
        return None
    from allolaw.errors import UserError
    from allolaw.intake.manifest import dataset_config_sha256, verify_manifest

    try:
        verify_manifest(config["results_dir"], dataset,
                        config_sha256=dataset_config_sha256(config, dataset))
    except UserError as err:
        return str(err)
    return None
