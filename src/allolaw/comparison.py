"""The ``compare`` stage: LOO comparison of a dataset's models, hypotheses, curvature audit.

:func:`compare_dataset` reads every fit of a dataset and writes

* ``comparison.csv`` — PSIS-LOO of the trait likelihood for each model, ranked, with stacking
  weights (weights of the best predictive mixture, *not* posterior model probabilities),
  elpd differences with their SE, Pareto k counts and each model's check verdict;
* ``hypotheses.csv`` — :func:`allolaw.hypotheses.compare_hypotheses` for every model;
* ``curvature_audit.json`` — is the spread of taxon exponents real, or one curved law seen
  through taxa that sit at different sizes? Plus the local exponent ``b(x) = b + 2c(x − x_ref)``
  of every curved model, with a band over a size grid and where it crosses each named value;
* ``breakpoint.json`` — break size (original units), exponents on both sides, and the
  probability that they differ by more than δ.

Each JSON says ``"applicable": false`` with a reason when the dataset has nothing to audit.
"""

from __future__ import annotations

import json
import logging
import math
import warnings
from pathlib import Path
from typing import Any

import arviz as az
import numpy as np
import pandas as pd

from allolaw import paths
from allolaw.config import dataset_config, hypotheses_config
from allolaw.diagnostics import pareto_k_threshold, read_groups
from allolaw.hypotheses import compare_hypotheses
from allolaw.io import atomic_path, write_json

__all__ = [
    "COMPARISON_COLUMNS",
    "STACKING_NOTE",
    "audit_curvature",
    "compare_dataset",
    "compare_models",
    "local_exponent",
    "summarise_breakpoint",
]

log = logging.getLogger(__name__)

#: Columns of ``comparison.csv`` (DEVELOPERS.md contract, then our additions).
COMPARISON_COLUMNS = [
    "dataset", "model", "rank", "elpd_loo", "se", "elpd_diff", "dse", "p_loo",
    "stacking_weight", "n_bad_k", "warning", "check_verdict", "note",
]
#: Written beside every stacking weight.
STACKING_NOTE = (
    "stacking weights are the weights of the best predictive mixture of the models (Yao et "
    "al. 2018); they are not posterior model probabilities"
)
#: The groups of a fit this stage reads (not the predictive draws, prior or sampler stats).
_COMPARE_GROUPS = ("posterior", "log_likelihood", "constant_data", "observed_data")
# Curvature audit verdict bands on the share of between-taxon exponent variance explained
# (our own reading aids: common practice, no source).
_MOST = 0.5
_LITTLE = 0.2


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
            fits[model] = read_groups(path, _COMPARE_GROUPS)
        else:
            missing.append(model)
            log.warning("%s/%s: no posterior.nc; left out of the comparison", dataset, model)
    verdicts = {m: _check_verdict(results, dataset, m) for m in ds["models"]}
    prepared = _read_json(paths.prepared_path(results, dataset))

    table = compare_models(fits, verdicts=verdicts)
    if missing:
        absent = pd.DataFrame([{"model": m, "warning": "no fit", "check_verdict": verdicts[m],
                                "note": "not fitted; not compared"} for m in missing])
        table = pd.concat([table, absent], ignore_index=True) if len(table) else absent
        table = table.reindex(columns=COMPARISON_COLUMNS)
    table["dataset"] = dataset
    for column in ("rank", "n_bad_k"):
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


