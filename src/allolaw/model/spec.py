"""Model specs: plain-word YAML files in ``models/``, validated against a JSON schema.

A spec names the terms of one model variant (taxon levels, measurement error, curvature,
breakpoint, residuals, covariates, priors). The schema ``schemas/model.schema.yaml`` describes
every key with its default; :func:`load_spec` validates a file, fills the defaults and returns
a :class:`ModelSpec`. :func:`describe_spec` turns a spec into a paragraph for the report.
"""

from __future__ import annotations

import copy
import json
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path
from typing import Any

import jsonschema
import yaml

from allolaw.errors import UserError

__all__ = ["NO_BREAK_SUFFIX", "ModelSpec", "describe_spec", "load_spec", "matched_no_break",
           "models_to_fit", "parse_spec", "spec_schema"]

#: Suffix of the matched model without break derived from a breakpoint spec.
NO_BREAK_SUFFIX = "__no_break"


@dataclass(frozen=True)
class ModelSpec:
    """A validated model spec with every default filled in.

    Attributes mirror the keys of ``schemas/model.schema.yaml``; ``priors["exponent"]`` is
    ``{"mean": m, "sd": s}`` (a normal prior).
    """

    name: str
    description: str
    taxa: dict[str, Any]
    size_error: str
    trait_error: str
    curvature: str
    breakpoint: str
    hinge_width: float
    residuals: str
    covariates: list[dict[str, Any]]
    priors: dict[str, dict[str, Any]]
    shared_ancestry: str = "none"
    source: str = field(default="", compare=False)
    within_species: str = "together"
    scatter_by_taxon: str = "none"
    error_correlation: str = "estimated"

    def to_dict(self) -> dict[str, Any]:
        """Return the spec as plain data (the keys of the YAML file plus ``name``)."""
        return {
            "name": self.name,
            "description": self.description,
            "taxa": copy.deepcopy(self.taxa),
            "size_error": self.size_error,
            "trait_error": self.trait_error,
            "curvature": self.curvature,
            "breakpoint": self.breakpoint,
            "hinge_width": self.hinge_width,
            "residuals": self.residuals,
            "covariates": copy.deepcopy(self.covariates),
            "priors": copy.deepcopy(self.priors),
            "within_species": self.within_species,
            "shared_ancestry": self.shared_ancestry,
            "scatter_by_taxon": self.scatter_by_taxon,
            "error_correlation": self.error_correlation,
        }

    def to_json(self) -> str:
        """The spec as a JSON string (stored in the InferenceData attributes)."""
        return json.dumps(self.to_dict(), sort_keys=True)

    @property
    def has_size_error(self) -> bool:
        """True when the true log size of each species is a latent parameter."""
        return self.size_error != "none"

    @property
    def cost_rank(self) -> int:
        """A rough rank of how long a fit of this spec takes, from the spec alone.

        The workflow starts the fits with the highest rank first (Snakemake ``priority``), so
        the longest fits do not start last and run alone on one core while the other idles
        (longest job first: Graham 1969, SIAM J. Appl. Math. 17:416-429). One point for the
        law, one per taxon term that varies, two for a latent true size per species (the
        largest block of parameters), one each for curvature, curvature by taxon, a
        breakpoint, Student-t residuals and a within/between split (two when the within
        exponent varies by species), one for correlated taxon terms (two or more terms
        varying, ``taxa.correlation: estimated``) and one for scatter by taxon. The
        correlation point was added without a new timing (every demo taxon model gets it, so
        the order of the demo fits is unchanged). Demo batch of 2026-12-03, job seconds in spec
        order: island 12, 57, 70, 86, 113 for ranks 1, 3, 5, 6, 7; tree 8, 37, 33, 49 for
        1, 5, 6, 7; cell 11, 27, 40 for 1, 3, 3 (benchmarks/README.md).
        """
        rank = 1
        if self.taxa.get("levels") != "none":
            rank += len(self.taxa.get("vary", []))
        rank += 2 if self.has_size_error else 0
        rank += {"none": 0, "shared": 1}.get(self.curvature, 2)
        rank += 1 if self.breakpoint != "none" else 0
        rank += 1 if self.residuals == "student_t" else 0
        rank += {"together": 0, "separate": 1}.get(self.within_species, 2)
        rank += {"none": 0, "full": 1}.get(self.shared_ancestry, 2)
        varying = len(self.taxa.get("vary", [])) + (self.curvature == "shared_and_taxa")
        if (self.taxa.get("levels") != "none" and varying > 1
                and self.taxa.get("correlation", "estimated") == "estimated"):
            rank += 1
        rank += 1 if self.scatter_by_taxon != "none" else 0
        return rank


