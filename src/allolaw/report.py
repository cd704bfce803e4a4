"""The audit report: one self-contained HTML page per dataset, and an index of the batch.

:func:`render_dataset_report` reads every result the earlier stages wrote for one dataset
(``clean.csv``, ``ledger.csv``, ``prepared.json``, each ``posterior.nc``, each check JSON,
``hypotheses.csv``, ``comparison.csv``, ``curvature_audit.json``, ``breakpoint.json``) and
renders what exists; each missing input becomes a visible warning on the page, never a silent
gap. :func:`render_index` writes ``index.html``: one row per dataset with the headline answer
and the worst check verdict, and the run time and peak memory of each Snakemake job read from
the benchmark files under ``logs/benchmarks/``.

Pages are Jinja2 templates with autoescaping on; the only strings marked safe are the SVG
figures built (and escaped) in :mod:`allolaw.plots`. Nothing is fetched when a page opens: CSS
and figures are inline, there is no script.
"""

from __future__ import annotations

import datetime as dt
import json
import logging
import math
import os
import platform
import re
import time
from importlib import metadata
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from jinja2 import Environment, PackageLoader, StrictUndefined
from markupsafe import Markup

from allolaw import __version__, paths, plots
from allolaw.config import config_sha256, dataset_config, hypotheses_config
from allolaw.io import write_text
from allolaw.law import TAXON_TERMS, expected_log_trait

__all__ = ["read_benchmarks", "render_dataset_report", "render_index", "summarise_dataset"]

log = logging.getLogger(__name__)

_STATUS_ORDER = {"pass": 0, "info": 0, "warn": 1, "missing": 2, "fail": 3}
_PACKAGES = ("pymc", "pytensor", "arviz", "numpy", "scipy", "pandas", "xarray", "numpyro",
             "jax", "nutpie", "pint", "jinja2", "matplotlib", "snakemake")
_REFERENCES = {
    "savage_dickey": (
        "Dickey, J. M. (1971). The weighted likelihood ratio, linear hypotheses on normal "
        "location parameters. Annals of Mathematical Statistics 42:204–223."
    ),
    "wagenmakers": (
        "Wagenmakers, E.-J., Lodewyckx, T., Kuriyal, H., Grasman, R. (2010). Bayesian "
        "hypothesis testing for psychologists: a tutorial on the Savage–Dickey method. "
        "Cognitive Psychology 60:158–189."
    ),
    "loo": (
        "Vehtari, A., Gelman, A., Gabry, J. (2017). Practical Bayesian model evaluation using "
        "leave-one-out cross-validation and WAIC. Statistics and Computing 27:1413–1432."
    ),
    "rhat": (
        "Vehtari, A., Gelman, A., Simpson, D., Carpenter, B., Bürkner, P.-C. (2021). "
        "Rank-normalization, folding, and localization: an improved R-hat for assessing "
        "convergence of MCMC. Bayesian Analysis 16:667–718."
    ),
    "stacking": (
        "Yao, Y., Vehtari, A., Simpson, D., Gelman, A. (2018). Using stacking to average "
        "Bayesian predictive distributions. Bayesian Analysis 13:917–1007."
    ),
    "sbc": (
        "Talts, S., Betancourt, M., Simpson, D., Vehtari, A., Gelman, A. (2018). Validating "
        "Bayesian inference algorithms with simulation-based calibration. arXiv:1804.06788."
    ),
    "nuts": (
        "Hoffman, M. D., Gelman, A. (2014). The No-U-Turn sampler. Journal of Machine Learning "
        "Research 15:1593–1623."
    ),
    "pit": (
        "Gabry, J., Simpson, D., Vehtari, A., Betancourt, M., Gelman, A. (2019). "
        "Visualization in Bayesian workflow. JRSS A 182:389–402."
    ),
    "okabe": (
        "Okabe, M., Ito, K. (2008). Color Universal Design (CUD): how to make figures and "
        "presentations that are friendly to colorblind people."
    ),
}


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
        footer=_footer(config, None, []),
        generated=_now(),
        version=__version__,
        fmt=_fmt,
    )
    out = paths.index_report_path(config["reports_dir"])
    write_text(out, html)
    _readable(out)
    log.info("index: wrote %s", out)
    return out


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
    models = list(ds["models"])
    primary = ds.get("primary_model") or models[-1]

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

    fits = {}
    model_info = []
    trait_unit = ((prepared or {}).get("canonical_units") or {}).get("trait") or ds["trait"]["unit"]
    for name in models:
        idata = _read_posterior(paths.posterior_path(results, dataset, name), missing, name)
        check = _read_json(paths.check_path(results, dataset, name), missing,
                           f"checks/{name}.json", "run 'allolaw check'")
        if idata is not None:
            fits[name] = idata
        model_info.append(
            _model_section(name, idata, check, primary=name == primary, trait_unit=trait_unit)
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
        "generated": _now(),
        "version": __version__,
        "fmt": _fmt,
        "pct": _pct,
    }
    context["data"] = _data_section(prepared, clean, ledger, levels)
    context["hypotheses"] = _table(hyp, constant=("dataset", "parameter"),
                                   hidden=("method", "note"))
    context["hypothesis_notes"] = (
        sorted(set(hyp["note"].dropna().astype(str)) - {""})
        if hyp is not None and "note" in hyp.columns else []
    )
    context["comparison"] = _table(comp)
    context["comparison_models"] = sorted(set(comp["model"])) if comp is not None else []
    context["curvature"] = _curvature_section(curv)
    context["breakpoint"] = _breakpoint_section(brk, comp)
    context["worst_verdict"] = _worst_verdict(model_info)
    context["headline"] = _headline(
        primary, fits.get(primary), hyp, context["curvature"], context["breakpoint"],
        model_info, units,
        delta=hypotheses_config(config, dataset).get("interval_halfwidth"),
    )
    context["methods"] = _methods(config, dataset, model_info, hyp)
    context["footer"] = _footer(config, dataset, model_info, prepared=prepared)
    context["figures"] = (
        _figures(ds, fits, primary, clean, levels, units, config, dataset) if figures else {}
    )
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
    from allolaw.diagnostics import read_groups

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
        "size_display": _unit_text(size_unit),
        "trait_display": _unit_text(trait_unit),
        "x_axis": f"{size_label} ({_unit_text(size_unit)}, log scale)",
        "y_axis": f"{trait_label} ({_unit_text(trait_unit)}, log scale)",
        "reference_size": ref,
        "log_reference_size": (prepared or {}).get("log_reference_size"),
    }


