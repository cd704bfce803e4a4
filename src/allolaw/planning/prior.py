"""The design prior: the truth drawn, per simulated table, from a fitted posterior.

Assurance (O'Hagan & Stevens 2001) averages the power of a design over a prior for the truth
instead of fixing it at one value. Here that prior is the posterior of an earlier fit
(``posterior.nc``, data contract in DEVELOPERS.md): each simulated table takes one draw of
``exponent``, the taxon SDs, ``sigma`` and ``curvature``.

References
----------
O'Hagan, A., Stevens, J. W. (2001). Bayesian assessment of sample size for clinical trials of
cost-effectiveness. Medical Decision Making 21:219–230.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from allolaw.errors import UserError
from allolaw.planning.design import Truth
from allolaw.planning.simulate import DesignPrior

__all__ = ["read_design_prior"]


def read_design_prior(truth: Truth, *, root: str | Path = ".") -> DesignPrior:
    """The truth draws of a plan: a point mass, or the draws of ``truth.from_fit``.

    With several taxon levels in the fit the SDs of all levels are added in variance (the
    planned table has one level of taxa). A fit without taxon or curvature terms gives 0 for
    those. The fit's residual SD includes no measurement error (that is the design's).

    Raises
    ------
    UserError
        If the file is missing or has no ``exponent`` or ``sigma``.
    """
    if not truth.from_fit:
        return DesignPrior.point(truth)
    import xarray as xr

    path = Path(root) / truth.from_fit
    if not path.is_file():
        msg = f"plans: truth.from_fit: file not found: {path}"
        raise UserError(msg)
    post = xr.open_dataset(path, group="posterior")
    try:
        for name in ("exponent", "sigma"):
            if name not in post:
                msg = f"{path}: group 'posterior' has no variable {name!r} (needed as the truth)"
                raise UserError(msg)

        def flat(name: str) -> np.ndarray:
            return np.asarray(post[name].values, dtype=float).reshape(-1)

        n = flat("exponent").size

        def summed_sd(prefix: str) -> np.ndarray:
            names = [str(v) for v in post.data_vars if str(v).startswith(prefix)]
            return np.sqrt(sum((flat(v) ** 2 for v in names), np.zeros(n)))

        curvature = flat("curvature") if "curvature" in post else np.zeros(n)
        return DesignPrior(flat("exponent"), summed_sd("intercept_sd__"),
                           summed_sd("exponent_sd__"), flat("sigma"), curvature,
                           source=f"{n} posterior draws of {truth.from_fit}")
    finally:
        post.close()