def load_spec(models_dir: str | Path, name: str) -> ModelSpec:
    """Read, validate and complete ``<models_dir>/<name>.yaml``.

    Parameters
    ----------
    models_dir
        Folder of model specs.
    name
        Spec name (file name without ``.yaml``).

    Raises
    ------
    UserError
        If the file is missing or not YAML, or a key is unknown or has a bad value; the
        message names the file, the key and the value.
    """
    base = name.removesuffix(NO_BREAK_SUFFIX)
    path = Path(models_dir) / f"{name}.yaml"
    if base != name and not path.is_file():
        spec = load_spec(models_dir, base)
        raw = spec.to_dict()
        raw.pop("name", None)
        raw["breakpoint"] = "none"
        raw["description"] = (f"The spec '{base}' without its break: same taxon terms and "
                              "priors, one straight law (the matched model for the break's "
                              "LOO comparison).")
        return parse_spec(raw, name=name, source=f"{path} (derived from {base}.yaml)")
    if not path.is_file():
        known = sorted(p.stem for p in Path(models_dir).glob("*.yaml"))
        msg = f"model spec not found: {path} (known specs: {', '.join(known) or 'none'})"
        raise UserError(msg)
    try:
        raw = yaml.safe_load(path.read_text(encoding="utf-8"))
    except yaml.YAMLError as err:
        msg = f"{path}: not valid YAML: {err}"
        raise UserError(msg) from err
    return parse_spec(raw if raw is not None else {}, name=name, source=str(path))


def matched_no_break(name: str) -> str:
    """Name of the spec derived from breakpoint spec ``name`` with ``breakpoint: none``.

    :func:`load_spec` builds it from ``<name>.yaml`` when no file of that name exists.
    """
    return f"{name}{NO_BREAK_SUFFIX}"


def models_to_fit(models_dir: str | Path, models: list[str]) -> list[str]:
    """The listed models plus, after each breakpoint model, its matched model without break.

    The workflow fits this list, and the compare stage reads it, so a dataset that lists a
    breakpoint model is always compared with the same model without the break. A name without
    a spec file is kept as it is (the fit stage says that the spec is missing).
    """
    out: list[str] = []
    for name in models:
        out.append(name)
        derived = matched_no_break(name)
        if not (Path(models_dir) / f"{name}.yaml").is_file() or derived in models:
            continue
        if load_spec(models_dir, name).breakpoint != "none":
            out.append(derived)
    return out


