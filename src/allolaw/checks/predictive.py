"""Posterior and prior predictive checks of one fit: LOO-PIT, test statistics, density overlays.
"""

from __future__ import annotations

from typing import Any

import arviz as az
import numpy as np
import pandas as pd
from scipy import stats

from allolaw import paths
from allolaw.config import dataset_config

__all__ = ["predictive_checks"]


def predictive_checks(
    idata: az.InferenceData,
    *,
    groups: list[str] | None = None,
    n_bins: int = 10,
    n_overlay_draws: int = 100,
    grid_size: int = 60,
    seed: int = 0,
) -> dict[str, Any]:
    """Posterior and prior predictive checks of the ``trait`` variable, as compact summaries.

    Parameters
    ----------
    idata
        Fit with ``observed_data.trait`` and ``posterior_predictive.trait`` (and optionally
        ``log_likelihood.trait`` for LOO-PIT and ``prior_predictive.trait``).
    groups
        Taxon label of each species (same order as the ``species`` dim) for per-taxon
        statistics; ``None`` skips them.
    n_bins
        Histogram bins of the LOO-PIT values.
    n_overlay_draws, grid_size
        Size of the density overlay: predictive draws used and points of the grid.
    seed
        Seed for choosing overlay draws.

    Returns
    -------
    dict
        ``loo_pit`` (values, histogram, Kolmogorov–Smirnov distance and p-value against the
        uniform), ``test_statistics`` (observed value, predictive 5/50/95% and Bayesian
        p-value P(T(y_rep) ≥ T(y)) of min, max, SD and each taxon's residual SD),
        ``density_overlay`` and ``prior_predictive``.

    References
    ----------
    Gelman, A., Meng, X.-L., Stern, H. (1996). Posterior predictive assessment of model
    fitness via realized discrepancies. Statistica Sinica 6:733–807.

    Gabry, J., Simpson, D., Vehtari, A., Betancourt, M., Gelman, A. (2019). Visualization in
    Bayesian workflow. JRSS A 182:389–402 (LOO-PIT).
    """
    out: dict[str, Any] = {}
    y = np.asarray(idata.observed_data["trait"].values, dtype=float)
    has_pp = hasattr(idata, "posterior_predictive") and "trait" in idata.posterior_predictive
    if not has_pp:
        out["note"] = "no posterior predictive draws of 'trait' in the fit; checks skipped"
    else:
        pp = np.asarray(idata.posterior_predictive["trait"].values, dtype=float)
        yrep = pp.reshape(-1, *pp.shape[2:]).reshape(pp.shape[0] * pp.shape[1], -1)
        if hasattr(idata, "log_likelihood"):
            out["loo_pit"] = _loo_pit_summary(idata, n_bins)
        out["test_statistics"] = _test_statistics(y, yrep, groups)
        out["density_overlay"] = _density_overlay(y, yrep, n_overlay_draws, grid_size, seed)
    if hasattr(idata, "prior_predictive") and "trait" in idata.prior_predictive:
        prior = np.asarray(idata.prior_predictive["trait"].values, dtype=float).ravel()
        lo, hi = float(y.min()), float(y.max())
        out["prior_predictive"] = {
            "quantiles": dict(
                zip(["q05", "q50", "q95"], np.quantile(prior, [0.05, 0.5, 0.95]).tolist(),
                    strict=True)
            ),
            "observed_min": lo,
            "observed_max": hi,
            "share_within_observed_range": float(np.mean((prior >= lo) & (prior <= hi))),
            "share_beyond_10_log_units": float(np.mean(np.abs(prior - np.median(y)) > 10)),
        }
    else:
        out["prior_predictive"] = None
    return out


# --- predictive checks ----------------------------------------------------------------------


def _loo_pit_summary(idata: az.InferenceData, n_bins: int) -> dict[str, Any]:
    import warnings

    with warnings.catch_warnings(), np.errstate(all="ignore"):
        # High Pareto k is reported by check_fit; the PIT values are still summarised.
        warnings.simplefilter("ignore", UserWarning)
        pit = np.asarray(az.loo_pit(idata, y="trait"), dtype=float).ravel()
    ks = stats.kstest(pit, "uniform")
    counts, edges = np.histogram(pit, bins=n_bins, range=(0.0, 1.0))
    return {
        "values": pit.round(4).tolist(),
        "histogram": {"edges": edges.round(4).tolist(), "counts": counts.tolist()},
        "ks_distance": float(ks.statistic),
        "ks_pvalue": float(ks.pvalue),
        "share_outside_05_95": float(np.mean((pit < 0.05) | (pit > 0.95))),
    }