def _unit_text(unit: str) -> str:
    # pint spellings to print: um**3 → µm³ (the "u" prefix is micro)
    text = re.sub(r"\*\*2\b", "²", unit)
    text = re.sub(r"\*\*3\b", "³", text)
    return re.sub(r"\bu(?=[a-zA-Z])", "µ", text)


# --- sections -------------------------------------------------------------------------------
def _data_section(
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
            if _truthy(row.get("flag_outlier")):
                f.append("outlier")
            if _truthy(row.get("flag_singleton_taxon")):
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


def _model_section(
    name: str, idata: Any, check: dict[str, Any] | None, *, primary: bool, trait_unit: str
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
    out["check"] = check
    out["verdict"] = (check or {}).get("verdict", "missing")
    if check is not None:
        ppc = check.get("ppc") or {}
        out["ppc_stats"] = ppc.get("test_statistics") or []
        out["loo_pit"] = ppc.get("loo_pit")
        out["prior_predictive"] = ppc.get("prior_predictive")
        out["ppc_note"] = ppc.get("note")
        out["ppc_figs"] = _ppc_figures(ppc, trait_unit)
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
        from allolaw.spec import describe_spec, parse_spec

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
                                                               "coef__")))
    for var in names:
        draws = np.asarray(post[var].values, dtype=float).reshape(-1)
        q = np.quantile(draws, [0.05, 0.5, 0.95])
        rows.append({"name": var, "q05": q[0], "q50": q[1], "q95": q[2],
                     "mean": float(draws.mean()), "sd": float(draws.std(ddof=1))})
    return rows


def _ppc_figures(ppc: dict[str, Any], trait_unit: str) -> dict[str, Markup]:
    figs: dict[str, Markup] = {}
    dens = ppc.get("density_overlay")
    if dens and dens.get("grid"):
        figs["overlay"] = _svg(plots.density_overlay_svg(
            dens["grid"], dens["observed"], dens["predictive_q05"], dens["predictive_q50"],
            dens["predictive_q95"], x_label=f"natural log of the trait in {_unit_text(trait_unit)}",
            title="posterior predictive density",
        ))
    pit = ppc.get("loo_pit")
    if pit and pit.get("histogram"):
        hist = pit["histogram"]
        n = sum(hist["counts"])
        figs["loo_pit"] = _svg(plots.histogram_svg(
            hist["edges"], hist["counts"], x_label="LOO-PIT value", y_label="species",
            expected=n / max(len(hist["counts"]), 1), title="LOO-PIT (uniform if calibrated)",
        ))
    return figs