def parse_spec(raw: Any, *, name: str, source: str = "<spec>") -> ModelSpec:
    """Validate a spec given as plain data and return it with defaults filled in.

    Parameters
    ----------
    raw
        The mapping read from YAML.
    name
        Spec name.
    source
        Where it came from (used in error messages).
    """
    schema = spec_schema()
    validator = jsonschema.Draft202012Validator(schema)
    errors = sorted(validator.iter_errors(raw), key=lambda e: list(e.absolute_path))
    if errors:
        raise UserError(_format_schema_error(errors, source))
    spec = copy.deepcopy(raw)
    _fill_defaults(spec, schema, schema)
    _check_consistency(spec, source)
    intercept = spec["priors"]["intercept"]
    intercept.setdefault("mean", "auto")
    for cov in spec["covariates"]:
        cov["column"] = cov["column"].removeprefix("cov_")
    return ModelSpec(
        name=name,
        description=spec["description"],
        taxa=spec["taxa"],
        size_error=spec["size_error"],
        trait_error=spec["trait_error"],
        curvature=spec["curvature"],
        breakpoint=spec["breakpoint"],
        hinge_width=float(spec["hinge_width"]),
        residuals=spec["residuals"],
        covariates=spec["covariates"],
        priors=spec["priors"],
        shared_ancestry=spec["shared_ancestry"],
        source=source,
        within_species=spec["within_species"],
        scatter_by_taxon=spec["scatter_by_taxon"],
        error_correlation=spec["error_correlation"],
    )


def spec_schema() -> dict[str, Any]:
    """Return the JSON schema of model specs shipped with the package."""
    text = resources.files("allolaw").joinpath("schemas/model.schema.yaml").read_text("utf-8")
    return yaml.safe_load(text)


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
    pri = spec.priors
    sentences = [
        "The natural log of the trait is modelled as an intercept plus an exponent times the "
        "natural log of size, centred at the reference size, so that the intercept is the log "
        "trait of a species of reference size."
    ]
    levels = spec.taxa["levels"]
    vary = spec.taxa["vary"]
    if levels != "none" and vary:
        which = {
            "all": "every taxon level of the dataset",
            "innermost": "the innermost taxon level",
        }.get(levels) if isinstance(levels, str) else "the levels " + ", ".join(levels)
        terms = " and ".join("its own " + v for v in vary)
        sentences.append(
            f"At {which}, each taxon has {terms}: a normal deviation from its parent taxon "
            "(or from the population law at the outermost level), with an SD estimated from "
            "the data (partial pooling)."
        )
        n_terms = len(vary) + (spec.curvature == "shared_and_taxa")
        if n_terms > 1:
            sentences.append(_describe_correlation(spec))
    else:
        sentences.append("All species share one law (no taxon terms).")
    if spec.curvature == "shared":
        sentences.append("A quadratic term in centred log size, shared by all taxa, bends the law.")
    elif spec.curvature == "shared_and_taxa":
        sentences.append(
            "A quadratic term in centred log size bends the law; each taxon has its own "
            "curvature, deviating from the shared one."
        )
    if spec.breakpoint == "one":
        sentences.append(
            "The exponent changes at one break in size through a smooth hinge of width "
            f"{spec.hinge_width:g} on the log scale; the break location has a uniform prior "
            f"between the {pri['break_range']['lower_quantile']:.0%} and "
            f"{pri['break_range']['upper_quantile']:.0%} quantiles of observed log size."
        )
    if spec.within_species != "together":
        sentences.append(
            "Log size is split into the mean of its species (the innermost taxon level) and the "
            "deviation from that mean, each with its own slope: the exponent is the "
            "between-species exponent and the within-species exponent is estimated apart "
            "(van de Pol & Wright 2009)"
            + ("; each species has its own within-species exponent, partially pooled."
               if spec.within_species == "separate_by_species" else ".")
        )
    sentences.append(_describe_errors(spec))
    for cov in spec.covariates:
        if cov["transform"] == "boltzmann":
            sentences.append(
                f"Temperature ({cov['column']}) enters as centred inverse temperature 1/(kT) "
                "with k = 8.617e-5 eV/K; its coefficient is minus an activation energy in eV "
                "(Gillooly et al. 2001)."
            )
        else:
            sentences.append(f"The centred covariate {cov['column']} enters additively.")
    if spec.residuals == "student_t":
        sentences.append(
            "Residuals follow a Student-t distribution with estimated degrees of freedom "
            f"(prior gamma({pri['nu']['alpha']:g}, {pri['nu']['beta']:g})), so single outlying "
            "species pull the law less than under normal residuals."
        )
    else:
        sentences.append("Residuals are normal on the log scale.")
    if spec.scatter_by_taxon != "none":
        where = ("the innermost taxon level" if spec.scatter_by_taxon == "innermost"
                 else f"level {spec.scatter_by_taxon}")
        sentences.append(
            f"Each taxon at {where} has its own residual SD: its log is normal around the log "
            "of the typical residual SD, with an SD (half-normal prior of scale "
            f"{pri['scatter_spread']['sd']:g}) estimated from the data (partial pooling).")
    if spec.shared_ancestry != "none":
        sentences.append(_describe_ancestry(spec))
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
    sentences.append(
        f"Priors: exponent normal({pri['exponent']['mean']:g}, {pri['exponent']['sd']:g}); "
        f"intercept normal with SD {pri['intercept']['sd']:g}, {intercept_text}; {sigma_text}"
        + (f"; within-species exponent normal({pri['within_exponent']['mean']:g}, "
           f"{pri['within_exponent']['sd']:g})." if spec.within_species != "together" else ".")
    )
    return " ".join(sentences)


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


