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

import itertools
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
# an innermost taxon with fewer species cannot pin its own intercept and exponent: its
# deviation is written non-centred from its parent (common practice, no source)
_INFORMATIVE_MIN_SPECIES = 3


def build_model(
    data: pd.DataFrame,
    spec: ModelSpec,
    *,
    levels: list[str],
    log_reference_size: float,
    centring: dict[str, float] | None = None,
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
    centring
        The result of :func:`taxon_parameterisation` for these arguments, when the caller
        already has it; computed here otherwise.

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
    param = centring
    if param is None:
        param = taxon_parameterisation(data, spec, levels=levels,
                                       log_reference_size=log_reference_size)
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
        varying = set(_varying_terms(spec))

        def term(name: str, prior: dict[str, Any]) -> tuple[Any, Any]:
            # (population value, per-species value) of one term of the law
            if name in varying and inputs.taxa:
                return _taxon_terms(name, prior, inputs, param, pri[f"{name}_sd"]["sd"])
            value = pm.Normal(name, float(prior["mean"]), float(prior["sd"]))
            return value, value

        _, a = term("intercept", {"mean": intercept_mean, "sd": pri["intercept"]["sd"]})
        exponent, b = term("exponent", pri["exponent"])
        c = None
        if spec.curvature != "none":
            _, c = term("curvature", pri["curvature"])

        sigma = _residual_sd(spec)
        size = _true_log_size(spec, inputs, log_size_obs, sigma_holder=sigma)
        if spec.size_error == "ratio":
            sigma = size.sigma
        centred_size = size.value - log_size_ref

        mu = a + b * centred_size
        if c is not None:
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
    data: pd.DataFrame,
    spec: ModelSpec,
    *,
    levels: list[str],
    log_reference_size: float | None = None,
) -> dict[str, float]:
    """How centred the innermost taxon deviations of each varying term are written.

    Returns ``{term: c}`` with ``c`` in [0, 1]: each deviation is ``sd^(1−c) · u`` with
    ``u ~ N(0, sd^c)``, so ``c = 1`` is the centred form (best when each taxon's data pin its
    deviation down) and ``c = 0`` the non-centred one (best when the prior dominates, the funnel
    of Betancourt & Girolami 2015); values between are the partially non-centred forms of
    Papaspiliopoulos et al. (2007). ``parameterisation: centred`` / ``non-centred`` fix ``c`` to
    1 / 0. With ``auto``, ``c`` is the median over taxa of the share of a taxon's deviation
    that its own data determine, ``τ² / (τ² + se²)`` (the complement of the shrinkage factor),
    from a least-squares line per innermost taxon (se of its intercept at the reference size,
    its slope, after the pooled quadratic when the spec is curved) and the between-taxon
    variance ``τ²`` of DerSimonian & Laird (1986) within parents. Only the within-parent
    deviations at the innermost level use ``c``: every other taxon value is drawn exactly
    given the data-pinned means (see :func:`_taxon_terms`). Curvature deviations, which a
    per-taxon line cannot estimate, get ``c = 0``.

    References
    ----------
    .. [1] Betancourt, M. & Girolami, M. (2015). Hamiltonian Monte Carlo for hierarchical
       models. In Current Trends in Bayesian Methodology with Applications, CRC.
    .. [2] Papaspiliopoulos, O., Roberts, G. O. & Sköld, M. (2007). A general framework for
       the parametrization of hierarchical models. Statistical Science 22:59–73.
    .. [3] DerSimonian, R. & Laird, N. (1986). Meta-analysis in clinical trials. Controlled
       Clinical Trials 7:177–188.
    """
    used = select_levels(spec, levels)
    terms = _varying_terms(spec)
    if not used:
        return {}
    choice = spec.taxa["parameterisation"]
    if choice != "auto":
        return dict.fromkeys(terms, 1.0 if choice == "centred" else 0.0)
    parent = used[-2] if len(used) > 1 else None
    estimates = _per_taxon_lines(data, spec, used[-1], parent, log_reference_size)
    out = {}
    for term in terms:
        if term == "curvature" or estimates is None:
            out[term] = 0.0
            continue
        est, se = estimates[term]
        out[term] = round(_data_share(est, se, estimates["parent"]), 3)
    return out


def _varying_terms(spec: ModelSpec) -> list[str]:
    # the terms of the law that get taxon deviations
    terms = list(spec.taxa["vary"])
    if spec.curvature == "shared_and_taxa":
        terms.append("curvature")
    return terms