def compare_models(
    fits: dict[str, az.InferenceData], *, verdicts: dict[str, str] | None = None
) -> pd.DataFrame:
    """PSIS-LOO comparison of fits on the ``trait`` likelihood, with stacking weights.

    Parameters
    ----------
    fits
        Model name → InferenceData with a ``log_likelihood.trait`` group.
    verdicts
        Model name → check verdict, copied into the table.

    Returns
    -------
    pandas.DataFrame
        Columns :data:`COMPARISON_COLUMNS` (``dataset`` empty), best model first.

    References
    ----------
    Vehtari, A., Gelman, A., Gabry, J. (2017). Practical Bayesian model evaluation using
    leave-one-out cross-validation and WAIC. Statistics and Computing 27:1413–1432.

    Yao, Y., Vehtari, A., Simpson, D., Gelman, A. (2018). Using stacking to average Bayesian
    predictive distributions. Bayesian Analysis 13:917–1007.
    """
    verdicts = verdicts or {}
    if not fits:
        return pd.DataFrame(columns=COMPARISON_COLUMNS)
    loos = {name: _loo(idata) for name, idata in fits.items()}
    if len(loos) == 1:
        (name, loo), = loos.items()
        comp = pd.DataFrame({"rank": [0], "elpd_loo": [loo.elpd_loo], "se": [loo.se],
                             "elpd_diff": [0.0], "dse": [0.0], "p_loo": [loo.p_loo],
                             "weight": [1.0]}, index=[name])
    else:
        with warnings.catch_warnings():
            # high Pareto k: counted per model below and written in the table
            warnings.simplefilter("ignore", UserWarning)
            # ArviZ 0.23 sorts with inplace=True, which pandas 3.1 deprecates; not our call
            warnings.filterwarnings("ignore", message="The inplace keyword")
            comp = az.compare(loos, ic="loo", method="stacking", var_name="trait")
    rows = []
    for name, rec in comp.iterrows():
        loo = loos[str(name)]
        n_draws = int(fits[str(name)].posterior.sizes["chain"]
                      * fits[str(name)].posterior.sizes["draw"])
        k = np.asarray(loo.pareto_k.values, dtype=float)
        thr = pareto_k_threshold(n_draws)
        n_bad = int(np.sum(~(k <= thr)))
        warning = (f"{n_bad} observation(s) with Pareto k > {thr:.2f}: this model's LOO "
                   "estimate is unreliable" if n_bad else "")
        rows.append({
            "dataset": "", "model": str(name), "rank": int(rec["rank"]),
            "elpd_loo": float(rec["elpd_loo"]), "se": float(rec["se"]),
            "elpd_diff": float(rec["elpd_diff"]), "dse": float(rec["dse"]),
            "p_loo": float(rec["p_loo"]), "stacking_weight": float(rec["weight"]),
            "n_bad_k": n_bad, "warning": warning,
            "check_verdict": verdicts.get(str(name), "not checked"), "note": STACKING_NOTE,
        })
    return pd.DataFrame(rows, columns=COMPARISON_COLUMNS)


def audit_curvature(
    linear: az.InferenceData,
    curved: az.InferenceData,
    taxa_curved: az.InferenceData | None = None,
    *,
    names: dict[str, str] | None = None,
) -> dict[str, Any]:
    """How much of the spread of taxon exponents is one curved law in disguise?

    When taxa occupy different size ranges, a single curved law makes their straight-line
    exponents differ (each taxon sees the local slope of its size range). The audit fits the
    taxa model with and without a shared curvature term and asks how much of the
    between-taxon exponent variance the curvature absorbs::

        share = 1 − E[σ_b² | curved] / E[σ_b² | linear]

    per taxon level and summed over levels, next to the LOO difference of the models and
    P(curvature > 0).

    Parameters
    ----------
    linear, curved, taxa_curved
        Fits of the taxa model without curvature, with shared curvature, and (optional) with
        curvature varying by taxon. They need ``exponent_sd__<level>``; ``curved`` needs
        ``curvature``.
    names
        Model names for the output (keys ``linear``, ``curved``, ``taxa_curved``).

    Returns
    -------
    dict
        JSON-ready audit with a one-paragraph ``verdict``.

    References
    ----------
    Glazier, D. S. (2005). Beyond the '3/4-power law': variation in the intra- and
    interspecific scaling of metabolic rate in animals. Biological Reviews 80:611–662.

    Kolokotrones, T., Savage, V., Deeds, E. J., Fontana, W. (2010). Curvature in metabolic
    scaling. Nature 464:753–756.
    """
    names = names or {"linear": "linear", "curved": "curved", "taxa_curved": "taxa_curved"}
    fits = {"linear": linear, "curved": curved}
    if taxa_curved is not None:
        fits["taxa_curved"] = taxa_curved
    levels = [str(v).removeprefix("exponent_sd__") for v in linear.posterior.data_vars
              if str(v).startswith("exponent_sd__")]
    if not levels:
        return {"applicable": False,
                "reason": f"model '{names['linear']}' has no taxon exponents (exponent_sd__*)"}
    sd_summary: dict[str, dict[str, Any]] = {}
    share: dict[str, float] = {}
    total = {"linear": 0.0, "curved": 0.0}
    for level in levels:
        name = f"exponent_sd__{level}"
        sd_summary[level] = {key: _summary(fit.posterior[name]) for key, fit in fits.items()
                             if name in fit.posterior}
        var_lin = float(np.mean(_flat(linear.posterior[name]) ** 2))
        if name in curved.posterior:
            var_cur = float(np.mean(_flat(curved.posterior[name]) ** 2))
            share[level] = 1.0 - var_cur / var_lin
            total["linear"] += var_lin
            total["curved"] += var_cur
    share_total = 1.0 - total["curved"] / total["linear"] if total["linear"] > 0 else math.nan
    curvature = _flat(curved.posterior["curvature"])
    p_pos = float(np.mean(curvature > 0))
    loo = {key: _loo(fit) for key, fit in fits.items()}
    diffs = [_loo_difference(loo, "curved", "linear", names)]
    if "taxa_curved" in loo:
        diffs.append(_loo_difference(loo, "taxa_curved", "curved", names))
    out: dict[str, Any] = {
        "applicable": True,
        "models": {k: names[k] for k in fits},
        "exponent_sd": sd_summary,
        "mean_exponent_variance": {
            level: {k: float(np.mean(_flat(f.posterior[f"exponent_sd__{level}"]) ** 2))
                    for k, f in fits.items() if f"exponent_sd__{level}" in f.posterior}
            for level in levels
        },
        "share_explained_by_curvature": {"by_level": share, "all_levels": share_total},
        "curvature": _summary(curved.posterior["curvature"]),
        "p_curvature_positive": p_pos,
        "loo_differences": diffs,
    }
    if taxa_curved is not None:
        taxon_sd = [v for v in taxa_curved.posterior.data_vars
                    if str(v).startswith("curvature_sd__")]
        out["curvature_sd"] = {str(v).removeprefix("curvature_sd__"):
                               _summary(taxa_curved.posterior[v]) for v in taxon_sd}
    out["verdict"] = _curvature_verdict(out, names)
    return out