def _format_schema_error(errors: list[jsonschema.ValidationError], source: str) -> str:
    err = errors[0]
    path = [str(p) for p in err.absolute_path]
    if err.validator == "additionalProperties":
        known = sorted(err.schema.get("properties", {}))
        extra = sorted(set(err.instance) - set(known)) if isinstance(err.instance, dict) else []
        key = ".".join([*path, extra[0]]) if extra else ".".join(path) or "(top level)"
        msg = f"{source}: unknown key '{key}' (allowed here: {', '.join(known)})"
    else:
        key = ".".join(path) or "(top level)"
        value = err.instance
        if err.validator == "oneOf" and isinstance(err.schema, dict):
            choices = [s.get("enum") for s in err.schema["oneOf"] if "enum" in s]
            allowed = ", ".join(str(c) for group in choices for c in group)
            detail = f"expected one of {allowed} or a list of level names"
        else:
            detail = err.message
        msg = f"{source}: key '{key}': bad value {value!r}: {detail}"
    if len(errors) > 1:
        msg += f" (and {len(errors) - 1} more problem(s))"
    return msg


def _check_consistency(spec: dict[str, Any], source: str) -> None:
    size, trait = spec["size_error"], spec["trait_error"]
    if (size == "ratio") != (trait == "ratio"):
        key = "size_error" if size != "ratio" else "trait_error"
        msg = (
            f"{source}: key '{key}': bad value {spec[key]!r}: the error-ratio setting needs "
            "both size_error and trait_error set to 'ratio'"
        )
        raise UserError(msg)
    if spec["curvature"] != "none" and spec["breakpoint"] != "none":
        msg = (
            f"{source}: key 'breakpoint': bad value {spec['breakpoint']!r}: a breakpoint "
            "cannot be combined with curvature (choose one way for the law to bend)"
        )
        raise UserError(msg)
    rng = spec["priors"]["break_range"]
    if rng["lower_quantile"] >= rng["upper_quantile"]:
        msg = (
            f"{source}: key 'priors.break_range': bad value {rng!r}: lower_quantile must be "
            "below upper_quantile"
        )
        raise UserError(msg)
    sigma = spec["priors"]["sigma"]
    if "fixed" in sigma and "sd" in sigma:
        msg = f"{source}: key 'priors.sigma': bad value {sigma!r}: give either sd or fixed"
        raise UserError(msg)
    ratio = spec["priors"]["error_ratio"]
    if size == "ratio" and ratio["log_sd"] > 0:
        # with one error SD per axis and no scatter beyond measurement error, the data fix
        # only the slope given the ratio: an uncertain ratio leaves the posterior of the
        # ratio at its prior (measured on simulated tables), so the setting is refused
        msg = (
            f"{source}: key 'priors.error_ratio.log_sd': bad value {ratio['log_sd']!r}: in "
            "ratio mode the ratio of trait to size error variances is not identified by the "
            "data and must be fixed (log_sd: 0, value: the known ratio)"
        )
        raise UserError(msg)
    if size == "ratio" and "fixed" in sigma:
        msg = (
            f"{source}: key 'priors.sigma.fixed': in ratio mode the residual SD follows from "
            "the error ratio and cannot be fixed"
        )
        raise UserError(msg)
    _check_ancestry(spec, source)
    _check_scatter(spec, source)
    if spec["curvature"] == "shared_and_taxa" and spec["taxa"]["levels"] == "none":
        msg = (
            f"{source}: key 'curvature': bad value 'shared_and_taxa': per-taxon curvature "
            "needs taxon levels (taxa.levels is 'none')"
        )
        raise UserError(msg)


