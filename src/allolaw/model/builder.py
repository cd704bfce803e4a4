"""The model builder: a validated spec plus a clean table become one PyMC model.

The law, for species i in innermost taxon t, is::

    log trait_i = a_t + b_t·(x_i − x_ref) + c_t·(x_i − x_ref)² [+ hinge] [+ Σ coef·z_i] + e_i

with x_i the natural log of size (the latent true log size when size carries measurement
error), x_ref the log reference size, and e_i normal or Student-t. A taxon at an inner level
deviates from its parent taxon at the next level out (order → family); the outermost taxa
deviate from the population values. Variable names and dims follow the data contract in
DEVELOPERS.md, so later stages read them by name.

The inputs are read in :mod:`allolaw.model.inputs`, the terms built in
:mod:`allolaw.model.terms`.
"""

from __future__ import annotations

import logging
from typing import Any

import numpy as np
import pandas as pd
import pymc as pm
import pytensor.tensor as pt

from allolaw.errors import UserError
from allolaw.model.error_correlation import correlated_errors
from allolaw.model.error_sd import species_error_sd
from allolaw.model.inputs import read_inputs
from allolaw.model.phylo_terms import ancestry_term
from allolaw.model.scatter import scatter_level, scatter_term
from allolaw.model.spec import ModelSpec
from allolaw.model.terms import covariate_term, hinge, residual_sd, taxon_terms, true_log_size
from allolaw.model.within import latent_split, split_log_size, within_term
from allolaw.phylogeny import Phylogeny

__all__ = ["TRAIT", "build_model"]

log = logging.getLogger(__name__)
#: Name of the observed trait variable (the only one in ``log_likelihood``).
TRAIT = "trait"


