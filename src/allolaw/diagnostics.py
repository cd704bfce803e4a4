"""Checks of one fit: convergence, sampler health, importance-sampling reliability, predictions.

:func:`check_fit` turns an InferenceData into a :class:`CheckResult` (verdict pass/warn/fail
and one row per diagnostic) plus findings in plain words. :func:`check_dataset_model` is the
``check`` stage: it loads a fit, checks it, refits once with a higher target acceptance when
the sampler diverged, adds posterior and prior predictive checks and writes
``results/<d>/checks/<m>.json``. A failed check is written, never dropped: the verdict travels
on to the comparison and the report.
"""

from __future__ import annotations

import json
import logging
import math
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import arviz as az
import numpy as np
import pandas as pd
from scipy import stats

from allolaw import paths
from allolaw.config import dataset_config
from allolaw.errors import UserError
from allolaw.io import atomic_path, write_json

__all__ = [
    "CheckResult",
    "Diagnostic",
    "check_dataset_model",
    "check_fit",
    "pareto_k_threshold",
    "predictive_checks",
    "read_groups",
    "read_posterior",
]

log = logging.getLogger(__name__)

# Names of sample statistics in the outputs of PyMC, numpyro (through PyMC) and nutpie.
_DIVERGING = ("diverging", "divergences")
_REACHED_MAX_DEPTH = ("reached_max_treedepth", "maxdepth_reached")
_TREE_DEPTH = ("tree_depth", "depth", "treedepth__")
_DEFAULT_MAX_TREEDEPTH = 10  # PyMC, numpyro and nutpie default


@dataclass
class Diagnostic:
    """One diagnostic: its worst value, the threshold and the status."""

    name: str
    value: float | None
    threshold: float | None
    status: str  # pass | warn | fail | info
    message: str

    def to_dict(self) -> dict[str, Any]:
        value: float | str | None = self.value
        if self.value is not None and not math.isfinite(self.value):
            value = str(self.value)  # "nan" / "inf": shown, not dropped
        return {
            "name": self.name,
            "value": value,
            "threshold": self.threshold,
            "status": self.status,
            "message": self.message,
        }


@dataclass
class CheckResult:
    """Outcome of :func:`check_fit`."""

    verdict: str
    diagnostics: list[Diagnostic] = field(default_factory=list)
    n_divergent: int = 0
    n_draws: int = 0
    n_chains: int = 0

    def diagnostic(self, name: str) -> Diagnostic:
        """Return the diagnostic called ``name``."""
        for diag in self.diagnostics:
            if diag.name == name:
                return diag
        msg = f"no diagnostic named {name!r}"
        raise KeyError(msg)

    def to_list(self) -> list[dict[str, Any]]:
        return [d.to_dict() for d in self.diagnostics]