def _table(
    frame: pd.DataFrame | None, *, constant: tuple[str, ...] = ("dataset",),
    hidden: tuple[str, ...] = (),
) -> dict[str, Any] | None:
    """Rows of a result CSV; ``constant`` columns are left out (and named once) when they
    hold one value; ``hidden`` ones are left out always."""
    if frame is None:
        return None
    records = [
        {k: (None if _isnan(v) else v) for k, v in rec.items()}
        for rec in frame.to_dict("records")
    ]
    same = {
        c: str(frame[c].iloc[0]) for c in constant
        if c in frame.columns and len(frame)
        and (frame[c].astype(str) == str(frame[c].iloc[0])).all()
    }
    columns = [c for c in frame.columns if c not in same and c not in hidden]
    return {"columns": columns, "rows": records, "same": same}


def _curvature_section(obj: Any) -> dict[str, Any] | None:
    """The curvature audit as shown: its verdict sentence, a short answer and its numbers.

    Reads ``curvature_audit.json`` as the compare stage writes it (``applicable``, ``reason``
    or ``verdict``, ``share_explained_by_curvature``, ``curvature``, ``p_curvature_positive``,
    ``loo_differences``, ``local_exponent``); other keys are listed as they are.
    """
    if obj is None:
        return None
    if not isinstance(obj, dict):
        return {"answer": str(obj), "text": [], "numbers": [], "loo": [], "crossings": []}
    if not obj.get("applicable", True):
        reason = str(obj.get("reason", "no reason given"))
        crossings = _crossings(obj)
        return {"answer": f"not audited ({reason})", "text": [], "numbers": [], "loo": [],
                "crossings": crossings}
    verdict = str(obj.get("verdict") or obj.get("conclusion") or "")
    answer = verdict.split(". ")[0].rstrip(".") + "." if verdict else (
        "the audit gives no verdict sentence")
    numbers: list[tuple[str, Any]] = []
    share = obj.get("share_explained_by_curvature") or {}
    if "all_levels" in share:
        numbers.append(("share of between-taxon exponent variance explained by curvature "
                        "(all levels)", share["all_levels"]))
    for level, value in (share.get("by_level") or {}).items():
        numbers.append((f"share explained at level {level}", value))
    curv = obj.get("curvature") or {}
    if "median" in curv:
        numbers.append(("curvature c, median (90% interval)",
                        f"{_fmt(curv['median'])} ({_fmt(curv.get('q05'))} to "
                        f"{_fmt(curv.get('q95'))})"))
    if "p_curvature_positive" in obj:
        numbers.append(("P(curvature > 0)", obj["p_curvature_positive"]))
    for key, value in (obj.get("check_verdicts") or {}).items():
        numbers.append((f"check verdict of the {key} model", value))
    skip = {"applicable", "verdict", "conclusion", "reason", "share_explained_by_curvature",
            "curvature", "p_curvature_positive", "loo_differences", "local_exponent",
            "check_verdicts", "models", "exponent_sd", "mean_exponent_variance", "curvature_sd"}
    numbers += [(k, v) for k, v in _flatten({k: v for k, v in obj.items() if k not in skip})]
    for level, by_model in (obj.get("exponent_sd") or {}).items():
        for key, summ in by_model.items():
            if isinstance(summ, dict) and "median" in summ:
                numbers.append((f"exponent SD at {level}, {key} model",
                                f"{_fmt(summ['median'])} ({_fmt(summ.get('q05'))} to "
                                f"{_fmt(summ.get('q95'))})"))
    return {"answer": answer, "text": [verdict] if verdict else [], "numbers": numbers,
            "loo": list(obj.get("loo_differences") or []), "crossings": _crossings(obj)}


def _crossings(obj: dict[str, Any]) -> list[dict[str, Any]]:
    rows = []
    for model, local in (obj.get("local_exponent") or {}).items():
        for c in (local or {}).get("crossings", []):
            rows.append({"model": model, "unit": local.get("size_unit", ""), **c})
    return rows


# Rule of thumb for calling a break supported (common practice, no source): the exponents on
# the two sides differ by more than δ with probability ≥ 0.95, the breakpoint model is not
# worse than the best by LOO by more than 2 SE of the difference, and its checks did not fail.
_BREAK_P_MIN = 0.95
_BREAK_DSE = 2.0