def local_exponent(
    idata: az.InferenceData,
    *,
    values: dict[str, float] | None = None,
    grid_size: int = 40,
    log_size_range: tuple[float, float] | None = None,
) -> dict[str, Any]:
    """The local exponent ``b(x) = b + 2c(x − x_ref)`` of a curved law over a size grid.

    Parameters
    ----------
    idata
        Fit with ``exponent`` and ``curvature`` (population values) and ``constant_data``
        ``log_size_ref`` (and ``log_size_obs`` for the default grid).
    values
        Named exponents: for each, the size where b(x) crosses it.
    grid_size
        Points of the size grid (log-spaced between the smallest and largest size).
    log_size_range
        Natural-log size range of the grid (default: range of the observed log sizes).

    Returns
    -------
    dict
        ``grid`` rows (size, log_size, median, q05, q95 of b(x)), and ``crossings``: per
        named value, the size where the median curve crosses it (null when it does not within
        the range), the median and 90% interval over draws of the crossing size, and the
        posterior probability that the crossing lies within the observed range.

    References
    ----------
    Kolokotrones, T., Savage, V., Deeds, E. J., Fontana, W. (2010). Curvature in metabolic
    scaling. Nature 464:753–756 (local exponent of a quadratic log–log law).
    """
    post = idata.posterior
    const = idata.constant_data
    ref = _scalar(const["log_size_ref"])
    if log_size_range is None:
        obs = np.asarray(const["log_size_obs"].values, dtype=float)
        log_size_range = (float(obs.min()), float(obs.max()))
    lo, hi = log_size_range
    grid = np.linspace(lo, hi, grid_size)
    b = _flat(post["exponent"])
    c = _flat(post["curvature"])
    local = b[:, None] + 2 * c[:, None] * (grid[None, :] - ref)
    q05, q50, q95 = np.quantile(local, [0.05, 0.5, 0.95], axis=0)
    rows = [{"size": math.exp(x), "log_size": float(x), "median": float(m), "q05": float(a),
             "q95": float(z)} for x, m, a, z in zip(grid, q50, q05, q95, strict=True)]
    crossings = []
    for name, v in (values or {}).items():
        with np.errstate(divide="ignore", invalid="ignore"):
            x_cross = ref + (v - b) / (2 * c)
        finite = x_cross[np.isfinite(x_cross)]
        inside = float(np.mean((x_cross >= lo) & (x_cross <= hi)))
        qs = np.quantile(finite, [0.05, 0.5, 0.95]) if finite.size else [math.nan] * 3
        crossings.append({
            "name": name, "value": float(v),
            "median_curve_crossing_size": _crossing(grid, q50, v),
            "crossing_size_median": _exp(qs[1]),
            "crossing_size_q05": _exp(qs[0]),
            "crossing_size_q95": _exp(qs[2]),
            "p_crossing_within_observed_range": inside,
        })
    return {
        "reference_size": math.exp(ref),
        "note": ("b(x) is the slope of the curved law at size x; the model's 'exponent' is "
                 "b at the reference size"),
        "grid": rows,
        "crossings": crossings,
    }


