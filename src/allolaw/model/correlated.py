"""Correlated taxon terms at the data's centre size: one correlation matrix per level, LKJ prior.

A taxon's deviations of intercept and exponent (and curvature, when it varies by taxon) are
one normal vector per level with covariance ``diag(s) R diag(s)``: ``s`` the per-term SDs
(``<term>_sd__<level>``, half-normal priors) and ``R`` a correlation matrix with the LKJ prior
of shape ``eta`` (Lewandowski, Kurowicka & Joe 2009).

Where log size is centred matters. Intercepts live at the reference size, so moving the
reference by Δ turns an intercept deviation ``a`` into ``a + Δ·b``. A full covariance can
express the moved deviations, but its priors (half-normal SDs, LKJ) are not carried along by
the move: measured on 12 simulated genera, the reference moved by 4 log units shrank the
posterior mean SD of genus exponents to 0.66 of its value with the LKJ prior alone (0.35 with
independent deviations). So the SDs and the correlations describe the deviations at a centre
fixed by the data, the mean observed log size ``x̄`` (constant data ``log_size_centre``),
whatever the reference: with ``Δ = x_ref − x̄`` the deviations at the reference are
``A·δ`` with ``a_ref = a + Δ·b + Δ²·c``, ``b_ref = b + 2Δ·c``, ``c_ref = c`` (the same law
written around another centre), and ``δ ~ N(0, diag(s) R diag(s))``. The reference size then
changes only how the taxon values are reported, not the model.

The LKJ prior is written through its canonical partial correlations: for a k × k matrix,
the partial correlation of terms i and j given the terms before j (j < i, 1-based) is
``2·Beta(β_j, β_j) − 1`` with ``β_j = eta + (k − 1 − j)/2``, all independent, and the
Cholesky factor ``L`` of ``R`` follows from them row by row (the vine method of Lewandowski
et al. 2009, sec. 2; the same construction as the Cholesky-factor transform of the Stan
manual, from memory). Each partial correlation is one bounded free variable, so every value
the sampler visits is a valid correlation matrix (no positive-definiteness check that rejects
steps), and the factor enters the whitened taxon tree of :mod:`allolaw.model.treemsg` as the
step ``D = A·diag(s)·L``: each taxon value is its parent plus ``D`` times a standard normal,
non-centred through the Cholesky factor.

References
----------
.. [1] Lewandowski, D., Kurowicka, D. & Joe, H. (2009). Generating random correlation
   matrices based on vines and extended onion method. J. Multivariate Anal. 100:1989–2001.
"""

from __future__ import annotations

from typing import Any

import numpy as np

__all__ = ["DEFAULT_ETA", "centre_map", "correlation_factor", "correlation_name", "level_step",
           "partial_beta_shapes"]

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


def centre_map(terms: list[str], shift: float) -> list[list[float]]:
    """The matrix ``A`` taking deviations at the data's centre to those at the reference.

    ``shift`` is ``x_ref − x̄``; rows and columns follow ``terms`` (a subset of intercept,
    exponent, curvature, in that order). Entries between terms that do not both vary are
    left out, so with one varying term ``A`` is the identity.
    """
    full = {("intercept", "intercept"): 1.0, ("intercept", "exponent"): shift,
            ("intercept", "curvature"): shift**2, ("exponent", "exponent"): 1.0,
            ("exponent", "curvature"): 2.0 * shift, ("curvature", "curvature"): 1.0}
    return [[full.get((r, c), 0.0) for c in terms] for r in terms]


def level_step(terms: list[str], sds: list[Any], level: str, *, eta: float | None,
               shift: float) -> list[Any]:
    """The step of one level for :func:`allolaw.model.treemsg.pass_up`: ``A·diag(sds)·L``.

    ``eta=None``: independent deviations at the data's centre (``L`` the identity). With one
    term, or with ``A`` and ``L`` both the identity, the k SDs themselves (a diagonal step).
    """
    k = len(terms)
    A = centre_map(terms, shift)
    correlated = eta is not None and k > 1
    if not correlated and all(A[i][j] == 0.0 for i in range(k) for j in range(k) if i != j):
        return list(sds)
    L = (correlation_factor(terms, level, eta) if correlated
         else [[1.0 if i == j else 0.0 for j in range(k)] for i in range(k)])
    scaled = [[sds[i] * L[i][j] if j <= i else 0.0 for j in range(k)] for i in range(k)]
    # D = A·scaled, leaving out the structural zeros (the float 0.0)
    step: list[list[Any]] = [[0.0] * k for _ in range(k)]
    for i in range(k):
        for j in range(k):
            parts = [A[i][m] * scaled[m][j] for m in range(k)
                     if A[i][m] != 0.0 and not _zero(scaled[m][j])]
            if parts:
                step[i][j] = sum(parts[1:], parts[0])
    return step


def _zero(x: Any) -> bool:
    return isinstance(x, float) and x == 0.0