def _breakpoint_section(obj: Any, comp: pd.DataFrame | None) -> dict[str, Any] | None:
    """The breakpoint summary as shown, with a supported / not supported answer.

    Reads ``breakpoint.json`` as the compare stage writes it (``applicable``, ``reason`` or
    ``models: {name: {break_size, exponent_below, exponent_above, difference, delta,
    p_abs_difference_above_delta, p_exponent_increases, check_verdict}}``) and the model's
    row of ``comparison.csv``.
    """
    if obj is None:
        return None
    if not isinstance(obj, dict):
        return {"answer": str(obj), "supported": None, "rows": [], "rule": None}
    if not obj.get("applicable", True) or not obj.get("models"):
        reason = str(obj.get("reason", "no breakpoint model"))
        return {"answer": f"not assessed ({reason})", "supported": None, "rows": [],
                "rule": None}
    rows = []
    for model, m in obj["models"].items():
        row: dict[str, Any] = {"model": model, **m}
        loo = None
        if comp is not None and "model" in comp.columns:
            match = comp[comp["model"] == model]
            if not match.empty:
                loo = match.iloc[0].to_dict()
        row["loo"] = loo
        p = _float(m.get("p_abs_difference_above_delta"))
        checks_ok = m.get("check_verdict") != "fail"
        loo_ok = None
        if loo is not None:
            diff, dse = _float(loo.get("elpd_diff")), _float(loo.get("dse"))
            if diff is not None and dse is not None:
                loo_ok = abs(diff) <= _BREAK_DSE * dse or abs(diff) == 0
        row["supported"] = (p is not None and p >= _BREAK_P_MIN and checks_ok
                            and loo_ok is not False)
        row["loo_ok"] = loo_ok
        rows.append(row)
    best = rows[0]
    size = best.get("break_size") or {}
    unit = size.get("unit", "")
    verdict = "supported" if best["supported"] else "not supported"
    answer = (
        f"{verdict} — model {best['model']} puts the break at {_fmt(size.get('median'))} "
        f"{unit} (90% interval {_fmt(size.get('q05'))} to {_fmt(size.get('q95'))}); exponent "
        f"{_fmt((best.get('exponent_below') or {}).get('median'))} below and "
        f"{_fmt((best.get('exponent_above') or {}).get('median'))} above; P(|difference| > "
        f"{_fmt(best.get('delta'))}) = {_fmt(best.get('p_abs_difference_above_delta'))}"
    )
    if best["loo_ok"] is False:
        answer += "; LOO prefers another model by more than 2 SE"
    if best.get("check_verdict") == "fail":
        answer += "; its checks failed"
    elif best.get("check_verdict") in (None, "", "not checked", "missing"):
        answer += "; its fit has not been checked"
    return {"answer": answer + ".", "supported": best["supported"], "rows": rows,
            "rule": (f"A break is called supported when P(|difference| > δ) ≥ {_BREAK_P_MIN}, "
                     f"the breakpoint model is within {_BREAK_DSE:g} SE of the best model by "
                     "LOO, and its checks did not fail (a rule of thumb, not a test).")}


def _flatten(obj: Any, prefix: str = "") -> list[tuple[str, Any]]:
    out: list[tuple[str, Any]] = []
    if isinstance(obj, dict):
        for k, v in obj.items():
            out += _flatten(v, f"{prefix}{k}.")
        return [(k.rstrip("."), v) for k, v in out]
    if isinstance(obj, list):
        if all(not isinstance(v, dict | list) for v in obj) and len(obj) <= 12:
            return [(prefix, ", ".join(_fmt(v) for v in obj))]
        for i, v in enumerate(obj[:50]):
            out += _flatten(v, f"{prefix}{i}.")
        return out
    return [(prefix, obj)]


def _worst_verdict(models: list[dict[str, Any]]) -> str:
    verdicts = [m["verdict"] for m in models] or ["missing"]
    return max(verdicts, key=lambda v: _STATUS_ORDER.get(v, 2))


