"""The curvature audit and the local exponent of curved models.

Is the spread of taxon exponents real, or one curved law seen through taxa that sit at
different sizes? Plus the local exponent ``b(x) = b + 2c(x − x_ref)`` of every curved model,
with a band over a size grid and where it crosses each named value.
"""

from __future__ import annotations

import math
from typing import Any

import arviz as az
import numpy as np

from allolaw.answers.comparison import trait_loo
from allolaw.answers.draws import flat, scalar, summary

__all__ = ["audit_curvature", "local_exponent"]
# Curvature audit verdict bands on the share of between-taxon exponent variance explained
# (our own reading aids: common practice, no source).
_MOST = 0.5
_LITTLE = 0.2


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
        sd_summary[level] = {key: summary(fit.posterior[name]) for key, fit in fits.items()
                             if name in fit.posterior}
        var_lin = float(np.mean(flat(linear.posterior[name]) ** 2))
        if name in curved.posterior:
            var_cur = float(np.mean(flat(curved.posterior[name]) ** 2))
            share[level] = 1.0 - var_cur / var_lin
            total["linear"] += var_lin
            total["curved"] += var_cur
    share_total = 1.0 - total["curved"] / total["linear"] if total["linear"] > 0 else math.nan
    curvature = flat(curved.posterior["curvature"])
    p_pos = float(np.mean(curvature > 0))
    loo = {key: trait_loo(fit) for key, fit in fits.items()}
    diffs = [_loo_difference(loo, "curved", "linear", names)]
    if "taxa_curved" in loo:
        diffs.append(_loo_difference(loo, "taxa_curved", "curved", names))
    out: dict[str, Any] = {
        "applicable": True,
        "models": {k: names[k] for k in fits},
        "exponent_sd": sd_summary,
        "mean_exponent_variance": {
            level: {k: float(np.mean(flat(f.posterior[f"exponent_sd__{level}"]) ** 2))
                    for k, f in fits.items() if f"exponent_sd__{level}" in f.posterior}
            for level in levels
        },
        "share_explained_by_curvature": {"by_level": share, "all_levels": share_total},
        "curvature": summary(curved.posterior["curvature"]),
        "p_curvature_positive": p_pos,
        "loo_differences": diffs,
    }
    if taxa_curved is not None:
        taxon_sd = [v for v in taxa_curved.posterior.data_vars
                    if str(v).startswith("curvature_sd__")]
        out["curvature_sd"] = {str(v).removeprefix("curvature_sd__"):
                               summary(taxa_curved.posterior[v]) for v in taxon_sd}
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
    ref = scalar(const["log_size_ref"])
    if log_size_range is None:
        obs = np.asarray(const["log_size_obs"].values, dtype=float)
        log_size_range = (float(obs.min()), float(obs.max()))
    lo, hi = log_size_range
    grid = np.linspace(lo, hi, grid_size)
    b = flat(post["exponent"])
    c = flat(post["curvature"])
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


def _curvature_verdict(audit: dict[str, Any], names: dict[str, str]) -> str:
    share = audit["share_explained_by_curvature"]["all_levels"]
    p_pos = audit["p_curvature_positive"]
    curv = audit["curvature"]
    d = audit["loo_differences"][0]
    loo_text = (f"LOO prefers '{d['better']}' by {abs(d['elpd_difference']):.1f} elpd "
                f"(standard error {d['elpd_difference_se']:.1f})")
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
    return {"model_a": names[a], "model_b": names[b], "elpd_difference": total,
            "elpd_difference_se": se,
            "better": names[a] if total > 0 else names[b]}


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
