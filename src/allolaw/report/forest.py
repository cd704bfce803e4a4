"""What stands beside each forest plot: per-taxon data and a warning for levels with few taxa.

For each taxon: its species count, size range and the unpooled exponent (ordinary least squares
of log trait on log size over its own species, no pooling), beside the fitted exponent. A level
with 3 taxa or fewer gets a warning with the width of the posterior 90% interval of its SD of
taxon exponents relative to the prior's: near 1 means the data hardly inform that SD, so how
far each taxon is pulled toward the population exponent is set by the prior.
"""

from __future__ import annotations

import json
import math
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats

__all__ = ["FEW_TAXA", "few_taxa_warning", "taxon_rows"]

#: Levels with this many taxa or fewer get the warning (common practice, no source).
FEW_TAXA = 3


def taxon_rows(clean: pd.DataFrame, level: str, labels: list[str], qs: np.ndarray
               ) -> list[dict[str, Any]]:
    """Per taxon: species count, size range, unpooled OLS exponent, fitted median (90%).

    ``qs`` holds the 5%, 50% and 95% quantiles of the fitted taxon exponents (3 × taxa).
    The unpooled exponent needs 3 species with different sizes, else it is ``None``.
    """
    rows = []
    for j, label in enumerate(labels):
        own = clean[clean[level].astype(str) == label] if level in clean.columns else clean[:0]
        x = own["log_size"].astype(float).to_numpy()
        y = own["log_trait"].astype(float).to_numpy()
        slope = None
        if x.size >= 3 and np.ptp(x) > 0:
            slope = float(stats.linregress(x, y).slope)
        rows.append({"taxon": label, "n_species": int(x.size),
                     "size_min": float(np.exp(x.min())) if x.size else None,
                     "size_max": float(np.exp(x.max())) if x.size else None,
                     "unpooled": slope, "q05": float(qs[0, j]), "median": float(qs[1, j]),
                     "q95": float(qs[2, j])})
    return rows


def few_taxa_warning(idata: Any, level: str, n_taxa: int) -> str | None:
    """The warning for a level with at most :data:`FEW_TAXA` taxa, or ``None``.

    The prior of ``exponent_sd__<level>`` is half-normal with the spec's scale (0.25, the
    schema default, when the fit does not say); its 90% interval runs from
    ``scale·Φ⁻¹(0.525)`` to ``scale·Φ⁻¹(0.975)``.
    """
    name = f"exponent_sd__{level}"
    if n_taxa > FEW_TAXA or name not in idata.posterior:
        return None
    raw = idata.attrs.get("spec")
    spec = json.loads(raw) if isinstance(raw, str) and raw else {}
    scale = float(spec.get("priors", {}).get("exponent_sd", {}).get("sd", 0.25))
    prior_width = scale * (stats.norm.ppf(0.975) - stats.norm.ppf(0.525))
    draws = np.asarray(idata.posterior[name].values, dtype=float).reshape(-1)
    q05, q95 = np.quantile(draws, [0.05, 0.95])
    ratio = float((q95 - q05) / prior_width) if prior_width > 0 else math.nan
    return (f"Only {n_taxa} taxa at level {level}: the SD of their exponents is learned from "
            f"{n_taxa} values, and the 90% interval of its posterior is {ratio:.2f} times as "
            "wide as its prior's; how far each taxon is pulled toward the population exponent "
            "depends on that prior.")
