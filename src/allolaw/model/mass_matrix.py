"""The fixed mass matrix a chain extension runs with: the adapted one, or one from the draws.

nutpie hands back the diagonal of its adapted inverse mass matrix but, when its low-rank
part is in use, not that part's directions. :func:`mass_matrix_from_draws` then builds a
fixed inverse mass matrix from the fit's own draws in the sampler's unconstrained space,
pooled over chains: their covariance (dense) when there are at most :data:`DENSE_MAX`
unconstrained values and more draws than values, else their variances (diagonal), both
regularised as Stan regularises its adapted metric. The step size is then tuned again for
:data:`STEP_TUNING_STEPS` steps with that matrix fixed (dual averaging), and those draws are
thrown away.

References
----------
Stan Development Team, Stan Reference Manual, "MCMC Sampling", section "Hamiltonian Monte
Carlo: automatic parameter tuning" (the metric is the regularised covariance of warm-up
draws); the regularisation as coded in stan-dev/stan ``src/stan/mcmc/covar_adaptation.hpp``
and ``var_adaptation.hpp``.
Hoffman, M. D. & Gelman, A. (2014). The No-U-Turn sampler. Journal of Machine Learning
Research 15, 1593–1623 (section 3.2: dual-averaging step-size adaptation).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

__all__ = ["DENSE_MAX", "MASS_ADAPTED", "MASS_DENSE", "MASS_DIAGONAL", "STEP_TUNING_STEPS",
           "ChainMetric", "mass_matrix_from_draws", "regularised_covariance",
           "unconstrained_draws"]

#: Names of the mass matrices, as the extension record gives them.
MASS_ADAPTED = "adapted diagonal"
MASS_DENSE = "draws' covariance (dense)"
MASS_DIAGONAL = "draws' variances (diagonal)"

#: Most unconstrained values for a dense matrix. Our own choice: a dense inverse mass matrix
#: costs one n×n matrix-vector product per leapfrog step and one Cholesky factor (n³/3) per
#: chain; at n = 1000 that is 8 MB and about a million multiply-adds a step, small beside the
#: gradient of the models that size. Above it, or with no more pooled draws than values (the
#: sample covariance of N draws has rank at most N − 1), the variances alone are used.
DENSE_MAX = 1000
#: Steps of step-size tuning before the added draws (common practice, no source: long enough
#: for dual averaging to settle from a start within a factor of a few, short beside a fit).
STEP_TUNING_STEPS = 200


@dataclass(frozen=True)
class ChainMetric:
    """The fixed mass matrix and step size every chain of the extension runs with."""

    kind: str  # MASS_ADAPTED, MASS_DENSE or MASS_DIAGONAL
    inverse_mass: np.ndarray  # (chains, n) diagonals, or (n, n) dense, one for every chain
    step_size: np.ndarray  # (chains,): used as it is, or where step-size tuning starts
    tuning_steps: int  # steps of step-size tuning before the added draws (0: none)

    @property
    def size(self) -> int:
        """Number of unconstrained values."""
        return int(self.inverse_mass.shape[-1])

    def potential(self, chain: int) -> Any:
        """PyMC's fixed quadratic potential for chain ``chain`` (never adapted in tuning).

        ``QuadPotentialDiag`` and ``QuadPotentialFull`` take the inverse mass matrix and keep
        the base class's ``update``, which does nothing (pymc 5.28,
        ``step_methods/hmc/quadpotential.py``): only the step size is tuned.
        """
        from pymc.step_methods.hmc.quadpotential import QuadPotentialDiag, QuadPotentialFull

        if self.kind == MASS_DENSE:
            return QuadPotentialFull(self.inverse_mass)
        return QuadPotentialDiag(self.inverse_mass[chain])


def regularised_covariance(draws: np.ndarray, *, dense: bool = True) -> np.ndarray:
    """Sample covariance (or variances) of ``draws`` shrunk as Stan shrinks its metric.

    ``(n / (n + 5)) · S + 1e-3 · (5 / (n + 5)) · I`` with ``S`` the sample covariance (divisor
    n − 1) of the ``n`` draws; with ``dense=False`` the same on the variances alone.

    Parameters
    ----------
    draws
        ``(n, d)``: one row per draw.
    dense
        Whole ``(d, d)`` matrix, or only its diagonal ``(d,)``.

    References
    ----------
    stan-dev/stan ``src/stan/mcmc/covar_adaptation.hpp`` (dense) and ``var_adaptation.hpp``
    (diagonal); Stan Reference Manual, "Hamiltonian Monte Carlo: automatic parameter tuning".
    """
    draws = np.asarray(draws, dtype=float)
    n = draws.shape[0]
    if n < 2:
        msg = f"a covariance needs at least 2 draws, got {n}"
        raise ValueError(msg)
    weight, jitter = n / (n + 5.0), 1e-3 * (5.0 / (n + 5.0))
    if not dense:
        return weight * draws.var(axis=0, ddof=1) + jitter
    cov = np.atleast_2d(np.cov(draws, rowvar=False, ddof=1))
    return weight * cov + jitter * np.eye(cov.shape[0])


def unconstrained_draws(posterior: Any, value_vars: tuple[str, ...]) -> np.ndarray | None:
    """The draws in the sampler's unconstrained space, pooled over chains: ``(N, n)``.

    Each value variable is flattened in C order, in the order of ``value_vars`` (the order of
    PyMC's and nutpie's flat vectors). ``None`` when a value variable is not in ``posterior``
    (nutpie stores the transformed ones, e.g. ``sigma_log__``; PyMC does not).
    """
    if any(name not in posterior for name in value_vars):
        return None
    n_total = int(posterior.sizes["chain"]) * int(posterior.sizes["draw"])
    parts = []
    for name in value_vars:
        values = np.asarray(posterior[name].transpose("chain", "draw", ...).values, dtype=float)
        parts.append(values.reshape(n_total, -1))
    return np.concatenate(parts, axis=1)


def mass_matrix_from_draws(posterior: Any, value_vars: tuple[str, ...],
                           step_size: np.ndarray, *, dense_max: int = DENSE_MAX,
                           tuning_steps: int = STEP_TUNING_STEPS) -> ChainMetric | None:
    """A fixed inverse mass matrix from the fit's own draws (``None``: draws not stored).

    Dense (the draws' regularised covariance) when there are at most ``dense_max``
    unconstrained values and the pooled draws outnumber them; else the diagonal of their
    regularised variances. ``step_size`` (per chain) is where the step-size tuning starts.
    """
    draws = unconstrained_draws(posterior, value_vars)
    if draws is None:
        return None
    n_draws, size = draws.shape
    dense = size <= dense_max and n_draws - 1 >= size
    inverse = regularised_covariance(draws, dense=dense)
    chains = int(np.size(step_size))
    if not dense:
        inverse = np.tile(inverse, (chains, 1))
    return ChainMetric(kind=MASS_DENSE if dense else MASS_DIAGONAL, inverse_mass=inverse,
                       step_size=np.asarray(step_size, dtype=float),
                       tuning_steps=int(tuning_steps))
