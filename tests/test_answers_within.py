"""Within versus between exponents (answers/within.py) on hand-built posteriors."""

import arviz as az
import numpy as np
import pytest

from allolaw.answers.within import compare_within_between


def test_difference_and_its_probability_follow_the_draws():
    # Hand-built draws: within ~ N(1.0, 0.05), between ~ N(0.75, 0.05), independent, so the
    # difference is N(0.25, 0.0707) and P(> 0) = Φ(0.25 / 0.0707) = Φ(3.54) ≈ 0.9998 (normal
    # table; closed form).
    rng = np.random.default_rng(0)
    idata = az.from_dict(posterior={"within_exponent": rng.normal(1.0, 0.05, (2, 20000)),
                                    "exponent": rng.normal(0.75, 0.05, (2, 20000))})
    result = compare_within_between(idata)
    assert result["difference"]["median"] == pytest.approx(0.25, abs=0.003)
    # 90% interval of N(0.25, 0.0707): 0.25 ± 1.6449 × 0.0707 (closed form).
    assert result["difference"]["low"] == pytest.approx(0.25 - 1.6449 * 0.0707, abs=0.005)
    assert result["p_within_steeper"] == pytest.approx(0.9998, abs=0.001)


def test_a_fit_without_a_split_has_no_comparison():
    idata = az.from_dict(posterior={"exponent": np.zeros((1, 10))})
    assert compare_within_between(idata) is None
