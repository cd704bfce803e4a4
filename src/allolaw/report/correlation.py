"""The correlation of taxon deviations per level, in words, beside the taxon SDs.

With ``taxa.correlation: estimated`` a fit holds ``correlation_<a>_<b>__<level>`` for each pair
of terms that vary by taxon; the deviations (and so the correlation) are those at the data's
centre size, the exponential of the mean observed log size (``log_size_centre``), not at the
reference size (:mod:`allolaw.model.correlated`).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

__all__ = ["correlation_sentences"]

_WORDS = {"intercept": "intercepts", "exponent": "exponents", "curvature": "curvatures"}


def correlation_sentences(idata: Any, *, size_unit: str = "") -> list[str]:
    """One sentence per level and pair of terms: median correlation, 90% interval, direction.

    The direction is stated only when the 90% interval leaves out zero; otherwise the sentence
    says the data do not tell its sign.
    """
    post = idata.posterior
    names = sorted(str(v) for v in post.data_vars if str(v).startswith("correlation_")
                   and not str(v).startswith("correlation_partial"))
    if not names:
        return []
    centre = None
    if "constant_data" in idata.groups() and "log_size_centre" in idata.constant_data:
        centre = math.exp(float(np.asarray(idata.constant_data["log_size_centre"]).ravel()[0]))
    where = (f" (intercepts at the data's centre size, {centre:.3g} {size_unit}".rstrip()
             + ")" if centre is not None else " (intercepts at the data's centre size)")
    out = []
    for name in names:
        pair, level = name.removeprefix("correlation_").split("__", 1)
        first, second = pair.split("_", 1)
        draws = np.asarray(post[name].values, dtype=float).reshape(-1)
        q05, q50, q95 = np.quantile(draws, [0.05, 0.5, 0.95])
        if q05 > 0:
            how = (f"taxa with higher {_WORDS[first]} tend to have higher {_WORDS[second]}")
        elif q95 < 0:
            how = (f"taxa with higher {_WORDS[first]} tend to have lower {_WORDS[second]}")
        else:
            how = "the data do not tell its sign"
        text = (f"At level {level}, the correlation of taxon {_WORDS[first]} and "
                f"{_WORDS[second]}{where if first == 'intercept' else ''} is {q50:.2f} "
                f"(90% interval {q05:.2f} to {q95:.2f}): {how}.")
        out.append(text)
    return out
