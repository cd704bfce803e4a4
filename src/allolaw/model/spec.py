"""Model specs: plain-word YAML files in ``models/``, validated against a JSON schema.

A spec names the terms of one model variant (taxon levels, measurement error, curvature,
breakpoint, residuals, covariates, priors). The schema ``schemas/model.schema.yaml`` describes
every key with its default; :func:`load_spec` validates a file, fills the defaults and returns
a :class:`ModelSpec`. :func:`allolaw.model.describing.describe_spec` turns a spec into a
paragraph for the report.
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

__all__ = ["NO_BREAK_SUFFIX", "ModelSpec", "load_spec", "matched_no_break", "models_to_fit",
           "parse_spec", "spec_schema"]

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