def build_model(
    data: pd.DataFrame,
    spec: ModelSpec,
    *,
    levels: list[str],
    log_reference_size: float,
    prior_only: bool = False,
    phylogeny: Phylogeny | None = None,
) -> pm.Model:
    """Build the PyMC model of ``spec`` for one clean table.

    Parameters
    ----------
    data
        One row per species in the ``clean.csv`` format (DEVELOPERS.md). ``data.attrs
        ["source"]``, when set, names the file in error messages.
    spec
        Validated model spec.
    levels
        Taxon level columns of the dataset, outer to inner.
    log_reference_size
        Natural log of the reference size; log size is centred there, so ``intercept`` is
        the log trait of a species of reference size.
    prior_only
        Build the model for prior draws: the taxon values are written in the plain
        non-centred form, without the data-whitened map (whose potential prior sampling
        would ignore). Same variables, same joint prior.
    phylogeny
        The dataset's tree, species in table order (:func:`allolaw.model.phylo_terms.
        load_phylogeny`); needed when the spec has ``shared_ancestry`` (the residuals then
        evolve along it, :func:`allolaw.model.phylo_terms.ancestry_term`, and taxon terms
        are written in the non-centred form, since the whitened map assumes independent
        residuals).

    Returns
    -------
    pymc.Model
        With coords ``species`` and one per taxon level used; the observed variable ``trait``
        (dim ``species``) and the data ``log_size_obs`` and ``log_size_ref``.

    Raises
    ------
    UserError
        If a column the spec needs is missing or holds a missing or invalid value.

    Notes
    -----
    Errors in size are modelled structurally: each species has a latent true log size, and
    the measured log size is normal around it (Carroll et al. 2006, ch. 9; Richardson &
    Gilks 1993) with an SD given per species and taken as exact, or, with ``replicates``
    errors, an error SD estimated from the species' replicates and partially pooled
    (:mod:`allolaw.model.error_sd`; the same for trait errors). The true log sizes follow a
    normal population nested like the spec's taxon levels
    (:func:`~allolaw.model.terms.true_log_size`), one normal population without taxon
    levels; with shared ancestry they evolve by Brownian motion along the tree instead
    (:func:`~allolaw.model.phylo_terms.size_tree_population`), taxon levels or not. With
    ``ratio`` errors (fixed ratio, no scatter beyond measurement error) this
    is the Bayesian form of Deming regression (Deming 1943).
    Taxon deviations are normal per level, the terms of one taxon correlated (LKJ prior, the
    default) or independent; their SDs and correlations describe the deviations at the data's
    centre size, so the reference size changes only how taxon intercepts are reported
    (:mod:`allolaw.model.correlated`). The sampler sees them whitened by the data
    (:func:`taxon_terms`): for a law linear in the taxon values with normal residuals and
    exact sizes the map is exact and the funnel between taxon values and their SDs
    (Betancourt & Girolami 2015) is gone; otherwise it is an approximation that reduces it,
    while the model stays exactly the nested one.

    References
    ----------
    .. [1] Carroll, R. J., Ruppert, D., Stefanski, L. A. & Crainiceanu, C. M. (2006).
       Measurement Error in Nonlinear Models, 2nd ed. Chapman & Hall/CRC.
    .. [2] Richardson, S. & Gilks, W. R. (1993). Conditional independence models for
       epidemiological studies with covariate measurement error. Stat. Med. 12:1703–1722.
    .. [3] Deming, W. E. (1943). Statistical Adjustment of Data. Wiley.
    .. [4] Gillooly, J. F. et al. (2001). Effects of size and temperature on metabolic rate.
       Science 293:2248–2251.
    .. [5] Betancourt, M. & Girolami, M. (2015). Hamiltonian Monte Carlo for hierarchical
       models. In Current Trends in Bayesian Methodology with Applications, CRC.
    """
    inputs = read_inputs(data, spec, levels=levels)
    if spec.shared_ancestry != "none" and phylogeny is None:
        msg = (f"model {spec.name}: shared_ancestry {spec.shared_ancestry!r} needs the "
               "dataset's tree (`tree:` in the config)")
        raise UserError(msg)
    pri = spec.priors
    coords: dict[str, Any] = {"species": inputs.species}
    for level, taxa in inputs.taxa.items():
        coords[level] = taxa.labels
    intercept_mean = pri["intercept"].get("mean", "auto")
    if intercept_mean == "auto":
        intercept_mean = float(np.median(inputs.log_trait))
    term_priors = {
        "intercept": {"mean": intercept_mean, "sd": pri["intercept"]["sd"]},
        "exponent": pri["exponent"],
        "curvature": pri["curvature"],
    }
    terms = ["intercept", "exponent"] + (["curvature"] if spec.curvature != "none" else [])
    varying = [t for t in terms if t in _varying_terms(spec)] if inputs.taxa else []
    with pm.Model(coords=coords) as model:
        log_size_obs = pm.Data("log_size_obs", inputs.log_size, dims="species")
        log_size_ref = pm.Data("log_size_ref", float(log_reference_size))
        for level, taxa in inputs.taxa.items():
            pm.Data(f"taxon_index__{level}", taxa.index, dims="species")
        # taxon SDs and correlations describe deviations at this centre (model/correlated.py)
        centre = float(np.mean(inputs.log_size))
        if varying:
            pm.Data("log_size_centre", centre)

        # terms shared by all species
        shared = {t: pm.Normal(t, float(term_priors[t]["mean"]), float(term_priors[t]["sd"]))
                  for t in terms if t not in varying}
        sigma = residual_sd(spec)
        whiten = not prior_only and spec.taxa["parameterisation"] == "auto"
        sd_size, sd_estimated = _error_sd(inputs, "size", spec, prior_only)
        size = true_log_size(spec, inputs, log_size_obs, sigma_holder=sigma, whiten=whiten,
                             sd_size=sd_size, sd_estimated=sd_estimated,
                             phylogeny=phylogeny if spec.shared_ancestry != "none" else None)
        if spec.size_error == "ratio":
            sigma = size.sigma
        scatter = scatter_level(spec, levels)  # scatter by taxon (model/scatter.py)
        if scatter is not None:
            sigma = scatter_term(model, data, spec, sigma, scatter)
        centred_size = size.value - log_size_ref
        feature = {"intercept": pt.ones_like(centred_size), "exponent": centred_size,
                   "curvature": centred_size**2}

        within_part = _within_split(model, data, spec, levels, feature, log_size_ref,
                                    size.value)
        offset = sum((shared[t] * feature[t] for t in shared), within_part)
        for cov in spec.covariates:
            offset = offset + covariate_term(cov, inputs, pri["covariate"])
        if spec.breakpoint == "one" and "exponent" in shared:
            offset = offset + hinge(spec, inputs, size.value, log_size_ref, shared["exponent"])

        offset, total_sd = _trait_error(data, inputs, spec, offset, sigma, size.value, sd_size,
                                        prior_only)

        mu = offset
        if varying:
            for part in _taxon_parts(spec, varying, term_priors, inputs, feature, offset,
                                     total_sd, centre_shift=float(log_reference_size) - centre,
                                     prior_only=prior_only):
                mu = mu + part
            if spec.breakpoint == "one" and "exponent" in varying:
                mu = mu + hinge(spec, inputs, size.value, log_size_ref, model["exponent"])

        _observe_trait(model, spec, mu, total_sd, inputs, phylogeny)
    log.debug("built model %s (taxon terms %s, prior_only=%s)", spec.name, varying, prior_only)
    return model


