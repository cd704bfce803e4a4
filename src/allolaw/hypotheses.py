"""Posterior probabilities of named exponents, by Savage–Dickey density ratios.

Every fit is the *encompassing* model: the exponent is free. A named value v (say 3/4) is the
point hypothesis ``exponent == v`` nested in it, and its Bayes factor against the free model is
the Savage–Dickey ratio ``p(exponent = v | y) / p(exponent = v)`` (Dickey 1971; Wagenmakers et
al. 2010). With prior weights π_k for the named values and π_other for "another value" (the
free model itself, Bayes factor 1)::

    P(H_k | y) ∝ π_k · BF_k,        P(other | y) ∝ π_other.

The posterior density at v must be right far in the tails, where kernel density estimates of
the draws are not (they decay like the kernel, not like the posterior). So wherever the full
conditional of the exponent is normal we use the Rao–Blackwellised estimate, the average over
draws of that conditional density (Gelfand & Smith 1990; Chib 1995):

* the population exponent given the outermost taxon exponents and their SD (normal prior,
  normal deviations);
* a taxon's exponent given its parent's value, its level's SD and its child taxa's
  exponents (inner taxa) or its species' data (innermost taxa);
* the exponent of a model without taxon exponents given intercepts, curvature, hinge,
  covariates, residual SD and (latent) sizes — the likelihood is normal and linear in it.

The data terms need normal residuals; with Student-t residuals (and whenever the conditional
fails its self-check, see below) the density is parametric: a skew-normal fitted by moments or
a Student-t fitted by maximum likelihood, whichever fits the draws better.
The self-check: by the laws of total expectation and variance the conditional means must
average to the posterior mean of the draws and the conditional variances plus the spread of
the conditional means must add up to the posterior variance; a conditional that does not
match the draws was built on a wrong model structure and is not used.

The prior density at v is exact for the population exponent (normal prior) and, for a taxon
exponent, the normal prior mixed over the half-normal prior of the taxon SDs (Monte Carlo with
a fixed seed).

Prior sensitivity: the exponent prior SD is multiplied by each factor of
``prior_scale_factors``; draws are reweighted by the prior ratio (Pareto-smoothed importance
weights, with their Pareto k), conditional densities of the population exponent are rebuilt
with the new prior, and the prior density at v is recomputed.
"""

from __future__ import annotations

import itertools
import json
import logging
import math
import warnings
from dataclasses import dataclass, field
from typing import Any

import arviz as az
import numpy as np
import pandas as pd
from scipy import special, stats

__all__ = ["COLUMNS", "DensityEstimate", "compare_hypotheses", "exponent_density",
           "fit_parametric"]

log = logging.getLogger(__name__)

#: Columns of ``hypotheses.csv`` (DEVELOPERS.md), in order; ``dataset`` is added by the caller.
COLUMNS = [
    "dataset", "model", "parameter", "level", "taxon", "hypothesis", "value", "kind",
    "prior_weight", "log_bf", "posterior_prob", "interval_prob", "nearest_prob",
    "posterior_prob_prior_half", "posterior_prob_prior_double", "conclusion_changes",
    "method", "note",
]

_RB_METHOD = "Savage–Dickey, Rao–Blackwellised normal full conditional"
_PARAM_METHOD = "Savage–Dickey, {family} fitted to draws"
_T_DF_GRID = (1000.0, 100.0, 40.0, 25.0, 16.0, 12.0, 8.0, 6.0, 4.0, 3.0, 2.0, 1.5, 1.0)
_PRIOR_MC_DRAWS = 20000
_PRIOR_MC_SEED = 20100101
# Self-check of a conditional: conditional means average to the posterior mean within 0.2
# posterior SD, and total variance within a factor 1.4 (common practice, no source).
_SELF_CHECK_MEAN = 0.2
_SELF_CHECK_VAR = 1.4
# Pareto k above which sensitivity weights are unreliable (Vehtari et al. 2024, JMLR 25:72).
_WEIGHT_K_MAX = 0.7


