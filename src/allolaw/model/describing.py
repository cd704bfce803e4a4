"""The plain-words paragraph of a model spec, for the report's methods section.

:func:`describe_spec` says what a :class:`~allolaw.model.spec.ModelSpec` assumes: the law,
taxon terms and their correlation, measurement errors and how their SDs are known, the
population of the true sizes, shared ancestry, residuals and priors. Every sentence is written
from the spec alone (no fit needed), so the report can state the assumptions of any model.
"""

from __future__ import annotations

from allolaw.model.spec import ModelSpec

__all__ = ["describe_spec"]


def describe_spec(spec: ModelSpec) -> str:
    """Describe the model in one plain-words paragraph (for the report's methods section).

    Parameters
    ----------
    spec
        A validated spec.

    Returns
    -------
    str
        A paragraph naming every term and prior of the model.
    """
    sentences = [
        "The natural log of the trait is modelled as an intercept plus an exponent times the "
        "natural log of size, centred at the reference size, so that the intercept is the log "
        "trait of a species of reference size.",
        *_describe_taxa(spec),
        *_describe_shape(spec),
        _describe_errors(spec),
        *_describe_covariates(spec),
        *_describe_residuals(spec),
        _describe_priors(spec),
    ]
    return " ".join(s for s in sentences if s)


def _describe_taxa(spec: ModelSpec) -> list[str]:
    levels = spec.taxa["levels"]
    vary = spec.taxa["vary"]
    if levels == "none" or not vary:
        return ["All species share one law (no taxon terms)."]
    which = {
        "all": "every taxon level of the dataset",
        "innermost": "the innermost taxon level",
    }.get(levels) if isinstance(levels, str) else "the levels " + ", ".join(levels)
    terms = " and ".join("its own " + v for v in vary)
    out = [
        f"At {which}, each taxon has {terms}: a normal deviation from its parent taxon "
        "(or from the population law at the outermost level), with an SD estimated from "
        "the data (partial pooling)."
    ]
    if len(vary) + (spec.curvature == "shared_and_taxa") > 1:
        out.append(_describe_correlation(spec))
    return out


def _describe_shape(spec: ModelSpec) -> list[str]:
    # curvature, breakpoint and the within/between split of log size
    pri = spec.priors
    out = []
    if spec.curvature == "shared":
        out.append("A quadratic term in centred log size, shared by all taxa, bends the law.")
    elif spec.curvature == "shared_and_taxa":
        out.append(
            "A quadratic term in centred log size bends the law; each taxon has its own "
            "curvature, deviating from the shared one."
        )
    if spec.breakpoint == "one":
        out.append(
            "The exponent changes at one break in size through a smooth hinge of width "
            f"{spec.hinge_width:g} on the log scale; the break location has a uniform prior "
            f"between the {pri['break_range']['lower_quantile']:.0%} and "
            f"{pri['break_range']['upper_quantile']:.0%} quantiles of observed log size."
        )
    if spec.within_species != "together":
        out.append(
            "Log size"
            + (" (the latent true log size)" if spec.size_error != "none" else "")
            + " is split into the mean of its species (the innermost taxon level) and the "
            "deviation from that mean, each with its own slope: the exponent is the "
            "between-species exponent and the within-species exponent is estimated apart "
            "(van de Pol & Wright 2009)"
            + ("; each species has its own within-species exponent, partially pooled."
               if spec.within_species == "separate_by_species" else ".")
        )
    return out


def _describe_covariates(spec: ModelSpec) -> list[str]:
    out = []
    for cov in spec.covariates:
        if cov["transform"] == "boltzmann":
            out.append(
                f"Temperature ({cov['column']}) enters as centred inverse temperature 1/(kT) "
                "with k = 8.617e-5 eV/K; its coefficient is minus an activation energy in eV "
                "(Gillooly et al. 2001)."
            )
        else:
            out.append(f"The centred covariate {cov['column']} enters additively.")
    return out


def _describe_residuals(spec: ModelSpec) -> list[str]:
    # the residual distribution, scatter by taxon and shared ancestry
    pri = spec.priors
    if spec.residuals == "student_t":
        out = [
            "Residuals follow a Student-t distribution with estimated degrees of freedom "
            f"(prior gamma({pri['nu']['alpha']:g}, {pri['nu']['beta']:g})), so single outlying "
            "species pull the law less than under normal residuals."
        ]
    else:
        out = ["Residuals are normal on the log scale."]
    if spec.scatter_by_taxon != "none":
        where = ("the innermost taxon level" if spec.scatter_by_taxon == "innermost"
                 else f"level {spec.scatter_by_taxon}")
        out.append(
            f"Each taxon at {where} has its own residual SD: its log is normal around the log "
            "of the typical residual SD, with an SD (half-normal prior of scale "
            f"{pri['scatter_spread']['sd']:g}) estimated from the data (partial pooling).")
    if spec.shared_ancestry != "none":
        out.append(_describe_ancestry(spec))
    return out


def _describe_priors(spec: ModelSpec) -> str:
    pri = spec.priors
    sigma = pri["sigma"]
    sigma_text = (
        f"the residual SD is fixed at {sigma['fixed']:g}"
        if "fixed" in sigma
        else f"the residual SD half-normal({sigma['sd']:g})"
    )
    intercept_mean = pri["intercept"].get("mean", "auto")
    intercept_text = (
        "centred at the median log trait"
        if intercept_mean == "auto"
        else f"with mean {intercept_mean:g}"
    )
    return (
        f"Priors: exponent normal({pri['exponent']['mean']:g}, {pri['exponent']['sd']:g}); "
        f"intercept normal with SD {pri['intercept']['sd']:g}, {intercept_text}; {sigma_text}"
        + (f"; within-species exponent normal({pri['within_exponent']['mean']:g}, "
           f"{pri['within_exponent']['sd']:g})." if spec.within_species != "together" else ".")
    )