def _headline(
    primary: str,
    idata: Any,
    hyp: pd.DataFrame | None,
    curvature: dict[str, Any] | None,
    breakpoint: dict[str, Any] | None,
    models: list[dict[str, Any]],
    units: dict[str, Any],
    *,
    delta: float | None = None,
) -> dict[str, Any]:
    out: dict[str, Any] = {"primary": primary}
    sentences = []
    if idata is not None and "exponent" in idata.posterior:
        draws = np.asarray(idata.posterior["exponent"].values, dtype=float).reshape(-1)
        q05, q50, q95 = (float(v) for v in np.quantile(draws, [0.05, 0.5, 0.95]))
        out["exponent"] = {"q05": q05, "q50": q50, "q95": q95, "above": None,
                           "curved": "curvature" in idata.posterior}
        if "exponent_above" in idata.posterior:
            above = np.asarray(idata.posterior["exponent_above"].values, dtype=float).ravel()
            out["exponent"]["above"] = [float(v) for v in np.quantile(above, [0.05, 0.5, 0.95])]
        ref = units.get("reference_size")
        at = f" at {_fmt(ref)} {units['size_display']}" if ref else ""
        below = " (below the break)" if out["exponent"]["above"] else ""
        sentences.append(
            f"The population exponent{at}{below} is {q50:.3f} (90% interval {q05:.3f} to "
            f"{q95:.3f})."
        )
    else:
        out["exponent"] = None
        sentences.append(f"No fit of the primary model '{primary}' is available.")
    out["named"] = None
    if hyp is not None and not hyp.empty:
        pop = hyp[(hyp["model"] == primary) & (hyp["parameter"] == "exponent")
                  & (hyp["taxon"].fillna("").astype(str) == "")]
        points = pop[pop["kind"] == "point"]
        if not points.empty:
            best = points.loc[points["posterior_prob"].astype(float).idxmax()]
            other = pop[pop["kind"] == "other"]
            out["named"] = {
                "hypothesis": str(best["hypothesis"]),
                "value": float(best["value"]),
                "posterior_prob": float(best["posterior_prob"]),
                "interval_prob": _float(best.get("interval_prob")),
                "other_prob": float(other["posterior_prob"].iloc[0]) if not other.empty else None,
            }
            sentences.append(
                f"The most probable named exponent is {best['hypothesis']} "
                f"({float(best['value']):g}) with posterior probability "
                f"{float(best['posterior_prob']):.3f}."
            )
    out["delta"] = delta
    out["curvature"] = curvature
    out["breakpoint"] = breakpoint
    out["failed"] = [m["name"] for m in models if m["verdict"] == "fail"]
    out["warned"] = [m["name"] for m in models if m["verdict"] == "warn"]
    out["unchecked"] = [m["name"] for m in models if m["verdict"] == "missing"]
    if out["failed"]:
        sentences.append("Failed checks: " + ", ".join(out["failed"]) + ".")
    out["sentence"] = " ".join(sentences)
    return out


def _methods(
    config: dict[str, Any], dataset: str, models: list[dict[str, Any]], hyp: pd.DataFrame | None
) -> dict[str, Any]:
    sampler = next((m["sampler"] for m in models if m["sampler"]), None) or dict(
        config.get("sampler", {})
    )
    backends = sorted({str(m["backend"]) for m in models if m["backend"]})
    thresholds: dict[str, Any] = {}
    for m in models:
        for d in (m["check"] or {}).get("diagnostics", []):
            if d.get("threshold") is not None:
                thresholds.setdefault(d["name"], d["threshold"])
    methods_used = sorted(set(hyp["method"].dropna().astype(str))) if hyp is not None and (
        "method" in hyp.columns) else []
    hconf = dict(config.get("hypotheses", {}))
    hconf.update(dataset_config(config, dataset).get("hypotheses", {}))
    described = [(m["name"], m["description"]) for m in models if m["description"]]
    others = [
        (m["name"], str((m["spec"] or {}).get("description", "")).strip().rstrip(".")
         or "no description")
        for m in models
        if not m["primary"] and m["fitted"]
    ]
    sbc_run = any("sbc" in str(k).lower() for m in models for k in (m["check"] or {}))
    refs = ["nuts", "rhat", "loo", "pit", "savage_dickey", "wagenmakers", "stacking"]
    if sbc_run:
        refs.append("sbc")
    refs.append("okabe")
    return {
        "sampler": sampler,
        "backends": backends,
        "thresholds": thresholds,
        "hypothesis_methods": methods_used,
        "named": hconf.get("exponents", []),
        "delta": hconf.get("interval_halfwidth"),
        "scale_factors": hconf.get("prior_scale_factors", []),
        "described": described,
        "others": others,
        "sbc_run": sbc_run,
        "references": [_REFERENCES[r] for r in refs],
    }