def compare_hypotheses(
    idata: az.InferenceData,
    spec: Any,
    settings: dict[str, Any],
    *,
    density: str = "auto",
) -> pd.DataFrame:
    """Posterior probabilities of the named exponents for one fit.

    Parameters
    ----------
    idata
        A fit with the variables of the data contract (``exponent``, and where the model has
        them ``exponent_sd__<level>``, ``taxon_exponent__<level>`` …), ``observed_data`` and
        ``constant_data``.
    spec
        The model spec (:class:`allolaw.spec.ModelSpec` or its ``to_dict()``); uses
        ``priors["exponent"]``, ``priors["exponent_sd"]``, ``residuals``, ``curvature``,
        ``breakpoint``.
    settings
        The ``hypotheses`` config block: ``exponents`` (name, value, weight),
        ``other_weight``, ``interval_halfwidth``, ``bounds``, ``prior_scale_factors``.
    density
        ``auto`` (Rao–Blackwellised conditional where it applies and passes its self-check,
        else :func:`fit_parametric`), ``conditional`` (same, but raises when the conditional
        does not apply) or ``parametric``.

    Returns
    -------
    pandas.DataFrame
        Rows of ``hypotheses.csv`` (columns :data:`COLUMNS`; ``dataset`` left empty).

    References
    ----------
    Dickey, J. M. (1971). The weighted likelihood ratio, linear hypotheses on normal location
    parameters. Annals of Mathematical Statistics 42:204–223.

    Wagenmakers, E.-J., Lodewyckx, T., Kuriyal, H., Grasman, R. (2010). Bayesian hypothesis
    testing for psychologists: a tutorial on the Savage–Dickey method. Cognitive Psychology
    60:158–189.

    Gelfand, A. E., Smith, A. F. M. (1990). Sampling-based approaches to calculating marginal
    densities. JASA 85:398–409.

    Chib, S. (1995). Marginal likelihood from the Gibbs output. JASA 90:1313–1321.

    Vehtari, A., Simpson, D., Gelman, A., Yao, Y., Gabry, J. (2024). Pareto smoothed
    importance sampling. JMLR 25(72):1–58.
    """
    spec_d = _spec_dict(spec)
    model_name = str(spec_d.get("name", idata.attrs.get("model", "")))
    named = [(str(h["name"]), float(h["value"]), float(h.get("weight", 1.0)))
             for h in settings.get("exponents", [])]
    other_weight = float(settings.get("other_weight", 1.0))
    delta = float(settings.get("interval_halfwidth", 0.03))
    bounds = list(settings.get("bounds", []))
    factors = [float(f) for f in settings.get("prior_scale_factors", [0.5, 2.0])]

    posterior = idata.posterior
    if "exponent" not in posterior:
        return pd.DataFrame(columns=COLUMNS)
    tree = _Tree.from_idata(idata)
    prior = spec_d["priors"]["exponent"]
    m0, s0 = float(prior["mean"]), float(prior["sd"])
    sd_scale = float(spec_d["priors"].get("exponent_sd", {}).get("sd", 0.25))

    weights: dict[float, np.ndarray | None] = {1.0: None}
    weight_k: dict[float, float] = {}
    b_pop = _flat(posterior["exponent"])
    for f in factors:
        lw = stats.norm.logpdf(b_pop, m0, f * s0) - stats.norm.logpdf(b_pop, m0, s0)
        w, k = _smoothed_weights(lw)
        weights[f] = w
        weight_k[f] = k

    note = _base_note(spec_d, idata)
    rows: list[dict[str, Any]] = []
    for node in _nodes(tree):
        est = exponent_density(idata, spec_d, node, density=density)
        prior_node = _node_prior(node, tree, m0, s0, sd_scale)
        block = _hypothesis_block(
            est, prior_node, named, other_weight, delta, bounds, weights, weight_k,
        )
        for row in block:
            row.update(model=model_name, parameter=node.parameter, level=node.level,
                       taxon=node.taxon, method=est.method)
            row["note"] = "; ".join(s for s in (note, row.pop("_note", "")) if s)
            rows.append(row)
    table = pd.DataFrame(rows)
    table["dataset"] = str(idata.attrs.get("dataset", ""))
    for column in COLUMNS:
        if column not in table:
            table[column] = np.nan
    return table[COLUMNS + [c for c in table.columns if c not in COLUMNS]]


