"""Measurement-error SDs estimated from replicates, partially pooled within a dataset.

With ``size_error: replicates`` (or ``trait_error: replicates``) the error SD of a species is
not read as an exact number. Each species whose SD does not come from a given SD column has
a true error SD of one replicate measurement, ``σ_i``, on the natural-log scale::

    log σ_i = log σ_common + spread · w_i,   w_i ~ normal(0, 1)   (non-centred)

with ``log σ_common ~ normal(ln median, log_sd)`` (``priors.error_sd_common``) and ``spread ~
half-normal(sd)`` (``priors.error_sd_spread``), one set per axis. A species with n ≥ 2 values
observes their sample variance ``s_i²``, and ``s_i² (n_i − 1) / σ_i² ~ χ²(n_i − 1)`` (normal
errors; Cochran's theorem). The error of the species mean has SD ``σ_i / sqrt(n_i)``. A
species with one value (n = 1) has no variance to observe: its ``σ_i`` is a draw from the
pooled distribution. Given SDs (``sd_source`` = given) stay as given.

References
----------
.. [1] Cochran, W. G. (1934). The distribution of quadratic forms in a normal system.
   Math. Proc. Cambridge Philos. Soc. 30:178–191.
.. [2] Gelman, A. et al. (2013). Bayesian Data Analysis, 3rd ed., ch. 5 (partial pooling)
   and §3.2 (the scaled inverse-chi-square posterior of a normal variance).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
import pymc as pm
import pytensor.tensor as pt
from scipy import special

from allolaw.errors import UserError

__all__ = ["ReplicateErrors", "read_replicate_errors", "replicate_variance_kernel",
           "replicate_variance_logp", "species_error_sd", "true_near_measured"]


@dataclass
class ReplicateErrors:
    """Per species of one axis: which error SDs are estimated and the replicate data."""

    estimated: np.ndarray  # bool: the species' error SD is a parameter
    variance: np.ndarray  # sample variance of the log values (ddof 1; NaN for one value)
    n: np.ndarray  # number of values behind it (1 for one value)


def read_replicate_errors(data: pd.DataFrame, axis: str, spec_name: str,
                          source: str) -> ReplicateErrors:
    """Read the replicate variances and counts of the species whose SD is not given.

    Species with ``sd_source_<axis>`` = given keep their SD; ``replicates`` and ``pooled``
    species get an estimated SD; ``none`` (no species of the dataset has two values) is
    refused. A table without ``sd_source_<axis>`` takes every SD as given.

    Raises
    ------
    UserError
        If a needed column is missing or holds a bad value (file, line, column, value).
    """
    origin_col = f"sd_source_{axis}"
    n_rows = len(data)
    if origin_col not in data.columns:
        return ReplicateErrors(np.zeros(n_rows, bool), np.full(n_rows, np.nan),
                               np.ones(n_rows, int))
    origin = data[origin_col].astype(str).to_numpy()
    none = np.flatnonzero(origin == "none")
    if none.size:
        row = int(none[0])
        msg = (f"{source}: line {row + 2}, column '{origin_col}', value 'none': model spec "
               f"'{spec_name}' estimates {axis} error SDs from replicates, but no species of "
               "the dataset has two values and no SD is given (give an SD column, or set "
               f"{axis}_error: none)")
        raise UserError(msg)
    estimated = origin != "given"
    variance = np.full(n_rows, np.nan)
    n = np.ones(n_rows, int)
    if estimated.any():
        var_col, n_col = f"replicate_var_log_{axis}", f"replicate_n_{axis}"
        for column in (var_col, n_col):
            if column not in data.columns:
                msg = (f"{source}: column '{column}' is needed by model spec '{spec_name}' "
                       "(replicate-based error SDs) but is missing; prepare the dataset again")
                raise UserError(msg)
        counts = pd.to_numeric(data[n_col], errors="coerce").to_numpy(dtype=float)
        values = pd.to_numeric(data[var_col], errors="coerce").to_numpy(dtype=float)
        bad_n = estimated & ~(np.isfinite(counts) & (counts >= 1))
        bad_v = estimated & (counts >= 2) & ~(np.isfinite(values) & (values >= 0))
        for bad, column in ((bad_n, n_col), (bad_v, var_col)):
            if bad.any():
                row = int(np.flatnonzero(bad)[0])
                value = data[column].iloc[row]
                value = value.item() if hasattr(value, "item") else value
                msg = (f"{source}: line {row + 2}, column '{column}', value {value!r}: "
                       "needs a replicate count ≥ 1 and, for two or more values, a variance ≥ 0")
                raise UserError(msg)
        n = np.where(estimated, counts, 1).astype(int)
        variance = np.where(estimated & (n >= 2), values, np.nan)
    return ReplicateErrors(estimated=estimated, variance=variance, n=n)


def replicate_variance_logp(variance: Any, n: Any, sd: Any) -> Any:
    """Log density of the sample variance ``s²`` of n normal values with SD ``sd``.

    ``s² (n − 1) / sd² ~ χ²(n − 1)``, so ``s²`` has a gamma density with shape (n − 1)/2 and
    rate (n − 1)/(2 sd²). Works on NumPy arrays and PyTensor tensors alike. Infinite at
    ``s² = 0`` when n = 2; the model uses :func:`replicate_variance_kernel`.
    """
    k = n - 1.0
    lib = pt if isinstance(sd, pt.TensorVariable) else np
    log_gamma = pt.gammaln if lib is pt else special.gammaln
    return ((k / 2.0 - 1.0) * lib.log(variance) + (k / 2.0) * lib.log(k / (2.0 * sd**2))
            - k * variance / (2.0 * sd**2) - log_gamma(k / 2.0))


def replicate_variance_kernel(variance: Any, n: Any, sd: Any) -> Any:
    """The part of :func:`replicate_variance_logp` that depends on ``sd``.

    ``−(n − 1) log sd − (n − 1) s² / (2 sd²)``: finite at ``s² = 0`` (two replicates that
    agree exactly pull ``sd`` down, but a log-normal prior keeps the posterior proper).
    """
    k = n - 1.0
    lib = pt if isinstance(sd, pt.TensorVariable) else np
    return -k * lib.log(sd) - k * variance / (2.0 * sd**2)


def species_error_sd(axis: str, species: list[str], given: np.ndarray | None,
                     errors: ReplicateErrors | None, priors: dict[str, Any], *,
                     observe: bool) -> Any:
    """The SD of each species' measurement error (of its mean), dims ``species``.

    Without estimated SDs this is the constant data ``sd_log_<axis>`` (as given). Otherwise
    it is ``<axis>_error_sd_mean`` built from ``<axis>_error_sd_common``,
    ``<axis>_error_sd_spread`` and ``<axis>_error_sd_w`` (dim ``<axis>_error_species``, the
    species whose SD is estimated), with ``<axis>_error_sd_replicate`` the SD of one
    replicate. ``observe=False`` (prior draws) leaves the replicate variances out.
    """
    if errors is None or not errors.estimated.any():
        return pm.Data(f"sd_log_{axis}", given, dims="species")
    model = pm.modelcontext(None)
    pick = np.flatnonzero(errors.estimated)
    coord = f"{axis}_error_species"
    model.add_coord(coord, [species[i] for i in pick])
    common_prior = priors["error_sd_common"]
    log_common = pm.Normal(f"{axis}_error_log_sd_common", math.log(common_prior["median"]),
                           common_prior["log_sd"])
    pm.Deterministic(f"{axis}_error_sd_common", pt.exp(log_common))
    spread = pm.HalfNormal(f"{axis}_error_sd_spread", priors["error_sd_spread"]["sd"])
    w = pm.Normal(f"{axis}_error_sd_w", 0.0, 1.0, dims=coord)
    per_replicate = pm.Deterministic(f"{axis}_error_sd_replicate",
                                     pt.exp(log_common + spread * w), dims=coord)
    n = errors.n[pick]
    seen = np.flatnonzero(n >= 2)
    if observe and seen.size:
        pm.Potential(f"{axis}_replicate_variance", pt.sum(replicate_variance_kernel(
            errors.variance[pick][seen], n[seen].astype(float), per_replicate[seen])))
    given = np.zeros(errors.estimated.size) if given is None else np.nan_to_num(given)
    base = np.where(errors.estimated, 0.0, given)  # given SDs as given
    full = pt.set_subtensor(pt.as_tensor_variable(base)[pick], per_replicate / np.sqrt(n))
    return pm.Deterministic(f"{axis}_error_sd_mean", full, dims="species")


def true_near_measured(log_size: np.ndarray, sd: Any) -> Any:
    """True log sizes written as measured value plus ``sd`` times a free value ``u``.

    ``true_log_size = log_size + sd · size_error_u`` (``size_error_u`` flat; the potential
    ``size_error_jacobian`` adds ``Σ log sd``, so the density of the true sizes is unchanged;
    their prior and the measurement likelihood are added by the caller). When the error SDs
    are parameters, the true size of a species moves with its error SD; in ``u`` it does not
    (the non-centred form, Betancourt & Girolami 2015). ``size_shift`` is the true minus the
    measured log size.
    """
    u = pm.Flat("size_error_u", dims="species")
    shift = pm.Deterministic("size_shift", sd * u, dims="species")
    pm.Potential("size_error_jacobian", pt.sum(pt.log(sd)))
    return pm.Deterministic("true_log_size", log_size + shift, dims="species")
