"""Scoring fits on misspecified data: bias, interval coverage, named-exponent ranking.

One fit of one scenario (:data:`SCENARIOS`, simulators of :mod:`allolaw.testing.misspecified`)
becomes one record (:func:`fit_scenario`, :func:`score_fit`); :func:`summarise_records` turns
the records into one row per scenario and model. ``benchmarks/misspecification.py`` runs the
fits in worker processes. :func:`corrected_slope` is the outside reference: the
reliability-corrected least-squares slope (Fuller 1987).
"""

from __future__ import annotations

import time
from collections.abc import Callable
from typing import Any

import numpy as np
import pandas as pd

from allolaw.testing.data import Simulated
from allolaw.testing.misspecified import (
    DESIGNS,
    simulate_correlated_errors,
    simulate_spread_taxa,
    simulate_taxon_scatter,
    simulate_three_levels,
)

__all__ = [
    "NAMED_EXPONENTS",
    "SCENARIOS",
    "corrected_slope",
    "fit_scenario",
    "interval_covers",
    "score_fit",
    "simulate_scenario",
    "summarise_records",
]

#: Named exponents ranked by :func:`allolaw.answers.hypotheses.compare_hypotheses` (equal weights).
NAMED_EXPONENTS = {
    "exponents": [{"name": "2/3", "value": 2.0 / 3.0, "weight": 1.0},
                  {"name": "3/4", "value": 0.75, "weight": 1.0},
                  {"name": "1", "value": 1.0, "weight": 1.0}],
    "other_weight": 1.0,
    "interval_halfwidth": 0.03,
    "bounds": [],
    "prior_scale_factors": [],
}

#: Scenario name -> (simulator, keyword arguments).
SCENARIOS: dict[str, tuple[Callable[..., Simulated], dict[str, Any]]] = {
    "spread_reliability": (simulate_spread_taxa, {}),
    "correlated_errors": (simulate_correlated_errors, {}),
    "taxon_scatter": (simulate_taxon_scatter, {}),
    "three_levels": (simulate_three_levels, {}),
    "wide_20x12": (simulate_spread_taxa, dict(DESIGNS["wide_20x12"])),
    "wide_8x15": (simulate_spread_taxa, dict(DESIGNS["wide_8x15"])),
}


def simulate_scenario(name: str, seed: int) -> Simulated:
    """The dataset of scenario ``name`` with ``seed``."""
    simulator, kwargs = SCENARIOS[name]
    return simulator(seed=seed, **kwargs)


def fit_scenario(
    name: str,
    seed: int,
    spec: Any,
    *,
    draws: int = 500,
    warmup: int = 500,
    chains: int = 4,
    target_acceptance: float = 0.9,
) -> dict[str, Any]:
    """Simulate scenario ``name`` with ``seed``, fit ``spec`` and score the fit.

    Sampling is :func:`allolaw.testing.quick_sample` (numpyro, chains in sequence) with
    seed ``seed``; the record is :func:`score_fit`'s plus the scenario, seed, sampler settings
    and wall seconds.
    """
    from allolaw.model.builder import build_model
    from allolaw.testing.data import quick_sample

    start = time.perf_counter()
    sim = simulate_scenario(name, seed)
    model = build_model(sim.data, spec, levels=sim.levels,
                        log_reference_size=sim.log_reference_size)
    idata = quick_sample(model, seed=seed, draws=draws, warmup=warmup, chains=chains,
                         target_acceptance=target_acceptance)
    record = {"scenario": name, "seed": seed, "model": spec.name, "draws": draws,
              "warmup": warmup, "chains": chains, "species": len(sim.data)}
    record |= score_fit(idata, sim, spec)
    record["seconds"] = time.perf_counter() - start
    return record


def score_fit(idata: Any, sim: Simulated, spec: Any, *, prob: float = 0.9) -> dict[str, Any]:
    """Bias, central-interval coverage, named-exponent probabilities and diagnostics of a fit.

    Returns
    -------
    dict
        ``true_exponent``, ``mean``, ``lo``, ``hi`` (central ``prob`` interval), ``bias``
        (posterior mean − truth), ``covers``; ``taxon`` (per level: ``hits``, ``intervals``),
        ``probabilities`` (named exponent -> posterior probability of the population
        exponent), ``top`` (the named exponent with the largest), ``top_is_true``;
        ``divergences`` and ``max_rhat`` (over the exponent, the taxon exponents and their
        SDs).
    """
    import arviz as az

    from allolaw.answers.hypotheses import compare_hypotheses

    post = idata.posterior
    draws = post["exponent"].values.reshape(-1)
    truth = float(sim.truth["exponent"])
    lo, hi, inside = interval_covers(draws[:, None], np.array([truth]), prob=prob)
    record: dict[str, Any] = {
        "true_exponent": truth, "mean": float(draws.mean()), "lo": float(lo[0]),
        "hi": float(hi[0]), "bias": float(draws.mean() - truth), "covers": bool(inside[0]),
        "taxon": {},
    }
    names = ["exponent"]
    for level in sim.levels:
        var = f"taxon_exponent__{level}"
        if var not in post:
            continue
        names += [var] + ([f"exponent_sd__{level}"] if f"exponent_sd__{level}" in post else [])
        labels = [str(v) for v in post[level].values]
        values = post[var].values.reshape(-1, len(labels))
        true = np.array([sim.truth[var][label] for label in labels])
        _, _, inside = interval_covers(values, true, prob=prob)
        record["taxon"][level] = {"hits": int(inside.sum()), "intervals": int(inside.size)}
    table = compare_hypotheses(idata, spec, NAMED_EXPONENTS)
    pop = table[(table["parameter"] == "exponent") & (table["kind"] == "point")
                & (table["level"].fillna("") == "")]
    probs = {str(r.hypothesis): float(r.posterior_prob) for r in pop.itertuples()}
    record["probabilities"] = probs
    true_name = next((h["name"] for h in NAMED_EXPONENTS["exponents"]
                      if abs(h["value"] - truth) < 1e-9), None)
    record["top"] = max(probs, key=probs.__getitem__) if probs else None
    record["top_is_true"] = record["top"] is not None and record["top"] == true_name
    rhat = az.rhat(idata, var_names=names)
    record["max_rhat"] = float(max(float(rhat[v].max()) for v in names))
    record["divergences"] = int(idata.sample_stats["diverging"].sum())
    return record


