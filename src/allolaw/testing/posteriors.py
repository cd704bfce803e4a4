"""Small hand-built InferenceData objects with known properties, for tests of checks.

Nothing here runs MCMC: draws come from known distributions (with optional, deliberate
defects), so every check can be made to pass and to fail on purpose.

* :func:`line_posterior` — a simple line ``trait = intercept + exponent·(x − x_ref) + noise``,
  with draws from its (normal-approximation) posterior, a ``trait`` log likelihood and sample
  stats in the style of PyMC, numpyro or nutpie. Keyword arguments inject defects: shifted
  chain means, a stuck chain, divergences, low BFMI, saturated tree depth, an outlier that
  gives a high Pareto k.
* :func:`conjugate_line_posterior` — exact posterior draws for a line with known residual SD
  and independent normal priors, with the closed-form marginal posterior and prior of the
  exponent, for Savage–Dickey checks.
"""

from __future__ import annotations

from dataclasses import dataclass

import arviz as az
import numpy as np

__all__ = [
    "ConjugateHierarchy",
    "ConjugateLine",
    "conjugate_hierarchy_posterior",
    "conjugate_line_posterior",
    "line_posterior",
]


def line_posterior(
    *,
    seed: int = 0,
    chains: int = 4,
    draws: int = 500,
    n_obs: int = 40,
    shift_chain: float = 0.0,
    stuck_chain: bool = False,
    n_divergent: int = 0,
    low_bfmi: bool = False,
    treedepth_saturated_share: float = 0.0,
    outlier_sd: float = 0.0,
    stats_style: str = "pymc",
    spread_factor: float = 1.0,
) -> az.InferenceData:
    """Return posterior draws of a simple line with optional, deliberate defects.

    Parameters
    ----------
    seed
        Seed of every random draw.
    chains, draws
        Shape of the posterior.
    n_obs
        Number of observations (species) in the ``trait`` log likelihood.
    shift_chain
        Added to every draw of ``exponent`` in the last chain, in posterior SDs.
    stuck_chain
        The last chain stays at one value of every parameter (no moves at all).
    n_divergent
        Number of draws (spread over chains) marked divergent.
    low_bfmi
        Energy follows a slow random walk, so the energy BFMI is far below 0.3.
    treedepth_saturated_share
        Share of draws that hit the maximum tree depth (10).
    outlier_sd
        If positive, the last observation is moved this many residual SDs off the line and the
        draws are taken from the posterior that ignores it: its log likelihood varies wildly
        over draws, which gives a high Pareto k.
    stats_style
        Names used in ``sample_stats``: ``"pymc"`` (``diverging``, ``energy``, ``tree_depth``,
        ``reached_max_treedepth``), ``"numpyro"`` (``diverging``, ``energy``, ``tree_depth``)
        or ``"nutpie"`` (``diverging``, ``energy``, ``depth``, ``maxdepth_reached``).
    spread_factor
        Multiplies the residual SD used by the log likelihood and the posterior predictive
        draws: below 1 the model claims too little spread (LOO-PIT values pile up at 0 and 1).
    """
    rng = np.random.default_rng(seed)
    a_true, b_true, s_true = 1.0, 0.75, 0.2
    x = np.sort(rng.uniform(-2.0, 2.0, n_obs))
    y = a_true + b_true * x + rng.normal(0.0, s_true, n_obs)
    if outlier_sd > 0:
        y[-1] = a_true + b_true * x[-1] + outlier_sd * s_true
    fit_x, fit_y = (x[:-1], y[:-1]) if outlier_sd > 0 else (x, y)
    n_fit = fit_x.size
    # Normal approximation of the posterior of (a, b) with sigma near its estimate (flat priors).
    design = np.column_stack([np.ones(n_fit), fit_x])
    coef, *_ = np.linalg.lstsq(design, fit_y, rcond=None)
    resid_sd = float(np.sqrt(np.sum((fit_y - design @ coef) ** 2) / (n_fit - 2)))
    cov = resid_sd**2 * np.linalg.inv(design.T @ design)
    ab = rng.multivariate_normal(coef, cov, size=(chains, draws))
    sigma = resid_sd * np.sqrt((n_fit - 2) / rng.chisquare(n_fit - 2, size=(chains, draws)))
    post = {"intercept": ab[..., 0], "exponent": ab[..., 1], "sigma": sigma}
    if shift_chain:
        post["exponent"][-1] += shift_chain * float(np.sqrt(cov[1, 1]))
    if stuck_chain:
        for name in post:
            post[name][-1] = post[name][-1, 0] + 3.0 * post[name].std()
    mu = post["intercept"][..., None] + post["exponent"][..., None] * x
    scale = spread_factor * post["sigma"][..., None]
    loglik = -0.5 * ((y - mu) / scale) ** 2 - np.log(scale) - 0.5 * np.log(2 * np.pi)
    yrep = mu + scale * rng.standard_normal(mu.shape)
    prior_a = rng.normal(0.0, 2.0, (1, 500))
    prior_b = rng.normal(0.75, 0.5, (1, 500))
    prior_s = np.abs(rng.normal(0.0, 1.0, (1, 500)))
    prior_y = (prior_a[..., None] + prior_b[..., None] * x
               + prior_s[..., None] * rng.standard_normal((1, 500, n_obs)))
    sample_stats = _sample_stats(
        rng, chains, draws, n_divergent, low_bfmi, treedepth_saturated_share, stats_style
    )
    species = [f"sp{i:03d}" for i in range(n_obs)]
    return az.from_dict(
        posterior=post,
        sample_stats=sample_stats,
        log_likelihood={"trait": loglik},
        posterior_predictive={"trait": yrep},
        prior={"intercept": prior_a, "exponent": prior_b, "sigma": prior_s},
        prior_predictive={"trait": prior_y},
        observed_data={"trait": y},
        constant_data={"log_size_obs": x, "log_size_ref": np.array(0.0)},
        coords={"species": species},
        dims={"trait": ["species"], "log_size_obs": ["species"]},
        attrs={"log_reference_size": 0.0},
    )


