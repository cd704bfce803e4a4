"""Correlated taxon terms: one correlation matrix per taxon level, LKJ prior.

A taxon's deviations of intercept and exponent (and curvature, when it varies by taxon) are
one normal vector per level with covariance ``diag(s) R diag(s)``: ``s`` the per-term SDs
(``<term>_sd__<level>``, half-normal priors as before) and ``R`` a correlation matrix with the
LKJ prior of shape ``eta`` (Lewandowski, Kurowicka & Joe 2009). Intercepts live at the
reference size, so moving the reference by Δ turns the intercept deviation ``a`` into
``a + Δ·b``: with independent deviations the model itself changes with the reference, with a
full covariance the same family of models is only re-expressed (the intercept-exponent
correlation takes up the move).

The LKJ prior is written through its canonical partial correlations: for a k × k matrix,
the partial correlation of terms i and j given the terms before j (j < i, 1-based) is
``2·Beta(β_j, β_j) − 1`` with ``β_j = eta + (k − 1 − j)/2``, all independent, and the
Cholesky factor of ``R`` follows from them row by row (the vine method of Lewandowski et al.
2009, sec. 2; the same construction as the Cholesky-factor transform of the Stan manual,
from memory). Each partial correlation is one bounded free variable, so every value the
sampler visits is a valid correlation matrix (no positive-definiteness check that rejects
steps), and the factor enters the whitened taxon tree of :mod:`allolaw.model.treemsg` as the
lower-triangular step ``D = diag(s)·L``: each taxon value is its parent plus ``D`` times a
standard normal, non-centred through the Cholesky factor.

References
----------
.. [1] Lewandowski, D., Kurowicka, D. & Joe, H. (2009). Generating random correlation
   matrices based on vines and extended onion method. J. Multivariate Anal. 100:1989–2001.
"""

from __future__ import annotations

from typing import Any

import numpy as np

__all__ = ["DEFAULT_ETA", "correlation_factor", "correlation_name", "partial_beta_shapes",
           "step_factor"]

#: LKJ shape of the default prior: 1, uniform over correlation matrices. The correlation
#: between intercept and exponent deviations depends on where log size is centred (near ±1
#: when the reference lies far from the taxa's sizes); a prior that pulls it towards 0
#: would make the answers depend on the reference again.
DEFAULT_ETA = 1.0


def correlation_name(first: str, second: str, level: str) -> str:
    """Name of the posterior variable holding the correlation of two terms at a level."""
    return f"correlation_{first}_{second}__{level}"


def partial_beta_shapes(k: int, eta: float) -> list[float]:
    """Beta shape of each column's partial correlations (column j = 1 … k − 1).

    ``β_j = eta + (k − 1 − j)/2`` (Lewandowski et al. 2009, sec. 2.4, vine method): with
    k = 2 this is beta(eta, eta) on (−1, 1), density ∝ (1 − r²)^(eta − 1).
    """
    return [eta + (k - 1 - j) / 2.0 for j in range(1, k)]


def correlation_factor(terms: list[str], level: str, eta: float) -> list[list[Any]]:
    """Cholesky factor of the correlation matrix of ``terms`` at ``level``, entry by entry.

    Creates the free ``correlation_partial__<level>`` (k(k−1)/2 values on (0, 1), rows of the
    factor in order) and one deterministic :func:`correlation_name` per pair of terms. Call
    inside the model context. Entries above the diagonal are the float 0.0.
    """
    import pymc as pm
    import pytensor.tensor as pt

    k = len(terms)
    shapes = partial_beta_shapes(k, eta)
    pairs = [(i, j) for i in range(1, k) for j in range(i)]
    alpha = np.array([shapes[j] for _, j in pairs])
    raw = pm.Beta(f"correlation_partial__{level}", alpha=alpha, beta=alpha,
                  shape=(len(pairs),))
    z = {pair: 2.0 * raw[n] - 1.0 for n, pair in enumerate(pairs)}
    L: list[list[Any]] = [[0.0] * k for _ in range(k)]
    L[0][0] = pt.as_tensor_variable(1.0)
    for i in range(1, k):
        left = 1.0
        for j in range(i):
            L[i][j] = z[(i, j)] * pt.sqrt(left)
            left = left - L[i][j] ** 2
        L[i][i] = pt.sqrt(left)
    for i, j in pairs:
        # R = L Lᵀ has a unit diagonal, so R_ij is the dot product of rows i and j
        r = sum(L[i][m] * L[j][m] for m in range(j + 1))
        pm.Deterministic(correlation_name(terms[j], terms[i], level), r)
    return L


def step_factor(sds: list[Any], L: list[list[Any]]) -> list[list[Any]]:
    """The lower-triangular step ``D = diag(sds)·L`` of one level (zeros stay the float 0.0)."""
    k = len(sds)
    return [[sds[i] * L[i][j] if j <= i else 0.0 for j in range(k)] for i in range(k)]