def _describe_correlation(spec: ModelSpec) -> str:
    where = ("The SDs describe the deviations at the data's centre size (the geometric mean "
             "of the sizes), whatever the reference size")
    if spec.taxa["correlation"] == "none":
        return f"A taxon's deviations of different terms are independent. {where}."
    eta = spec.priors["taxon_correlation"]["eta"]
    return (f"A taxon's deviations of different terms are correlated, one correlation matrix "
            f"per level with an LKJ prior of shape {eta:g} (Lewandowski, Kurowicka & Joe "
            f"2009; 1 is uniform over correlation matrices). {where}, and so do the "
            "correlations.")


def _describe_ancestry(spec: ModelSpec) -> str:
    if spec.shared_ancestry == "full":
        how = "by Brownian motion along the tree of the dataset (Felsenstein 1985)"
    else:
        prior = spec.priors["ancestry_signal"]
        lam = (f"fixed at {prior['fixed']:g}" if "fixed" in prior
               else f"with a beta({prior['alpha']:g}, {prior['beta']:g}) prior")
        how = ("by Brownian motion along the tree of the dataset scaled by Pagel's λ "
               f"({lam}; Pagel 1999): λ = 0 is no likeness from shared ancestry, λ = 1 "
               "plain Brownian motion")
    text = (f"Residuals of related species are alike: they evolve {how}. Branch lengths are "
            "divided by the largest root-to-tip distance, so the residual SD is that of a "
            "species at the full height of the tree.")
    if spec.taxa["levels"] != "none" and spec.taxa["vary"]:
        text += " Taxon values are written in the non-centred form."
    return text


def _describe_errors(spec: ModelSpec) -> str:
    population = _describe_size_population(spec)
    if spec.size_error == "ratio":
        ratio = spec.priors["error_ratio"]
        return (
            "Both axes carry measurement error with a known, fixed ratio of trait to size "
            f"error variances ({ratio['value']:g}) and one unknown error SD per axis; this "
            "setting assumes no scatter about the law beyond measurement error (a Bayesian "
            f"Deming regression). {population}"
        )
    parts = []
    if spec.size_error in ("known", "replicates"):
        parts.append(
            f"Size is measured with error ({_describe_error_sd(spec, 'size')}); the true log "
            f"size of each species is a latent parameter. {population} The correction of the "
            "exponent for measurement error in size holds as far as that population model and "
            "the error SDs are right."
        )
    if spec.trait_error in ("known", "replicates"):
        parts.append(
            "The trait's measurement-error variance of each species "
            f"({_describe_error_sd(spec, 'trait')}) is added to the residual variance."
        )
    if "replicates" in (spec.size_error, spec.trait_error):
        common, spread = spec.priors["error_sd_common"], spec.priors["error_sd_spread"]
        parts.append(
            "An error SD estimated from replicates is a parameter of each species: the SD of "
            "one replicate, log-normal around a common SD of the dataset (one per axis; the log "
            f"of the common SD normal(ln {common['median']:g}, {common['log_sd']:g}), the SD of "
            f"the log SDs across species half-normal({spread['sd']:g})). The sample variance "
            "of a species' n replicate log values, times (n − 1) over the true error variance, "
            "is chi-square with n − 1 degrees of freedom, and the species mean has error SD "
            "true error SD / √n; a species with one value takes its error SD from the pooled "
            "distribution. " + _describe_error_pairs(spec)
        )
    return " ".join(parts) or "Size and trait are taken as measured without error."


def _describe_error_pairs(spec: ModelSpec) -> str:
    # independence of size and trait errors, or their estimated correlation
    if (spec.error_correlation == "estimated" and spec.size_error == "replicates"
            and spec.trait_error == "replicates"):
        return (
            "Errors are assumed normal on the log scale, independent between replicates and "
            "of the species' true values. The size and trait errors of a species whose two "
            "error SDs are estimated are bivariate normal with one correlation for the "
            "dataset (uniform(−1, 1) prior), learnt from the species' replicate covariances "
            "(Wishart likelihood of each species' replicate cross-products); the trait is "
            "normal given the true size, its mean shifted by the correlated part of the size "
            "error and its error variance reduced by the factor 1 − correlation²."
        )
    return (
        "Errors are assumed normal on the log scale and independent between "
        "replicates, between size and trait, and of the species' true values. Where they "
        "are not (e.g. a species value is a mean of individuals whose trait follows their "
        "own size), the correction for size error overshoots the exponent."
    )


def _describe_error_sd(spec: ModelSpec, axis: str) -> str:
    mode = spec.size_error if axis == "size" else spec.trait_error
    if mode == "known":
        return "SD given per species, taken as exact"
    return ("SD given per species taken as exact where the data give one; otherwise "
            "estimated from the species' replicates, partially pooled")


def _describe_size_population(spec: ModelSpec) -> str:
    if spec.shared_ancestry != "none":
        return (
            "The true log sizes evolve by Brownian motion along the tree of the dataset "
            "(Felsenstein 1985; Pagel's λ of the sizes fixed at 1) from a root mean, with an SD "
            "per unit of tree height, both estimated; taxon levels do not enter the sizes."
        )
    if spec.taxa["levels"] != "none" and (spec.taxa["vary"]
                                          or spec.curvature == "shared_and_taxa"):
        return (
            "The true log sizes are normal around their taxon's mean size, with one SD "
            "within taxa; each taxon's mean size is normal around its parent's (one SD per "
            "level), the outermost around a population mean."
        )
    return "The true log sizes come from one normal population (mean and SD estimated)."
