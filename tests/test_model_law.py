"""The posterior law evaluated from draws: the law's formula term by term."""

import arviz as az
import numpy as np
import pytest

from allolaw.errors import UserError
from allolaw.model.law import expected_log_trait


def test_expected_log_trait_follows_the_law_term_by_term():
    # hand-built posterior: 2 chains x 3 draws, one level with two taxa, a hinge
    rng = np.random.default_rng(0)
    shape = (2, 3)
    a, b, brk, above = (rng.normal(m, 0.1, shape) for m in (1.0, 0.8, 1.0, 0.4))
    ta = np.stack([a + 0.2, a - 0.2], axis=-1)
    tb = np.stack([b + 0.1, b - 0.1], axis=-1)
    idata = az.from_dict(
        posterior={"intercept": a, "exponent": b, "break_log_size": brk, "exponent_above": above,
                   "taxon_intercept__genus": ta, "taxon_exponent__genus": tb},
        coords={"genus": ["g1", "g2"]},
        dims={"taxon_intercept__genus": ["genus"], "taxon_exponent__genus": ["genus"]},
        constant_data={"log_size_ref": np.array(0.5), "hinge_width": np.array(0.1)},
    )
    grid = np.array([-1.0, 0.5, 3.0])

    def hinge(d):
        return 0.1 * np.logaddexp(0.0, d / 0.1)

    def law(i, s):
        slope_change = (above - b).reshape(-1, 1)
        return (i.reshape(-1, 1) + s.reshape(-1, 1) * (grid - 0.5)
                + slope_change * (hinge(grid - brk.reshape(-1, 1))
                                  - hinge(0.5 - brk.reshape(-1, 1))))

    np.testing.assert_allclose(expected_log_trait(idata, grid), law(a, b))
    np.testing.assert_allclose(expected_log_trait(idata, grid, level="genus", taxon="g2"),
                               law(a - 0.2, b - 0.1))
    # the intercept is the law at the reference size, hinge included
    np.testing.assert_allclose(expected_log_trait(idata, 0.5)[:, 0], a.reshape(-1))
    with pytest.raises(UserError, match="g3"):
        expected_log_trait(idata, grid, level="genus", taxon="g3")
    with pytest.raises(UserError, match="no taxon terms at level 'order'"):
        expected_log_trait(idata, grid, level="order", taxon="o1")


def test_expected_log_trait_adds_curvature_per_taxon():
    c = np.full((1, 2), -0.1)
    idata = az.from_dict(
        posterior={"intercept": np.zeros((1, 2)), "exponent": np.ones((1, 2)), "curvature": c,
                   "taxon_curvature__genus": np.stack([c - 0.05, c + 0.05], axis=-1)},
        coords={"genus": ["g1", "g2"]},
        dims={"taxon_curvature__genus": ["genus"]},
        constant_data={"log_size_ref": np.array(0.0)},
    )
    grid = np.array([-2.0, 2.0])
    np.testing.assert_allclose(expected_log_trait(idata, grid)[0], grid - 0.1 * grid**2)
    np.testing.assert_allclose(expected_log_trait(idata, grid, level="genus", taxon="g1")[0],
                               grid - 0.15 * grid**2)