def _per_taxon_lines(
    data: pd.DataFrame,
    spec: ModelSpec,
    level: str,
    parent: str | None,
    log_reference_size: float | None,
) -> dict[str, Any] | None:
    # least-squares intercept (at the reference size; the mean log size of the table if none
    # is given) and slope per taxon, with standard errors; taxa with fewer than 3 species or no
    # size spread are left out
    centre = log_reference_size
    if centre is None:
        centre = float(np.mean(data["log_size"].to_numpy(dtype=float)))
    y_all = data["log_trait"].to_numpy(dtype=float)
    bend = np.zeros(len(data))
    if spec.curvature != "none" and len(data) > 3:
        # a curved law makes straight per-taxon slopes differ by size range; take out the
        # pooled quadratic first
        dx = data["log_size"].to_numpy(dtype=float) - centre
        bend = np.polyfit(dx, y_all, 2)[0] * dx**2
    bend_of = pd.Series(bend, index=data.index)
    rows: dict[str, list[Any]] = {"a": [], "va": [], "b": [], "vb": [], "parent": []}
    sse, dof = 0.0, 0
    for _, group in data.groupby(level, sort=False):
        x = group["log_size"].to_numpy(dtype=float) - centre
        y = group["log_trait"].to_numpy(dtype=float) - bend_of.loc[group.index].to_numpy()
        n = len(x)
        sxx = float(np.sum((x - x.mean()) ** 2))
        if n < 3 or sxx <= 1e-12:
            continue
        slope = float(np.sum((x - x.mean()) * (y - y.mean())) / sxx)
        icept = float(y.mean() - slope * x.mean())
        sse += float(np.sum((y - icept - slope * x) ** 2))
        dof += n - 2
        rows["parent"].append(str(group[parent].iloc[0]) if parent else "")
        rows["a"].append(icept)
        rows["va"].append(1.0 / n + x.mean() ** 2 / sxx)
        rows["b"].append(slope)
        rows["vb"].append(1.0 / sxx)
    if len(rows["a"]) < 2:
        return None
    # one residual variance pooled over taxa: per-taxon estimates from a handful of species
    # are too noisy for the weights (they inflate Q and so τ²)
    pooled = sse / max(dof, 1)
    arr = {k: np.asarray(v) for k, v in rows.items()}
    return {"intercept": (arr["a"], np.sqrt(pooled * arr["va"])),
            "exponent": (arr["b"], np.sqrt(pooled * arr["vb"])), "parent": arr["parent"]}