def _taxon_parts(spec: ModelSpec, varying: list[str], term_priors: dict[str, Any],
                 inputs: Any, feature: dict[str, Any], offset: Any, total_sd: Any, *,
                 centre_shift: float, prior_only: bool) -> list[Any]:
    """Per varying term, each species' taxon value times its feature (call inside the model)."""
    pri = spec.priors
    # the taxon values are whitened by the data (see taxon_terms); the prior draws and
    # `parameterisation: non-centred` use the plain non-centred form
    whiten = (not prior_only and spec.taxa["parameterisation"] == "auto"
              and spec.shared_ancestry == "none")
    per_species = taxon_terms(
        varying, term_priors, {t: pri[f"{t}_sd"]["sd"] for t in varying}, inputs,
        features=feature if whiten else None,
        target=pt.as_tensor_variable(inputs.log_trait) - offset,
        noise_var=total_sd**2,  # a scalar or one per species (see whitened_op.whitened_map)
        correlation_eta=(float(pri["taxon_correlation"]["eta"])
                         if spec.taxa["correlation"] == "estimated" else None),
        centre_shift=centre_shift,
    )
    return [per_species[t] * feature[t] for t in varying]


def _within_split(model: pm.Model, data: pd.DataFrame, spec: ModelSpec, levels: list[str],
                  feature: dict[str, Any], log_size_ref: Any, true_size: Any) -> Any:
    """The within-species part of the law (model/within.py); the exponent then acts on means.

    Without a split: zero. With one, ``feature["exponent"]`` becomes the centred group mean
    (of the latent true sizes when size has error; the data keep the measured split).
    """
    if spec.within_species not in ("separate", "separate_by_species"):
        return pt.zeros_like(feature["exponent"])
    split = split_log_size(data, spec, levels=levels)
    group_mean = pm.Data("group_mean_log_size", split.group_mean, dims="species")
    if spec.size_error == "none":
        feature["exponent"] = group_mean - log_size_ref
        return within_term(model, split, spec)
    true_mean, true_deviation = latent_split(split, true_size)
    feature["exponent"] = true_mean - log_size_ref
    return within_term(model, split, spec, deviation=true_deviation)


def _trait_error(data: pd.DataFrame, inputs: Any, spec: ModelSpec, offset: Any, sigma: Any,
                 true_size: Any, sd_size: Any, prior_only: bool) -> tuple[Any, Any]:
    """Mean offset and total SD of the observed log trait, with its measurement error."""
    if spec.trait_error not in ("known", "replicates"):
        return offset, sigma
    sd_trait, _ = _error_sd(inputs, "trait", spec, prior_only)
    # size and trait errors of a species mean correlated (model/error_correlation.py)
    joint = correlated_errors(data, inputs, spec, true_size=true_size, sd_size=sd_size,
                              sd_trait=sd_trait, observe=not prior_only)
    if joint is not None:
        offset, sd_trait = offset + joint[0], joint[1]
    return offset, pt.sqrt(sigma**2 + sd_trait**2)


def _observe_trait(model: pm.Model, spec: ModelSpec, mu: Any, total_sd: Any, inputs: Any,
                   phylogeny: Any) -> None:
    """The observed log trait: along the tree, Student-t or normal around ``mu``."""
    pri = spec.priors
    if spec.shared_ancestry != "none":  # residuals along the tree (model/phylo_terms.py)
        ancestry_term(TRAIT, mu, total_sd, pri, spec.shared_ancestry, phylogeny,
                      inputs.log_trait, model)
    elif spec.residuals == "student_t":
        nu = pm.Gamma("nu", alpha=pri["nu"]["alpha"], beta=pri["nu"]["beta"])
        pm.StudentT(TRAIT, nu=nu, mu=mu, sigma=total_sd, observed=inputs.log_trait,
                    dims="species")
    else:
        pm.Normal(TRAIT, mu=mu, sigma=total_sd, observed=inputs.log_trait, dims="species")


def _error_sd(inputs: Any, axis: str, spec: ModelSpec, prior_only: bool) -> tuple[Any, bool]:
    # the error SD of each species' value on one axis: given, or estimated from replicates
    mode = spec.size_error if axis == "size" else spec.trait_error
    if mode not in ("known", "replicates"):
        return None, False
    errors = inputs.replicate_errors.get(axis)
    given = inputs.sd_size if axis == "size" else inputs.sd_trait
    sd = species_error_sd(axis, inputs.species, given, errors, spec.priors,
                          observe=not prior_only)
    return sd, errors is not None and bool(errors.estimated.any())


def _varying_terms(spec: ModelSpec) -> list[str]:
    # the terms of the law that get taxon deviations
    terms = list(spec.taxa["vary"])
    if spec.curvature == "shared_and_taxa":
        terms.append("curvature")
    return terms
