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
from allolaw.law import expected_log_trait
from allolaw.spec import ModelSpec

__all__ = [
    "BOLTZMANN_EV_PER_K",
    "SIZE_MEASUREMENT",
    "TRAIT",
    "build_model",
    "expected_log_trait",
    "select_levels",
]

log = logging.getLogger(__name__)

#: Boltzmann constant in eV/K (CODATA value, rounded as in Gillooly et al. 2001).
BOLTZMANN_EV_PER_K = 8.617e-5
#: Name of the observed trait variable (the only one in ``log_likelihood``).
TRAIT = "trait"
#: Name of the observed measured log size (present with errors in size; not a likelihood
#: term for model comparison: ``log_likelihood`` holds ``trait`` only).
SIZE_MEASUREMENT = "measured_log_size"


def build_model(
    data: pd.DataFrame,
    spec: ModelSpec,
    *,
    levels: list[str],
    log_reference_size: float,
    prior_only: bool = False,
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
    intercept and exponent deviations of a taxon). The sampler sees them whitened by the data
    (:func:`_taxon_terms`), which removes the funnels of hierarchical models (Betancourt &
    Girolami 2015) without choosing between centred and non-centred forms.

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

        # terms shared by all species
        shared = {t: pm.Normal(t, float(term_priors[t]["mean"]), float(term_priors[t]["sd"]))
                  for t in terms if t not in varying}
        sigma = _residual_sd(spec)
        size = _true_log_size(spec, inputs, log_size_obs, sigma_holder=sigma)
        if spec.size_error == "ratio":
            sigma = size.sigma
        centred_size = size.value - log_size_ref
        feature = {"intercept": pt.ones_like(centred_size), "exponent": centred_size,
                   "curvature": centred_size**2}

        offset = sum((shared[t] * feature[t] for t in shared), pt.zeros_like(centred_size))
        for cov in spec.covariates:
            offset = offset + _covariate_term(cov, inputs, pri["covariate"])
        if spec.breakpoint == "one" and "exponent" in shared:
            offset = offset + _hinge(spec, inputs, size.value, log_size_ref, shared["exponent"])

        total_sd = sigma
        if spec.trait_error in ("known", "replicates"):
            sd_trait = pm.Data("sd_log_trait", inputs.sd_trait, dims="species")
            total_sd = pt.sqrt(sigma**2 + sd_trait**2)

        mu = offset
        if varying:
            # the taxon values are whitened by the data (see _taxon_terms); the prior draws
            # and `parameterisation: non-centred` use the plain non-centred form
            whiten = not prior_only and spec.taxa["parameterisation"] == "auto"
            per_species = _taxon_terms(
                varying, term_priors, {t: pri[f"{t}_sd"]["sd"] for t in varying}, inputs,
                features=feature if whiten else None,
                target=pt.as_tensor_variable(inputs.log_trait) - offset,
                noise_var=total_sd**2 * pt.ones_like(centred_size),
            )
            for t in varying:
                mu = mu + per_species[t] * feature[t]
            if spec.breakpoint == "one" and "exponent" in varying:
                mu = mu + _hinge(spec, inputs, size.value, log_size_ref, model["exponent"])

        if spec.residuals == "student_t":
            nu = pm.Gamma("nu", alpha=pri["nu"]["alpha"], beta=pri["nu"]["beta"])
            pm.StudentT(TRAIT, nu=nu, mu=mu, sigma=total_sd, observed=inputs.log_trait,
                        dims="species")
        else:
            pm.Normal(TRAIT, mu=mu, sigma=total_sd, observed=inputs.log_trait, dims="species")
    log.debug("built model %s (taxon terms %s, prior_only=%s)", spec.name, varying, prior_only)
    return model


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


