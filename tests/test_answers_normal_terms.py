"""The shared pieces of the normal full conditionals (allolaw.answers.normal_terms)."""

from __future__ import annotations

import numpy as np

from allolaw.answers.normal_terms import law_pieces, self_check
from allolaw.testing.posteriors import conjugate_line_posterior


def _spec(**extra):
    spec = {"name": "toy", "residuals": "normal", "curvature": "none", "breakpoint": "none"}
    spec.update(extra)
    return spec


def test_pieces_give_the_closed_form_conditional_of_the_slope():
    # y = a + b x + e with sigma known: given a, the slope's conditional precision is
    # prior precision + sum(x^2)/sigma^2 (Gelman et al. 2013, BDA3, section 14.2).
    line = conjugate_line_posterior(seed=3, sigma=0.3)
    law = law_pieces(line.idata, _spec())
    assert law is not None
    x = np.asarray(line.idata.constant_data["log_size_obs"].values)
    assert np.allclose(law.dx, x[None, :])
    assert np.allclose(law.var, 0.09)
    assert law.inner is None
    assert np.array_equal(law.per_species("curvature"), np.zeros((1, 1)))
    intercept = law.per_species("intercept")
    assert intercept.shape == (4000, 1)
    prec = 0.5**-2 + np.sum(law.dx**2 / law.var, axis=1)
    assert np.allclose(prec, 0.5**-2 + np.sum(x**2) / 0.09)


def test_correlated_or_heavy_tailed_residuals_give_no_pieces():
    line = conjugate_line_posterior(seed=3)
    assert law_pieces(line.idata, _spec(shared_ancestry="signal")) is None
    assert law_pieces(line.idata, _spec(residuals="student_t")) is None


def test_correlated_size_and_trait_errors_give_no_pieces():
    # the trait's mean then holds ρ·(s_y/s_x)·(measured − true size), not in the pieces
    line = conjugate_line_posterior(seed=3)
    assert law_pieces(line.idata, _spec()) is not None
    post = line.idata.posterior
    line.idata.posterior = post.assign(error_correlation=post["sigma"] * 0 + 0.5)
    assert law_pieces(line.idata, _spec()) is None


def test_self_check_passes_matching_conditionals_and_names_a_shifted_mean():
    rng = np.random.default_rng(0)
    means = rng.normal(1.0, 0.1, 4000)
    sds = np.full(4000, 0.2)
    draws = means + sds * rng.normal(size=4000)
    assert self_check(draws, means, sds) == ""
    assert "conditional means average" in self_check(draws, means + 0.5, sds)
    assert "variance ratio" in self_check(draws, means, sds * 3)
