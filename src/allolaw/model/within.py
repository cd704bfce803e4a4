"""Within- and between-species exponents by within-group centring.

With ``within_species: separate`` the log size x of each row is split into the mean of its
group at the innermost taxon level (the species, when rows are individuals) and the deviation
from that mean::

    log trait = a + b_between·(x̄_g − x_ref) + b_within·(x − x̄_g) + …

so ``exponent`` is the between-species exponent and ``within_exponent`` the within-species one.
The deviations sum to zero in every group, so with no other group terms the least-squares
``b_within`` equals the fixed-effects slope (one dummy per group), and ``b_between`` the slope
of group means (Mundlak 1978; van de Pol & Wright 2009).

References
----------
Mundlak, Y. (1978). On the pooling of time series and cross section data. Econometrica 46,
69-85.
van de Pol, M. & Wright, J. (2009). A simple method for distinguishing within- versus
between-subject effects using mixed models. Animal Behaviour 77, 753-758.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from allolaw.errors import UserError
from allolaw.model.spec import ModelSpec

__all__ = ["SizeSplit", "split_log_size"]


@dataclass(frozen=True)
class SizeSplit:
    """Log size split at one grouping level.

    Attributes
    ----------
    level
        The grouping level (innermost taxon level of the dataset).
    group_mean
        Per row, the mean observed log size of its group.
    deviation
        Per row, observed log size minus its group mean.
    """

    level: str
    group_mean: np.ndarray
    deviation: np.ndarray


def split_log_size(data: pd.DataFrame, spec: ModelSpec, *, levels: list[str]) -> SizeSplit:
    """Split the observed log size of ``data`` at the innermost of ``levels``.

    Raises
    ------
    UserError
        Without a taxon level, or with a spec option the split does not support.
    """
    source = spec.source or spec.name
    unsupported = [key for key, value in (("size_error", spec.size_error),
                                          ("curvature", spec.curvature),
                                          ("breakpoint", spec.breakpoint)) if value != "none"]
    if unsupported:
        msg = (
            f"{source}: key 'within_species': bad value 'separate': cannot be combined with "
            f"{', '.join(unsupported)} (the split uses observed log sizes and a straight law)"
        )
        raise UserError(msg)
    if not levels:
        msg = (
            f"{source}: key 'within_species': 'separate' needs a taxon level to group by "
            "(the species level of a dataset with `rows_are: individuals`); this dataset has none"
        )
        raise UserError(msg)
    level = levels[-1]
    log_size = data["log_size"].to_numpy(dtype=float)
    group_mean = data.groupby(level, sort=False)["log_size"].transform("mean").to_numpy(float)
    return SizeSplit(level, group_mean, log_size - group_mean)