def _check_scatter(spec: dict[str, Any], source: str) -> None:
    value = spec["scatter_by_taxon"]
    if value == "none":
        return
    if spec["size_error"] == "ratio":
        msg = (f"{source}: key 'scatter_by_taxon': bad value {value!r}: in ratio mode the "
               "residual SD follows from the error ratio and cannot vary by taxon")
        raise UserError(msg)
    if spec["shared_ancestry"] != "none":
        msg = (f"{source}: key 'scatter_by_taxon': bad value {value!r}: cannot be combined "
               f"with shared_ancestry {spec['shared_ancestry']!r} (one residual SD along the "
               "tree)")
        raise UserError(msg)


def _check_ancestry(spec: dict[str, Any], source: str) -> None:
    # the tree density is Gaussian and has no per-species error variance (see model/phylo_terms)
    if spec["shared_ancestry"] == "none":
        return
    value = spec["shared_ancestry"]
    if spec["residuals"] != "normal":
        msg = (f"{source}: key 'shared_ancestry': bad value {value!r}: shared ancestry needs "
               f"normal residuals (residuals is {spec['residuals']!r})")
        raise UserError(msg)
    if spec["size_error"] == "ratio":
        msg = (f"{source}: key 'shared_ancestry': bad value {value!r}: shared ancestry cannot "
               "be combined with size_error 'ratio' (no residual beyond measurement error to "
               "follow the tree; use size_error: known or replicates)")
        raise UserError(msg)
    if spec["trait_error"] != "none":
        msg = (f"{source}: key 'shared_ancestry': bad value {value!r}: shared ancestry cannot "
               f"be combined with trait_error {spec['trait_error']!r} (use trait_error: none)")
        raise UserError(msg)


def _fill_defaults(node: Any, schema: dict[str, Any], root: dict[str, Any]) -> None:
    schema = _resolve(schema, root)
    if isinstance(node, list) and "items" in schema:
        for item in node:
            _fill_defaults(item, schema["items"], root)
        return
    if not isinstance(node, dict):
        return
    for key, sub in schema.get("properties", {}).items():
        default = sub.get("default")
        resolved = _resolve(sub, root)
        if key not in node and default is not None:
            node[key] = copy.deepcopy(default)
        elif key in node and isinstance(node[key], dict) and isinstance(default, dict):
            # a partly given prior keeps the default's other entries ({"sd": 2} → mean too)
            for dkey, dval in default.items():
                if "fixed" in node[key] and dkey != "fixed":
                    continue  # a fixed value takes no prior parameters
                node[key].setdefault(dkey, copy.deepcopy(dval))
        if key in node:
            _fill_defaults(node[key], resolved, root)


def _resolve(schema: dict[str, Any], root: dict[str, Any]) -> dict[str, Any]:
    while "$ref" in schema:
        target: Any = root
        for part in schema["$ref"].removeprefix("#/").split("/"):
            target = target[part]
        schema = target
    return schema