def interval_covers(
    draws: np.ndarray, truth: np.ndarray, *, prob: float = 0.9
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Central ``prob`` intervals of each column of ``draws`` and whether they hold ``truth``.

    ``draws`` is (draws, k), ``truth`` (k,). The interval runs from the ``(1 − prob)/2`` to
    the ``(1 + prob)/2`` quantile (linear interpolation, NumPy's default); a truth on an end
    counts as inside.
    """
    draws = np.asarray(draws, dtype=float)
    truth = np.asarray(truth, dtype=float)
    tail = (1.0 - prob) / 2.0
    lo, hi = np.quantile(draws, [tail, 1.0 - tail], axis=0)
    return lo, hi, (lo <= truth) & (truth <= hi)


def summarise_records(records: list[dict[str, Any]]) -> pd.DataFrame:
    """One row per scenario and model: fits, mean bias, coverage, top-ranked share, diagnostics.

    Columns: ``scenario, model, fits, true_exponent, mean_estimate, mean_bias,
    coverage_exponent, coverage_taxon, taxon_intervals, top_true_share, mean_p_true,
    divergences, max_rhat``. Coverages are shares of intervals holding the truth;
    ``mean_p_true`` is the mean posterior probability of the true named exponent.
    """
    rows = []
    frame = pd.DataFrame(records)
    for (scenario, model), group in frame.groupby(["scenario", "model"], sort=False):
        taxon_hits = sum(sum(v["hits"] for v in t.values()) for t in group["taxon"])
        taxon_n = sum(sum(v["intervals"] for v in t.values()) for t in group["taxon"])
        p_true = [_p_true(r) for r in group.to_dict("records")]
        rows.append({
            "scenario": scenario, "model": model, "fits": len(group),
            "true_exponent": float(group["true_exponent"].iloc[0]),
            "mean_estimate": float(group["mean"].mean()),
            "mean_bias": float(group["bias"].mean()),
            "coverage_exponent": float(group["covers"].mean()),
            "coverage_taxon": taxon_hits / taxon_n if taxon_n else float("nan"),
            "taxon_intervals": int(taxon_n),
            "top_true_share": float(group["top_is_true"].mean()),
            "mean_p_true": float(np.nanmean(p_true)) if p_true else float("nan"),
            "divergences": int(group["divergences"].sum()),
            "max_rhat": float(group["max_rhat"].max()),
        })
    return pd.DataFrame(rows)


def _p_true(record: dict[str, Any]) -> float:
    truth = record["true_exponent"]
    for h in NAMED_EXPONENTS["exponents"]:
        if abs(h["value"] - truth) < 1e-9:
            return float(record["probabilities"].get(h["name"], np.nan))
    return float("nan")


def corrected_slope(
    log_size: np.ndarray,
    log_trait: np.ndarray,
    error_var: np.ndarray | float,
    *,
    groups: np.ndarray | None = None,
) -> dict[str, float]:
    """Least-squares slope corrected for size error by the reliability ratio.

    ``slope = slope_OLS / λ`` with ``λ = (s²_x − σ̄²_u) / s²_x``, s²_x the variance of the
    measured log sizes and σ̄²_u the mean error variance (Fuller 1987, §1.1, eq. 1.1.6 with
    the moment estimator of §1.2 for known error variance). With ``groups`` both axes are
    centred within each group first, so slope and reliability are the within-group ones.

    References
    ----------
    .. [1] Fuller, W. A. (1987). Measurement Error Models. Wiley, New York. §1.1–1.2.
    """
    x = np.asarray(log_size, dtype=float)
    y = np.asarray(log_trait, dtype=float)
    u = np.broadcast_to(np.asarray(error_var, dtype=float), x.shape)
    dof = x.size - 1
    if groups is not None:
        g = pd.Series(np.asarray(groups))
        x = x - pd.Series(x).groupby(g).transform("mean").to_numpy()
        y = y - pd.Series(y).groupby(g).transform("mean").to_numpy()
        dof = x.size - g.nunique()
        # within a group of n, centring removes a share 1/n of each error variance
        sizes = g.map(g.value_counts()).to_numpy(dtype=float)
        u = u * (1.0 - 1.0 / sizes)
    s_xx = float(np.sum(x**2) / dof) if groups is not None else float(np.var(x, ddof=1))
    s_xy = float(np.sum((x - x.mean()) * (y - y.mean())) / dof)
    naive = s_xy / s_xx
    error = float(np.sum(u) / dof)
    reliability = (s_xx - error) / s_xx
    return {"ols": naive, "reliability": reliability, "slope": naive / reliability}