@dataclass
class DensityEstimate:
    """The posterior density of one exponent, as draws plus a density method."""

    draws: np.ndarray  # (S,)
    method: str
    cond_mean: np.ndarray | None = None  # (S,) Rao–Blackwellised conditional means
    cond_sd: np.ndarray | None = None
    rebuild: Any = None  # callable(prior_sd) -> (mean, sd) for the population node
    _fits: dict[int, Any] = field(default_factory=dict, repr=False)

    def parametric(self, weights: np.ndarray | None = None) -> Any:
        """The parametric density fitted to the (weighted) draws, cached per weight vector."""
        key = 0 if weights is None else id(weights)
        if key not in self._fits:
            self._fits[key] = fit_parametric(self.draws, _normalised(weights, self.draws.size))
        return self._fits[key]

    def logpdf(self, value: float, weights: np.ndarray | None = None,
               prior_sd: float | None = None) -> float:
        """Log posterior density at ``value`` (optionally reweighted, with a new prior SD)."""
        w = _normalised(weights, self.draws.size)
        if self.cond_mean is not None:
            mean, sd = self.cond_mean, self.cond_sd
            if prior_sd is not None and self.rebuild is not None:
                mean, sd = self.rebuild(prior_sd)
            logs = stats.norm.logpdf(value, mean, sd)
            return float(special.logsumexp(logs, b=w))
        return float(self.parametric(weights).logpdf(value))

    def cdf(self, value: float, weights: np.ndarray | None = None,
            prior_sd: float | None = None) -> float:
        """Posterior P(exponent < value)."""
        w = _normalised(weights, self.draws.size)
        if self.cond_mean is not None:
            mean, sd = self.cond_mean, self.cond_sd
            if prior_sd is not None and self.rebuild is not None:
                mean, sd = self.rebuild(prior_sd)
            return float(np.sum(w * stats.norm.cdf(value, mean, sd)))
        return float(np.sum(w * (self.draws < value)))


def exponent_density(
    idata: az.InferenceData, spec: Any, node: Any, *, density: str = "auto"
) -> DensityEstimate:
    """Density estimate of one exponent (the population one or one taxon's).

    See the module docstring for the methods; ``node`` is one item of the internal node list
    (population or a taxon at a level).
    """
    spec_d = _spec_dict(spec)
    draws = _node_draws(idata, node)
    if density == "parametric":
        return _parametric_estimate(draws, "")
    tree = _Tree.from_idata(idata)
    cond = _conditional(idata, spec_d, tree, node)
    if cond is None:
        if density == "conditional":
            msg = f"no normal full conditional for {node.label} in this model"
            raise ValueError(msg)
        return _parametric_estimate(draws, "")
    mean, sd, rebuild = cond
    problem = _self_check(draws, mean, sd)
    if problem:
        if density == "conditional":
            msg = f"conditional of {node.label} fails its self-check: {problem}"
            raise ValueError(msg)
        log.warning("%s: conditional density not used (%s); parametric fit instead",
                    node.label, problem)
        return _parametric_estimate(draws, f" (conditional failed self-check: {problem})")
    return DensityEstimate(draws=draws, method=_RB_METHOD, cond_mean=mean, cond_sd=sd,
                           rebuild=rebuild)


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
class _Tree:
    levels: list[str]  # outer → inner, levels with taxon exponents
    labels: dict[str, list[str]]
    species_index: dict[str, np.ndarray]  # level → taxon index of each species
    parent: dict[str, np.ndarray]  # level → index into the next level out, per taxon

    @classmethod
    def from_idata(cls, idata: az.InferenceData) -> _Tree:
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


