"""The law a fit describes, evaluated from its draws: NumPy only.

Kept apart from :mod:`allolaw.model.builder` (which imports PyMC) so that the stages that only
read fits (compare, report) do not pay PyMC's import.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from allolaw.errors import UserError

__all__ = ["TAXON_TERMS", "expected_log_trait", "smooth_hinge"]

#: The terms of the law that can vary between taxa.
TAXON_TERMS = ("intercept", "exponent", "curvature")


def expected_log_trait(
    idata: Any,
    log_size: np.ndarray | list[float] | float,
    *,
    level: str | None = None,
    taxon: str | None = None,
) -> np.ndarray:
    """Posterior draws of the law (expected log trait) at given natural-log sizes.

    Parameters
    ----------
    idata
        InferenceData of a fit of :func:`allolaw.model.builder.build_model` (``posterior`` and
        ``constant_data``).
    log_size
        Natural logs of size (canonical unit), the grid.
    level, taxon
        A taxon level and one taxon of it for that taxon's law; both ``None`` for the
        population law. Terms that do not vary at that level are the population values.

    Returns
    -------
    numpy.ndarray
        Shape ``(draws, grid)`` with chains stacked; covariates at their centre (mean).
    """
    post = idata.posterior
    grid = np.atleast_1d(np.asarray(log_size, dtype=float))
    ref = _scalar(idata.constant_data["log_size_ref"])
    if (level is None) != (taxon is None):
        msg = "expected_log_trait: give both level and taxon, or neither"
        raise ValueError(msg)

    def draws(name: str) -> np.ndarray:
        var = post[name]
        if level is not None and f"taxon_{name}__{level}" in post:
            var = post[f"taxon_{name}__{level}"]
            labels = [str(v) for v in var[level].values]
            if str(taxon) not in labels:
                msg = f"taxon {taxon!r} is not a taxon of level '{level}' (known: {labels})"
                raise UserError(msg)
            var = var.isel({level: labels.index(str(taxon))})
        return var.values.reshape(-1)

    if level is not None and not any(f"taxon_{t}__{level}" in post for t in TAXON_TERMS):
        msg = f"the model has no taxon terms at level '{level}'"
        raise UserError(msg)
    a = draws("intercept")
    b = draws("exponent")
    dx = grid[None, :] - ref
    out = a[:, None] + b[:, None] * dx
    if "curvature" in post:
        out = out + draws("curvature")[:, None] * dx**2
    if "break_log_size" in post:
        width = _scalar(idata.constant_data["hinge_width"])
        brk = post["break_log_size"].values.reshape(-1)[:, None]
        pop_b = post["exponent"].values.reshape(-1)
        above = post["exponent_above"].values.reshape(-1) + (b - pop_b)
        out = out + (above - b)[:, None] * (
            smooth_hinge(grid[None, :] - brk, width) - smooth_hinge(ref - brk, width)
        )
    return out


def _scalar(var: Any) -> float:
    # constant data may carry a length-1 dim when read back from some writers
    return float(np.asarray(var.values).reshape(-1)[0])


def smooth_hinge(d: np.ndarray, width: float) -> np.ndarray:
    """The break models' softplus hinge ``width · log(1 + exp(d / width))`` (NumPy)."""
    return width * np.logaddexp(0.0, d / width)