def _stat_row(name: str, observed: float, replicated: np.ndarray) -> dict[str, Any]:
    q = np.quantile(replicated, [0.05, 0.5, 0.95])
    return {
        "statistic": name,
        "observed": float(observed),
        "q05": float(q[0]),
        "q50": float(q[1]),
        "q95": float(q[2]),
        "p_value": float(np.mean(replicated >= observed)),
    }


def _test_statistics(
    y: np.ndarray, yrep: np.ndarray, groups: list[str] | None
) -> list[dict[str, Any]]:
    rows = [
        _stat_row("min", y.min(), yrep.min(axis=1)),
        _stat_row("max", y.max(), yrep.max(axis=1)),
        _stat_row("sd", y.std(ddof=1), yrep.std(axis=1, ddof=1)),
    ]
    if groups is not None:
        fitted = yrep.mean(axis=0)  # posterior-mean prediction of each species
        labels = np.asarray(groups, dtype=object)
        for label in sorted(set(labels.tolist())):
            idx = np.flatnonzero(labels == label)
            if idx.size < 3:
                continue
            obs = float(np.std(y[idx] - fitted[idx], ddof=1))
            rep = np.std(yrep[:, idx] - fitted[idx], axis=1, ddof=1)
            rows.append(_stat_row(f"residual_sd[{label}]", obs, rep))
    return rows


def _density_overlay(
    y: np.ndarray, yrep: np.ndarray, n_draws: int, grid_size: int, seed: int
) -> dict[str, Any]:
    lo, hi = float(min(y.min(), np.quantile(yrep, 0.005))), float(
        max(y.max(), np.quantile(yrep, 0.995))
    )
    pad = 0.05 * (hi - lo)
    grid = np.linspace(lo - pad, hi + pad, grid_size)
    rng = np.random.default_rng(seed)
    pick = rng.choice(yrep.shape[0], size=min(n_draws, yrep.shape[0]), replace=False)
    dens = np.array([_kde(row, grid) for row in yrep[pick]])
    return {
        "grid": grid.round(4).tolist(),
        "observed": _kde(y, grid).round(5).tolist(),
        "predictive_q05": np.quantile(dens, 0.05, axis=0).round(5).tolist(),
        "predictive_q50": np.quantile(dens, 0.5, axis=0).round(5).tolist(),
        "predictive_q95": np.quantile(dens, 0.95, axis=0).round(5).tolist(),
        "n_draws": len(pick),
    }


def _kde(values: np.ndarray, grid: np.ndarray) -> np.ndarray:
    if np.ptp(values) == 0:
        return np.zeros_like(grid)
    return stats.gaussian_kde(values)(grid)


def ppc_findings(ppc: dict[str, Any]) -> list[str]:
    findings = []
    pit = ppc.get("loo_pit")
    if pit and pit["ks_pvalue"] < 0.01:
        findings.append(
            f"LOO-PIT values are not uniform (KS distance {pit['ks_distance']:.2f}, p = "
            f"{pit['ks_pvalue']:.3f}): the predictive spread does not match the data."
        )
    for row in ppc.get("test_statistics", []):
        if row["p_value"] < 0.01 or row["p_value"] > 0.99:
            findings.append(
                f"Posterior predictive p-value of {row['statistic']} is {row['p_value']:.3f}: "
                "the model rarely reproduces this feature of the data."
            )
    return findings


def innermost_groups(
    config: dict[str, Any], dataset: str, idata: az.InferenceData
) -> list[str] | None:
    """Innermost taxon label of each species, in the order of the fit's ``species`` dim."""
    levels: list[str] = []
    for source in dataset_config(config, dataset)["sources"]:
        levels = list(source["columns"].get("levels", [])) or levels
    if not levels:
        return None
    clean = paths.clean_path(config["results_dir"], dataset)
    if not clean.is_file():
        return None
    table = pd.read_csv(clean, dtype={"species": str})
    inner = levels[-1]
    if inner not in table.columns:
        return None
    mapping = dict(zip(table["species"], table[inner].astype(str), strict=True))
    species = idata.observed_data["trait"].coords.get("species")
    if species is None:
        return None
    labels = [mapping.get(str(s)) for s in species.values]
    return None if any(lbl is None for lbl in labels) else labels  # type: ignore[return-value]
