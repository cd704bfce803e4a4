"""The node tree of a fit's exponents and the normal full conditional of each node's exponent.

Nodes are the population exponent and each taxon's exponent, outer to inner. Where the full
conditional of a node's exponent is normal (see :mod:`allolaw.answers.hypotheses`), its mean and
SD per draw give the Rao–Blackwellised density (Gelfand & Smith 1990); the self-check compares
the conditionals with the draws by the laws of total expectation and variance. Also the prior
of each node's exponent (Monte Carlo over the taxon SDs, fixed seed).

References
----------
.. [1] Gelfand, A. E., Smith, A. F. M. (1990). Sampling-based approaches to calculating
   marginal densities. JASA 85:398–409.
"""

from __future__ import annotations

import itertools
import json
import math
from dataclasses import dataclass
from typing import Any

import arviz as az
import numpy as np
from scipy import special, stats

from allolaw.answers.draws import flat, flat_matrix
from allolaw.answers.normal_terms import law_pieces

PRIOR_MC_DRAWS = 20000
PRIOR_MC_SEED = 20100101


# --- the taxon tree -----------------------------------------------------------------------


@dataclass
class _Node:
    parameter: str  # "exponent" or "taxon_exponent"
    level: str  # "" for the population
    taxon: str
    index: int  # position along the level dim (-1 for the population)

    @property
    def label(self) -> str:
        return "exponent" if not self.level else f"taxon_exponent__{self.level}[{self.taxon}]"


@dataclass
class Tree:
    levels: list[str]  # outer → inner, levels with taxon exponents
    labels: dict[str, list[str]]
    species_index: dict[str, np.ndarray]  # level → taxon index of each species
    parent: dict[str, np.ndarray]  # level → index into the next level out, per taxon

    @classmethod
    def from_idata(cls, idata: az.InferenceData) -> Tree:
        post = idata.posterior
        const = getattr(idata, "constant_data", None)
        levels = [str(n).removeprefix("taxon_exponent__") for n in post.data_vars
                  if str(n).startswith("taxon_exponent__")]
        labels = {lvl: [str(v) for v in post[f"taxon_exponent__{lvl}"][lvl].values]
                  for lvl in levels}
        species_index: dict[str, np.ndarray] = {}
        if const is not None:
            for lvl in list(labels) + _index_levels(const):
                name = f"taxon_index__{lvl}"
                if name in const:
                    species_index[lvl] = np.asarray(const[name].values, dtype=int)
        # outer levels have fewer taxa; each inner taxon nests in one outer taxon
        levels.sort(key=lambda lvl: len(labels[lvl]))
        parent: dict[str, np.ndarray] = {}
        for outer, inner in itertools.pairwise(levels):
            if inner in species_index and outer in species_index:
                par = np.zeros(len(labels[inner]), dtype=int)
                for t in range(len(labels[inner])):
                    hit = species_index[outer][species_index[inner] == t]
                    par[t] = int(hit[0]) if hit.size else 0
                parent[inner] = par
        return cls(levels=levels, labels=labels, species_index=species_index, parent=parent)


def _index_levels(const: Any) -> list[str]:
    return [str(n).removeprefix("taxon_index__") for n in const.data_vars
            if str(n).startswith("taxon_index__")]


def tree_nodes(tree: Tree) -> list[_Node]:
    nodes = [_Node("exponent", "", "", -1)]
    for lvl in tree.levels:
        nodes += [_Node("taxon_exponent", lvl, lab, j) for j, lab in enumerate(tree.labels[lvl])]
    return nodes


def node_draws(idata: az.InferenceData, node: _Node) -> np.ndarray:
    post = idata.posterior
    if not node.level:
        return flat(post["exponent"])
    var = post[f"taxon_exponent__{node.level}"].isel({node.level: node.index})
    return flat(var)


# --- Rao–Blackwellised conditionals --------------------------------------------------------


def conditional(
    idata: az.InferenceData, spec: dict[str, Any], tree: Tree, node: _Node
) -> tuple[np.ndarray, np.ndarray, Any] | None:
    """Mean and SD per draw of the normal full conditional of ``node``, or None."""
    post = idata.posterior
    prior = spec["priors"]["exponent"]
    m0, s0 = float(prior["mean"]), float(prior["sd"])
    n_draws = flat(post["exponent"]).size
    if not node.level:
        if "break_log_size" in post and tree.levels:
            return None  # the hinge and the taxa both hold the population exponent
        prior_mean = np.full(n_draws, m0)
        base = _children_or_data(idata, spec, tree, node)
        if base is None:
            return None
        prec_extra, lin_extra = base

        def rebuild(prior_sd: float) -> tuple[np.ndarray, np.ndarray]:
            prec = prior_sd**-2 + prec_extra
            return (prior_mean * prior_sd**-2 + lin_extra) / prec, prec**-0.5

        mean, sd = rebuild(s0)
        return mean, sd, rebuild
    k = tree.levels.index(node.level)
    sd_name = f"exponent_sd__{node.level}"
    if sd_name not in post:
        return None
    tau = flat(post[sd_name])
    if k == 0:
        parent_value = flat(post["exponent"])
    else:
        outer = tree.levels[k - 1]
        if node.level not in tree.parent:
            return None
        p = int(tree.parent[node.level][node.index])
        parent_value = flat(post[f"taxon_exponent__{outer}"].isel({outer: p}))
    base = _children_or_data(idata, spec, tree, node)
    if base is None:
        return None
    prec_extra, lin_extra = base
    prec = tau**-2 + prec_extra
    mean = (parent_value * tau**-2 + lin_extra) / prec
    return mean, prec**-0.5, None


