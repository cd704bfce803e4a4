"""The terms of the law, built inside a PyMC model: residual SD, true log size, taxon terms,
hinge and covariates. Variable names follow the data contract in DEVELOPERS.md.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pymc as pm
import pytensor.tensor as pt

from allolaw.model.correlated import level_step
from allolaw.model.error_sd import true_near_measured
from allolaw.model.inputs import Inputs
from allolaw.model.phylo_terms import size_tree_population
from allolaw.model.spec import ModelSpec
from allolaw.model.treemsg import layered_tree, pass_down, pass_up
from allolaw.model.whitened_op import whitened_map
from allolaw.phylogeny import Phylogeny

__all__ = ["SIZE_MEASUREMENT"]

#: Name of the observed measured log size (present with errors in size; not a likelihood
#: term for model comparison: ``log_likelihood`` holds ``trait`` only).
SIZE_MEASUREMENT = "measured_log_size"


@dataclass
class _Size:
    value: Any
    sigma: Any = None


def residual_sd(spec: ModelSpec) -> Any:
    sigma_prior = spec.priors["sigma"]
    if spec.size_error == "ratio":
        return None  # set from the error ratio in true_log_size
    if "fixed" in sigma_prior:
        return pm.Deterministic("sigma", pt.as_tensor_variable(float(sigma_prior["fixed"])))
    return pm.HalfNormal("sigma", sigma=sigma_prior["sd"])


def true_log_size(spec: ModelSpec, inputs: Inputs, log_size_obs: Any, *, sigma_holder: Any,
                  whiten: bool = True, sd_size: Any = None, sd_estimated: bool = False,
                  phylogeny: Phylogeny | None = None) -> _Size:
    """The latent true log sizes (with errors in size) and, in ratio mode, the residual SD.

    With taxon levels in the spec, the true sizes follow a nested population mirroring the
    taxon tree (:func:`size_population`); without, one normal population (``size_mean``,
    ``size_sd``); with ``phylogeny`` (shared ancestry), Brownian motion along the tree
    instead (:func:`~allolaw.model.phylo_terms.size_tree_population`; the taxon levels then
    shape the law's taxon terms only). ``whiten=False`` writes the plain non-centred form
    (prior draws).
    ``sd_size``: the error SD of each species' measured log size (default: the constant
    data ``sd_log_size``); ``sd_estimated``: it holds parameters
    (:mod:`allolaw.model.error_sd`), so with ``whiten`` the true sizes are written around the
    measured ones in units of that SD (:func:`~allolaw.model.error_sd.true_near_measured`).
    """
    if spec.size_error == "none":
        return _Size(value=log_size_obs, sigma=sigma_holder)
    x = inputs.log_size
    spread = float(np.std(x, ddof=1)) if len(x) > 1 else 1.0
    spread = max(spread, 1e-3)
    # population of true log sizes: weakly informative on the scale of the data, unless the
    # spec fixes the prior (priors.size_population)
    population = spec.priors.get("size_population") or {
        "mean": float(np.mean(x)), "sd": 5.0 * spread, "sd_scale": 2.0 * spread}
    near = sd_size if (whiten and sd_estimated) else None
    if phylogeny is not None:
        true = size_tree_population(x, population, phylogeny, whiten=whiten, near=near)
    elif inputs.taxa:
        true = size_population(inputs, population, whiten=whiten, near=near)
    else:
        size_mean = pm.Normal("size_mean", population["mean"], population["sd"])
        size_sd = pm.HalfNormal("size_sd", population["sd_scale"])
        if near is None:
            true = pm.Normal("true_log_size", size_mean, size_sd, dims="species")
        else:
            true = true_near_measured(x, near)
            pm.Potential("size_population_density",
                         pt.sum(pm.logp(pm.Normal.dist(size_mean, size_sd), true)))
    if spec.size_error == "ratio":
        pri = spec.priors
        error_sd = pm.HalfNormal("size_error_sd", pri["size_error_sd"]["sd"])
        # the spec check refuses an uncertain ratio (not identified by the data)
        ratio = pm.Deterministic("error_ratio",
                                 pt.as_tensor_variable(float(pri["error_ratio"]["value"])))
        sigma = pm.Deterministic("sigma", pt.sqrt(ratio) * error_sd)
        pm.Normal(SIZE_MEASUREMENT, true, error_sd, observed=x, dims="species")
        return _Size(value=true, sigma=sigma)
    if sd_size is None:
        sd_size = pm.Data("sd_log_size", inputs.sd_size, dims="species")
    pm.Normal(SIZE_MEASUREMENT, true, sd_size, observed=x, dims="species")
    return _Size(value=true, sigma=sigma_holder)


def size_population(inputs: Inputs, population: dict[str, float], *, whiten: bool,
                    near: Any = None) -> Any:
    """True log sizes in a nested population that mirrors the taxon tree; returns them.

    Each species' true log size is normal around its innermost taxon's size mean with SD
    ``size_within_sd``; each taxon's size mean is normal around its parent's with SD
    ``size_sd__<level>``; the outermost around ``size_mean`` (prior ``population["mean"]``,
    ``population["sd"]``; half-normal SD priors of scale ``population["sd_scale"]``). Taxon
    size means are ``taxon_size_mean__<level>``.

    Given the true sizes, the size means are an intercept-only taxon term with the true
    sizes as target and noise variance ``size_within_sd²``, an exact normal-linear problem,
    so the sampler sees them whitened exactly as in :func:`taxon_terms` (one standard normal
    per node, ``size_mean_w``; potential ``size_tree_density``, which also holds the density
    of the true sizes given their taxon means). The free variable is then ``size_shift``,
    each true size minus its measured value (flat; the whole prior of the true sizes sits
    in that potential; with ``near``, estimated error SDs, it is ``size_error_u`` of
    :func:`~allolaw.model.error_sd.true_near_measured`). A single population would correct a
    within-taxon slope with the total reliability of size instead of the within-taxon one
    when taxa sit at different places along the size axis (Carroll et al. 2006, ch. 3.3).

    References
    ----------
    .. [1] Carroll, R. J., Ruppert, D., Stefanski, L. A. & Crainiceanu, C. M. (2006).
       Measurement Error in Nonlinear Models, 2nd ed. Chapman & Hall/CRC.
    """
    levels = list(inputs.taxa)
    tree = layered_tree([inputs.taxa[level].parent if k else inputs.taxa[level].labels
                         for k, level in enumerate(levels)])
    scale = float(population["sd_scale"])
    sds = [pm.HalfNormal(f"size_sd__{level}", sigma=scale) for level in levels]
    within = pm.HalfNormal("size_within_sd", sigma=scale)
    w = pm.Normal("size_mean_w", 0.0, 1.0, shape=(tree.n_nodes,))
    step = [[pt.as_tensor_variable(float(population["sd"]))]] + [[sd] for sd in sds]
    index = inputs.taxa[levels[-1]].index
    true = None
    root = [float(population["mean"])]
    if whiten:
        # free: the shift of each true size from its measured value (start: zero shift)
        if near is None:
            shift = pm.Flat("size_shift", dims="species")
            true = pm.Deterministic("true_log_size", inputs.log_size + shift, dims="species")
        else:
            true = true_near_measured(inputs.log_size, near)
        ones = pt.as_tensor_variable(np.ones(len(inputs.log_size)))
        values, density = whitened_map(tree, step, root, [w], [ones], true, within**2, index)
    else:
        info, chol = pass_up(tree, step, None, None)
        values, density = pass_down(tree, step, root, [w], info, chol)
    pm.Deterministic("size_mean", values[0][0][0])
    for lv, level in enumerate(levels):
        pm.Deterministic(f"taxon_size_mean__{level}", values[lv + 1][0], dims=level)
    inner_mean = values[-1][0][index]
    if not whiten:
        return pm.Normal("true_log_size", inner_mean, within, dims="species")
    resid = (true - inner_mean) / within
    within_density = pt.sum(-0.5 * resid**2 - pt.log(within) - 0.5 * np.log(2 * np.pi))
    pm.Potential("size_tree_density", density + within_density)
    return true


def taxon_terms(
    terms: list[str],
    priors: dict[str, dict[str, float]],
    sd_scales: dict[str, float],
    inputs: Inputs,
    features: dict[str, Any] | None,
    target: Any,
    noise_var: Any,
    *,
    correlation_eta: float | None = None,
    centre_shift: float = 0.0,
) -> dict[str, Any]:
    """Population and taxon values of the varying ``terms``; returns per-species values.

    The model is the usual nested one: the population values ``p ~ N(m0, s0²)`` per term,
    each outermost taxon ``N(p, s_1²)``, each inner taxon ``N(parent, s_l²)``, with one SD per
    term and level and the terms independent a priori. What the sampler sees is a whitened
    form of it, written by hand because no library offers it: one standard normal per term
    and taxon (``<term>_w``, population included), mapped to the taxon values through the
    exact conditional distribution of each value given its parent and the data below it
    (``features``, ``target`` and ``noise_var``: the law is
    ``target_i = Σ_term value_term,taxon(i) · feature_term,i + noise``, noise variance
    ``noise_var_i``). Messages pass up the tree (each taxon's data, then each parent's
    children) and values are drawn down it, root first (Gaussian belief propagation, e.g.
    Bishop 2006, ch. 8.4; with the prior step and the data message combined as in the Kalman
    smoother). The map is a change of variables: a potential adds the values' prior density
    and the log-Jacobian, so the model is exactly the nested one whatever the messages. When
    the law is linear in the taxon values with normal noise, the messages are exact and the
    standard normals are independent of everything else in the posterior: no funnel
    whatever the SDs, from zero to large. Student-t residuals or a breakpoint make the
    messages an approximation (normal noise, hinge left out); the model is still exact.

    With ``features=None`` the messages are empty and the map is the plain non-centred form,
    ``value = parent + s · w`` (the prior draws use it; so does ``parameterisation:
    non-centred``).

    The SDs (and, with ``correlation_eta``, one LKJ(``correlation_eta``) correlation matrix
    per level) describe the deviations at the data's centre size, ``centre_shift`` = log
    reference size minus that centre below the reference (:mod:`allolaw.model.correlated`):
    the step of each level is then a full k × k matrix ``A·diag(s)·L`` and the messages and
    the map are the same with that matrix.

    Every step is element-wise over taxa with k × k blocks (k ≤ 3 terms) written out entry by
    entry, so any backend (C, numba, JAX) compiles it to plain loops.
    """
    levels = list(inputs.taxa)
    tree = layered_tree([inputs.taxa[level].parent if k else inputs.taxa[level].labels
                         for k, level in enumerate(levels)])
    sds = {term: [pm.HalfNormal(f"{term}_sd__{level}", sigma=sd_scales[term])
                  for level in levels] for term in terms}
    w = [pm.Normal(f"{term}_w", 0.0, 1.0, shape=(tree.n_nodes,)) for term in terms]
    m0 = [float(priors[term]["mean"]) for term in terms]
    s0 = [float(priors[term]["sd"]) for term in terms]
    # step SDs per depth (depth 0 is the population, whose step is its prior)
    step = [[pt.as_tensor_variable(v) for v in s0]]
    # deviations at the data's centre, correlated or not (model/correlated.py)
    step += [level_step(terms, [sds[term][lv] for term in terms], level,
                        eta=correlation_eta, shift=centre_shift)
             for lv, level in enumerate(levels)]

    if features is not None:
        # messages up the tree from the data, values drawn down it (model/whitened_op.py)
        values, density = whitened_map(tree, step, m0, w, [features[term] for term in terms],
                                       target, noise_var, inputs.taxa[levels[-1]].index)
    else:
        # no data messages: the plain non-centred form
        info, chol = pass_up(tree, step, None, None)
        values, density = pass_down(tree, step, m0, w, info, chol)
    if features is not None:
        pm.Potential("taxon_tree_density", density)

    per_species = {}
    inner_index = inputs.taxa[levels[-1]].index
    for i, term in enumerate(terms):
        pm.Deterministic(term, values[0][i][0])
        for lv, level in enumerate(levels):
            dims = level
            var = pm.Deterministic(f"taxon_{term}__{level}", values[lv + 1][i], dims=dims)
            if lv == len(levels) - 1:
                per_species[term] = var[inner_index]
    return per_species


def hinge(spec: ModelSpec, inputs: Inputs, x: Any, x_ref: Any, exponent: Any) -> Any:
    pri = spec.priors
    rng = pri["break_range"]
    lo, hi = np.quantile(inputs.log_size, [rng["lower_quantile"], rng["upper_quantile"]])
    brk = pm.Uniform("break_log_size", float(lo), float(hi))
    above = pm.Normal("exponent_above", pri["exponent_above"]["mean"], pri["exponent_above"]["sd"])
    width = pm.Data("hinge_width", float(spec.hinge_width))
    # taxon exponent deviations shift the slope on both sides of the break alike, so the
    # change of slope at the break is the population one; the hinge is zero at x_ref
    change = above - exponent
    return change * (_softplus(x - brk, width) - _softplus(x_ref - brk, width))


def _softplus(d: Any, width: Any) -> Any:
    return width * pt.softplus(d / width)


def covariate_term(cov: dict[str, Any], inputs: Inputs, pri: dict[str, float]) -> Any:
    name = cov["column"]
    values = inputs.covariates[name]
    centre = float(np.mean(values))
    centred = values - centre
    pm.Data(f"covariate_centre__{name}", centre)
    z = pm.Data(f"covariate__{name}", centred, dims="species")
    # transform none: the prior SD is per covariate SD; boltzmann: per 1/eV
    scale = 1.0
    if cov["transform"] == "none":
        scale = 1.0 / max(float(np.std(values, ddof=1)), 1e-12)
    coef = pm.Normal(f"coef__{name}", pri["mean"] * scale, pri["sd"] * scale)
    return coef * z
