"""Tests of allolaw.phylogeny.density against dense multivariate normal densities."""

from __future__ import annotations

import numpy as np
import pytensor
import pytensor.tensor as pt
import pytest
import scipy.stats
from pytensor.graph.traversal import ancestors

from allolaw.phylogeny.density import (
    log_density,
    log_density_numpy,
    size_log_density,
    size_log_density_numpy,
)
from allolaw.phylogeny.simulate import random_tree
from allolaw.phylogeny.tree import tree_covariance

# trees: (tips, seed, polytomy share, zero-length internal share, ultrametric)
TREES = [
    (5, 1, 0.0, 0.0, True),
    (17, 2, 0.3, 0.2, False),
    (120, 3, 0.2, 0.1, False),
    (500, 4, 0.1, 0.05, False),
]


def _dense_logpdf(r, sigma, lam, phylo):
    # the definition: r ~ N(0, σ²(λC + (1 − λ)D)) (Pagel 1999), D = diag(C)
    C = tree_covariance(phylo)
    S = sigma**2 * (lam * C + (1.0 - lam) * np.diag(np.diag(C)))
    return scipy.stats.multivariate_normal(np.zeros(len(r)), S).logpdf(r)


@pytest.fixture(scope="module")
def compiled():
    r = pt.vector("r")
    s = pt.scalar("sigma")
    lam = pt.scalar("lam")
    cache = {}

    def get(phylo, key):
        if key not in cache:
            out = log_density(r, s, lam, phylo)
            grads = pt.grad(out, [r, s, lam])
            cache[key] = pytensor.function([r, s, lam], [out, *grads],
                                                 mode="FAST_COMPILE")
        return cache[key]

    return get


@pytest.mark.parametrize(("n", "seed", "poly", "zero", "ultra"), TREES)
@pytest.mark.parametrize("lam", [0.0, 0.3, 1.0])
def test_linear_time_density_equals_dense_normal(n, seed, poly, zero, ultra, lam, compiled):
    phylo = random_tree(n, seed=seed, polytomy_share=poly, zero_share=zero,
                        ultrametric=ultra)
    if poly:
        assert len(phylo.parent) < 2 * n - 1  # the tree really has polytomies
    r = np.random.default_rng(seed).normal(size=n) * 1.3
    sigma = 0.7
    # reference: scipy.stats.multivariate_normal with the dense covariance (Pagel 1999)
    want = _dense_logpdf(r, sigma, lam, phylo)
    assert log_density_numpy(r, sigma, lam, phylo) == pytest.approx(want, abs=1e-8)
    got = compiled(phylo, (n, seed))(r, sigma, lam)[0]
    assert float(got) == pytest.approx(want, abs=1e-8)


@pytest.mark.parametrize("lam", [0.3, 0.9])
def test_density_gradient_matches_finite_differences(lam, compiled):
    phylo = random_tree(40, seed=7, polytomy_share=0.3, zero_share=0.1)
    rng = np.random.default_rng(8)
    r = rng.normal(size=40)
    sigma = 1.4
    _, g_r, g_s, g_l = compiled(phylo, (40, 7))(r, sigma, lam)
    h = 1e-6

    # central differences of the NumPy density (which equals the dense one, test above)
    def f(rr=r, ss=sigma, ll=lam):
        return log_density_numpy(rr, ss, ll, phylo)

    fd_r = np.array([(f(rr=r + h * e) - f(rr=r - h * e)) / (2 * h) for e in np.eye(40)])
    np.testing.assert_allclose(g_r, fd_r, rtol=1e-5, atol=1e-6)
    assert float(g_s) == pytest.approx((f(ss=sigma + h) - f(ss=sigma - h)) / (2 * h), rel=1e-5)
    assert float(g_l) == pytest.approx((f(ll=lam + h) - f(ll=lam - h)) / (2 * h), rel=1e-5)


def test_size_density_is_brownian_motion_around_the_mean():
    phylo = random_tree(60, seed=11)
    sizes = np.random.default_rng(12).normal(3.0, 1.0, size=60)
    C = tree_covariance(phylo)
    # sizes ~ N(mean·1, sd² C): Brownian motion from the root value (Felsenstein 1985)
    want = scipy.stats.multivariate_normal(np.full(60, 2.5), 0.8**2 * C).logpdf(sizes)
    assert size_log_density_numpy(sizes, 2.5, 0.8, phylo) == pytest.approx(want, abs=1e-8)
    x = pt.vector("x")
    f = pytensor.function([x], size_log_density(x, 2.5, 0.8, phylo), mode="FAST_COMPILE")
    assert float(f(sizes)) == pytest.approx(want, abs=1e-8)


def test_graph_size_grows_with_levels_not_species():
    r = pt.vector("r")
    small = random_tree(200, seed=1)
    big = random_tree(2000, seed=1)
    n_small = len(list(ancestors([log_density(r, 1.0, 0.5, small)])))
    n_big = len(list(ancestors([log_density(r, 1.0, 0.5, big)])))
    per_level_small = n_small / len(small.levels)
    per_level_big = n_big / len(big.levels)
    # ten times the species: the graph per level stays the same size (a fixed set of ops)
    assert per_level_big == pytest.approx(per_level_small, rel=0.2)
