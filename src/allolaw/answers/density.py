"""The posterior density of one exponent: Rao–Blackwellised conditional or a parametric fit.

:func:`exponent_density` chooses the conditional (:mod:`allolaw.answers.node_tree`) where it
applies and passes its self-check, else :func:`fit_parametric`: a skew-normal fitted by moments
or a Student-t fitted by maximum likelihood, whichever fits the draws better.
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass, field
from typing import Any

import arviz as az
import numpy as np
from scipy import special, stats

from allolaw.answers.node_tree import Tree, conditional, node_draws, spec_dict
from allolaw.answers.normal_terms import self_check

__all__ = ["DensityEstimate", "exponent_density", "fit_parametric"]

log = logging.getLogger(__name__)

_RB_METHOD = "Savage–Dickey, Rao–Blackwellised normal full conditional"
_PARAM_METHOD = "Savage–Dickey, {family} fitted to draws"
_T_DF_GRID = (1000.0, 100.0, 40.0, 25.0, 16.0, 12.0, 8.0, 6.0, 4.0, 3.0, 2.0, 1.5, 1.0)


@dataclass
class DensityEstimate:
    """The posterior density of one exponent, as draws plus a density method."""

    draws: np.ndarray  # (S,)
    method: str
    cond_mean: np.ndarray | None = None  # (S,) Rao–Blackwellised conditional means
    cond_sd: np.ndarray | None = None
    rebuild: Any = None  # callable(prior_sd) -> (mean, sd) for the population node
    _fits: dict[int, Any] = field(default_factory=dict, repr=False)

    def parametric(self, weights: np.ndarray | None = None) -> Any:
        """The parametric density fitted to the (weighted) draws, cached per weight vector."""
        key = 0 if weights is None else id(weights)
        if key not in self._fits:
            self._fits[key] = fit_parametric(self.draws, _normalised(weights, self.draws.size))
        return self._fits[key]

    def logpdf(self, value: float, weights: np.ndarray | None = None,
               prior_sd: float | None = None) -> float:
        """Log posterior density at ``value`` (optionally reweighted, with a new prior SD)."""
        w = _normalised(weights, self.draws.size)
        if self.cond_mean is not None:
            mean, sd = self.cond_mean, self.cond_sd
            if prior_sd is not None and self.rebuild is not None:
                mean, sd = self.rebuild(prior_sd)
            logs = stats.norm.logpdf(value, mean, sd)
            return float(special.logsumexp(logs, b=w))
        return float(self.parametric(weights).logpdf(value))

    def cdf(self, value: float, weights: np.ndarray | None = None,
            prior_sd: float | None = None) -> float:
        """Posterior P(exponent < value)."""
        w = _normalised(weights, self.draws.size)
        if self.cond_mean is not None:
            mean, sd = self.cond_mean, self.cond_sd
            if prior_sd is not None and self.rebuild is not None:
                mean, sd = self.rebuild(prior_sd)
            return float(np.sum(w * stats.norm.cdf(value, mean, sd)))
        return float(np.sum(w * (self.draws < value)))


def exponent_density(
    idata: az.InferenceData, spec: Any, node: Any, *, density: str = "auto"
) -> DensityEstimate:
    """Density estimate of one exponent (the population one or one taxon's).

    See the module docstring for the methods; ``node`` is one item of the internal node list
    (population or a taxon at a level).
    """
    spec_d = spec_dict(spec)
    draws = node_draws(idata, node)
    if density == "parametric":
        return _parametric_estimate(draws, "")
    tree = Tree.from_idata(idata)
    cond = conditional(idata, spec_d, tree, node)
    if cond is None:
        if density == "conditional":
            msg = f"no normal full conditional for {node.label} in this model"
            raise ValueError(msg)
        return _parametric_estimate(draws, "")
    mean, sd, rebuild = cond
    problem = self_check(draws, mean, sd)
    if problem:
        if density == "conditional":
            msg = f"conditional of {node.label} fails its self-check: {problem}"
            raise ValueError(msg)
        log.warning("%s: conditional density not used (%s); parametric fit instead",
                    node.label, problem)
        return _parametric_estimate(draws, f" (conditional failed self-check: {problem})")
    return DensityEstimate(draws=draws, method=_RB_METHOD, cond_mean=mean, cond_sd=sd,
                           rebuild=rebuild)


def _normalised(weights: np.ndarray | None, n: int) -> np.ndarray:
    if weights is None:
        return np.full(n, 1.0 / n)
    return weights / weights.sum()


def fit_parametric(draws: np.ndarray, weights: np.ndarray) -> Any:
    """Fit a skew-normal (by moments) and a Student-t (by maximum likelihood) to weighted draws.

    Returns the frozen scipy distribution with the higher weighted log likelihood (both have
    three parameters). The skew-normal captures skew, the Student-t heavy tails (the marginal
    posterior of a regression slope with unknown residual SD is a Student-t; Gelman et al.
    2013, *Bayesian Data Analysis*, 3rd ed., section 14.2).

    References
    ----------
    Azzalini, A. (1985). A class of distributions which includes the normal ones.
    Scandinavian Journal of Statistics 12:171–178.
    """
    w = weights / weights.sum()
    candidates = [_skew_normal_moments(draws, w), _student_t_mle(draws, w)]
    scores = [float(np.sum(w * dist.logpdf(draws))) for dist in candidates]
    return candidates[int(np.argmax(scores))]


def _parametric_estimate(draws: np.ndarray, suffix: str) -> DensityEstimate:
    est = DensityEstimate(draws=draws, method="")
    family = "Student-t" if est.parametric().dist.name == "t" else "skew-normal"
    est.method = _PARAM_METHOD.format(family=family) + suffix
    return est


def _skew_normal_moments(draws: np.ndarray, w: np.ndarray) -> Any:
    """Skew-normal with the weighted mean, variance and skewness of the draws."""
    mean = float(np.sum(w * draws))
    var = float(np.sum(w * (draws - mean) ** 2))
    skew = float(np.sum(w * (draws - mean) ** 3)) / var**1.5 if var > 0 else 0.0
    # the skewness of a skew-normal is below 0.9953 in size (Azzalini 1985)
    skew = float(np.clip(skew, -0.99, 0.99))
    g = abs(skew) ** (2 / 3)
    c = ((4 - math.pi) / 2) ** (2 / 3)
    delta = math.copysign(math.sqrt(math.pi / 2 * g / (g + c)), skew)
    alpha = delta / math.sqrt(1 - delta**2)
    omega = math.sqrt(var / (1 - 2 * delta**2 / math.pi))
    xi = mean - omega * delta * math.sqrt(2 / math.pi)
    return stats.skewnorm(alpha, loc=xi, scale=omega)


def _student_t_mle(draws: np.ndarray, w: np.ndarray) -> Any:
    """Student-t by weighted maximum likelihood: EM for location and scale on a df grid.

    References
    ----------
    Lange, K. L., Little, R. J. A., Taylor, J. M. G. (1989). Robust statistical modeling using
    the t distribution. JASA 84:881–896.
    """
    best: tuple[float, float, float, float] | None = None
    centre = float(np.sum(w * draws))
    spread = float(np.sqrt(np.sum(w * (draws - centre) ** 2))) or 1.0
    loc, scale2 = centre, spread**2
    for df in _T_DF_GRID:  # from near-normal to heavy tails, each fit starting at the last
        for _ in range(15):
            u = (df + 1) / (df + (draws - loc) ** 2 / scale2)
            loc = float(np.sum(w * u * draws) / np.sum(w * u))
            scale2 = float(np.sum(w * u * (draws - loc) ** 2))
        ll = float(np.sum(w * stats.t.logpdf(draws, df, loc, math.sqrt(scale2))))
        if best is None or ll > best[0]:
            best = (ll, df, loc, math.sqrt(scale2))
    assert best is not None
    return stats.t(best[1], loc=best[2], scale=best[3])