def _footer(
    config: dict[str, Any],
    dataset: str | None,
    models: list[dict[str, Any]],
    *,
    prepared: dict[str, Any] | None = None,
    logs_dir: str | Path = "logs",
) -> dict[str, Any]:
    versions = next((m["versions"] for m in models if m["versions"]), None)
    versions_source = "recorded in the fit" if versions else "installed when this page was made"
    if not versions:
        versions = {}
        for name in _PACKAGES:
            try:
                versions[name] = metadata.version(name)
            except metadata.PackageNotFoundError:
                continue
    seeds = [(m["name"], m["seed"]) for m in models if m["seed"] is not None]
    data_hashes = [(s["file"], s.get("sha256", "")) for s in (prepared or {}).get("sources", [])]
    fit_hashes = sorted({m["data_sha256"] for m in models if m["data_sha256"]})
    fit_seconds = [float(m["wall_seconds"]) for m in models if m["wall_seconds"] is not None]
    jobs = read_benchmarks(logs_dir)
    if dataset is not None and not jobs.empty:
        jobs = jobs[jobs["dataset"] == dataset]
    job_seconds = (len(jobs), float(jobs["s"].sum())) if dataset and not jobs.empty else None
    target = f"reports/{dataset}.html" if dataset else "reports/index.html"
    command = (
        f"snakemake --cores 2 {target}" if dataset else "snakemake --cores 2"
    )
    by_hand = (
        f"allolaw report --config config/config.yaml --dataset {dataset}"
        if dataset else "allolaw report --config config/config.yaml --index"
    )
    return {
        "version": __version__,
        "python": platform.python_version(),
        "versions": sorted(versions.items()),
        "versions_source": versions_source,
        "base_seed": config.get("sampler", {}).get("seed"),
        "seeds": seeds,
        "config_sha256": config_sha256(config),
        "data_hashes": data_hashes,
        "fit_hashes": fit_hashes,
        "fit_seconds": sum(fit_seconds) if fit_seconds else None,
        "job_seconds": job_seconds,
        "command": command,
        "by_hand": by_hand,
    }


