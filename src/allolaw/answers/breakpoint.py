"""The breakpoint summary: break size, exponents on both sides, and the probability that
they differ by more than δ.
"""

from __future__ import annotations

from typing import Any

import arviz as az
import numpy as np

from allolaw.answers.draws import flat, summary_array

__all__ = ["summarise_breakpoint"]


def summarise_breakpoint(
    idata: az.InferenceData, *, delta: float = 0.03, unit: str = ""
) -> dict[str, Any]:
    """Break size (original units), exponents below and above, and P(|difference| > δ).

    Parameters
    ----------
    idata
        Fit with ``break_log_size``, ``exponent`` (below the break) and ``exponent_above``.
    delta
        Smallest difference of exponents that counts as a change (the hypotheses' δ).
    unit
        Canonical size unit, for the output.
    """
    post = idata.posterior
    brk = flat(post["break_log_size"])
    below = flat(post["exponent"])
    above = flat(post["exponent_above"])
    diff = above - below
    size = np.exp(brk)
    q = np.quantile(size, [0.05, 0.5, 0.95])
    return {
        "applicable": True,
        "break_size": {"unit": unit, "median": float(q[1]), "q05": float(q[0]),
                       "q95": float(q[2]), "mean_log": float(brk.mean())},
        "exponent_below": summary_array(below),
        "exponent_above": summary_array(above),
        "difference": summary_array(diff),
        "delta": float(delta),
        "p_abs_difference_above_delta": float(np.mean(np.abs(diff) > delta)),
        "p_exponent_increases": float(np.mean(diff > 0)),
    }