def _varying_terms(spec: ModelSpec) -> list[str]:
    # the terms of the law that get taxon deviations
    terms = list(spec.taxa["vary"])
    if spec.curvature == "shared_and_taxa":
        terms.append("curvature")
    return terms


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
    terms: list[str],
    priors: dict[str, dict[str, float]],
    sd_scales: dict[str, float],
    inputs: _Inputs,
    features: dict[str, Any] | None,
    target: Any,
    noise_var: Any,
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

    Every step is element-wise over taxa with k × k blocks (k ≤ 3 terms) written out entry by
    entry, so any backend (C, numba, JAX) compiles it to plain loops.
    """
    levels = list(inputs.taxa)
    k = len(terms)
    tree = _taxon_tree(inputs)
    sds = {term: [pm.HalfNormal(f"{term}_sd__{level}", sigma=sd_scales[term])
                  for level in levels] for term in terms}
    w = [pm.Normal(f"{term}_w", 0.0, 1.0, shape=(tree.n_nodes,)) for term in terms]
    m0 = [float(priors[term]["mean"]) for term in terms]
    s0 = [float(priors[term]["sd"]) for term in terms]
    depths = tree.depths
    # step SDs per depth (depth 0 is the population, whose step is its prior)
    step = [[pt.as_tensor_variable(v) for v in s0]]
    step += [[sds[term][lv] for term in terms] for lv in range(len(levels))]

    # upward pass: information (precision P, vector h) of each node from the data below it
    inner = depths[-1]
    if features is not None:
        idx = inputs.taxa[levels[-1]].index
        n_inner = len(inner)
        weight = 1.0 / noise_var
        x = [features[term] for term in terms]
        P = [[None] * k for _ in range(k)]
        for i in range(k):
            for j in range(i + 1):
                P[i][j] = P[j][i] = _segment_sum(x[i] * x[j] * weight, idx, n_inner)
        h = [_segment_sum(x[i] * target * weight, idx, n_inner) for i in range(k)]
    else:
        P, h = None, None
    info: list[Any] = [None] * len(depths)
    chol: list[Any] = [None] * len(depths)
    for d in range(len(depths) - 1, -1, -1):
        info[d] = (P, h)
        if P is None:
            continue
        D = step[d]
        B = [[D[i] * P[i][j] * D[j] + (1.0 if i == j else 0.0) for j in range(k)]
             for i in range(k)]
        L = _cholesky(B)
        chol[d] = L
        if d == 0:
            break
        # the message a node sends its parent: N(parent; ·) with precision
        # Q = (P⁻¹ + S)⁻¹ = P − (DP)ᵀ B⁻¹ (DP) and vector g = h − (DP)ᵀ B⁻¹ (D h), S = D²
        DP = [[D[i] * P[i][j] for j in range(k)] for i in range(k)]
        Y = [_cho_solve(L, [DP[i][c] for i in range(k)]) for c in range(k)]  # columns
        z = _cho_solve(L, [D[i] * h[i] for i in range(k)])
        Q = [[P[i][j] - sum(DP[m][i] * Y[j][m] for m in range(k)) for j in range(k)]
             for i in range(k)]
        g = [h[i] - sum(DP[m][i] * z[m] for m in range(k)) for i in range(k)]
        parents = tree.parent[depths[d]] - depths[d - 1][0]
        n_par = len(depths[d - 1])
        P = [[_segment_sum(Q[i][j], parents, n_par) for j in range(k)] for i in range(k)]
        h = [_segment_sum(g[i], parents, n_par) for i in range(k)]

    # downward pass: each node given its parent value and its own information
    values: list[list[Any]] = []
    density = pt.as_tensor_variable(0.0)
    for d, nodes in enumerate(depths):
        D = step[d]
        if d == 0:
            parent = [pt.as_tensor_variable(np.full(1, v)) for v in m0]
        else:
            at = tree.parent[nodes] - depths[d - 1][0]
            parent = [values[d - 1][i][at] for i in range(k)]
        wd = [w[i][nodes] for i in range(k)]
        P, h = info[d]
        if P is None:
            values.append([parent[i] + D[i] * wd[i] for i in range(k)])
            continue
        L = chol[d]
        # value = parent + D u with u = B⁻¹ D (h − P·parent) + L⁻ᵀ w; the potential is the
        # prior density of the value plus the log-Jacobian minus the N(0, 1) density of w:
        # −Σ log diag L − |u|²/2 + |w|²/2 (no division by an SD: finite as any SD → 0)
        resid = [h[i] - sum(P[i][j] * parent[j] for j in range(k)) for i in range(k)]
        a = _cho_solve(L, [D[i] * resid[i] for i in range(k)])
        e = _back_solve(L, wd)
        u = [a[i] + e[i] for i in range(k)]
        values.append([parent[i] + D[i] * u[i] for i in range(k)])
        density = density + sum(
            pt.sum(-pt.log(L[i][i]) - 0.5 * u[i] ** 2 + 0.5 * wd[i] ** 2) for i in range(k))
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


@dataclass
class _TaxonTree:
    parent: np.ndarray  # per node (population 0, then each level's taxa), its parent; −1
    depths: list[np.ndarray]  # node indices by depth: [0], then each level outer to inner

    @property
    def n_nodes(self) -> int:
        return len(self.parent)


def _taxon_tree(inputs: _Inputs) -> _TaxonTree:
    parent = [-1]
    depths = [np.array([0])]
    for k, level in enumerate(inputs.taxa):
        taxa = inputs.taxa[level]
        start = len(parent)
        if k == 0:
            parent += [0] * len(taxa.labels)
        else:
            parent += [int(depths[-1][0]) + int(p) for p in taxa.parent]
        depths.append(np.arange(start, len(parent)))
    return _TaxonTree(parent=np.asarray(parent), depths=depths)


def _segment_sum(values: Any, index: np.ndarray, n: int) -> Any:
    # sums of values by group (index per element into n groups)
    return pt.inc_subtensor(pt.zeros(n)[index], values)


def _cholesky(B: list[list[Any]]) -> list[list[Any]]:
    # Cholesky factor of a batch of small SPD matrices given entry by entry (lists of
    # element-wise tensors): L[i][j] for j ≤ i
    k = len(B)
    L: list[list[Any]] = [[None] * k for _ in range(k)]
    for j in range(k):
        L[j][j] = pt.sqrt(B[j][j] - sum(L[j][m] ** 2 for m in range(j)))
        for i in range(j + 1, k):
            L[i][j] = (B[i][j] - sum(L[i][m] * L[j][m] for m in range(j))) / L[j][j]
    return L


def _forward_solve(L: list[list[Any]], b: list[Any]) -> list[Any]:
    # L y = b
    y: list[Any] = []
    for i in range(len(b)):
        y.append((b[i] - sum(L[i][m] * y[m] for m in range(i))) / L[i][i])
    return y


def _back_solve(L: list[list[Any]], y: list[Any]) -> list[Any]:
    # Lᵀ x = y
    k = len(y)
    x: list[Any] = [None] * k
    for i in range(k - 1, -1, -1):
        x[i] = (y[i] - sum(L[m][i] * x[m] for m in range(i + 1, k))) / L[i][i]
    return x


def _cho_solve(L: list[list[Any]], b: list[Any]) -> list[Any]:
    # B x = b with B = L Lᵀ
    return _back_solve(L, _forward_solve(L, b))


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