# --- figures --------------------------------------------------------------------------------
def _figures(
    ds: dict[str, Any],
    fits: dict[str, Any],
    primary: str,
    clean: pd.DataFrame | None,
    levels: list[str],
    units: dict[str, Any],
    config: dict[str, Any],
    dataset: str,
) -> dict[str, Any]:
    # every key the template reads, so a page without clean.csv still renders (and says why)
    figs: dict[str, Any] = {"notes": [], "scatter": None, "scatter_notes": "", "forest": [],
                            "local": [], "breaks": []}
    idata = fits.get(primary)
    named = _named_exponents(config, dataset)
    if clean is None or "log_size" not in clean.columns:
        figs["notes"].append("No scatter plot: clean.csv is missing.")
        return figs
    log_x = clean["log_size"].astype(float).to_numpy()
    log_y = clean["log_trait"].astype(float).to_numpy()
    colour_level = levels[0] if levels else None
    taxa = clean[colour_level].astype(str).tolist() if colour_level else ["all species"] * len(
        clean)
    colours = plots.taxon_colours(taxa)
    series = []
    for taxon in sorted(colours):
        idx = [i for i, t in enumerate(taxa) if t == taxon]
        titles = []
        for i in idx:
            row = clean.iloc[i]
            path = " / ".join(str(row[lv]) for lv in levels if lv in clean.columns)
            titles.append(
                f"{row['species']} ({path}): {_fmt(math.exp(log_x[i]))} {units['size']}, "
                f"{_fmt(math.exp(log_y[i]))} {units['trait']}"
            )
        flagged = [_truthy(clean.iloc[i].get("flag_outlier")) for i in idx]
        series.append(plots.Series(np.exp(log_x[idx]), np.exp(log_y[idx]), titles,
                                   label=taxon, colour=colours[taxon], flagged=flagged))
    grid = np.linspace(log_x.min() - 0.05 * np.ptp(log_x), log_x.max() + 0.05 * np.ptp(log_x), 80)
    bands, refs = [], []
    if idata is None:
        figs["notes"].append(f"No law drawn: the fit of the primary model '{primary}' is missing.")
    else:
        law = _law(idata, grid)
        q = np.quantile(law, [0.05, 0.5, 0.95], axis=0)
        bands.append(plots.Band(np.exp(grid), np.exp(q[1]), np.exp(q[0]), np.exp(q[2]),
                                label="population law (90% band)", colour="#111111", width=2.4))
        if colour_level and _has_taxon_terms(idata, colour_level):
            for taxon in sorted(colours):
                idx = [i for i, t in enumerate(taxa) if t == taxon]
                tgrid = np.linspace(log_x[idx].min(), log_x[idx].max(), 30)
                if np.ptp(tgrid) == 0:
                    continue
                try:
                    tl = _law(idata, tgrid, level=colour_level, taxon=taxon)
                except Exception as err:  # shown, not fatal
                    figs["notes"].append(f"No law for taxon {taxon}: {err}")
                    continue
                tq = np.quantile(tl, [0.05, 0.5, 0.95], axis=0)
                many = len(colours) > 7
                bands.append(plots.Band(
                    np.exp(tgrid), np.exp(tq[1]), None if many else np.exp(tq[0]),
                    None if many else np.exp(tq[2]), label="", colour=colours[taxon], width=1.6,
                ))
            figs["notes"].append(
                f"Coloured lines: the law of each {colour_level} (posterior median"
                + ("" if len(colours) > 7 else " and 90% band") + "), over its species' sizes."
            )
        ref_log = float(idata.constant_data["log_size_ref"].values) if (
            hasattr(idata, "constant_data") and "log_size_ref" in idata.constant_data
        ) else float(np.mean(log_x))
        a_med = float(np.median(_law(idata, np.array([ref_log]))[:, 0]))
        for i, (name, value) in enumerate(named):
            y = a_med + value * (grid - ref_log)
            refs.append(plots.Band(np.exp(grid), np.exp(y), label=f"{name} ({value:g})",
                                   colour="#6b7280", width=1.1, dash=["6 4", "2 3", "10 3 2 3",
                                                                      "1 2"][i % 4]))
    figs["scatter"] = _svg(plots.scatter_law_svg(
        series, bands, x_label=units["x_axis"], y_label=units["y_axis"], reference_lines=refs,
        title="", width=940, height=540,
    ))
    figs["scatter_notes"] = (
        "Points: species means, coloured by " + (colour_level or "species")
        + " (Okabe–Ito palette); a dark ring marks a flagged outlier. Dashed grey lines: the "
        "named exponents, drawn through the population law at the reference size. Hover a "
        "point for the species name."
    )
    figs["forest"] = []
    if idata is not None:
        pop = np.quantile(np.asarray(idata.posterior["exponent"].values).reshape(-1),
                          [0.05, 0.5, 0.95])
        for level in levels:
            var = f"taxon_exponent__{level}"
            if var not in idata.posterior:
                continue
            arr = idata.posterior[var]
            labels = [str(v) for v in arr[level].values]
            draws = np.asarray(arr.values, dtype=float).reshape(-1, len(labels))
            qs = np.quantile(draws, [0.05, 0.5, 0.95], axis=0)
            rows = [(labels[j], qs[0, j], qs[1, j], qs[2, j]) for j in range(len(labels))]
            row_colours = colours if level == colour_level else None
            if colour_level and level != colour_level and level in clean.columns:
                # inner taxa: grouped and coloured by their outermost taxon
                parent = dict(zip(clean[level].astype(str), clean[colour_level].astype(str),
                                  strict=False))
                rows.sort(key=lambda r: (parent.get(r[0], ""), r[0]))
                row_colours = {r[0]: colours.get(parent.get(r[0], ""), "#1d2430")
                               for r in rows}
            figs["forest"].append({
                "level": level,
                "svg": _svg(plots.forest_svg(
                    rows, x_label=f"exponent of each {level} (median, 90% interval)",
                    marks=named, population=tuple(pop),
                    colours=row_colours,
                )),
            })
    figs["local"] = []
    figs["breaks"] = []
    for name, fit in fits.items():
        if "curvature" in fit.posterior:
            lgrid = np.linspace(log_x.min(), log_x.max(), 60)
            q = np.quantile(_local_exponent(fit, lgrid), [0.05, 0.5, 0.95], axis=0)
            marks_x = []
            if units.get("reference_size"):
                marks_x.append(("reference size", float(units["reference_size"])))
            figs["local"].append({"model": name, "svg": _svg(
                plots.line_band_svg(
                    [plots.Band(np.exp(lgrid), q[1], q[0], q[2], label="local exponent (90%)",
                                colour=plots.OKABE_ITO[3])],
                    x_label=units["x_axis"], y_label="local exponent d log y / d log x",
                    log_x=True, marks_y=named, marks_x=marks_x,
                ))})
        if "break_log_size" in fit.posterior:
            draws = np.asarray(fit.posterior["break_log_size"].values, dtype=float).reshape(-1)
            centres = np.linspace(draws.min(), draws.max(), 120)
            counts = _density(draws, centres)
            q = np.quantile(draws, [0.05, 0.5, 0.95])
            figs["breaks"].append({
                "model": name,
                "q": [float(math.exp(v)) for v in q],
                "svg": _svg(plots.line_band_svg(
                    [plots.Band(np.exp(centres), counts, np.zeros_like(counts), counts,
                                label="posterior of the break", colour=plots.OKABE_ITO[4])],
                    x_label=units["x_axis"],
                    y_label="density (per natural-log unit)", log_x=True,
                    marks_x=[("median", float(math.exp(q[1])))],
                )),
            })
    return figs


