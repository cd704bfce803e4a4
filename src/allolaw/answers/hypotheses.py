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

The conditionals and the node tree are in :mod:`allolaw.answers.node_tree`, the density
estimates in :mod:`allolaw.answers.density`.

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

import math
import warnings
from typing import Any

import arviz as az
import numpy as np
import pandas as pd
from scipy import special, stats

from allolaw.answers.density import DensityEstimate, exponent_density
from allolaw.answers.draws import flat, scalar
from allolaw.answers.local_exponent import local_taxon_exponent
from allolaw.answers.node_tree import Prior, Tree, node_prior, spec_dict, tree_nodes

__all__ = ["COLUMNS", "compare_hypotheses", "draws_hypotheses"]

#: Columns of ``hypotheses.csv`` (DEVELOPERS.md), in order; ``dataset`` is added by the caller.
COLUMNS = [
    "dataset", "model", "parameter", "level", "taxon", "hypothesis", "value", "kind",
    "prior_weight", "log_bf", "posterior_prob", "interval_prob", "nearest_prob",
    "posterior_prob_prior_half", "posterior_prob_prior_double", "conclusion_changes",
    "method", "note",
]
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
        The model spec (:class:`allolaw.model.spec.ModelSpec` or its ``to_dict()``); uses
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
    spec_d = spec_dict(spec)
    model_name = str(spec_d.get("name", idata.attrs.get("model", "")))
    named, other_weight, delta, bounds, factors = _read_settings(settings)

    posterior = idata.posterior
    if "exponent" not in posterior:
        return pd.DataFrame(columns=COLUMNS)
    tree = Tree.from_idata(idata)
    prior = spec_d["priors"]["exponent"]
    m0, s0 = float(prior["mean"]), float(prior["sd"])
    sd_scale = float(spec_d["priors"].get("exponent_sd", {}).get("sd", 0.25))

    weights, weight_k = _prior_weights(flat(posterior["exponent"]), m0, s0, factors)

    note = _base_note(spec_d, idata)
    rows: list[dict[str, Any]] = []
    for node in tree_nodes(tree):
        local = local_taxon_exponent(idata, spec_d, node, tree)
        if local is None:
            est = exponent_density(idata, spec_d, node, density=density)
            prior_node = node_prior(node, tree, m0, s0, sd_scale)
        else:
            est, prior_node, local_note = local
        block = _hypothesis_block(
            est, prior_node, named, other_weight, delta, bounds, weights, weight_k,
        )
        for row in block:
            row.update(model=model_name, parameter=node.parameter, level=node.level,
                       taxon=node.taxon, method=est.method)
            node_note = local_note if local is not None else note
            row["note"] = "; ".join(s for s in (node_note, row.pop("_note", "")) if s)
            rows.append(row)
    table = pd.DataFrame(rows)
    table["dataset"] = str(idata.attrs.get("dataset", ""))
    for column in COLUMNS:
        if column not in table:
            table[column] = np.nan
    return table[COLUMNS + [c for c in table.columns if c not in COLUMNS]]


def draws_hypotheses(draws: np.ndarray, prior_mean: float, prior_sd: float,
                     settings: dict[str, Any]) -> list[dict[str, Any]]:
    """Rows of the named values for one more exponent with a normal prior, from its draws.

    For an exponent without a normal full conditional in :mod:`allolaw.answers.node_tree`
    (the within-species exponent): the posterior density at each named value is the
    parametric fit to the draws (:func:`allolaw.answers.density.fit_parametric`), the prior
    density the normal prior's, and the prior sensitivity reweights the draws by the prior
    ratio as in :func:`compare_hypotheses`. Each row has the keys of :data:`COLUMNS` from
    ``hypothesis`` to ``method`` (``note`` holds the sensitivity statement).
    """
    named, other_weight, delta, bounds, factors = _read_settings(settings)
    draws = np.asarray(draws, dtype=float).reshape(-1)
    weights, weight_k = _prior_weights(draws, prior_mean, prior_sd, factors)
    est = DensityEstimate(draws=draws, method="")
    family = "Student-t" if est.parametric().dist.name == "t" else "skew-normal"
    est.method = f"Savage–Dickey, {family} fitted to draws"
    rows = _hypothesis_block(est, Prior(prior_mean, prior_sd), named, other_weight, delta,
                             bounds, weights, weight_k)
    for row in rows:
        row["method"] = est.method
        row["note"] = row.pop("_note", "")
    return rows


def _read_settings(settings: dict[str, Any]) -> tuple[list[tuple[str, float, float]], float,
                                                      float, list[dict[str, Any]],
                                                      list[float]]:
    named = [(str(h["name"]), float(h["value"]), float(h.get("weight", 1.0)))
             for h in settings.get("exponents", [])]
    other_weight = float(settings.get("other_weight", 1.0))
    delta = float(settings.get("interval_halfwidth", 0.03))
    bounds = list(settings.get("bounds", []))
    factors = [float(f) for f in settings.get("prior_scale_factors", [0.5, 2.0])]
    return named, other_weight, delta, bounds, factors


def _prior_weights(draws: np.ndarray, m0: float, s0: float, factors: list[float]
                   ) -> tuple[dict[float, np.ndarray | None], dict[float, float]]:
    # importance weights of the draws for each scaled prior SD, with their Pareto k
    weights: dict[float, np.ndarray | None] = {1.0: None}
    weight_k: dict[float, float] = {}
    for f in factors:
        lw = stats.norm.logpdf(draws, m0, f * s0) - stats.norm.logpdf(draws, m0, s0)
        weights[f], weight_k[f] = _smoothed_weights(lw)
    return weights, weight_k


# --- one block of rows ------------------------------------------------------------------


def _hypothesis_block(
    est: DensityEstimate,
    prior: Prior,
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


def _base_note(spec: dict[str, Any], idata: az.InferenceData) -> str:
    parts = []
    ref = None
    const = getattr(idata, "constant_data", None)
    if const is not None and "log_size_ref" in const:
        ref = math.exp(scalar(const["log_size_ref"]))
    if spec.get("curvature", "none") != "none":
        where = f" {ref:.4g}" if ref is not None else ""
        parts.append(f"with curvature the exponent is local: the slope at the reference "
                     f"size{where}")
    if spec.get("breakpoint", "none") != "none":
        parts.append("with a breakpoint the exponent is the one below the break")
    return "; ".join(parts)


def _smoothed_weights(log_ratio: np.ndarray) -> tuple[np.ndarray, float]:
    with warnings.catch_warnings(), np.errstate(over="ignore"):
        # ArviZ warns on high k; k is reported in the note instead. Its Pareto fit overflows
        # in exp on nearly constant log ratios (a prior far wider than the posterior); the
        # weights and k stay finite (k < 0 then), so that overflow is not shown either.
        warnings.simplefilter("ignore", UserWarning)
        lw, k = az.psislw(log_ratio - log_ratio.max())
    w = np.exp(np.asarray(lw) - np.max(lw))
    return w / w.sum(), float(k)
