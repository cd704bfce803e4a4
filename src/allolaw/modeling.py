"""The model builder: a validated spec plus a clean table become one PyMC model.

The law, for species i in innermost taxon t, is::

    log trait_i = a_t + b_t·(x_i − x_ref) + c_t·(x_i − x_ref)² [+ hinge] [+ Σ coef·z_i] + e_i

with x_i the natural log of size (the latent true log size when size carries measurement
error), x_ref the log reference size, and e_i normal or Student-t. A taxon at an inner level
deviates from its parent taxon at the next level out (order → family); the outermost taxa
deviate from the population values. Variable names and dims follow the data contract in
DEVELOPERS.md, so later stages read them by name.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
import pymc as pm
import pytensor.tensor as pt

from allolaw.errors import UserError
from allolaw.spec import ModelSpec

__all__ = [
    "BOLTZMANN_EV_PER_K",
    "SIZE_MEASUREMENT",
    "TRAIT",
    "build_model",
    "expected_log_trait",
    "select_levels",
    "taxon_parameterisation",
]

log = logging.getLogger(__name__)

#: Boltzmann constant in eV/K (CODATA value, rounded as in Gillooly et al. 2001).
BOLTZMANN_EV_PER_K = 8.617e-5
#: Name of the observed trait variable (the only one in ``log_likelihood``).
TRAIT = "trait"
#: Name of the observed measured log size (present with errors in size; not a likelihood
#: term for model comparison: ``log_likelihood`` holds ``trait`` only).
SIZE_MEASUREMENT = "measured_log_size"

# auto parameterisation thresholds (see taxon_parameterisation)
_CENTRED_MIN_SPECIES = 10
_CENTRED_MIN_RELIABILITY = 0.9
_CENTRED_MAX_TRAIT_ERROR_FRACTION = 0.5


def build_model(
    data: pd.DataFrame,
    spec: ModelSpec,
    *,
    levels: list[str],
    log_reference_size: float,
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
    Errors in size are modelled structurally: each species has a latent true log size with a
    normal population prior (mean and SD estimated), and the measured log size is normal
    around it with the known SD (Carroll et al. 2006, ch. 9; Richardson & Gilks 1993). With
    ``ratio`` errors this is the Bayesian form of Deming regression (Deming 1943).
    Taxon deviations are independent normal terms per level (no correlation between the
    intercept and exponent deviations of a taxon).

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
    inputs = _read_inputs(data, spec, levels=levels)
    param = taxon_parameterisation(data, spec, levels=levels)
    pri = spec.priors
    coords: dict[str, Any] = {"species": inputs.species}
    for level, taxa in inputs.taxa.items():
        coords[level] = taxa.labels
    with pm.Model(coords=coords) as model:
        log_size_obs = pm.Data("log_size_obs", inputs.log_size, dims="species")
        log_size_ref = pm.Data("log_size_ref", float(log_reference_size))
        for level, taxa in inputs.taxa.items():
            pm.Data(f"taxon_index__{level}", taxa.index, dims="species")

        intercept_mean = pri["intercept"].get("mean", "auto")
        if intercept_mean == "auto":
            intercept_mean = float(np.median(inputs.log_trait))
        intercept = pm.Normal("intercept", float(intercept_mean), pri["intercept"]["sd"])
        exponent = pm.Normal("exponent", pri["exponent"]["mean"], pri["exponent"]["sd"])
        curvature = None
        if spec.curvature != "none":
            curvature = pm.Normal("curvature", pri["curvature"]["mean"], pri["curvature"]["sd"])

        sigma = _residual_sd(spec)
        size = _true_log_size(spec, inputs, log_size_obs, sigma_holder=sigma)
        if spec.size_error == "ratio":
            sigma = size.sigma
        centred_size = size.value - log_size_ref

        a = intercept
        if "intercept" in spec.taxa["vary"]:
            a = _taxon_terms("intercept", intercept, inputs, param, pri["intercept_sd"]["sd"])
        b = exponent
        if "exponent" in spec.taxa["vary"]:
            b = _taxon_terms("exponent", exponent, inputs, param, pri["exponent_sd"]["sd"])
        mu = a + b * centred_size
        if curvature is not None:
            c = curvature
            if spec.curvature == "shared_and_taxa":
                c = _taxon_terms("curvature", curvature, inputs, param, pri["curvature_sd"]["sd"])
            mu = mu + c * centred_size**2
        if spec.breakpoint == "one":
            mu = mu + _hinge(spec, inputs, size.value, log_size_ref, exponent)
        for cov in spec.covariates:
            mu = mu + _covariate_term(cov, inputs, pri["covariate"])

        total_sd = sigma
        if spec.trait_error in ("known", "replicates"):
            sd_trait = pm.Data("sd_log_trait", inputs.sd_trait, dims="species")
            total_sd = pt.sqrt(sigma**2 + sd_trait**2)
        if spec.residuals == "student_t":
            nu = pm.Gamma("nu", alpha=pri["nu"]["alpha"], beta=pri["nu"]["beta"])
            pm.StudentT(TRAIT, nu=nu, mu=mu, sigma=total_sd, observed=inputs.log_trait,
                        dims="species")
        else:
            pm.Normal(TRAIT, mu=mu, sigma=total_sd, observed=inputs.log_trait, dims="species")
    log.debug("built model %s (taxon parameterisation %s)", spec.name, param)
    return model


def expected_log_trait(
    idata: Any,
    log_size: np.ndarray | list[float] | float,
    *,
    level: str | None = None,
    taxon: str | None = None,
) -> np.ndarray:
    """Posterior draws of the law (expected log trait) at given natural-log sizes.

    Parameters
    ----------
    idata
        InferenceData of a fit of :func:`build_model` (``posterior`` and ``constant_data``).
    log_size
        Natural logs of size (canonical unit), the grid.
    level, taxon
        A taxon level and one taxon of it for that taxon's law; both ``None`` for the
        population law. Terms that do not vary at that level are the population values.

    Returns
    -------
    numpy.ndarray
        Shape ``(draws, grid)`` with chains stacked; covariates at their centre (mean).
    """
    post = idata.posterior
    grid = np.atleast_1d(np.asarray(log_size, dtype=float))
    ref = _scalar(idata.constant_data["log_size_ref"])
    if (level is None) != (taxon is None):
        msg = "expected_log_trait: give both level and taxon, or neither"
        raise ValueError(msg)

    def draws(name: str) -> np.ndarray:
        var = post[name]
        if level is not None and f"taxon_{name}__{level}" in post:
            var = post[f"taxon_{name}__{level}"]
            labels = [str(v) for v in var[level].values]
            if str(taxon) not in labels:
                msg = f"taxon {taxon!r} is not a taxon of level '{level}' (known: {labels})"
                raise UserError(msg)
            var = var.isel({level: labels.index(str(taxon))})
        return var.values.reshape(-1)

    if level is not None and not any(f"taxon_{t}__{level}" in post for t in _TAXON_TERMS):
        msg = f"the model has no taxon terms at level '{level}'"
        raise UserError(msg)
    a = draws("intercept")
    b = draws("exponent")
    dx = grid[None, :] - ref
    out = a[:, None] + b[:, None] * dx
    if "curvature" in post:
        out = out + draws("curvature")[:, None] * dx**2
    if "break_log_size" in post:
        width = _scalar(idata.constant_data["hinge_width"])
        brk = post["break_log_size"].values.reshape(-1)[:, None]
        pop_b = post["exponent"].values.reshape(-1)
        above = post["exponent_above"].values.reshape(-1) + (b - pop_b)
        out = out + (above - b)[:, None] * (
            _softplus_np(grid[None, :] - brk, width) - _softplus_np(ref - brk, width)
        )
    return out


def select_levels(spec: ModelSpec, levels: list[str]) -> list[str]:
    """The taxon levels a spec uses for a dataset with ``levels`` (outer to inner).

    Raises
    ------
    UserError
        If the spec lists a level the dataset does not have.
    """
    chosen = spec.taxa["levels"]
    if not spec.taxa["vary"] and spec.curvature != "shared_and_taxa":
        return []
    if chosen == "none":
        return []
    if chosen == "all":
        return list(levels)
    if chosen == "innermost":
        return list(levels[-1:])
    unknown = [lvl for lvl in chosen if lvl not in levels]
    if unknown:
        msg = (
            f"{spec.source or spec.name}: key 'taxa.levels': bad value {unknown[0]!r}: the "
            f"dataset's levels are {list(levels)}"
        )
        raise UserError(msg)
    return [lvl for lvl in levels if lvl in chosen]


def taxon_parameterisation(
    data: pd.DataFrame, spec: ModelSpec, *, levels: list[str]
) -> dict[str, str]:
    """Choose ``centred`` or ``non-centred`` taxon deviations per level.

    With ``parameterisation: auto`` a level is centred when its taxa hold a median of at
    least 10 members (species at the innermost level used, child taxa at an outer level,
    whose deviations are what inform the outer one), and measurement error is small: the
    median reliability of log size (1 − sd_log_size² / var(log_size)) is at least 0.9 and
    the median trait error SD is at most half the residual SD of a least-squares line.
    Otherwise it is non-centred. Centred
    forms sample better when each taxon's data pin down its deviation; non-centred ones when
    the prior dominates (the funnel of Betancourt & Girolami 2015). The thresholds are common
    practice, no source.

    References
    ----------
    .. [1] Betancourt, M. & Girolami, M. (2015). Hamiltonian Monte Carlo for hierarchical
       models. In Current Trends in Bayesian Methodology with Applications, CRC.
    .. [2] Papaspiliopoulos, O., Roberts, G. O. & Sköld, M. (2007). A general framework for
       the parametrization of hierarchical models. Statistical Science 22:59–73.
    """
    used = select_levels(spec, levels)
    choice = spec.taxa["parameterisation"]
    if choice != "auto":
        return dict.fromkeys(used, choice)
    small_error = True
    x = data["log_size"].to_numpy(dtype=float)
    y = data["log_trait"].to_numpy(dtype=float)
    if spec.size_error in ("known", "replicates") and len(x) > 2:
        sd_x = data["sd_log_size"].to_numpy(dtype=float)
        reliability = 1.0 - np.nanmedian(sd_x**2) / max(np.var(x, ddof=1), 1e-12)
        small_error &= bool(reliability >= _CENTRED_MIN_RELIABILITY)
    if spec.trait_error in ("known", "replicates") and len(x) > 2:
        slope, icept = np.polyfit(x, y, 1)
        resid_sd = float(np.std(y - icept - slope * x, ddof=2))
        sd_y = float(np.nanmedian(data["sd_log_trait"].to_numpy(dtype=float)))
        small_error &= bool(sd_y <= _CENTRED_MAX_TRAIT_ERROR_FRACTION * resid_sd)
    if spec.size_error == "ratio":
        small_error = False
    out = {}
    for k, level in enumerate(used):
        if k + 1 < len(used):
            # an outer taxon's deviation is informed by its child taxa, not its species
            per_taxon = data.groupby(level, sort=False)[used[k + 1]].nunique()
        else:
            per_taxon = data.groupby(level, sort=False).size()
        many = float(per_taxon.median()) >= _CENTRED_MIN_SPECIES
        out[level] = "centred" if (many and small_error) else "non-centred"
    return out


_TAXON_TERMS = ("intercept", "exponent", "curvature")


@dataclass
class _Taxa:
    labels: list[str]
    index: np.ndarray  # per species, into labels
    parent: np.ndarray | None  # per taxon, into the labels of the next level out


@dataclass
class _Inputs:
    species: list[str]
    log_size: np.ndarray
    log_trait: np.ndarray
    sd_size: np.ndarray | None = None
    sd_trait: np.ndarray | None = None
    taxa: dict[str, _Taxa] = field(default_factory=dict)
    covariates: dict[str, np.ndarray] = field(default_factory=dict)


@dataclass
class _Size:
    value: Any
    sigma: Any = None


def _read_inputs(data: pd.DataFrame, spec: ModelSpec, *, levels: list[str]) -> _Inputs:
    source = data.attrs.get("source", "clean.csv")
    used = select_levels(spec, levels)
    needed = ["species", "log_size", "log_trait", *used]
    if spec.size_error in ("known", "replicates"):
        needed.append("sd_log_size")
    if spec.trait_error in ("known", "replicates"):
        needed.append("sd_log_trait")
    needed += [f"cov_{c['column']}" for c in spec.covariates]
    missing = [c for c in needed if c not in data.columns]
    if missing:
        msg = (
            f"{source}: column '{missing[0]}' is needed by model spec '{spec.name}' but is "
            f"missing (columns: {', '.join(map(str, data.columns))})"
        )
        raise UserError(msg)
    if len(data) < 3:
        msg = f"{source}: {len(data)} species; a scaling law needs at least 3"
        raise UserError(msg)
    species = [str(s) for s in data["species"]]
    if len(set(species)) != len(species):
        dup = pd.Series(species)[pd.Series(species).duplicated()].iloc[0]
        msg = f"{source}: column 'species', value {dup!r}: species appears twice"
        raise UserError(msg)
    for column in ("log_size", "log_trait"):
        _check_finite(data, column, source)
    inputs = _Inputs(
        species=species,
        log_size=data["log_size"].to_numpy(dtype=float),
        log_trait=data["log_trait"].to_numpy(dtype=float),
    )
    if spec.size_error in ("known", "replicates"):
        inputs.sd_size = _error_sd(data, "size", spec, source)
    if spec.trait_error in ("known", "replicates"):
        inputs.sd_trait = _error_sd(data, "trait", spec, source)
    parent_labels: pd.Series | None = None
    previous: str | None = None
    for level in used:
        labels_col = data[level]
        if labels_col.isna().any():
            row = int(np.flatnonzero(labels_col.isna().to_numpy())[0])
            msg = (
                f"{source}: line {row + 2}, column '{level}', species {species[row]!r}: "
                "missing taxon label"
            )
            raise UserError(msg)
        labels_col = labels_col.astype(str)
        labels = list(dict.fromkeys(labels_col))
        index = np.array([labels.index(v) for v in labels_col], dtype=int)
        parent = None
        if parent_labels is not None and previous is not None:
            outer = list(inputs.taxa[previous].labels)
            parent = np.empty(len(labels), dtype=int)
            for k, label in enumerate(labels):
                parents = sorted(set(parent_labels[labels_col == label]))
                if len(parents) != 1:
                    msg = (
                        f"{source}: column '{level}', value {label!r}: the taxon sits in "
                        f"several taxa of level '{previous}' ({', '.join(parents)}); inner "
                        "levels must nest in outer ones"
                    )
                    raise UserError(msg)
                parent[k] = outer.index(parents[0])
        inputs.taxa[level] = _Taxa(labels=labels, index=index, parent=parent)
        parent_labels, previous = labels_col, level
    for cov in spec.covariates:
        column = f"cov_{cov['column']}"
        _check_finite(data, column, source)
        values = data[column].to_numpy(dtype=float)
        if cov["transform"] == "boltzmann":
            if np.any(values <= 0):
                row = int(np.flatnonzero(values <= 0)[0])
                msg = (
                    f"{source}: line {row + 2}, column '{column}', value {values[row]!r}: a "
                    "Boltzmann covariate needs temperatures in kelvin (> 0)"
                )
                raise UserError(msg)
            values = 1.0 / (BOLTZMANN_EV_PER_K * values)
        inputs.covariates[cov["column"]] = values
    return inputs


def _check_finite(data: pd.DataFrame, column: str, source: str) -> None:
    values = pd.to_numeric(data[column], errors="coerce").to_numpy(dtype=float)
    bad = ~np.isfinite(values)
    if bad.any():
        row = int(np.flatnonzero(bad)[0])
        value = _plain(data[column].iloc[row])
        msg = (
            f"{source}: line {row + 2}, column '{column}', value {value!r}: "
            "not a finite number"
        )
        raise UserError(msg)


def _error_sd(data: pd.DataFrame, axis: str, spec: ModelSpec, source: str) -> np.ndarray:
    column = f"sd_log_{axis}"
    mode = spec.size_error if axis == "size" else spec.trait_error
    sd = pd.to_numeric(data[column], errors="coerce").to_numpy(dtype=float)
    if mode == "known":
        origin_col = f"sd_source_{axis}"
        if origin_col in data.columns:
            origin = data[origin_col].astype(str).to_numpy()
            not_given = np.flatnonzero(origin != "given")
            if not_given.size:
                row = int(not_given[0])
                msg = (
                    f"{source}: line {row + 2}, column '{origin_col}', value {origin[row]!r}: "
                    f"model spec '{spec.name}' has {axis}_error 'known', which needs SDs given "
                    f"in the data for every species (use 'replicates' to accept other sources)"
                )
                raise UserError(msg)
    bad = ~np.isfinite(sd) | (sd < 0)
    if bad.any():
        row = int(np.flatnonzero(bad)[0])
        value = _plain(data[column].iloc[row])
        msg = (
            f"{source}: line {row + 2}, column '{column}', value {value!r}: "
            f"model spec '{spec.name}' needs a measurement-error SD (≥ 0) for every species"
        )
        raise UserError(msg)
    if axis == "size":
        # a zero SD makes the latent size a point mass; a floor of 1e-3 on the log scale
        # (0.1 %) is far below any real measurement error (common practice, no source)
        sd = np.maximum(sd, 1e-3)
    return sd


def _residual_sd(spec: ModelSpec) -> Any:
    sigma_prior = spec.priors["sigma"]
    if spec.size_error == "ratio":
        return None  # set from the error ratio in _true_log_size
    if "fixed" in sigma_prior:
        return pm.Deterministic("sigma", pt.as_tensor_variable(float(sigma_prior["fixed"])))
    return pm.HalfNormal("sigma", sigma=sigma_prior["sd"])


def _true_log_size(spec: ModelSpec, inputs: _Inputs, log_size_obs: Any, *, sigma_holder: Any
                   ) -> _Size:
    if spec.size_error == "none":
        return _Size(value=log_size_obs, sigma=sigma_holder)
    x = inputs.log_size
    spread = float(np.std(x, ddof=1)) if len(x) > 1 else 1.0
    spread = max(spread, 1e-3)
    # population of true log sizes: weakly informative on the scale of the data, unless the
    # spec fixes the prior (priors.size_population)
    population = spec.priors.get("size_population") or {
        "mean": float(np.mean(x)), "sd": 5.0 * spread, "sd_scale": 2.0 * spread}
    size_mean = pm.Normal("size_mean", population["mean"], population["sd"])
    size_sd = pm.HalfNormal("size_sd", population["sd_scale"])
    true = pm.Normal("true_log_size", size_mean, size_sd, dims="species")
    if spec.size_error == "ratio":
        pri = spec.priors
        error_sd = pm.HalfNormal("size_error_sd", pri["size_error_sd"]["sd"])
        ratio_prior = pri["error_ratio"]
        if ratio_prior["log_sd"] == 0:
            ratio = pm.Deterministic("error_ratio", pt.as_tensor_variable(ratio_prior["value"]))
        else:
            ratio = pm.LogNormal("error_ratio", mu=np.log(ratio_prior["value"]),
                                 sigma=ratio_prior["log_sd"])
        sigma = pm.Deterministic("sigma", pt.sqrt(ratio) * error_sd)
        pm.Normal(SIZE_MEASUREMENT, true, error_sd, observed=x, dims="species")
        return _Size(value=true, sigma=sigma)
    sd_size = pm.Data("sd_log_size", inputs.sd_size, dims="species")
    pm.Normal(SIZE_MEASUREMENT, true, sd_size, observed=x, dims="species")
    return _Size(value=true, sigma=sigma_holder)


def _taxon_terms(
    term: str, population: Any, inputs: _Inputs, param: dict[str, str], sd_scale: float
) -> Any:
    """Per-species value of ``term``: population plus deviations along each taxon's path."""
    if not inputs.taxa:
        return population
    total = None
    level = ""
    for level, taxa in inputs.taxa.items():
        sd = pm.HalfNormal(f"{term}_sd__{level}", sigma=sd_scale)
        if param.get(level, "non-centred") == "centred":
            dev = pm.Normal(f"{term}_dev__{level}", 0.0, sd, dims=level)
        else:
            z = pm.Normal(f"{term}_z__{level}", 0.0, 1.0, dims=level)
            dev = sd * z
        base = population if total is None else total[taxa.parent]
        total = pm.Deterministic(f"taxon_{term}__{level}", base + dev, dims=level)
    return total[inputs.taxa[level].index]


def _hinge(spec: ModelSpec, inputs: _Inputs, x: Any, x_ref: Any, exponent: Any) -> Any:
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


def _plain(value: Any) -> Any:
    # numpy scalars print as np.float64(...); messages show the plain value
    return value.item() if hasattr(value, "item") else value


def _scalar(var: Any) -> float:
    # constant data may carry a length-1 dim when read back from some writers
    return float(np.asarray(var.values).reshape(-1)[0])


def _softplus_np(d: np.ndarray, width: float) -> np.ndarray:
    return width * np.logaddexp(0.0, d / width)


def _covariate_term(cov: dict[str, Any], inputs: _Inputs, pri: dict[str, float]) -> Any:
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
