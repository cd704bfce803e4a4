"""Convergence and sampler-health diagnostics of one fit: R-hat, ESS, MCSE, divergences,
tree depth, BFMI and Pareto k.

:func:`check_fit` turns an InferenceData into a :class:`CheckResult` (verdict pass/warn/fail and
one row per diagnostic) plus findings in plain words.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import arviz as az
import numpy as np

__all__ = ["CheckResult", "Diagnostic", "check_fit", "pareto_k_threshold"]

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