def _nodes(tree: _Tree) -> list[_Node]:
    nodes = [_Node("exponent", "", "", -1)]
    for lvl in tree.levels:
        nodes += [_Node("taxon_exponent", lvl, lab, j) for j, lab in enumerate(tree.labels[lvl])]
    return nodes


def _node_draws(idata: az.InferenceData, node: _Node) -> np.ndarray:
    post = idata.posterior
    if not node.level:
        return _flat(post["exponent"])
    var = post[f"taxon_exponent__{node.level}"].isel({node.level: node.index})
    return _flat(var)


# --- Rao–Blackwellised conditionals --------------------------------------------------------


def _conditional(
    idata: az.InferenceData, spec: dict[str, Any], tree: _Tree, node: _Node
) -> tuple[np.ndarray, np.ndarray, Any] | None:
    """Mean and SD per draw of the normal full conditional of ``node``, or None."""
    post = idata.posterior
    prior = spec["priors"]["exponent"]
    m0, s0 = float(prior["mean"]), float(prior["sd"])
    n_draws = _flat(post["exponent"]).size
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
    tau = _flat(post[sd_name])
    if k == 0:
        parent_value = _flat(post["exponent"])
    else:
        outer = tree.levels[k - 1]
        if node.level not in tree.parent:
            return None
        p = int(tree.parent[node.level][node.index])
        parent_value = _flat(post[f"taxon_exponent__{outer}"].isel({outer: p}))
    base = _children_or_data(idata, spec, tree, node)
    if base is None:
        return None
    prec_extra, lin_extra = base
    prec = tau**-2 + prec_extra
    mean = (parent_value * tau**-2 + lin_extra) / prec
    return mean, prec**-0.5, None


def _children_or_data(
    idata: az.InferenceData, spec: dict[str, Any], tree: _Tree, node: _Node
) -> tuple[np.ndarray, np.ndarray] | None:
    """Precision and precision-weighted sum from what depends on the node: children or data."""
    post = idata.posterior
    k = -1 if not node.level else tree.levels.index(node.level)
    if k + 1 < len(tree.levels):
        child = tree.levels[k + 1]
        sd_name = f"exponent_sd__{child}"
        if sd_name not in post:
            return None
        tau = _flat(post[sd_name])
        values = _flat_matrix(post[f"taxon_exponent__{child}"], child)
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
    idata: az.InferenceData, spec: dict[str, Any], tree: _Tree, node: _Node
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
        x = _flat_matrix(post["true_log_size"], "species")
    elif "log_size_obs" in const:
        x = np.asarray(const["log_size_obs"].values, dtype=float)[None, :]
    else:
        return None
    ref = _scalar(const["log_size_ref"]) if "log_size_ref" in const else float(
        idata.attrs.get("log_reference_size", 0.0))
    dx = x - ref
    inner = _innermost_level(post, const)

    def per_species(term: str) -> np.ndarray | None:
        if inner is not None and f"taxon_{term}__{inner}" in post:
            vals = _flat_matrix(post[f"taxon_{term}__{inner}"], inner)
            return vals[:, tree.species_index[inner]] if inner in tree.species_index else None
        if term in post:
            return _flat(post[term])[:, None]
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
        width = _scalar(const["hinge_width"])
        brk = _flat(post["break_log_size"])[:, None]
        hinge = width * (np.logaddexp(0.0, (x - brk) / width)
                         - np.logaddexp(0.0, (ref - brk) / width))
        above = _flat(post["exponent_above"])[:, None]
        offset = offset + above * hinge
        regressor = dx - hinge
    for name in post.data_vars:
        name = str(name)
        if name.startswith("coef__"):
            cov = name.removeprefix("coef__")
            if f"covariate__{cov}" not in const:
                return None
            z = np.asarray(const[f"covariate__{cov}"].values, dtype=float)[None, :]
            offset = offset + _flat(post[name])[:, None] * z
    sigma = _flat(post["sigma"])[:, None]
    var = sigma**2
    if "sd_log_trait" in const:
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