def _children_or_data(
    idata: az.InferenceData, spec: dict[str, Any], tree: Tree, node: _Node
) -> tuple[np.ndarray, np.ndarray] | None:
    """Precision and precision-weighted sum from what depends on the node: children or data."""
    post = idata.posterior
    k = -1 if not node.level else tree.levels.index(node.level)
    if k + 1 < len(tree.levels):
        child = tree.levels[k + 1]
        sd_name = f"exponent_sd__{child}"
        if sd_name not in post:
            return None
        tau = flat(post[sd_name])
        values = flat_matrix(post[f"taxon_exponent__{child}"], child)
        if node.level:
            if child not in tree.parent:
                return None
            mask = tree.parent[child] == node.index
        else:
            mask = np.ones(values.shape[1], dtype=bool)
        count = int(mask.sum())
        return count * tau**-2, values[:, mask].sum(axis=1) * tau**-2
    return _data_terms(idata, spec, tree, node)


def _data_terms(
    idata: az.InferenceData, spec: dict[str, Any], tree: Tree, node: _Node
) -> tuple[np.ndarray, np.ndarray] | None:
    """Normal likelihood terms of the exponent (linear in it) for the node's species."""
    law = law_pieces(idata, spec)
    if law is None:
        return None
    index = tree.species_index.get(law.inner) if law.inner is not None else None
    if law.inner is not None and index is None:
        return None
    a = law.per_species("intercept", index)
    c = law.per_species("curvature", index)
    covariates = law.covariate_part()
    if a is None or c is None or covariates is None:
        return None
    dx = law.dx
    offset = a + c * dx**2 + covariates
    regressor = dx
    if "break_log_size" in law.post:
        hinge = law.hinge()
        if node.level or "exponent_above" not in law.post or hinge is None:
            return None
        offset = offset + flat(law.post["exponent_above"])[:, None] * hinge
        regressor = dx - hinge
    n_species = law.n_species
    shape = (1, n_species)
    regressor = np.broadcast_to(regressor, np.broadcast_shapes(regressor.shape, shape))
    resid = law.y[None, :] - offset
    if node.level:
        if node.level != law.inner:
            return None
        mask = index == node.index
    else:
        if tree.levels:
            return None  # the population exponent reaches the data through its taxa
        mask = np.ones(n_species, dtype=bool)
    reg = regressor[:, mask]
    var_m = np.broadcast_to(law.var, np.broadcast_shapes(law.var.shape, shape))[:, mask]
    res_m = np.broadcast_to(resid, np.broadcast_shapes(resid.shape, shape))[:, mask]
    prec = np.sum(reg**2 / var_m, axis=1)
    lin = np.sum(reg * res_m / var_m, axis=1)
    return prec, lin


# --- prior densities ---------------------------------------------------------------------


@dataclass
class Prior:
    """Prior of one exponent: normal (population) or normal mixed over taxon SDs."""

    mean: float
    sd: float
    extra_var: np.ndarray | None = None  # Monte Carlo draws of the summed taxon variances

    def logpdf(self, value: float, factor: float = 1.0) -> float:
        if self.extra_var is None:
            return float(stats.norm.logpdf(value, self.mean, factor * self.sd))
        scale = np.sqrt((factor * self.sd) ** 2 + self.extra_var)
        return float(special.logsumexp(stats.norm.logpdf(value, self.mean, scale))
                     - math.log(self.extra_var.size))

    def cdf(self, value: float, factor: float = 1.0) -> float:
        if self.extra_var is None:
            return float(stats.norm.cdf(value, self.mean, factor * self.sd))
        scale = np.sqrt((factor * self.sd) ** 2 + self.extra_var)
        return float(np.mean(stats.norm.cdf(value, self.mean, scale)))


def node_prior(node: _Node, tree: Tree, m0: float, s0: float, sd_scale: float) -> Prior:
    if not node.level:
        return Prior(m0, s0)
    depth = tree.levels.index(node.level) + 1
    rng = np.random.default_rng(PRIOR_MC_SEED)
    # half-normal SDs of every level along the path, summed in variance
    sds = np.abs(rng.normal(0.0, sd_scale, (PRIOR_MC_DRAWS, depth)))
    return Prior(m0, s0, np.sum(sds**2, axis=1))


# --- helpers ------------------------------------------------------------------------------


def spec_dict(spec: Any) -> dict[str, Any]:
    if hasattr(spec, "to_dict"):
        return spec.to_dict()
    if isinstance(spec, str):
        return json.loads(spec)
    return dict(spec)