def _data_share(estimate: np.ndarray, se: np.ndarray, parent: np.ndarray) -> float:
    # DerSimonian–Laird moment estimate of the between-taxon variance within parents (Q summed
    # over parents, k − P degrees of freedom), then the median share τ²/(τ² + se²) of a
    # taxon's deviation that its own data determine
    w = 1.0 / np.maximum(se, 1e-12) ** 2
    q, dof, denom = 0.0, 0, 0.0
    for label in np.unique(parent):
        sel = parent == label
        if sel.sum() < 2:
            continue
        ws, es = w[sel], estimate[sel]
        q += float(np.sum(ws * (es - np.sum(ws * es) / np.sum(ws)) ** 2))
        dof += int(sel.sum()) - 1
        denom += float(np.sum(ws) - np.sum(ws**2) / np.sum(ws))
    if dof == 0 or denom <= 0.0:
        return 0.0
    tau2 = max(0.0, (q - dof) / denom)
    if tau2 <= 0.0:
        return 0.0
    return float(np.median(tau2 / (tau2 + se**2)))


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
    term: str,
    prior: dict[str, float],
    inputs: _Inputs,
    param: dict[str, float],
    sd_scale: float,
) -> tuple[Any, Any]:
    """Population value of ``term`` and its per-species value through the taxon tree.

    The model is the usual nested one: population ``p ~ N(m0, s0)``, each outermost taxon
    ``N(p, s_1)``, each inner taxon ``N(parent, s_l)``. Only the innermost taxon values enter
    the likelihood, so the sampler is given the quantities the data pin down, and everything
    else as an exact conditional draw (written by hand: no library offers this form):

    - the mean of each parent's children at the innermost level, ``<term>_group_mean``
      (its marginal density, every upper value integrated out);
    - the children's deviations from their parent's mean, in an orthonormal zero-sum basis per
      parent, ``<term>_dev__<level>`` (centred), ``<term>_z__<level>`` (non-centred) or
      ``<term>_u__<level>`` (partially centred, see :func:`taxon_parameterisation`);
    - innermost taxa with fewer than 3 species, as non-centred deviations from their parent,
      ``<term>_z_few__<level>``;
    - the population and upper taxon values given the group means, as standard normals
      ``<term>_w``, one per upper node, mapped through the exact conditional of each node
      given its parent and the group means below it (:func:`_tree_values`).

    The joint distribution is exactly that of the nested model; what changes is the geometry:
    with few taxa at a level, the population value's posterior width scales with the taxon SD
    (a funnel that neither the centred nor the non-centred form removes), while here the
    sampler sees only ``<term>_w`` ~ N(0, 1) independent of the data given the rest. Both the
    marginal density and the conditional draws follow the taxon tree (Gaussian message passing
    up and down the tree, e.g. Bishop 2006, ch. 8.4), so they cost element-wise operations and
    sums by parent only: no dense matrix is formed, factorised or solved.
    """
    levels = list(inputs.taxa)
    inner = levels[-1]
    inner_taxa = inputs.taxa[inner]
    m0, s0 = float(prior["mean"]), float(prior["sd"])
    sds = [pm.HalfNormal(f"{term}_sd__{level}", sigma=sd_scale) for level in levels]
    tree = _upper_tree(inputs)
    n_groups = len(tree.group_nodes)
    w = pm.Normal(f"{term}_w", 0.0, 1.0, shape=(len(tree.parent_node),))
    means = None
    if n_groups:
        # the group means' marginal density (the upward pass of _tree_messages), with a
        # forward simulator for prior draws
        # (the group sizes ride along as a parameter so that the signature gives the shape)
        means = pm.CustomDist(
            f"{term}_group_mean", pt.stack(sds), tree.group_size,
            logp=lambda value, sd, _k: _tree_messages(tree, m0, s0, sd, value)[2],
            random=lambda sd, _k, rng=None, size=None: _tree_draw_means(tree, m0, s0, sd, rng,
                                                                        size),
            signature="(l),(g)->(g)", shape=(n_groups,),
        )
    upper = _tree_values(tree, m0, s0, sds, means, w)
    population = pm.Deterministic(term, upper[0])
    for k, level in enumerate(levels[:-1]):
        lo = tree.offsets[k]
        pm.Deterministic(f"taxon_{term}__{level}",
                         upper[lo: lo + len(inputs.taxa[level].labels)], dims=level)
    n_inner = len(inner_taxa.labels)
    values = pt.zeros(n_inner)
    informative = np.flatnonzero(tree.informative)
    if n_groups:
        # informative taxa: their group's mean plus zero-sum deviations (orthonormal basis)
        values = pt.set_subtensor(values[informative],
                                  means[tree.group_of_inner[informative]])
    n_contrasts = tree.contrasts.shape[1]
    if n_contrasts:
        # partially non-centred (Papaspiliopoulos et al. 2007): dev = sd^(1−c)·u, u ~ N(0, sd^c)
        c = float(param.get(term, 0.0))
        if c >= 1.0:
            dev = pm.Normal(f"{term}_dev__{inner}", 0.0, sds[-1], shape=(n_contrasts,))
        elif c <= 0.0:
            dev = sds[-1] * pm.Normal(f"{term}_z__{inner}", 0.0, 1.0, shape=(n_contrasts,))
        else:
            u = pm.Normal(f"{term}_u__{inner}", 0.0, sds[-1] ** c, shape=(n_contrasts,))
            dev = sds[-1] ** (1.0 - c) * u
        values = values + (pt.as_tensor_variable(tree.contrasts) * dev[None, :]).sum(axis=1)
    weak = np.flatnonzero(~tree.informative)
    if weak.size:
        # taxa whose own data cannot pin their deviation (fewer than _INFORMATIVE_MIN_SPECIES
        # species): parent value plus a non-centred deviation
        z_weak = pm.Normal(f"{term}_z_few__{inner}", 0.0, 1.0, shape=(weak.size,))
        values = pt.set_subtensor(values[weak],
                                  upper[tree.parent_node_of_inner[weak]] + sds[-1] * z_weak)
    total = pm.Deterministic(f"taxon_{term}__{inner}", values, dims=inner)
    return population, total[inner_taxa.index]