@dataclass
class ConjugateLine:
    """Exact posterior of a line with known residual SD and independent normal priors.

    Attributes
    ----------
    idata
        Posterior draws of ``intercept``, ``exponent`` and (constant) ``sigma``, with
        ``observed_data.trait`` and ``constant_data.log_size_obs``/``log_size_ref``.
    post_mean, post_sd
        Closed-form marginal posterior of ``exponent`` (normal).
    prior_mean, prior_sd
        Normal prior of ``exponent``.
    """

    idata: az.InferenceData
    post_mean: float
    post_sd: float
    prior_mean: float
    prior_sd: float

    def log_bf(self, value: float) -> float:
        """Closed-form Savage–Dickey log BF of ``exponent == value`` vs the free model."""
        return _log_normal(value, self.post_mean, self.post_sd) - _log_normal(
            value, self.prior_mean, self.prior_sd
        )


def conjugate_line_posterior(
    *,
    seed: int = 0,
    n_obs: int = 25,
    sigma: float = 0.3,
    true_exponent: float = 0.75,
    prior_mean: float = 0.75,
    prior_sd: float = 0.5,
    intercept_prior_sd: float = 5.0,
    chains: int = 4,
    draws: int = 1000,
) -> ConjugateLine:
    """Exact posterior draws for ``y = a + b·x + e``, ``e ~ N(0, sigma²)`` with sigma known.

    Priors ``a ~ N(0, intercept_prior_sd²)``, ``b ~ N(prior_mean, prior_sd²)``; the joint
    posterior of (a, b) is bivariate normal (Bayesian linear regression with known variance;
    Gelman et al. 2013, *Bayesian Data Analysis*, 3rd ed., section 14.2).
    """
    rng = np.random.default_rng(seed)
    x = np.sort(rng.uniform(-1.5, 1.5, n_obs))
    y = 0.5 + true_exponent * x + rng.normal(0.0, sigma, n_obs)
    design = np.column_stack([np.ones(n_obs), x])
    prior_prec = np.diag([intercept_prior_sd**-2, prior_sd**-2])
    prior_mu = np.array([0.0, prior_mean])
    prec = prior_prec + design.T @ design / sigma**2
    cov = np.linalg.inv(prec)
    mean = cov @ (prior_prec @ prior_mu + design.T @ y / sigma**2)
    ab = rng.multivariate_normal(mean, cov, size=(chains, draws))
    post = {
        "intercept": ab[..., 0],
        "exponent": ab[..., 1],
        "sigma": np.full((chains, draws), sigma),
    }
    idata = az.from_dict(
        posterior=post,
        observed_data={"trait": y},
        constant_data={"log_size_obs": x, "log_size_ref": np.array(0.0)},
        coords={"species": [f"sp{i:03d}" for i in range(n_obs)]},
        dims={"trait": ["species"], "log_size_obs": ["species"]},
    )
    return ConjugateLine(
        idata=idata,
        post_mean=float(mean[1]),
        post_sd=float(np.sqrt(cov[1, 1])),
        prior_mean=prior_mean,
        prior_sd=prior_sd,
    )


