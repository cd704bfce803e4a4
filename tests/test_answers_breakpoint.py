"""The breakpoint summary."""

import math

import arviz as az
import numpy as np
import pytest
from scipy import stats

from allolaw.answers.breakpoint import summarise_breakpoint


def test_breakpoint_summary_is_in_original_units_with_lognormal_quantiles():
    rng = np.random.default_rng(4)
    mu, sd = math.log(50.0), 0.1
    idata = az.from_dict(posterior={
        "break_log_size": rng.normal(mu, sd, (2, 5000)),
        "exponent": rng.normal(0.7, 0.02, (2, 5000)),
        "exponent_above": rng.normal(1.0, 0.02, (2, 5000)),
    })
    out = summarise_breakpoint(idata, delta=0.05, unit="um**3")
    # quantiles of a log-normal: exp(mu ± 1.645 sd) (closed form)
    assert out["break_size"]["median"] == pytest.approx(50.0, rel=0.01)
    assert out["break_size"]["q05"] == pytest.approx(math.exp(mu - 1.645 * sd), rel=0.01)
    assert out["break_size"]["unit"] == "um**3"
    assert out["difference"]["median"] == pytest.approx(0.3, abs=0.01)
    # difference ~ N(0.3, 0.02·√2): P(|d| > 0.05) = 1 to machine precision (closed form)
    assert out["p_abs_difference_above_delta"] == pytest.approx(
        stats.norm.sf(0.05, 0.3, 0.02 * math.sqrt(2)), abs=1e-3)