@dataclass
class _Tree:
    parent_node: np.ndarray  # per upper node (root 0, then each upper level), its parent; −1
    offsets: list[int]  # start of each upper level's taxa in the upper nodes (root is node 0)
    parent_node_of_inner: np.ndarray  # per innermost taxon, its parent's upper node
    informative: np.ndarray  # per innermost taxon: enough species to pin its deviation
    group_nodes: np.ndarray  # upper nodes that have informative innermost children
    group_size: np.ndarray  # per group node, its number of informative innermost children
    group_of_inner: np.ndarray  # per innermost taxon, its group (index into group_nodes; −1)
    contrasts: np.ndarray  # (innermost taxa, contrasts): orthonormal zero-sum basis per group

    def depths(self) -> list[np.ndarray]:
        """Upper node indices by depth: the root, then each upper taxon level."""
        bounds = [0, *self.offsets, len(self.parent_node)]
        return [np.arange(lo, hi) for lo, hi in itertools.pairwise(bounds)]


def _upper_tree(inputs: _Inputs) -> _Tree:
    levels = list(inputs.taxa)
    parent_node = [-1]  # the root (population) has no parent
    offsets = []
    for k, level in enumerate(levels[:-1]):
        offsets.append(len(parent_node))
        taxa = inputs.taxa[level]
        if k == 0:
            parent_node += [0] * len(taxa.labels)
        else:
            parent_node += [offsets[k - 1] + int(p) for p in taxa.parent]
    inner = inputs.taxa[levels[-1]]
    n_inner = len(inner.labels)
    if len(levels) == 1:
        parent_of_inner = np.zeros(n_inner, dtype=int)
    else:
        parent_of_inner = offsets[-1] + np.asarray(inner.parent, dtype=int)
    species = np.bincount(inner.index, minlength=n_inner)
    informative = species >= _INFORMATIVE_MIN_SPECIES
    group_nodes = np.unique(parent_of_inner[informative])
    group_of_inner = np.full(n_inner, -1)
    group_of_inner[informative] = np.searchsorted(group_nodes, parent_of_inner[informative])
    blocks = [np.zeros((n_inner, 0))]
    for group in range(len(group_nodes)):
        members = np.flatnonzero(group_of_inner == group)
        basis = np.zeros((n_inner, len(members) - 1))
        basis[members, :] = _helmert(len(members))
        blocks.append(basis)
    group_size = np.bincount(group_of_inner[informative], minlength=len(group_nodes))
    return _Tree(parent_node=np.asarray(parent_node), offsets=offsets,
                 parent_node_of_inner=parent_of_inner, informative=informative,
                 group_nodes=group_nodes, group_size=group_size.astype(float),
                 group_of_inner=group_of_inner, contrasts=np.concatenate(blocks, axis=1))


def _informative_nodes(tree: _Tree) -> list[np.ndarray]:
    # per depth, the positions (within the depth) of the upper nodes that have informative
    # innermost taxa below them; these are the nodes that receive a message from the data
    depths = tree.depths()
    has = np.zeros(len(tree.parent_node), dtype=bool)
    has[tree.group_nodes] = True
    for d in range(len(depths) - 1, 0, -1):
        has[tree.parent_node[depths[d][has[depths[d]]]]] = True
    return [np.flatnonzero(has[nodes]) for nodes in depths]