def _self_check(draws: np.ndarray, mean: np.ndarray, sd: np.ndarray) -> str:
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
class _Prior:
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


def _node_prior(node: _Node, tree: _Tree, m0: float, s0: float, sd_scale: float) -> _Prior:
    if not node.level:
        return _Prior(m0, s0)
    depth = tree.levels.index(node.level) + 1
    rng = np.random.default_rng(_PRIOR_MC_SEED)
    # half-normal SDs of every level along the path, summed in variance
    sds = np.abs(rng.normal(0.0, sd_scale, (_PRIOR_MC_DRAWS, depth)))
    return _Prior(m0, s0, np.sum(sds**2, axis=1))


# --- one block of rows ------------------------------------------------------------------


def _hypothesis_block(
    est: DensityEstimate,
    prior: _Prior,
    named: list[tuple[str, float, float]],
    other_weight: float,
    delta: float,
    bounds: list[dict[str, Any]],
    weights: dict[float, np.ndarray | None],
    weight_k: dict[float, float],
) -> list[dict[str, Any]]:
    rows: list[dict[str, Any]] = []
    probs: dict[float, np.ndarray] = {}
    log_bfs: dict[float, np.ndarray] = {}
    prior_w = np.array([h[2] for h in named] + [other_weight])
    for factor, w in weights.items():
        new_sd = None if factor == 1.0 else factor * prior.sd
        log_bf = np.array([est.logpdf(value, w, new_sd) - prior.logpdf(value, factor)
                           for _, value, _ in named])
        with np.errstate(divide="ignore"):
            log_post = np.log(prior_w) + np.append(log_bf, 0.0)
        probs[factor] = np.exp(log_post - special.logsumexp(log_post))
        log_bfs[factor] = log_bf
    draws = est.draws
    values = np.array([h[1] for h in named])
    nearest = np.argmin(np.abs(draws[:, None] - values[None, :]), axis=1) if named else None
    top = {f: int(np.argmax(p)) for f, p in probs.items()}
    changes = any(t != top[1.0] for t in top.values())
    labels = [h[0] for h in named] + ["another value"]
    scaled = ", ".join(f"×{f:g}" for f in weights if f != 1.0)
    if changes:
        moved = ", ".join(f"{labels[t]} with prior SD ×{f:g}" for f, t in top.items()
                          if t != top[1.0])
        statement = (f"conclusion changes with the exponent prior: most probable is "
                     f"{labels[top[1.0]]}, but {moved}")
    else:
        statement = (f"conclusion unchanged with the exponent prior SD {scaled}: most "
                     f"probable stays {labels[top[1.0]]}")
    sens_note = "; ".join(s for s in (statement, _sensitivity_note(weight_k)) if s)
    for i, (name, value, weight) in enumerate(named):
        interval = est.cdf(value + delta) - est.cdf(value - delta)
        rows.append(_row(name, value, "point", weight, log_bfs[1.0][i], probs[1.0][i], interval,
                         float(np.mean(nearest == i)), _by_factor(probs, i), changes, sens_note))
    n = len(named)
    rows.append(_row("another value", math.nan, "other", other_weight, 0.0, probs[1.0][n],
                     math.nan, math.nan, _by_factor(probs, n), changes, sens_note))
    for bound in bounds:
        for side in ("below", "above"):
            if bound.get(side) is None:
                continue
            value = float(bound[side])
            p = {f: est.cdf(value, w, None if f == 1.0 else f * prior.sd)
                 for f, w in weights.items()}
            prior_p = prior.cdf(value)
            if side == "above":
                p = {f: 1.0 - v for f, v in p.items()}
                prior_p = 1.0 - prior_p
            log_bf = _log_odds(p[1.0]) - _log_odds(prior_p)
            sides = {f: v > 0.5 for f, v in p.items()}
            bound_changes = any(s != sides[1.0] for s in sides.values())
            sign = "<" if side == "below" else ">"
            label = f"{bound.get('name', side)} (exponent {sign} {value:g})"
            sens = {f: v for f, v in p.items() if f != 1.0}
            rows.append(_row(label, value, "bound", math.nan, log_bf, p[1.0], math.nan,
                             math.nan, sens, bound_changes, sens_note))
    return rows


