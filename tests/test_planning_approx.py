"""The fast analysis of simulated tables against closed forms and dense linear algebra."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate, stats

from allolaw.planning.approx import _logpost, _Stats, analyse_tables
from allolaw.planning.design import Analysis, Design
from allolaw.planning.simulate import DesignPrior, SimulatedTables, simulate_tables

NULL = 2 / 3
ALPHA = 0.05


def _flat(**kwargs) -> Analysis:
    # flat prior on intercept and exponent: the sampling-theory limit of the analysis
    return Analysis(exponent_prior=(1.0, math.inf), intercept_prior_sd=math.inf, **kwargs)


def test_one_sided_rejection_rate_equals_normal_power_with_known_sigma() -> None:
    # Known σ, no taxa, no size error, flat prior: the posterior of b is N(b̂, σ²/Sxx), so
    # "P(b ≤ 2/3 | y) < α" is the one-sided z-test of b = 2/3 at level α. Its power given the
    # sizes is 1 − Φ(z_{1−α} − (b − 2/3)·sqrt(Sxx)/σ) (Cohen 1988, Statistical Power Analysis,
    # ch. 2 set-up, with the normal in place of t because σ is known); with true log sizes
    # N(0, s²), Sxx/s² ~ χ²_{n−1}, so the power is that expression averaged over χ²_{n−1}.
    n, sigma, b, size_range, reps = 12, 0.3, 0.85, 3.0, 4000
    design = Design(species=n, taxa=1, size_range=size_range, size_error_sd=0.0, replicates=1)
    truth = DesignPrior(*(np.array([v]) for v in (b, 0.0, 0.0, sigma, 0.0)))
    sims = simulate_tables(design, truth, np.arange(reps), seed=7)
    post = analyse_tables(sims, _flat(scatter_fixed=sigma))
    rejected = post.cdf(NULL) < ALPHA
    s = size_range / 4
    z = stats.norm.ppf(1 - ALPHA)

    def power_given(u: float) -> float:
        return stats.norm.sf(z - (b - NULL) * s * math.sqrt(u) / sigma) * stats.chi2.pdf(u, n - 1)

    power = integrate.quad(power_given, 0, np.inf)[0]
    se = math.sqrt(power * (1 - power) / reps)
    assert 0.2 < power < 0.8  # a test that could fail either way
    assert abs(rejected.mean() - power) < 3 * se


def test_one_sided_rejection_rate_equals_noncentral_t_power_with_estimated_sigma() -> None:
    # Estimated σ with p(σ) ∝ 1/σ and a flat prior on (a, b): the posterior of b is Student-t
    # with n − 2 df around b̂ with scale s/sqrt(Sxx) (Gelman et al. 2013, BDA 3rd ed., sec.
    # 14.2), so the decision is the one-sided t-test and, at fixed sizes, its power is
    # P(T' > t_{1−α, n−2}) with T' noncentral t, df n − 2, noncentrality (b − 2/3)·sqrt(Sxx)/σ
    # (Cohen 1988, ch. 2). The analysis integrates σ on a 15-point Gauss–Hermite grid.
    n, sigma, b, reps = 12, 0.3, 0.8, 4000
    x = np.linspace(-1.0, 1.0, n)
    rng = np.random.default_rng(11)
    y = 0.5 + b * x + sigma * rng.standard_normal((reps, n))
    sims = SimulatedTables(log_size=np.tile(x, (reps, 1)), log_trait=y,
                           true_log_size=np.tile(x, (reps, 1)), taxon=np.zeros(n, int),
                           truth={}, size_error_sd=0.0, trait_error_sd=0.0,
                           table_ids=np.arange(reps))
    post = analyse_tables(sims, _flat(scatter_sd_scale=0.0, quadrature_points=15))
    rejected = post.cdf(NULL) < ALPHA
    sxx = float(np.sum((x - x.mean()) ** 2))
    nc = (b - NULL) * math.sqrt(sxx) / sigma
    power = stats.nct.sf(stats.t.ppf(1 - ALPHA, n - 2), n - 2, nc)
    se = math.sqrt(power * (1 - power) / reps)
    assert 0.2 < power < 0.8
    assert abs(rejected.mean() - power) < 3 * se


@pytest.mark.parametrize("curved", [False, True])
def test_integrated_likelihood_matches_dense_gaussian_marginal(curved: bool) -> None:
    # The per-taxon Woodbury sums must give the same log marginal likelihood (up to a
    # constant in θ) and the same posterior of (a, b[, c]) as dense algebra on the full
    # covariance V = noise·I + Z D Z' (Lindley & Smith 1972, JRSS B 34:1-41, the
    # linear-normal model); with `curved` a shared curvature column x² joins X (not Z).
    rng = np.random.default_rng(3)
    n, n_taxa = 15, 4
    taxon = np.arange(n) % n_taxa
    x = rng.normal(0, 1, n)
    y = 0.2 + 0.7 * x + 0.1 * x**2 + rng.normal(0, 0.3, n)
    analysis = Analysis(curvature=curved)
    stats_ = _Stats.build(x[None, :], y[None, :], taxon, n_taxa, analysis)
    free = ["intercept_sd", "exponent_sd", "scatter_sd"]
    X = np.column_stack([np.ones(n), x] + ([x**2] if curved else []))
    Z = np.zeros((n, 2 * n_taxa))
    Z[np.arange(n), 2 * taxon] = 1.0
    Z[np.arange(n), 2 * taxon + 1] = x
    m0 = np.array([np.median(y), 1.0] + ([0.0] if curved else []))
    P0 = np.diag([1 / 25, 1.0] + ([1 / 0.25**2] if curved else []))
    diffs = []
    for s_a, s_b, sig in [(0.3, 0.1, 0.25), (0.8, 0.02, 0.4)]:
        theta = np.log([[s_a, s_b, sig]])
        lp, mean, var = _logpost(theta, free, stats_, np.zeros(1), analysis)
        V = sig**2 * np.eye(n) + Z @ np.diag(np.tile([s_a**2, s_b**2], n_taxa)) @ Z.T
        marg = stats.multivariate_normal(X @ m0, V + X @ np.linalg.inv(P0) @ X.T).logpdf(y)
        prior = sum(np.log(s) - 0.5 * (s / k) ** 2 for s, k in ((s_a, 1), (s_b, 0.25),
                                                                (sig, 1)))
        diffs.append(float(lp[0]) - (marg + prior))
        Vi = np.linalg.inv(V)
        cov = np.linalg.inv(X.T @ Vi @ X + P0)
        mu = cov @ (X.T @ Vi @ y + P0 @ m0)
        np.testing.assert_allclose(mean[0], mu, rtol=1e-8)
        np.testing.assert_allclose(var[0], np.diag(cov), rtol=1e-8)
    assert abs(diffs[0] - diffs[1]) < 1e-8


def test_size_error_intervals_cover_the_true_exponent_at_reliability_08() -> None:
    # Recovery with known truth (invented data): true log sizes of SD 1 measured with error SD
    # 0.5 (reliability λ = 0.8); the naive slope is attenuated by λ (Fuller 1987, Measurement
    # Error Models, eq. 1.1.4). The 90 % intervals of the analysis must cover the truth in
    # 90 % of tables within Monte Carlo error, and the naive slope must be visibly attenuated.
    b, reps = 0.75, 1000
    design = Design(species=40, taxa=1, size_range=4.0, size_error_sd=0.5, replicates=1)
    truth = DesignPrior(*(np.array([v]) for v in (b, 0.0, 0.0, 0.2, 0.0)))
    sims = simulate_tables(design, truth, np.arange(reps), seed=5)
    post = analyse_tables(sims, Analysis())
    covered = (post.quantile(0.05) < b) & (b < post.quantile(0.95))
    w = sims.log_size - sims.log_size.mean(1, keepdims=True)
    naive = np.sum(w * sims.log_trait, 1) / np.sum(w * w, 1)
    assert abs(covered.mean() - 0.9) < 3 * math.sqrt(0.09 / reps)
    assert naive.mean() < 0.85 * b


def test_one_sided_curvature_detection_rate_equals_normal_power_with_known_sigma() -> None:
    # Known σ, no taxa, no size error, flat priors on (a, b, c), fixed sizes: the posterior of
    # c is N(ĉ, σ²·[(X'X)⁻¹]_cc), so "P(c ≤ 0 | y) < α" is the one-sided z-test of c = 0, with
    # power 1 − Φ(z_{1−α} − c/se_c) (Cohen 1988, ch. 2 set-up, normal because σ is known).
    n, sigma, c, reps = 20, 0.3, 0.06, 4000
    x = np.linspace(-2.0, 2.0, n)
    rng = np.random.default_rng(17)
    y = 0.3 + 0.75 * x + c * x**2 + sigma * rng.standard_normal((reps, n))
    sims = SimulatedTables(log_size=np.tile(x, (reps, 1)), log_trait=y,
                           true_log_size=np.tile(x, (reps, 1)), taxon=np.zeros(n, int),
                           truth={}, size_error_sd=0.0, trait_error_sd=0.0,
                           table_ids=np.arange(reps))
    analysis = _flat(scatter_fixed=sigma, curvature=True, curvature_prior=(0.0, math.inf))
    post = analyse_tables(sims, analysis, parameter="curvature")
    detected = post.cdf(0.0) < ALPHA
    X = np.column_stack([np.ones(n), x, x**2])
    se_c = sigma * math.sqrt(np.linalg.inv(X.T @ X)[2, 2])
    power = stats.norm.sf(stats.norm.ppf(1 - ALPHA) - c / se_c)
    se = math.sqrt(power * (1 - power) / reps)
    assert 0.2 < power < 0.8
    assert abs(detected.mean() - power) < 3 * se