def _tree_messages(tree: _Tree, m0: float, s0: float, sd: Any, means: Any
                   ) -> tuple[list[Any], list[Any], Any]:
    """Upward pass: each informative upper node's message from the group means below it.

    Returns per depth the message precision ``p`` and mean ``y`` of the informative nodes
    (their order as in :func:`_informative_nodes`), and the log density of ``means`` with every
    upper value integrated out. A group node's message is its group mean with precision
    ``K / s_L²``; a child's message reaches its parent through the child's own normal step
    (variance ``1/p + s²``), and a parent combines its children's messages by precision.
    Combining messages ``N(y_c; v, 1/q_c)`` into ``N(y; v, 1/q)`` leaves the factor
    ``∏ N(y_c; y, 1/q_c) · (2π/q)^½`` that is free of ``v``; the log density of the means is
    the sum of these factors over the tree plus the root's ``N(y_root; m0, 1/p + s0²)``.
    """
    depths = tree.depths()
    info = _informative_nodes(tree)
    deep = len(depths) - 1
    log2pi = float(np.log(2.0 * np.pi))
    p = pt.as_tensor_variable(tree.group_size) / sd[-1] ** 2
    y = means
    ps: list[Any] = [None] * len(depths)
    ys: list[Any] = [None] * len(depths)
    logp = pt.as_tensor_variable(0.0)
    for d in range(deep, 0, -1):
        ps[d], ys[d] = p, y
        q = p / (1.0 + sd[d - 1] ** 2 * p)  # the message as it reaches the parent
        parents = tree.parent_node[depths[d][info[d]]] - depths[d - 1][0]
        at = np.searchsorted(info[d - 1], parents)  # parent position among informative nodes
        n_par = len(info[d - 1])
        p = pt.inc_subtensor(pt.zeros(n_par)[at], q)
        y = pt.inc_subtensor(pt.zeros(n_par)[at], q * ys[d]) / p
        logp = logp + (-0.5 * pt.sum(q * (ys[d] - y[at]) ** 2) + 0.5 * pt.sum(pt.log(q))
                       - 0.5 * pt.sum(pt.log(p)) - 0.5 * (len(info[d]) - n_par) * log2pi)
    ps[0], ys[0] = p, y
    q = p / (1.0 + s0**2 * p)
    logp = logp + pt.sum(0.5 * pt.log(q) - 0.5 * q * (y - m0) ** 2 - 0.5 * log2pi)
    return ps, ys, logp


def _tree_values(tree: _Tree, m0: float, s0: float, sds: list[Any], means: Any, w: Any) -> Any:
    """Downward pass: every upper value given its parent and the group means below it.

    A node with parent value ``v_p``, own step SD ``s`` and upward message ``(p, y)`` is
    normal with mean ``(v_p + s² p y) / (1 + s² p)`` and SD ``s / √(1 + s² p)`` (``p = 0`` for
    nodes with no informative taxa below: the prior step). Written with ``w ~ N(0, 1)`` per
    node this is exact and stays finite as any SD goes to zero.
    """
    depths = tree.depths()
    info = _informative_nodes(tree)
    if means is not None:
        ps, ys, _ = _tree_messages(tree, m0, s0, pt.stack(sds), means)
    values: list[Any] = []
    for d, nodes in enumerate(depths):
        s2 = s0**2 if d == 0 else sds[d - 1] ** 2
        if d == 0:
            parent = pt.as_tensor_variable(np.full(1, m0))
        else:
            parent = values[d - 1][tree.parent_node[nodes] - depths[d - 1][0]]
        if means is None or not len(info[d]):
            values.append(parent + pt.sqrt(s2) * w[nodes])
            continue
        p, py = ps[d], ps[d] * ys[d]
        if len(info[d]) < len(nodes):  # nodes without informative taxa below get p = 0
            p = pt.set_subtensor(pt.zeros(len(nodes))[info[d]], p)
            py = pt.set_subtensor(pt.zeros(len(nodes))[info[d]], py)
        denom = 1.0 + s2 * p
        values.append((parent + s2 * py) / denom + pt.sqrt(s2 / denom) * w[nodes])
    return pt.concatenate(values)


def _tree_draw_means(tree: _Tree, m0: float, s0: float, sd: np.ndarray,
                     rng: np.random.Generator, size: Any) -> np.ndarray:
    # forward draws of the group means (prior predictive): root, each level, group means
    sd = np.asarray(sd, dtype=float)
    batch = tuple(np.atleast_1d(size)) if size is not None else sd.shape[:-1]
    sd = np.broadcast_to(sd, (*batch, sd.shape[-1]))
    depths = tree.depths()
    v = m0 + s0 * rng.standard_normal((*batch, 1))
    for d in range(1, len(depths)):
        parents = tree.parent_node[depths[d]] - depths[d - 1][0]
        v = v[..., parents] + sd[..., d - 1: d] * rng.standard_normal((*batch, len(depths[d])))
    at = tree.group_nodes - depths[-1][0]
    noise = rng.standard_normal((*batch, len(at)))
    return v[..., at] + sd[..., -1:] / np.sqrt(tree.group_size) * noise


def _helmert(k: int) -> np.ndarray:
    """(k, k − 1) orthonormal basis of the vectors of length k that sum to zero (Helmert)."""
    basis = np.zeros((k, max(k - 1, 0)))
    for c in range(1, k):
        basis[:c, c - 1] = 1.0 / np.sqrt(c * (c + 1))
        basis[c, c - 1] = -c / np.sqrt(c * (c + 1))
    return basis


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
