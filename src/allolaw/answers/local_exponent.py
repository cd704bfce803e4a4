"""Taxon exponents of a curved law, read at each taxon's own mean size.

With curvature the law of a taxon is ``a_t + b_t·d + c_t·d²`` in ``d = x − x_ref``, so its
exponent ``b_t`` is the slope at the reference size, which may lie far outside the taxon's
sizes. The hypotheses about a taxon's exponent are asked of its local exponent
``b_t + 2·c_t·(x̄_t − x_ref)`` at its mean observed log size ``x̄_t`` instead (Kolokotrones et
al. 2010). Its posterior density is a parametric fit to its draws
(:func:`allolaw.answers.density.fit_parametric`); its prior is the normal mixture of the
exponent prior and the curvature prior at that distance::

    b_t + 2c_t·d̄ ~ N(m_b + 2 m_c d̄, s_b² + Σ σ_b,l² + 4 d̄² (s_c² + Σ σ_c,l²))

mixed over half-normal draws of the taxon SDs σ along the taxon's path (the curvature SDs only
where curvature varies by taxon).
"""

from __future__ import annotations

import math
from typing import Any

import arviz as az
import numpy as np

from allolaw.answers.density import DensityEstimate, fit_parametric
from allolaw.answers.draws import flat, scalar
from allolaw.answers.node_tree import PRIOR_MC_DRAWS, PRIOR_MC_SEED, Prior, Tree

__all__ = ["local_taxon_exponent"]


def local_taxon_exponent(
    idata: az.InferenceData, spec: dict[str, Any], node: Any, tree: Tree
) -> tuple[DensityEstimate, Prior, str] | None:
    """Density, prior and note of a taxon's local exponent at its mean size.

    Returns ``None`` for the population node, or when the model has no curvature.

    References
    ----------
    Kolokotrones, T., Savage, V., Deeds, E. J., Fontana, W. (2010). Curvature in metabolic
    scaling. Nature 464:753–756.
    """
    post = idata.posterior
    if not node.level or "curvature" not in post:
        return None
    const = idata.constant_data
    x = np.asarray(const["log_size_obs"].values, dtype=float)
    idx = np.asarray(const[f"taxon_index__{node.level}"].values, dtype=int)
    d = float(x[idx == node.index].mean()) - scalar(const["log_size_ref"])
    b = flat(post[f"taxon_exponent__{node.level}"].isel({node.level: node.index}))
    by_taxon = f"taxon_curvature__{node.level}" in post
    c = (flat(post[f"taxon_curvature__{node.level}"].isel({node.level: node.index}))
         if by_taxon else flat(post["curvature"]))
    draws = b + 2.0 * c * d
    est = DensityEstimate(draws=draws, method="")
    family = "Student-t" if fit_parametric(draws, np.full(draws.size, 1.0 / draws.size)
                                           ).dist.name == "t" else "skew-normal"
    est.method = (f"Savage–Dickey, {family} fitted to draws of the local exponent at the "
                  "taxon's mean size")
    pri = spec["priors"]
    depth = tree.levels.index(node.level) + 1
    rng = np.random.default_rng(PRIOR_MC_SEED)
    sd_b = np.abs(rng.normal(0.0, float(pri.get("exponent_sd", {}).get("sd", 0.25)),
                             (PRIOR_MC_DRAWS, depth)))
    curv = pri.get("curvature", {"mean": 0.0, "sd": 0.25})  # the schema default
    var_c = float(curv["sd"]) ** 2
    if by_taxon:
        sd_c = np.abs(rng.normal(0.0, float(pri.get("curvature_sd", {}).get("sd", 0.1)),
                                 (PRIOR_MC_DRAWS, depth)))
        var_c = var_c + np.sum(sd_c**2, axis=1)
    m_b, s_b = float(pri["exponent"]["mean"]), float(pri["exponent"]["sd"])
    prior = Prior(m_b + 2.0 * float(curv["mean"]) * d, s_b,
                  np.sum(sd_b**2, axis=1) + 4.0 * d**2 * var_c)
    size = math.exp(d + scalar(const["log_size_ref"]))
    note = (f"local exponent at the taxon's mean observed size {size:.4g}: b + 2c·(x̄ − x_ref), "
            "not the slope at the reference size")
    return est, prior, note
