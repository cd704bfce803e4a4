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
from allolaw.phylogeny.tree_op import TreeDensity

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


def test_graph_is_one_tree_node_whatever_the_tree():
    # the messages are one operation (a loop over nodes): the graph does not grow with the tree
    r = pt.vector("r")
    sizes = []
    for n in (200, 2000):
        out = log_density(r, 1.0, 0.5, random_tree(n, seed=1))
        nodes = [v.owner for v in ancestors([out]) if v.owner is not None]
        assert sum(isinstance(a.op, TreeDensity) for a in nodes) == 1
        sizes.append(len(nodes))
    assert sizes[0] == sizes[1]


@pytest.mark.parametrize("mode", ["NUMBA", "JAX"])
def test_compiled_backends_equal_dense_density_and_finite_differences(mode):
    # the numba kernel and the JAX level form (with jax.grad) are separate implementations:
    # each against the dense density (scipy) and central differences of the NumPy twin
    phylo = random_tree(60, seed=21, polytomy_share=0.2, zero_share=0.1, ultrametric=False)
    rng = np.random.default_rng(22)
    r_val = rng.normal(size=60)
    r, s, lam = pt.vector("r"), pt.scalar("sigma"), pt.scalar("lam")
    out = log_density(r, s, lam, phylo)
    f = pytensor.function([r, s, lam], [out, *pt.grad(out, [r, s, lam])], mode=mode)
    h = 1e-6
    for lam_val in (0.0, 0.45, 1.0):
        value, g_r, g_s, g_l = f(r_val, 0.9, lam_val)
        assert float(value) == pytest.approx(_dense_logpdf(r_val, 0.9, lam_val, phylo), abs=1e-8)

        def fn(rr=r_val, ss=0.9, ll=lam_val):
            return log_density_numpy(rr, ss, ll, phylo)

        fd_r = np.array([(fn(rr=r_val + h * e) - fn(rr=r_val - h * e)) / (2 * h)
                         for e in np.eye(60)])
        np.testing.assert_allclose(g_r, fd_r, rtol=1e-5, atol=1e-6)
        assert float(g_s) == pytest.approx((fn(ss=0.9 + h) - fn(ss=0.9 - h)) / (2 * h),
                                           rel=1e-5)
        if 0.0 < lam_val < 1.0:
            assert float(g_l) == pytest.approx(
                (fn(ll=lam_val + h) - fn(ll=lam_val - h)) / (2 * h), rel=1e-5)