def _by_factor(probs: dict[float, np.ndarray], i: int) -> dict[float, float]:
    return {f: float(p[i]) for f, p in probs.items() if f != 1.0}


def _row(name: str, value: float, kind: str, weight: float, log_bf: float, prob: float,
         interval: float, nearest: float, sens: dict[float, float], changes: bool,
         note: str) -> dict[str, Any]:
    row: dict[str, Any] = {
        "hypothesis": name, "value": value, "kind": kind, "prior_weight": weight,
        "log_bf": float(log_bf), "posterior_prob": float(prob), "interval_prob": interval,
        "nearest_prob": nearest,
        "posterior_prob_prior_half": sens.get(0.5, math.nan),
        "posterior_prob_prior_double": sens.get(2.0, math.nan),
        "conclusion_changes": bool(changes),
    }
    for f, v in sens.items():
        if f not in (0.5, 2.0):
            row[f"posterior_prob_prior_x{f:g}"] = v
    if note:
        row["_note"] = note
    return row


def _sensitivity_note(weight_k: dict[float, float]) -> str:
    bad = [f for f, k in weight_k.items() if not k <= _WEIGHT_K_MAX]
    if not bad:
        return ""
    shown = ", ".join(f"×{f:g} (Pareto k {weight_k[f]:.2f})" for f in bad)
    return f"prior-sensitivity weights unreliable for prior SD {shown}"


def _log_odds(p: float) -> float:
    p = min(max(p, 1e-300), 1 - 1e-16)
    return math.log(p) - math.log1p(-p)


# --- helpers ------------------------------------------------------------------------------


def _spec_dict(spec: Any) -> dict[str, Any]:
    if hasattr(spec, "to_dict"):
        return spec.to_dict()
    if isinstance(spec, str):
        return json.loads(spec)
    return dict(spec)


def _base_note(spec: dict[str, Any], idata: az.InferenceData) -> str:
    parts = []
    ref = None
    const = getattr(idata, "constant_data", None)
    if const is not None and "log_size_ref" in const:
        ref = math.exp(_scalar(const["log_size_ref"]))
    if spec.get("curvature", "none") != "none":
        where = f" {ref:.4g}" if ref is not None else ""
        parts.append(f"with curvature the exponent is local: the slope at the reference "
                     f"size{where}")
    if spec.get("breakpoint", "none") != "none":
        parts.append("with a breakpoint the exponent is the one below the break")
    return "; ".join(parts)


def _scalar(da: Any) -> float:
    return float(np.asarray(da.values, dtype=float).reshape(-1)[0])


def _flat(da: Any) -> np.ndarray:
    return np.asarray(da.values, dtype=float).reshape(-1)


def _flat_matrix(da: Any, dim: str) -> np.ndarray:
    arr = da.transpose("chain", "draw", dim).values
    return np.asarray(arr, dtype=float).reshape(-1, arr.shape[-1])


def _normalised(weights: np.ndarray | None, n: int) -> np.ndarray:
    if weights is None:
        return np.full(n, 1.0 / n)
    return weights / weights.sum()


