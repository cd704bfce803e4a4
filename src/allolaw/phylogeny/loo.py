"""Leave-one-out conditional densities of residuals with shared ancestry, in linear time.

With correlated residuals the pointwise log-likelihood for leave-one-out cross-validation is
the conditional density of each species given all the others, ``p(y_i | y_−i, θ)`` (Bürkner,
Gabry & Vehtari 2020). For ``r ~ N(0, Σ)`` with precision ``Q = Σ⁻¹`` it is normal with mean
``r_i − (Q r)_i / Q_ii`` and variance ``1 / Q_ii``. Here both come from the tree, without Σ
or Q: a species' value is its parent node's value plus its own tip branch's noise,
independent of every other species, so given the others it is normal with

* mean: the expected value of the parent node given every other species, and
* variance: its tip branch length plus the variance of the parent node given them.

That distribution of the parent node is the "outside" message of Gaussian belief
propagation: a pass up the tree (as for the density) gives each node the message from the
species below it; a pass down combines, for each node, the message from above its parent
with those of its siblings. Two passes over the levels, vectorised over posterior draws.

References
----------
Bürkner, P.-C., Gabry, J. & Vehtari, A. (2020). Efficient leave-one-out cross-validation for
Bayesian non-factorized normal and Student-t models. Comput. Stat. 36, 1243–1261.
Felsenstein, J. (1973). Maximum-likelihood estimation of evolutionary trees from continuous
characters. Am. J. Hum. Genet. 25, 471–492.
Pagel, M. (1999). Inferring the historical patterns of biological evolution. Nature 401,
877–884.
"""

from __future__ import annotations

import numpy as np

from allolaw.phylogeny.tree import Phylogeny

__all__ = ["loo_conditionals", "loo_log_density"]


def loo_log_density(
    residuals: np.ndarray, sigma: np.ndarray | float, lam: np.ndarray | float,
    phylogeny: Phylogeny, *, chunk: int = 256,
) -> np.ndarray:
    """Pointwise ``log p(r_i | r_−i)`` for ``r ~ N(0, σ²(λC + (1 − λ)D))``.

    Parameters
    ----------
    residuals
        Shape (n_species,) or (n_draws, n_species): ``y − μ(θ)`` per posterior draw.
    sigma, lam
        Scalars or one per draw, shape (n_draws,).
    chunk
        Draws handled at once (memory: about 12 arrays of ``chunk × n_nodes`` floats).

    Returns
    -------
    Array shaped like ``residuals``: the log-likelihood values to hand to PSIS-LOO.

    References
    ----------
    Bürkner, Gabry & Vehtari (2020), the multivariate normal case (see the module docstring).
    """
    r = np.asarray(residuals, float)
    batch = r.reshape(-1, r.shape[-1])
    k = batch.shape[0]
    s2 = np.broadcast_to(np.asarray(sigma, float).reshape(-1, 1) ** 2, (k, 1))
    lam_a = np.broadcast_to(np.asarray(lam, float).reshape(-1), (k,))
    out = np.empty_like(batch)
    for start in range(0, k, chunk):
        rows = slice(start, start + chunk)
        mean, var = loo_conditionals(batch[rows], lam_a[rows], phylogeny)
        v = s2[rows] * var
        out[rows] = -0.5 * (np.log(2.0 * np.pi * v) + (batch[rows] - mean) ** 2 / v)
    return out.reshape(r.shape)


def loo_conditionals(
    residuals: np.ndarray, lam: np.ndarray | float, phylogeny: Phylogeny
) -> tuple[np.ndarray, np.ndarray]:
    """Mean and variance of each ``r_i`` given all other species, for σ = 1.

    The mean does not depend on σ; the variance scales with σ². Shapes as in
    :func:`loo_log_density`.
    """
    r = np.asarray(residuals, float)
    batch = r.reshape(-1, r.shape[-1])
    k, m = batch.shape[0], phylogeny.n_nodes
    lam_a = np.broadcast_to(np.asarray(lam, float).reshape(-1, 1), (k, 1))
    t = lam_a * phylogeny.length + (1.0 - lam_a) * phylogeny.tip_height  # (k, m)
    mu, vp, prec_up, info_up = _upward(batch, t, phylogeny)
    # downward: (mean, variance) of each node given the species outside its subtree
    out_mean = np.zeros((k, m))
    out_var = np.zeros((k, m))
    for nodes in phylogeny.depth_groups[1:]:
        p = phylogeny.parent[nodes]
        others_prec = prec_up[:, p] - 1.0 / vp[:, nodes]
        others_info = info_up[:, p] - mu[:, nodes] / vp[:, nodes]
        wo = out_var[:, p]
        # combine N(mean_o, wo) with the siblings' messages; no division by wo (0 at the root)
        denom = 1.0 + wo * others_prec
        out_mean[:, nodes] = (out_mean[:, p] + wo * others_info) / denom
        out_var[:, nodes] = wo / denom + t[:, nodes]
    tips = phylogeny.tip_node
    shape = r.shape
    return out_mean[:, tips].reshape(shape), out_var[:, tips].reshape(shape)


def _upward(
    z: np.ndarray, t: np.ndarray, phylogeny: Phylogeny
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    # per node: message mean mu, its variance at the parent vp (own + branch), and the sums
    # of the children's precisions and precision-weighted means
    k, m = z.shape[0], phylogeny.n_nodes
    mu = np.zeros((k, m))
    var = np.zeros((k, m))
    mu[:, phylogeny.tip_node] = z
    prec_up = np.zeros((k, m))
    info_up = np.zeros((k, m))
    for level in phylogeny.levels:
        # children sorted by parent, so each parent's sums are one np.add.reduceat segment
        order = np.argsort(level.slot, kind="stable")
        c = level.children[order]
        starts = np.searchsorted(level.slot[order], np.arange(len(level.parents)))
        v = var[:, c] + t[:, c]
        ps = level.parents
        prec_up[:, ps] = np.add.reduceat(1.0 / v, starts, axis=1)
        info_up[:, ps] = np.add.reduceat(mu[:, c] / v, starts, axis=1)
        mu[:, ps] = info_up[:, ps] / prec_up[:, ps]
        var[:, ps] = 1.0 / prec_up[:, ps]
    vp = var + t
    return mu, vp, prec_up, info_up
