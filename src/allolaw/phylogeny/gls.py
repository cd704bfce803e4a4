"""Products with the tree precision matrix and generalised least squares, in linear time.

``Q r`` with ``Q = (λC + (1 − λ)D)⁻¹`` follows from the leave-one-out conditionals
(:func:`allolaw.phylogeny.loo.loo_conditionals`): ``(Q r)_i = (r_i − m_i) / v_i`` with
``m_i, v_i`` the conditional mean and variance of ``r_i`` given the other species
(Bürkner, Gabry & Vehtari 2020, eq. for the normal case read backwards). With it the
phylogenetic generalised least-squares estimate (Grafen 1989) needs no n × n matrix.

References
----------
Bürkner, P.-C., Gabry, J. & Vehtari, A. (2020). Efficient leave-one-out cross-validation for
Bayesian non-factorized normal and Student-t models. Comput. Stat. 36, 1243–1261.
Grafen, A. (1989). The phylogenetic regression. Phil. Trans. R. Soc. B 326, 119–157.
"""

from __future__ import annotations

import numpy as np

from allolaw.phylogeny.loo import loo_conditionals
from allolaw.phylogeny.tree import Phylogeny

__all__ = ["gls_estimate", "precision_times"]


def precision_times(vectors: np.ndarray, lam: float, phylogeny: Phylogeny) -> np.ndarray:
    """``Q v`` for each row ``v`` of ``vectors`` (shape (n,) or (k, n)), ``Q = (λC+(1−λ)D)⁻¹``."""
    v = np.asarray(vectors, float)
    mean, var = loo_conditionals(v, lam, phylogeny)
    return (v - mean) / var


def gls_estimate(
    y: np.ndarray, X: np.ndarray, phylogeny: Phylogeny, *, lam: float = 1.0
) -> tuple[np.ndarray, np.ndarray]:
    """GLS coefficients and their unscaled covariance ``(XᵀQX)⁻¹`` (multiply by σ²).

    Parameters
    ----------
    y
        Shape (n_species,), species order of ``phylogeny``.
    X
        Design matrix, shape (n_species, p) (include a column of ones for an intercept).
    lam
        Pagel's λ, fixed.

    References
    ----------
    Grafen, A. (1989). The phylogenetic regression. Phil. Trans. R. Soc. B 326, 119–157.
    """
    X = np.asarray(X, float)
    QX = precision_times(X.T, lam, phylogeny).T
    Qy = precision_times(np.asarray(y, float), lam, phylogeny)
    cov = np.linalg.inv(X.T @ QX)
    return cov @ (X.T @ Qy), cov