def _smoothed_weights(log_ratio: np.ndarray) -> tuple[np.ndarray, float]:
    with warnings.catch_warnings():
        # ArviZ warns on high k; k is reported in the note instead.
        warnings.simplefilter("ignore", UserWarning)
        lw, k = az.psislw(log_ratio - log_ratio.max())
    w = np.exp(np.asarray(lw) - np.max(lw))
    return w / w.sum(), float(k)


def fit_parametric(draws: np.ndarray, weights: np.ndarray) -> Any:
    """Fit a skew-normal (by moments) and a Student-t (by maximum likelihood) to weighted draws.

    Returns the frozen scipy distribution with the higher weighted log likelihood (both have
    three parameters). The skew-normal captures skew, the Student-t heavy tails (the marginal
    posterior of a regression slope with unknown residual SD is a Student-t; Gelman et al.
    2013, *Bayesian Data Analysis*, 3rd ed., section 14.2).

    References
    ----------
    Azzalini, A. (1985). A class of distributions which includes the normal ones.
    Scandinavian Journal of Statistics 12:171–178.
    """
    w = weights / weights.sum()
    candidates = [_skew_normal_moments(draws, w), _student_t_mle(draws, w)]
    scores = [float(np.sum(w * dist.logpdf(draws))) for dist in candidates]
    return candidates[int(np.argmax(scores))]


def _parametric_estimate(draws: np.ndarray, suffix: str) -> DensityEstimate:
    est = DensityEstimate(draws=draws, method="")
    family = "Student-t" if est.parametric().dist.name == "t" else "skew-normal"
    est.method = _PARAM_METHOD.format(family=family) + suffix
    return est


def _skew_normal_moments(draws: np.ndarray, w: np.ndarray) -> Any:
    """Skew-normal with the weighted mean, variance and skewness of the draws."""
    mean = float(np.sum(w * draws))
    var = float(np.sum(w * (draws - mean) ** 2))
    skew = float(np.sum(w * (draws - mean) ** 3)) / var**1.5 if var > 0 else 0.0
    # the skewness of a skew-normal is below 0.9953 in size (Azzalini 1985)
    skew = float(np.clip(skew, -0.99, 0.99))
    g = abs(skew) ** (2 / 3)
    c = ((4 - math.pi) / 2) ** (2 / 3)
    delta = math.copysign(math.sqrt(math.pi / 2 * g / (g + c)), skew)
    alpha = delta / math.sqrt(1 - delta**2)
    omega = math.sqrt(var / (1 - 2 * delta**2 / math.pi))
    xi = mean - omega * delta * math.sqrt(2 / math.pi)
    return stats.skewnorm(alpha, loc=xi, scale=omega)


def _student_t_mle(draws: np.ndarray, w: np.ndarray) -> Any:
    """Student-t by weighted maximum likelihood: EM for location and scale on a df grid.

    References
    ----------
    Lange, K. L., Little, R. J. A., Taylor, J. M. G. (1989). Robust statistical modeling using
    the t distribution. JASA 84:881–896.
    """
    best: tuple[float, float, float, float] | None = None
    centre = float(np.sum(w * draws))
    spread = float(np.sqrt(np.sum(w * (draws - centre) ** 2))) or 1.0
    loc, scale2 = centre, spread**2
    for df in _T_DF_GRID:  # from near-normal to heavy tails, each fit starting at the last
        for _ in range(15):
            u = (df + 1) / (df + (draws - loc) ** 2 / scale2)
            loc = float(np.sum(w * u * draws) / np.sum(w * u))
            scale2 = float(np.sum(w * u * (draws - loc) ** 2))
        ll = float(np.sum(w * stats.t.logpdf(draws, df, loc, math.sqrt(scale2))))
        if best is None or ll > best[0]:
            best = (ll, df, loc, math.sqrt(scale2))
    assert best is not None
    return stats.t(best[1], loc=best[2], scale=best[3])