def check_fit(
    idata: az.InferenceData,
    *,
    rhat_max: float = 1.01,
    ess_bulk_min: float = 400,
    ess_tail_min: float = 400,
    bfmi_min: float = 0.3,
    max_treedepth_share: float = 0.01,
    pareto_k_max: float | None = None,
    var_names: list[str] | None = None,
) -> tuple[CheckResult, list[str]]:
    """Check convergence and sampler health of one fit.

    Parameters
    ----------
    idata
        The fit; needs ``posterior``; uses ``sample_stats`` and ``log_likelihood`` when present.
    rhat_max
        Largest acceptable rank-normalised split R-hat (Vehtari et al. 2021: 1.01). Above it
        the fit fails.
    ess_bulk_min, ess_tail_min
        Smallest acceptable bulk and tail effective sample size (Vehtari et al. 2021: 100 per
        chain, 400 for four chains). Below them the verdict is at least "warn".
    bfmi_min
        Smallest acceptable energy Bayesian fraction of missing information per chain
        (Betancourt 2016: 0.3). Below it the fit fails: the sampler cannot cross the energy
        levels the posterior needs.
    max_treedepth_share
        Largest acceptable share of draws that hit the maximum tree depth (warn; an
        efficiency problem, not a bias; common practice, no source).
    pareto_k_max
        Pareto k threshold for PSIS-LOO; ``None`` uses the sample-size-dependent
        ``min(1 − 1/log10(S), 0.7)`` of Vehtari et al. (2024). Above it: warn (the LOO
        estimate of that observation is unreliable; the posterior itself is not in doubt).
    var_names
        Posterior variables to check (default: all).

    Returns
    -------
    (CheckResult, list of str)
        The result and findings in plain words (one per diagnostic that is not a pass).

    References
    ----------
    Vehtari, A., Gelman, A., Simpson, D., Carpenter, B., Bürkner, P.-C. (2021). Rank-
    normalization, folding, and localization: an improved R-hat for assessing convergence of
    MCMC. Bayesian Analysis 16:667–718.

    Betancourt, M. (2016). Diagnosing suboptimal cotangent disintegrations in Hamiltonian
    Monte Carlo. arXiv:1604.00695.

    Vehtari, A., Simpson, D., Gelman, A., Yao, Y., Gabry, J. (2024). Pareto smoothed
    importance sampling. Journal of Machine Learning Research 25(72):1–58.
    """
    posterior = idata.posterior
    if var_names is not None:
        posterior = posterior[var_names]
    # fixed values stored as draws (e.g. a prior with `fixed:`) have no R-hat or ESS
    posterior = posterior[[name for name, da in posterior.data_vars.items()
                           if not _is_constant(da)]]
    n_chains = int(posterior.sizes["chain"])
    n_draws = int(posterior.sizes["draw"])
    diags: list[Diagnostic] = []

    diags.append(_rhat_diagnostic(posterior, rhat_max))
    diags.append(_ess_diagnostic(posterior, "bulk", ess_bulk_min))
    diags.append(_ess_diagnostic(posterior, "tail", ess_tail_min))
    diags.append(_mcse_diagnostic(posterior))
    stats_group = getattr(idata, "sample_stats", None)
    n_div = 0
    if stats_group is not None:
        div = _divergence_diagnostic(stats_group, n_chains * n_draws)
        if div is not None:
            n_div = int(div.value or 0)
            diags.append(div)
        depth = _treedepth_diagnostic(stats_group, max_treedepth_share)
        if depth is not None:
            diags.append(depth)
        if "energy" in stats_group:
            diags.append(_bfmi_diagnostic(idata, bfmi_min))
    if hasattr(idata, "log_likelihood"):
        diags.append(_pareto_diagnostic(idata, pareto_k_max))

    statuses = {d.status for d in diags}
    verdict = "fail" if "fail" in statuses else "warn" if "warn" in statuses else "pass"
    findings = [d.message for d in diags if d.status in {"warn", "fail"}]
    result = CheckResult(
        verdict=verdict, diagnostics=diags, n_divergent=n_div, n_draws=n_draws, n_chains=n_chains
    )
    return result, findings


def pareto_k_threshold(n_draws: int) -> float:
    """Sample-size-dependent Pareto k threshold ``min(1 − 1/log10(S), 0.7)``.

    References
    ----------
    Vehtari, A., Simpson, D., Gelman, A., Yao, Y., Gabry, J. (2024). Pareto smoothed
    importance sampling. JMLR 25(72), section 3.2.4.
    """
    if n_draws <= 10:
        return 0.0
    return float(min(1.0 - 1.0 / math.log10(n_draws), 0.7))


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


def check_dataset_model(
    config: dict[str, Any], dataset: str, model: str, *, threads: int = 1
) -> str:
    """The ``check`` stage: check one fit, refit once on divergences, write the check JSON.

    Parameters
    ----------
    config
        Validated batch config.
    dataset, model
        Names from the config.
    threads
        Cores for the one refit, if needed.

    Returns
    -------
    str
        The verdict, ``pass``, ``warn`` or ``fail``.
    """
    results = config["results_dir"]
    post_path = paths.posterior_path(results, dataset, model)
    if not post_path.is_file():
        msg = f"{post_path}: no fit of model '{model}' for dataset '{dataset}'; run `allolaw fit`"
        raise UserError(msg)
    start = time.perf_counter()
    idata = read_posterior(post_path)
    result, findings = check_fit(idata)
    refit: dict[str, Any] | None = None
    if result.n_divergent > 0:
        target = float(config["sampler"]["refit_target_accept"])
        before = _refit_numbers(result)
        log.info("%s/%s: %d divergences; refitting once with target_accept=%.3f",
                 dataset, model, result.n_divergent, target)
        from allolaw.fitting import fit_dataset_model

        refit_start = time.perf_counter()
        idata = fit_dataset_model(config, dataset, model, threads=threads, target_accept=target)
        refit_seconds = time.perf_counter() - refit_start
        result, findings = check_fit(idata)
        refit = {
            "reason": f"{before['n_divergent']} divergent transitions in the first fit",
            "target_accept": target,
            "before": before,
            "after": _refit_numbers(result),
        }
        # the refit's wall time goes to the posterior's attributes (which hold run times
        # anyway), not to the check JSON, which reruns must reproduce byte for byte
        idata.attrs["refit"] = json.dumps({**refit, "seconds": round(refit_seconds, 3)},
                                          sort_keys=True)
        idata.load()
        with atomic_path(post_path) as tmp:
            idata.to_netcdf(str(tmp))
        findings.insert(0, (
            f"The first fit had {before['n_divergent']} divergent transitions; it was refitted "
            f"once with target acceptance {target:g}, leaving {result.n_divergent}."
        ))
    groups = _innermost_groups(config, dataset, idata)
    ppc = predictive_checks(idata, groups=groups)
    findings.extend(_ppc_findings(ppc))
    payload = {
        "dataset": dataset,
        "model": model,
        "verdict": result.verdict,
        "diagnostics": result.to_list(),
        "findings": findings,
        "refit": refit,
        "ppc": ppc,
    }
    write_json(paths.check_path(results, dataset, model), _clean_json(payload))
    # the check runs inside the fit job of the workflow; this line is how
    # benchmarks/batch_cost.py tells its seconds from the fit's
    log.info("check %s/%s: %s; check done in %.2f s", dataset, model, result.verdict,
             time.perf_counter() - start)
    return result.verdict