def _density(draws: np.ndarray, grid: np.ndarray) -> np.ndarray:
    """Gaussian kernel density of ``draws`` on ``grid`` (Scott's bandwidth, scipy)."""
    from scipy import stats

    if np.ptp(draws) == 0:
        return np.zeros_like(grid)
    return stats.gaussian_kde(draws)(grid)


def _named_exponents(config: dict[str, Any], dataset: str) -> list[tuple[str, float]]:
    hconf = dict(config.get("hypotheses", {}))
    hconf.update(dataset_config(config, dataset).get("hypotheses", {}))
    return [(str(e["name"]), float(e["value"])) for e in hconf.get("exponents", [])]


def _has_taxon_terms(idata: Any, level: str) -> bool:
    return any(f"taxon_{t}__{level}" in idata.posterior for t in TAXON_TERMS)


def _law(idata: Any, log_size: np.ndarray, *, level: str | None = None,
         taxon: str | None = None) -> np.ndarray:
    """Posterior draws of the expected log trait on a grid, at most 1000 draws."""
    out = expected_log_trait(idata, log_size, level=level, taxon=taxon)
    if out.shape[0] > 1000:
        out = out[np.linspace(0, out.shape[0] - 1, 1000).astype(int)]
    return out


def _local_exponent(idata: Any, log_size: np.ndarray) -> np.ndarray:
    """Draws of d log trait / d log size along ``log_size`` (central differences inside,
    second-order one-sided at the ends, so exact for a quadratic law)."""
    return np.gradient(_law(idata, log_size), log_size, axis=1, edge_order=2)


def _readable(path: Path) -> None:
    # The atomic write's temporary file is private (0600); a report is for reading: 0644
    # less the umask, as for any new file.
    umask = os.umask(0)
    os.umask(umask)
    path.chmod(0o666 & ~umask)


def _svg(text: str) -> Markup:
    # Figures from allolaw.plots escape every text they contain; only they are marked safe.
    return Markup(text)


# --- formatting -----------------------------------------------------------------------------
def _environment() -> Environment:
    env = Environment(
        loader=PackageLoader("allolaw", "templates"),
        autoescape=True,
        undefined=StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
    )
    env.filters["fmt"] = _fmt
    env.filters["pct"] = _pct
    env.filters["status_class"] = lambda s: f"st-{s}" if s in _STATUS_ORDER else "st-missing"
    return env


def _fmt(value: Any, digits: int = 3) -> str:
    """Numbers with ``digits`` significant decimals for small values; text as given."""
    if value is None:
        return "–"
    if isinstance(value, bool | np.bool_):
        return "yes" if value else "no"
    if isinstance(value, int | np.integer):
        return str(int(value))
    if isinstance(value, float | np.floating):
        v = float(value)
        if not math.isfinite(v):
            return "NaN" if math.isnan(v) else ("∞" if v > 0 else "−∞")
        if v == int(v) and abs(v) < 1e6:
            return str(int(v))
        a = abs(v)
        if a >= 1e5 or a < 1e-3:
            return f"{v:.{digits}g}"
        if a >= 100:
            return f"{v:.1f}"
        return f"{v:.{digits}f}"
    if isinstance(value, str):
        try:
            return _fmt(float(value), digits) if value.strip() not in ("",) and _numeric(
                value) else value
        except ValueError:
            return value
    return str(value)


def _numeric(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return text.strip().lower() not in ("nan", "inf", "-inf", "infinity")


def _pct(value: Any) -> str:
    if value is None or _isnan(value):
        return "–"
    return f"{100 * float(value):.1f}%"


def _isnan(value: Any) -> bool:
    return isinstance(value, float | np.floating) and math.isnan(float(value))


def _float(value: Any) -> float | None:
    try:
        v = float(value)
    except (TypeError, ValueError):
        return None
    return None if math.isnan(v) else v


def _truthy(value: Any) -> bool:
    if isinstance(value, str):
        return value.strip().lower() in ("true", "1", "yes")
    return bool(value) if value is not None and not _isnan(value) else False


def _now() -> str:
    return dt.datetime.now(dt.UTC).strftime("%Y-%m-%d %H:%M UTC")