def _sample_stats(
    rng: np.random.Generator,
    chains: int,
    draws: int,
    n_divergent: int,
    low_bfmi: bool,
    saturated_share: float,
    style: str,
) -> dict[str, np.ndarray]:
    if low_bfmi:
        # E-BFMI = mean(ΔE²) / var(E): a slow random walk has tiny steps and a large spread.
        energy = np.cumsum(rng.normal(0.0, 0.1, (chains, draws)), axis=1) + 50.0
    else:
        energy = rng.normal(50.0, 2.0, (chains, draws))
    diverging = np.zeros((chains, draws), dtype=bool)
    if n_divergent:
        flat = rng.choice(chains * draws, size=n_divergent, replace=False)
        diverging.ravel()[flat] = True
    depth = rng.integers(2, 5, (chains, draws))
    n_sat = round(saturated_share * chains * draws)
    if n_sat:
        flat = rng.choice(chains * draws, size=n_sat, replace=False)
        depth.ravel()[flat] = 10
    reached = depth >= 10
    stats: dict[str, np.ndarray] = {"diverging": diverging, "energy": energy}
    if style == "pymc":
        stats.update(tree_depth=depth, reached_max_treedepth=reached)
    elif style == "numpyro":
        stats.update(tree_depth=depth)
    elif style == "nutpie":
        stats.update(depth=depth, maxdepth_reached=reached)
    else:
        msg = f"unknown stats_style {style!r} (pymc, numpyro or nutpie)"
        raise ValueError(msg)
    return stats


def _log_normal(x: float, mean: float, sd: float) -> float:
    return float(-0.5 * ((x - mean) / sd) ** 2 - np.log(sd) - 0.5 * np.log(2 * np.pi))



@dataclass
class ConjugateHierarchy:
    """Exact posterior of a normal–normal hierarchy with known SDs (population + taxa).

    ``taxon_exponent__group[j] ~ N(exponent, tau²)``, a per-taxon slope estimate
    ``est_j ~ N(taxon_exponent__group[j], se_j²)``, ``exponent ~ N(prior_mean, prior_sd²)``;
    every distribution is normal, so the joint posterior is normal (Gelman et al. 2013,
    *Bayesian Data Analysis*, 3rd ed., section 5.4, with tau known).
    """

    idata: az.InferenceData
    post_mean: float
    post_sd: float
    prior_mean: float
    prior_sd: float

    def log_bf(self, value: float) -> float:
        """Closed-form Savage–Dickey log BF of ``exponent == value`` vs the free model."""
        return _log_normal(value, self.post_mean, self.post_sd) - _log_normal(
            value, self.prior_mean, self.prior_sd
        )


def conjugate_hierarchy_posterior(
    *,
    seed: int = 0,
    n_taxa: int = 8,
    tau: float = 0.1,
    true_exponent: float = 0.72,
    prior_mean: float = 1.0,
    prior_sd: float = 1.0,
    chains: int = 4,
    draws: int = 1000,
) -> ConjugateHierarchy:
    """Exact joint posterior draws of a population exponent and its taxa (tau known)."""
    rng = np.random.default_rng(seed)
    se = rng.uniform(0.03, 0.1, n_taxa)
    theta = true_exponent + tau * rng.standard_normal(n_taxa)
    est = theta + se * rng.standard_normal(n_taxa)
    # joint prior of (exponent, theta_1..J)
    n = n_taxa + 1
    prior_cov = np.full((n, n), prior_sd**2)
    prior_cov[1:, 1:] += tau**2 * np.eye(n_taxa)
    prior_mu = np.full(n, prior_mean)
    # observe est = H z + noise with H picking the thetas
    H = np.hstack([np.zeros((n_taxa, 1)), np.eye(n_taxa)])
    S = H @ prior_cov @ H.T + np.diag(se**2)
    gain = prior_cov @ H.T @ np.linalg.inv(S)
    mean = prior_mu + gain @ (est - H @ prior_mu)
    cov = prior_cov - gain @ H @ prior_cov
    z = rng.multivariate_normal(mean, cov, size=(chains, draws))
    labels = [f"taxon{j}" for j in range(n_taxa)]
    idata = az.from_dict(
        posterior={
            "exponent": z[..., 0],
            "exponent_sd__group": np.full((chains, draws), tau),
            "taxon_exponent__group": z[..., 1:],
        },
        coords={"group": labels},
        dims={"taxon_exponent__group": ["group"]},
    )
    return ConjugateHierarchy(
        idata=idata,
        post_mean=float(mean[0]),
        post_sd=float(np.sqrt(cov[0, 0])),
        prior_mean=prior_mean,
        prior_sd=prior_sd,
    )