def read_posterior(path: str | Path) -> az.InferenceData:
    """Read a ``posterior.nc`` fully into memory and close the file (it may be rewritten)."""
    with az.rc_context({"data.load": "eager"}):
        return az.from_netcdf(path)


def read_groups(path: str | Path, groups: tuple[str, ...]) -> az.InferenceData:
    """Read only some groups of a ``posterior.nc`` (and its attributes) into memory.

    A stage that needs a few groups reads only those: the predictive draws are the largest
    groups of a fit, and reading every group costs about twice as long
    (benchmarks/report_build.py). A group missing from the file is left out, except
    ``posterior``, whose absence raises :class:`OSError`.
    """
    import xarray as xr

    with xr.open_dataset(path, engine="h5netcdf") as root:
        attrs = dict(root.attrs)
    data = {}
    for group in groups:
        try:
            data[group] = xr.load_dataset(path, group=group, engine="h5netcdf")
        except OSError:
            if group == "posterior":
                raise
    idata = az.InferenceData(**data)
    idata.attrs.update(attrs)
    return idata


# --- diagnostics ----------------------------------------------------------------------------


def _is_constant(da: Any) -> bool:
    vals = np.asarray(da.values)
    return bool(vals.size == 0 or np.all(vals == vals.reshape(-1)[0]))


def _worst(ds: Any, *, largest: bool, posterior: Any = None) -> tuple[float, str]:
    worst_val, worst_name = (-math.inf if largest else math.inf), ""
    for name, da in ds.data_vars.items():
        vals = np.asarray(da.values, dtype=float).ravel()
        if posterior is not None:
            draws = np.asarray(posterior[name].values)
            varying = ~np.all(draws == draws[:1, :1], axis=(0, 1)).ravel()
            vals = vals[varying]  # elements fixed in every draw have no R-hat/ESS
        if vals.size == 0:
            continue
        if np.isnan(vals).any():
            return math.nan, str(name)
        v = float(vals.max() if largest else vals.min())
        if (largest and v > worst_val) or (not largest and v < worst_val):
            worst_val, worst_name = v, str(name)
    return worst_val, worst_name


def _rhat_diagnostic(posterior: Any, rhat_max: float) -> Diagnostic:
    value, name = _worst(az.rhat(posterior, method="rank"), largest=True, posterior=posterior)
    ok = math.isfinite(value) and value <= rhat_max
    if ok:
        msg = f"Chains agree: largest rank-normalised R-hat is {value:.3f} ({name})."
    else:
        msg = (f"Chains disagree: rank-normalised R-hat of '{name}' is {value:.3f}, above "
               f"{rhat_max}; the chains have not converged to one distribution.")
    return Diagnostic("rhat", value, rhat_max, "pass" if ok else "fail", msg)


def _ess_diagnostic(posterior: Any, method: str, minimum: float) -> Diagnostic:
    value, name = _worst(az.ess(posterior, method=method), largest=False, posterior=posterior)
    ok = math.isfinite(value) and value >= minimum
    if ok:
        msg = f"Enough {method} effective draws: smallest {method} ESS is {value:.0f} ({name})."
    else:
        msg = (f"Few {method} effective draws: '{name}' has {method} ESS {value:.0f}, below "
               f"{minimum:g}; estimates of {'the centre' if method == 'bulk' else 'intervals'} "
               "are noisy. Run longer chains.")
    return Diagnostic(f"ess_{method}", value, float(minimum), "pass" if ok else "warn", msg)


def _mcse_diagnostic(posterior: Any) -> Diagnostic:
    mcse = az.mcse(posterior, method="mean")
    sd = posterior.std(dim=("chain", "draw"))
    ratio = mcse / sd.where(sd > 0)
    value, name = _worst(ratio, largest=True)
    msg = (f"Monte Carlo error of posterior means is at most {value:.3f} posterior SDs "
           f"({name}).")
    return Diagnostic("mcse_mean_over_sd", value, None, "info", msg)


