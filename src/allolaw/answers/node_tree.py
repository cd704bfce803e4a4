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

from allolaw.answers.draws import flat, flat_matrix, scalar

PRIOR_MC_DRAWS = 20000
PRIOR_MC_SEED = 20100101
# Self-check of a conditional: conditional means average to the posterior mean within 0.2
# posterior SD, and total variance within a factor 1.4 (common practice, no source).
_SELF_CHECK_MEAN = 0.2
_SELF_CHECK_VAR = 1.4


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
    if spec.get("residuals", "normal") != "normal":
        return None
    post = idata.posterior
    const = getattr(idata, "constant_data", None)
    obs = getattr(idata, "observed_data", None)
    if const is None or obs is None or "trait" not in obs or "sigma" not in post:
        return None
    y = np.asarray(obs["trait"].values, dtype=float)
    n_species = y.size
    if "true_log_size" in post:
        x = flat_matrix(post["true_log_size"], "species")
    elif "log_size_obs" in const:
        x = np.asarray(const["log_size_obs"].values, dtype=float)[None, :]
    else:
        return None
    ref = scalar(const["log_size_ref"]) if "log_size_ref" in const else float(
        idata.attrs.get("log_reference_size", 0.0))
    dx = x - ref
    inner = _innermost_level(post, const)

    def per_species(term: str) -> np.ndarray | None:
        if inner is not None and f"taxon_{term}__{inner}" in post:
            vals = flat_matrix(post[f"taxon_{term}__{inner}"], inner)
            return vals[:, tree.species_index[inner]] if inner in tree.species_index else None
        if term in post:
            return flat(post[term])[:, None]
        return np.zeros((1, 1))

    a = per_species("intercept")
    c = per_species("curvature")
    if a is None or c is None:
        return None
    offset = a + c * dx**2
    regressor = dx
    if "break_log_size" in post:
        if node.level or "exponent_above" not in post or "hinge_width" not in const:
            return None
        width = scalar(const["hinge_width"])
        brk = flat(post["break_log_size"])[:, None]
        hinge = width * (np.logaddexp(0.0, (x - brk) / width)
                         - np.logaddexp(0.0, (ref - brk) / width))
        above = flat(post["exponent_above"])[:, None]
        offset = offset + above * hinge
        regressor = dx - hinge
    for name in post.data_vars:
        name = str(name)
        if name.startswith("coef__"):
            cov = name.removeprefix("coef__")
            if f"covariate__{cov}" not in const:
                return None
            z = np.asarray(const[f"covariate__{cov}"].values, dtype=float)[None, :]
            offset = offset + flat(post[name])[:, None] * z
    sigma = flat(post["sigma"])[:, None]
    var = sigma**2
    if "trait_error_sd_mean" in post:  # trait error SDs estimated (model/error_sd.py)
        var = var + flat_matrix(post["trait_error_sd_mean"], "species") ** 2
    elif "sd_log_trait" in const:
        var = var + np.asarray(const["sd_log_trait"].values, dtype=float)[None, :] ** 2
    regressor = np.broadcast_to(regressor, np.broadcast_shapes(regressor.shape,
                                                               (1, n_species)))
    resid = y[None, :] - offset
    if node.level:
        if node.level != inner or inner not in tree.species_index:
            return None
        mask = tree.species_index[inner] == node.index
    else:
        if tree.levels:
            return None  # the population exponent reaches the data through its taxa
        mask = np.ones(n_species, dtype=bool)
    reg = regressor[:, mask]
    var_m = np.broadcast_to(var, np.broadcast_shapes(var.shape, (1, n_species)))[:, mask]
    res_m = np.broadcast_to(resid, np.broadcast_shapes(resid.shape, (1, n_species)))[:, mask]
    prec = np.sum(reg**2 / var_m, axis=1)
    lin = np.sum(reg * res_m / var_m, axis=1)
    return prec, lin


def _innermost_level(post: Any, const: Any) -> str | None:
    levels = [str(n).removeprefix("taxon_index__") for n in const.data_vars
              if str(n).startswith("taxon_index__")]
    if not levels:
        return None
    sizes = {lvl: int(np.unique(const[f"taxon_index__{lvl}"].values).size) for lvl in levels}
    return max(levels, key=lambda lvl: sizes[lvl])


def self_check(draws: np.ndarray, mean: np.ndarray, sd: np.ndarray) -> str:
    post_mean, post_var = float(draws.mean()), float(draws.var())
    rb_mean = float(mean.mean())
    rb_var = float(np.mean(sd**2) + mean.var())
    if post_var <= 0:
        return "the draws do not vary"
    if abs(rb_mean - post_mean) > _SELF_CHECK_MEAN * math.sqrt(post_var):
        return (f"conditional means average {rb_mean:.4g}, draws {post_mean:.4g}")
    ratio = rb_var / post_var
    if not 1 / _SELF_CHECK_VAR <= ratio <= _SELF_CHECK_VAR:
        return f"variance ratio {ratio:.2f}"
    return ""


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
