"""Scatter that varies by taxon: one residual SD per taxon at a chosen level, partially pooled.

With ``scatter_by_taxon: <level>`` (or ``innermost``) each taxon t of that level has its own
residual SD, ``log σ_t ~ N(log σ, τ²)``: ``sigma`` (prior ``priors.sigma``) is then the typical
(median) residual SD and ``τ`` (``log_sigma_sd__<level>``, half-normal with scale
``priors.scatter_spread.sd``, default 0.5: a typical taxon's SD within a factor e^0.5 ≈ 1.6 of
the median one) how much the SDs differ. Written non-centred: standard normals
``log_sigma_z__<level>``, ``taxon_sigma__<level> = sigma·exp(τ·z)`` (dim ``<level>``).
Partial pooling of log residual variances in the manner of the hierarchical variance models
of Gelman et al. (2013, Bayesian Data Analysis 3rd ed., ch. 15; from memory for the chapter).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from allolaw.errors import UserError
from allolaw.model.spec import ModelSpec

__all__ = ["scatter_level", "scatter_term"]


def scatter_level(spec: ModelSpec, levels: list[str]) -> str | None:
    """The taxon level whose taxa get their own residual SD, or ``None``.

    Raises
    ------
    UserError
        If the spec names a level the dataset does not have, or the dataset has no levels.
    """
    chosen = spec.scatter_by_taxon
    if chosen == "none":
        return None
    if not levels:
        msg = (f"{spec.source or spec.name}: key 'scatter_by_taxon': bad value {chosen!r}: "
               "the dataset has no taxon levels")
        raise UserError(msg)
    if chosen == "innermost":
        return levels[-1]
    if chosen not in levels:
        msg = (f"{spec.source or spec.name}: key 'scatter_by_taxon': bad value {chosen!r}: "
               f"the dataset's levels are {list(levels)}")
        raise UserError(msg)
    return chosen


def scatter_term(model: Any, data: pd.DataFrame, spec: ModelSpec, sigma: Any, level: str
                 ) -> Any:
    """Per-row residual SD: the SD of each row's taxon at ``level``. Call inside the model."""
    import pymc as pm
    import pytensor.tensor as pt

    codes, uniques = pd.factorize(data[level].astype(str).to_numpy())
    labels = [str(u) for u in uniques]
    if level in model.coords:
        position = {label: k for k, label in enumerate(model.coords[level])}
        index = np.array([position[labels[c]] for c in codes], dtype=int)
    else:
        model.add_coord(level, labels)
        index = codes.astype(int)
    spread = pm.HalfNormal(f"log_sigma_sd__{level}",
                           float(spec.priors["scatter_spread"]["sd"]))
    z = pm.Normal(f"log_sigma_z__{level}", 0.0, 1.0, dims=level)
    per_taxon = pm.Deterministic(f"taxon_sigma__{level}", sigma * pt.exp(spread * z),
                                 dims=level)
    return per_taxon[index]