def _first_present(ds: Any, names: tuple[str, ...]) -> str | None:
    for name in names:
        if name in ds:
            return name
    return None


def _divergence_diagnostic(stats_group: Any, n_total: int) -> Diagnostic | None:
    name = _first_present(stats_group, _DIVERGING)
    if name is None:
        return None
    n_div = int(np.asarray(stats_group[name].values, dtype=bool).sum())
    if n_div == 0:
        return Diagnostic("divergences", 0.0, 0.0, "pass", "No divergent transitions.")
    msg = (f"{n_div} of {n_total} transitions diverged ({100 * n_div / n_total:.2f}%): the "
           "sampler met curvature it could not follow, so the draws may be biased.")
    return Diagnostic("divergences", float(n_div), 0.0, "fail", msg)


def _treedepth_diagnostic(stats_group: Any, max_share: float) -> Diagnostic | None:
    reached_name = _first_present(stats_group, _REACHED_MAX_DEPTH)
    if reached_name is not None:
        reached = np.asarray(stats_group[reached_name].values, dtype=bool)
    else:
        depth_name = _first_present(stats_group, _TREE_DEPTH)
        if depth_name is None:
            return None
        limit = stats_group.attrs.get("max_treedepth", _DEFAULT_MAX_TREEDEPTH)
        reached = np.asarray(stats_group[depth_name].values) >= int(limit)
    share = float(reached.mean())
    ok = share <= max_share
    msg = (f"{100 * share:.1f}% of draws hit the maximum tree depth"
           + ("." if ok else f" (more than {100 * max_share:g}%): sampling is inefficient, "
              "consider a reparameterisation."))
    return Diagnostic("treedepth_saturation", share, max_share, "pass" if ok else "warn", msg)


def _bfmi_diagnostic(idata: az.InferenceData, bfmi_min: float) -> Diagnostic:
    values = np.atleast_1d(az.bfmi(idata))
    value = float(np.min(values))
    ok = value >= bfmi_min
    if ok:
        msg = f"Energy BFMI is at least {value:.2f} in every chain."
    else:
        msg = (f"Energy BFMI is {value:.2f} in the worst chain, below {bfmi_min}: the sampler "
               "cannot move between energy levels well enough to explore the tails.")
    return Diagnostic("bfmi", value, bfmi_min, "pass" if ok else "fail", msg)


def _pareto_diagnostic(idata: az.InferenceData, k_max: float | None) -> Diagnostic:
    n_samples = int(idata.posterior.sizes["chain"] * idata.posterior.sizes["draw"])
    threshold = pareto_k_threshold(n_samples) if k_max is None else k_max
    var = "trait" if "trait" in idata.log_likelihood else None
    with np.errstate(all="ignore"):
        loo = _quiet_loo(idata, var)
    k = np.asarray(loo.pareto_k.values, dtype=float)
    n_bad = int(np.sum(~(k <= threshold)))
    value = float(np.nanmax(k)) if np.isfinite(k).any() else math.inf
    if n_bad == 0:
        msg = f"PSIS-LOO is reliable: largest Pareto k is {value:.2f} (threshold {threshold:.2f})."
        status = "pass"
    else:
        msg = (f"{n_bad} observation(s) have Pareto k above {threshold:.2f} (largest "
               f"{value:.2f}): their leave-one-out predictions are unreliable, so LOO model "
               "comparison involving this fit is uncertain.")
        status = "warn"
    return Diagnostic("pareto_k", value, threshold, status, msg)


def _quiet_loo(idata: az.InferenceData, var: str | None) -> Any:
    import warnings

    with warnings.catch_warnings():
        # ArviZ warns when Pareto k is high; that finding is reported by the caller.
        warnings.simplefilter("ignore", UserWarning)
        return az.loo(idata, pointwise=True, var_name=var)


def _refit_numbers(result: CheckResult) -> dict[str, Any]:
    return {
        "verdict": result.verdict,
        "n_divergent": result.n_divergent,
        "diagnostics": {d.name: d.value for d in result.diagnostics},
    }


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


def _ppc_findings(ppc: dict[str, Any]) -> list[str]:
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


def _innermost_groups(
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


def _clean_json(obj: Any) -> Any:
    """Replace NaN/inf (not JSON) by None, recursively."""
    if isinstance(obj, dict):
        return {k: _clean_json(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple):
        return [_clean_json(v) for v in obj]
    if isinstance(obj, float | np.floating) and not math.isfinite(float(obj)):
        return None
    if isinstance(obj, np.generic):
        return obj.item()
    return obj
