"""Within- and between-species exponents by within-group centring.

With ``within_species: separate`` the log size x of each row is split into the mean of its
group at the innermost taxon level (the species, when rows are individuals) and the deviation
from that mean::

    log trait = a + b_between·(x̄_g − x_ref) + b_within·(x − x̄_g) + …

so ``exponent`` is the between-species exponent and ``within_exponent`` the within-species one.
With ``within_species: separate_by_species`` each group has its own within exponent, a normal
deviation from ``within_exponent`` with SD ``within_exponent_sd`` (partial pooling; written
non-centred), reported per group as ``taxon_within_exponent__<level>``.
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
from typing import Any

import numpy as np
import pandas as pd

from allolaw.errors import UserError
from allolaw.model.inputs import select_levels
from allolaw.model.spec import ModelSpec

__all__ = ["SizeSplit", "latent_split", "species_grouping_warning", "split_log_size",
           "within_term"]


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
    labels: list[str]
    index: np.ndarray


def split_log_size(data: pd.DataFrame, spec: ModelSpec, *, levels: list[str]) -> SizeSplit:
    """Split the observed log size of ``data`` at the innermost of ``levels``.

    Raises
    ------
    UserError
        Without a taxon level, or with a spec option the split does not support.
    """
    source = spec.source or spec.name
    unsupported = [key for key, value in (("curvature", spec.curvature),
                                          ("breakpoint", spec.breakpoint)) if value != "none"]
    if unsupported:
        msg = (
            f"{source}: key 'within_species': bad value 'separate': cannot be combined with "
            f"{', '.join(unsupported)} (the split assumes a straight law)"
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
    codes, uniques = pd.factorize(data[level].astype(str).to_numpy())
    return SizeSplit(level, group_mean, log_size - group_mean, [str(u) for u in uniques],
                     codes.astype(int))


def species_grouping_warning(spec: ModelSpec, *, levels: list[str], rows_are: str
                             ) -> str | None:
    """A warning when rows are individuals but the spec has no term at the species level.

    With ``rows_are: individuals`` the species is the innermost of ``levels``; a spec without
    taxon terms there (``pooled``, or ``taxa.levels`` that leave the species out) treats the
    individuals of a species as independent observations, so the species grouping is
    ignored. Returns the sentence, or ``None`` when there is nothing to warn about.
    """
    if rows_are != "individuals" or not levels:
        return None
    species = levels[-1]
    if species in select_levels(spec, levels):
        return None
    return (
        f"model {spec.name}: the rows of this dataset are individuals (rows_are: individuals) "
        f"but the model has no taxon term at the species level '{species}', so it treats "
        "every individual as an independent observation and ignores which species it "
        "belongs to: the exponent mixes within- and between-species scaling and its interval "
        "is too narrow when individuals of a species resemble each other. Use a spec with "
        "`taxa: {levels: all}` (or one that lists the species level)."
    )


def latent_split(split: SizeSplit, true_log_size: Any) -> tuple[Any, Any]:
    """Group mean and deviation of the latent true log sizes (size measured with error).

    The same split as :func:`split_log_size`, applied to the model's true log sizes rather
    than the measured ones, so that the within-species slope acts on true deviations (a
    slope on measured deviations is diluted by the within-group reliability; Fuller 1987,
    §1.1). Returns two tensors, one value per row.
    """
    import pytensor.tensor as pt

    counts = np.bincount(split.index, minlength=len(split.labels)).astype(float)
    sums = pt.inc_subtensor(pt.zeros(len(split.labels))[split.index], true_log_size)
    group_mean = (sums / counts)[split.index]
    return group_mean, true_log_size - group_mean


def within_term(model: Any, split: SizeSplit, spec: ModelSpec, deviation: Any = None) -> Any:
    """Add the within-group slope to ``model`` and return its part of the law, per row.

    ``deviation`` replaces the measured deviations by a tensor (the latent ones of
    :func:`latent_split`); the constant data ``within_log_size`` keeps the measured ones.

    Creates ``within_exponent`` and the data ``within_log_size``; with
    ``separate_by_species`` also ``within_exponent_sd__<level>``, the standard normal
    ``within_exponent_z__<level>`` and ``taxon_within_exponent__<level>`` (dim ``<level>``).
    Call inside the model context.
    """
    import pymc as pm

    pri = spec.priors
    within = pm.Normal("within_exponent", float(pri["within_exponent"]["mean"]),
                       float(pri["within_exponent"]["sd"]))
    measured = pm.Data("within_log_size", split.deviation, dims="species")
    deviation = measured if deviation is None else deviation
    if spec.within_species != "separate_by_species":
        return within * deviation
    level = split.level
    if level in model.coords:
        position = {label: k for k, label in enumerate(model.coords[level])}
        index = np.array([position[split.labels[c]] for c in split.index], dtype=int)
    else:
        model.add_coord(level, split.labels)
        index = split.index
    sd = pm.HalfNormal(f"within_exponent_sd__{level}", float(pri["within_exponent_sd"]["sd"]))
    z = pm.Normal(f"within_exponent_z__{level}", 0.0, 1.0, dims=level)
    per_group = pm.Deterministic(f"taxon_within_exponent__{level}", within + sd * z, dims=level)
    return per_group[index] * deviation
