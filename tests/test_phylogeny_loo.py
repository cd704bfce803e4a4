"""Tests of allolaw.phylogeny.loo and allolaw.phylogeny.gls against dense formulas."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm

from allolaw.phylogeny.gls import gls_estimate, precision_times
from allolaw.phylogeny.loo import loo_conditionals, loo_log_density
from allolaw.phylogeny.simulate import random_tree
from allolaw.phylogeny.tree import tree_covariance


def _pagel(phylo, lam):
    # λC + (1 − λ)D (Pagel 1999)
    C = tree_covariance(phylo)
    return lam * C + (1.0 - lam) * np.diag(np.diag(C))


@pytest.mark.parametrize(("n", "seed"), [(5, 1), (33, 2), (250, 3)])
def test_loo_densities_equal_dense_conditional_normal(n, seed):
    phylo = random_tree(n, seed=seed, polytomy_share=0.3, zero_share=0.1)
    rng = np.random.default_rng(seed)
    lam = np.array([0.0, 0.3, 1.0])
    sigma = np.array([0.5, 1.0, 2.0])
    r = rng.normal(size=(3, n))
    got = loo_log_density(r, sigma, lam, phylo)
    for d in range(3):
        Q = np.linalg.inv(sigma[d] ** 2 * _pagel(phylo, lam[d]))
        # Bürkner, Gabry & Vehtari (2020), normal case: y_i | y_−i has mean
        # y_i − (Q y)_i / Q_ii and variance 1 / Q_ii
        mean = r[d] - Q @ r[d] / np.diag(Q)
        var = 1.0 / np.diag(Q)
        want = -0.5 * (np.log(2 * np.pi * var) + (r[d] - mean) ** 2 / var)
        np.testing.assert_allclose(got[d], want, rtol=0, atol=1e-8)


def test_loo_conditionals_accept_one_vector():
    phylo = random_tree(20, seed=5)
    r = np.random.default_rng(5).normal(size=20)
    mean, var = loo_conditionals(r, 0.6, phylo)
    Q = np.linalg.inv(_pagel(phylo, 0.6))
    # the same dense formula (Bürkner, Gabry & Vehtari 2020)
    np.testing.assert_allclose(var, 1.0 / np.diag(Q), rtol=1e-10)
    np.testing.assert_allclose(mean, r - Q @ r / np.diag(Q), atol=1e-10)


def test_precision_times_equals_inverse_covariance_product():
    phylo = random_tree(80, seed=9, polytomy_share=0.2)
    v = np.random.default_rng(9).normal(size=(4, 80))
    want = np.linalg.solve(_pagel(phylo, 0.4), v.T).T  # dense Σ⁻¹ v
    np.testing.assert_allclose(precision_times(v, 0.4, phylo), want, atol=1e-8)


@pytest.mark.parametrize("ultrametric", [True, False])
def test_gls_slope_equals_statsmodels_gls_with_tree_covariance(ultrametric):
    phylo = random_tree(150, seed=21, ultrametric=ultrametric)
    rng = np.random.default_rng(21)
    C = tree_covariance(phylo)
    x = rng.multivariate_normal(np.zeros(150), C)
    y = 0.4 + 0.75 * x + rng.multivariate_normal(np.zeros(150), 0.3**2 * C)
    X = np.column_stack([np.ones(150), x])
    beta, cov = gls_estimate(y, X, phylogeny=phylo, lam=1.0)
    # phylogenetic GLS (Grafen 1989) = statsmodels GLS with the tree covariance
    ref = sm.GLS(y, X, sigma=C).fit()
    np.testing.assert_allclose(beta, ref.params, rtol=0, atol=1e-8)
    np.testing.assert_allclose(cov, ref.normalized_cov_params, rtol=1e-8)


def test_loo_in_chunks_equals_loo_at_once():
    phylo = random_tree(30, seed=12)
    rng = np.random.default_rng(12)
    r = rng.normal(size=(7, 30))
    sigma = rng.uniform(0.5, 2, size=7)
    lam = rng.uniform(size=7)
    whole = loo_log_density(r, sigma, lam, phylo, chunk=100)
    np.testing.assert_allclose(loo_log_density(r, sigma, lam, phylo, chunk=3), whole,
                               rtol=1e-14)
    # a single draw with scalar σ and λ gives that draw's row
    np.testing.assert_allclose(loo_log_density(r[4], sigma[4], lam[4], phylo), whole[4],
                               rtol=1e-14)