def summarise_breakpoint(
    idata: az.InferenceData, *, delta: float = 0.03, unit: str = ""
) -> dict[str, Any]:
    """Break size (original units), exponents below and above, and P(|difference| > δ).

    Parameters
    ----------
    idata
        Fit with ``break_log_size``, ``exponent`` (below the break) and ``exponent_above``.
    delta
        Smallest difference of exponents that counts as a change (the hypotheses' δ).
    unit
        Canonical size unit, for the output.
    """
    post = idata.posterior
    brk = _flat(post["break_log_size"])
    below = _flat(post["exponent"])
    above = _flat(post["exponent_above"])
    diff = above - below
    size = np.exp(brk)
    q = np.quantile(size, [0.05, 0.5, 0.95])
    return {
        "applicable": True,
        "break_size": {"unit": unit, "median": float(q[1]), "q05": float(q[0]),
                       "q95": float(q[2]), "mean_log": float(brk.mean())},
        "exponent_below": _summary_array(below),
        "exponent_above": _summary_array(above),
        "difference": _summary_array(diff),
        "delta": float(delta),
        "p_abs_difference_above_delta": float(np.mean(np.abs(diff) > delta)),
        "p_exponent_increases": float(np.mean(diff > 0)),
    }


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


def _curvature_verdict(audit: dict[str, Any], names: dict[str, str]) -> str:
    share = audit["share_explained_by_curvature"]["all_levels"]
    p_pos = audit["p_curvature_positive"]
    curv = audit["curvature"]
    d = audit["loo_differences"][0]
    loo_text = (f"LOO prefers '{d['better']}' by {abs(d['elpd_diff']):.1f} ± {d['se']:.1f} "
                "elpd")
    if share >= _MOST:
        head = "Most of the spread of taxon exponents is explained by one curved law"
    elif share <= _LITTLE:
        head = ("Little of the spread of taxon exponents is explained by curvature: the taxa "
                "differ in their own right")
    else:
        head = "Curvature explains part of the spread of taxon exponents"
    change = (f"lowers the mean between-taxon exponent variance by {100 * share:.0f}%"
              if share >= 0 else
              f"raises the mean between-taxon exponent variance by {-100 * share:.0f}%")
    return (
        f"{head}. Adding a shared curvature term to '{names['linear']}' {change} (share "
        f"explained {share:.2f}); the curvature is {curv['median']:.3f} (90% interval "
        f"{curv['q05']:.3f} to {curv['q95']:.3f}), P(curvature > 0) = {p_pos:.2f}; "
        f"{loo_text}."
    )


def _loo_difference(loo: dict[str, Any], a: str, b: str, names: dict[str, str]
                    ) -> dict[str, Any]:
    pa = np.asarray(loo[a].loo_i.values, dtype=float)
    pb = np.asarray(loo[b].loo_i.values, dtype=float)
    diff = pa - pb
    se = float(np.sqrt(diff.size * np.var(diff)))
    total = float(diff.sum())
    return {"model_a": names[a], "model_b": names[b], "elpd_diff": total, "se": se,
            "better": names[a] if total > 0 else names[b]}


# --- helpers ---------------------------------------------------------------------------


def _loo(idata: az.InferenceData) -> Any:
    with warnings.catch_warnings(), np.errstate(all="ignore"):
        # high Pareto k is counted and written by the callers
        warnings.simplefilter("ignore", UserWarning)
        return az.loo(idata, pointwise=True, var_name="trait")


def _model_spec(config: dict[str, Any], model: str, idata: az.InferenceData) -> Any:
    raw = idata.attrs.get("spec")
    if raw:
        spec = json.loads(raw) if isinstance(raw, str) else dict(raw)
        spec.setdefault("name", model)
        return spec
    from allolaw.spec import load_spec

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


def _summary(da: Any) -> dict[str, float]:
    return _summary_array(_flat(da))


def _summary_array(x: np.ndarray) -> dict[str, float]:
    q = np.quantile(x, [0.05, 0.5, 0.95])
    return {"mean": float(x.mean()), "sd": float(x.std()), "median": float(q[1]),
            "q05": float(q[0]), "q95": float(q[2])}


def _flat(da: Any) -> np.ndarray:
    return np.asarray(da.values, dtype=float).reshape(-1)


def _scalar(da: Any) -> float:
    return float(np.asarray(da.values, dtype=float).reshape(-1)[0])


def _exp(x: float) -> float | None:
    if not math.isfinite(x) or x > 700:
        return None
    return math.exp(x)


def _crossing(grid: np.ndarray, curve: np.ndarray, value: float) -> float | None:
    sign = np.sign(curve - value)
    idx = np.flatnonzero(np.diff(sign) != 0)
    if idx.size == 0:
        return None
    i = int(idx[0])
    x0, x1, y0, y1 = grid[i], grid[i + 1], curve[i], curve[i + 1]
    x = x0 + (value - y0) * (x1 - x0) / (y1 - y0) if y1 != y0 else x0
    return math.exp(float(x))


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
