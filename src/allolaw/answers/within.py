"""Within- versus between-species exponents of a fit with a within/between split.

Reads the posterior of a model built with ``within_species: separate`` (or
``separate_by_species``): ``within_exponent`` (the slope of log size around its species mean)
and ``exponent`` (the slope of species-mean log size). NumPy only.

References
----------
van de Pol, M. & Wright, J. (2009). A simple method for distinguishing within- versus
between-subject effects using mixed models. Animal Behaviour 77, 753-758.
"""

from __future__ import annotations

from typing import Any

import numpy as np

__all__ = ["compare_within_between"]


def compare_within_between(idata: Any, *, interval: float = 0.9) -> dict[str, Any] | None:
    """Posterior summary of ``within_exponent − exponent``, or ``None`` without a split.

    Parameters
    ----------
    idata
        InferenceData with ``posterior`` variables ``exponent`` and ``within_exponent``.
    interval
        Probability of the central interval reported (default 90%).

    Returns
    -------
    dict or None
        ``within``, ``between`` and ``difference`` (each ``median``, ``low``, ``high``) and
        ``p_within_steeper`` = P(within exponent > between exponent), the share of draws.
    """
    posterior = idata.posterior
    if "within_exponent" not in posterior or "exponent" not in posterior:
        return None
    within = np.asarray(posterior["within_exponent"]).ravel()
    between = np.asarray(posterior["exponent"]).ravel()
    difference = within - between
    tail = (1.0 - interval) / 2.0

    def summary(draws: np.ndarray) -> dict[str, float]:
        low, median, high = np.quantile(draws, [tail, 0.5, 1.0 - tail])
        return {"median": float(median), "low": float(low), "high": float(high)}

    return {
        "interval": interval,
        "within": summary(within),
        "between": summary(between),
        "difference": summary(difference),
        "p_within_steeper": float(np.mean(difference > 0)),
    }
