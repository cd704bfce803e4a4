"""Correlated size and trait errors of a species mean, estimated from paired replicates.

When a species' value is the mean of replicate rows that each hold both a size and a trait
(e.g. individuals measured for both), an individual that is larger usually also has the
larger trait: the errors of the species' mean log size and mean log trait are correlated.
With ``size_error: replicates``, ``trait_error: replicates`` and ``error_correlation:
estimated`` the model takes the two errors of a species whose SDs are both estimated as
bivariate normal with one correlation ``ρ`` per dataset (``error_correlation``, prior
uniform(−1, 1)); the means of n replicate pairs keep the correlation of one pair.

Data for ρ. Species i with n_i ≥ 2 paired replicates has the sample variances ``s_x²``,
``s_y²`` and covariance ``s_xy`` (ddof 1; clean.csv ``replicate_cov_log_size_trait``).
Their cross-product matrix ``A_i = (n_i − 1)·S_i`` is the sum of ``k = n_i − 1`` outer
products of independent normal contrasts with covariance ``Σ_i`` (Helmert's
transformation), so the log-likelihood of ``Σ_i`` is ``−k/2·log|Σ_i| − tr(Σ_i⁻¹ A_i)/2``,
the Wishart kernel, valid for k = 1 too (Anderson 2003, §3.3 and Thm 7.2.2). Its two
marginals are the scaled chi-square terms of :mod:`allolaw.model.error_sd`; this module adds
the difference between the joint kernel and those two terms, so the model holds the joint.

The trait given the true size. With size error ``e_x ~ N(0, s_x²)`` and trait error
``e_y``, ``(e_x, e_y)`` bivariate normal with correlation ρ, the conditional of ``e_y``
given ``e_x`` is ``N(ρ·(s_y/s_x)·e_x, s_y²·(1 − ρ²))`` (Gelman et al. 2013, §3.5; Anderson
2003, Thm 2.5.1). The measured log size already enters as normal around the true one
(``e_x = measured − true``), so the trait's likelihood becomes normal with mean
``law(true size) + ρ·(s_y/s_x)·(measured size − true size)`` and variance
``σ² + s_y²·(1 − ρ²)``: errors along the law are not read as attenuation (Fuller 1987, §1.1
and §1.2.3 for errors-in-variables with correlated errors).

References
----------
.. [1] Anderson, T. W. (2003). An Introduction to Multivariate Statistical Analysis, 3rd ed.
   Wiley.
.. [2] Gelman, A. et al. (2013). Bayesian Data Analysis, 3rd ed., §3.5 (multivariate normal).
.. [3] Fuller, W. A. (1987). Measurement Error Models. Wiley, ch. 1.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
import pymc as pm
import pytensor.tensor as pt

from allolaw.errors import UserError

__all__ = ["COVARIANCE_COLUMN", "PairedReplicates", "conditional_trait_error",
           "correlated_errors", "paired_covariance_kernel", "read_paired_replicates"]

log = logging.getLogger(__name__)

#: clean.csv column of the per-species replicate covariance of log size and log trait.
COVARIANCE_COLUMN = "replicate_cov_log_size_trait"


@dataclass
class PairedReplicates:
    """Species whose errors share ρ and the paired replicate data of those that have it."""

    both: np.ndarray  # bool per species: both error SDs estimated (ρ applies)
    observed: np.ndarray  # bool per species: paired data (n ≥ 2, covariance finite)
    covariance: np.ndarray  # sample covariance (ddof 1), NaN where not observed


def read_paired_replicates(data: pd.DataFrame, errors: dict[str, Any], spec_name: str,
                           source: str) -> PairedReplicates:
    """Read the replicate covariances of species whose size and trait SDs are both estimated.

    A species has paired data when both axes count the same n ≥ 2 values and its covariance
    is a finite number; NaN (one replicate, or rows without both values) leaves it out of the
    data for ρ, but ρ still applies to its errors.

    Raises
    ------
    UserError
        If the covariance column is missing while some species has both SDs estimated, or
        a covariance lies outside the bounds its two
        variances allow (|s_xy| ≤ s_x·s_y, up to rounding).
    """
    size, trait = errors["size"], errors["trait"]
    both = size.estimated & trait.estimated
    if COVARIANCE_COLUMN not in data.columns and both.any():
        msg = (f"{source}: column '{COVARIANCE_COLUMN}' is needed by model spec '{spec_name}' "
               "(error_correlation: estimated) but is missing; prepare the dataset again, or "
               "set error_correlation: none")
        raise UserError(msg)
    # a table whose SDs are all given (none estimated) needs no covariance column
    cov = (pd.to_numeric(data[COVARIANCE_COLUMN], errors="coerce").to_numpy(dtype=float)
           if COVARIANCE_COLUMN in data.columns else np.full(len(data), np.nan))
    observed = (both & (size.n >= 2) & (size.n == trait.n) & np.isfinite(cov)
                & np.isfinite(size.variance) & np.isfinite(trait.variance))
    bound = np.sqrt(np.where(observed, size.variance * trait.variance, 0.0))
    bad = observed & (np.abs(cov) > bound * (1 + 1e-9) + 1e-12)
    if bad.any():
        row = int(np.flatnonzero(bad)[0])
        value = float(cov[row])
        msg = (f"{source}: line {row + 2}, column '{COVARIANCE_COLUMN}', value {value!r}: "
               f"larger in size than the two replicate variances allow (|cov| ≤ {bound[row]:.6g})")
        raise UserError(msg)
    return PairedReplicates(both=both, observed=observed,
                            covariance=np.where(observed, cov, np.nan))


def paired_covariance_kernel(var_x: Any, var_y: Any, cov: Any, n: Any, sd_x: Any, sd_y: Any,
                             rho: Any) -> Any:
    """Wishart log-kernel of a 2 × 2 sample covariance minus its two chi-square kernels.

    With ``k = n − 1``: ``−k/2·log(1 − ρ²) − k/2·[(1/(1 − ρ²) − 1)·(v_x/σ_x² + v_y/σ_y²)
    − 2ρ·c/((1 − ρ²)·σ_x·σ_y)]``. Added to
    :func:`~allolaw.model.error_sd.replicate_variance_kernel` of each axis it gives
    ``−k/2·log|Σ| − tr(Σ⁻¹·k·S)/2``. NumPy arrays or PyTensor tensors.
    """
    k = n - 1.0
    lib = pt if any(isinstance(v, pt.TensorVariable) for v in (sd_x, sd_y, rho)) else np
    one_minus = 1.0 - rho**2
    quad = ((1.0 / one_minus - 1.0) * (var_x / sd_x**2 + var_y / sd_y**2)
            - 2.0 * rho * cov / (one_minus * sd_x * sd_y))
    return -0.5 * k * lib.log(one_minus) - 0.5 * k * quad


def conditional_trait_error(size_error: Any, sd_size: Any, sd_trait: Any,
                            rho: Any) -> tuple[Any, Any]:
    """Mean and SD of the trait error given the size error (bivariate normal, correlation ρ).

    ``mean = ρ·(s_y/s_x)·e_x``, ``sd = s_y·sqrt(1 − ρ²)`` (Gelman et al. 2013, §3.5).
    """
    lib = pt if any(isinstance(v, pt.TensorVariable)
                    for v in (size_error, sd_size, sd_trait, rho)) else np
    return rho * sd_trait / sd_size * size_error, sd_trait * lib.sqrt(1.0 - rho**2)


def correlated_errors(data: pd.DataFrame, inputs: Any, spec: Any, *, true_size: Any,
                      sd_size: Any, sd_trait: Any, observe: bool) -> tuple[Any, Any] | None:
    """Build ρ and its data; return the trait's mean shift and error SD, or ``None``.

    ``None`` (errors independent, as before) unless the spec has ``error_correlation:
    estimated`` with replicate errors on both axes and some species has paired replicate
    data (both SDs estimated, n ≥ 2, a finite covariance). Otherwise adds
    ``error_correlation`` (uniform(−1, 1)), the potential ``replicate_covariance``
    (``observe=False``, prior draws, leaves it out) and returns, per species,
    ``ρ_i·(s_y/s_x)·(measured − true log size)`` and ``s_y·sqrt(1 − ρ_i²)`` with
    ``ρ_i = ρ`` where both SDs are estimated and 0 elsewhere.
    """
    if (getattr(spec, "error_correlation", "none") != "estimated"
            or spec.size_error != "replicates" or spec.trait_error != "replicates"):
        return None
    errors = inputs.replicate_errors
    if "size" not in errors or "trait" not in errors:
        return None
    source = data.attrs.get("source", "clean.csv")
    paired = read_paired_replicates(data, errors, spec.name, source)
    if not paired.observed.any():
        # no species with paired replicates: nothing to learn ρ from, errors independent
        log.info("%s: no species has a replicate covariance; size and trait errors are "
                 "taken as independent", source)
        return None
    model = pm.modelcontext(None)
    rho = pm.Uniform("error_correlation", -1.0, 1.0)
    seen = np.flatnonzero(paired.observed)
    if observe and seen.size:
        per_x = model["size_error_sd_replicate"][_positions(errors["size"].estimated, seen)]
        per_y = model["trait_error_sd_replicate"][_positions(errors["trait"].estimated, seen)]
        pm.Potential("replicate_covariance", pt.sum(paired_covariance_kernel(
            errors["size"].variance[seen], errors["trait"].variance[seen],
            paired.covariance[seen], errors["size"].n[seen].astype(float), per_x, per_y, rho)))
    rho_i = rho * paired.both.astype(float)
    shift, sd = conditional_trait_error(pt.as_tensor_variable(inputs.log_size) - true_size,
                                        sd_size, sd_trait, rho_i)
    return shift, sd


def _positions(estimated: np.ndarray, rows: np.ndarray) -> np.ndarray:
    # index of each species row among the species whose SD is estimated (coord order)
    return np.searchsorted(np.flatnonzero(estimated), rows)
