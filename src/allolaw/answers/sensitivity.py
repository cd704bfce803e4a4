"""Power-scaling sensitivity of the headline answers to the prior and to the likelihood.

One component of the model (the exponent prior, the priors of the taxon SDs, the likelihood,
or the prior weights of the named values) is raised to a power α, ``p(θ)^α``, and the
posterior under it is estimated from the draws we have by importance weights
``w ∝ p(θ)^(α−1)``, Pareto-smoothed (Kallioinen et al. 2023; Vehtari et al. 2024). The Pareto
k of each set of weights says whether that estimate can be trusted.

For each α the headline quantities are recomputed: the posterior mean of the exponent,
P(|exponent − v| < δ) and the Savage–Dickey probability of each named value v. The prior
density at v changes with α where the exponent prior itself is scaled (``N(m, s²)^α`` is
``N(m, s²/α)``); the weights of the named values change analytically (``π_k^α``,
renormalised). The posterior density at v is the Rao–Blackwellised estimate of
:func:`allolaw.answers.density.exponent_density`, reweighted (its conditional rebuilt with the
scaled exponent prior); under a scaled likelihood that conditional no longer holds, so a
parametric density fitted to the weighted draws is used for that component, α = 1 included.

A conclusion *changes* when the most probable hypothesis changes, or its probability moves by
more than 0.2, or crosses 0.5 (our reading rule: common practice, no source).
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from types import SimpleNamespace
from typing import Any

import arviz as az
import numpy as np
from scipy import special, stats

from allolaw.answers.density import exponent_density

__all__ = ["ScaledAnswer", "Sensitivity", "judge_changes", "log_prior_components",
           "power_scale_sensitivity", "power_scale_weights"]

OTHER = "another value"
_POPULATION = SimpleNamespace(parameter="exponent", level="", taxon="", index=-1,
                              label="exponent")
_SD_TERMS = ("exponent", "intercept", "curvature")


@dataclass(frozen=True)
class ScaledAnswer:
    """The headline quantities with one component power-scaled by ``alpha``."""

    component: str
    alpha: float
    pareto_k: float
    ess: float  # effective sample size of the weights, 1 / Σ w²
    reliable: bool
    exponent_mean: float
    probs: dict[str, float]  # named values and "another value"
    interval_probs: dict[str, float]  # P(|exponent − v| < δ)
    top: str


@dataclass(frozen=True)
class Sensitivity:
    """Every scaled answer, the range of each probability, and whether the answer changes."""

    base: ScaledAnswer
    scaled: tuple[ScaledAnswer, ...]
    ranges: dict[str, tuple[float, float]]
    changes: bool
    reasons: tuple[str, ...]
    unreliable: tuple[str, ...]
    sentence: str


def power_scale_sensitivity(
    idata: az.InferenceData,
    spec: Any,
    settings: Mapping[str, Any],
    *,
    alphas: Sequence[float] = (0.5, 0.8, 1.25, 2.0),
    components: Sequence[str] = ("exponent", "taxon_sd", "likelihood", "named_weights"),
    k_max: float = 0.7,
    ess_min: float = 100.0,
    move: float = 0.2,
) -> Sensitivity:
    """Power-scaling sensitivity of the population exponent's answers.

    Parameters
    ----------
    idata
        A fit (``posterior``, and ``log_likelihood.trait`` for the likelihood component).
    spec
        Model spec or its dict (``priors``).
    settings
        The ``hypotheses`` block: ``exponents`` (name, value, weight), ``other_weight``,
        ``interval_halfwidth``.
    alphas
        Powers (Kallioinen et al. 2023 use α = 0.8 and 1.25 for the local measure; 0.5 and 2
        show larger changes).
    components
        Any of ``exponent`` (its prior), ``taxon_sd`` (half-normal priors of every
        ``*_sd__<level>``), ``likelihood``, ``named_weights``.
    k_max
        Pareto k above which importance weights are unreliable: 0.7 (Vehtari et al. 2024).
    ess_min
        Effective sample size ``1/Σw²`` below which they are unreliable too: weights for
        α > 1 on a normal prior are bounded (k < 0) yet can fall on few draws (100: common
        practice, no source).
    move
        See :func:`judge_changes`.

    References
    ----------
    Kallioinen, N., Paananen, T., Bürkner, P.-C., Vehtari, A. (2023). Detecting and
    diagnosing prior and likelihood sensitivity with power-scaling. Statistics and
    Computing 34:57.

    Vehtari, A., Simpson, D., Gelman, A., Yao, Y., Gabry, J. (2024). Pareto smoothed
    importance sampling. JMLR 25(72):1–58.
    """
    spec_d = spec.to_dict() if hasattr(spec, "to_dict") else dict(spec)
    prior = spec_d["priors"]["exponent"]
    ctx = _Context(
        est=exponent_density(idata, spec_d, _POPULATION),
        named=[(str(h["name"]), float(h["value"]), float(h.get("weight", 1.0)))
               for h in settings.get("exponents", [])],
        other_weight=float(settings.get("other_weight", 1.0)),
        delta=float(settings.get("interval_halfwidth", 0.03)),
        m0=float(prior["mean"]), s0=float(prior["sd"]), k_max=k_max, ess_min=ess_min,
    )
    logs = log_prior_components(idata, spec_d)
    if "likelihood" in components and "log_likelihood" in idata.groups():
        ll = idata.log_likelihood["trait"]
        logs["likelihood"] = np.asarray(ll.sum([d for d in ll.dims if d not in ("chain", "draw")])
                                        .values, dtype=float).reshape(-1)

    base = _answer(ctx, "", 1.0, None, -math.inf)
    scaled = _scaled_answers(ctx, base, logs, components, alphas)
    changes, reasons = judge_changes(base, scaled, move=move)
    unreliable = tuple(f"{a.component} α={a.alpha:g} (Pareto k {a.pareto_k:.2f}, "
                       f"ESS {a.ess:.0f})"
                       for a in scaled if not a.reliable)
    # ranges over the reliable scaled answers only (unreliable ones are listed instead)
    trusted = [a for a in scaled if a.reliable]
    ranges = {n: (min([base.probs[n]] + [a.probs[n] for a in trusted]),
                  max([base.probs[n]] + [a.probs[n] for a in trusted])) for n in base.probs}
    return Sensitivity(base=base, scaled=tuple(scaled), ranges=ranges, changes=changes,
                       reasons=tuple(reasons), unreliable=unreliable,
                       sentence=_sentence(base, changes, reasons, unreliable, ranges))


def power_scale_weights(log_density: np.ndarray, alpha: float) -> tuple[np.ndarray, float]:
    """Pareto-smoothed importance weights for ``p^α`` from draws under ``p``, and Pareto k.

    The log ratio is ``(α − 1)·log p(θ)`` per draw (Kallioinen et al. 2023, eq. 3);
    smoothing by :func:`arviz.psislw` (Vehtari et al. 2024).
    """
    log_ratio = (alpha - 1.0) * np.asarray(log_density, dtype=float).reshape(-1)
    if np.ptp(log_ratio) == 0.0:  # a constant density (a fixed parameter): nothing changes
        return np.full(log_ratio.size, 1.0 / log_ratio.size), -math.inf
    with warnings.catch_warnings():
        # ArviZ warns on high k; the k is returned and reported instead
        warnings.simplefilter("ignore", UserWarning)
        lw, k = az.psislw(log_ratio - log_ratio.max())
    w = np.exp(np.asarray(lw) - np.max(lw))
    return w / w.sum(), float(k)


def log_prior_components(idata: az.InferenceData, spec: Mapping[str, Any]
                         ) -> dict[str, np.ndarray]:
    """Per-draw log prior density of the components that bear on the exponent's answers.

    ``exponent``: the normal prior of the population exponent. ``taxon_sd``: the sum of the
    half-normal priors of every ``<term>_sd__<level>`` (scales ``priors.<term>_sd.sd``).
    ``curvature``: the normal prior of the shared curvature (when the fit has one).
    """
    post = idata.posterior
    pri = spec["priors"]
    out: dict[str, np.ndarray] = {}
    if "exponent" in post:
        p = pri["exponent"]
        out["exponent"] = stats.norm.logpdf(_flat(post["exponent"]), p["mean"], p["sd"])
    total = None
    for name in post.data_vars:
        term = str(name).split("_sd__")[0]
        if "_sd__" in str(name) and term in _SD_TERMS and f"{term}_sd" in pri:
            lp = stats.halfnorm.logpdf(_flat(post[name]), scale=float(pri[f"{term}_sd"]["sd"]))
            total = lp if total is None else total + lp
    if total is not None:
        out["taxon_sd"] = total
    if "curvature" in post and "curvature" in pri:
        p = pri["curvature"]
        out["curvature"] = stats.norm.logpdf(_flat(post["curvature"]), p["mean"], p["sd"])
    return out


def judge_changes(
    base: ScaledAnswer, scaled: Sequence[ScaledAnswer], *, move: float = 0.2
) -> tuple[bool, list[str]]:
    """Does the answer change under any reliable scaled version?

    It changes when the most probable hypothesis differs, or the base top hypothesis'
    probability moves by more than ``move`` or crosses 0.5 (common practice, no source).
    Scaled answers with unreliable weights are left out here and listed by the caller.
    """
    reasons = []
    p0 = base.probs[base.top]
    for a in scaled:
        if not a.reliable:
            continue
        where = f"{a.component} α={a.alpha:g}"
        p = a.probs[base.top]
        if a.top != base.top:
            reasons.append(f"{where}: most probable becomes {a.top} ({a.probs[a.top]:.2f})")
        elif abs(p - p0) > move:
            reasons.append(f"{where}: P({base.top}) moves from {p0:.2f} to {p:.2f}")
        elif (p0 > 0.5) != (p > 0.5):
            reasons.append(f"{where}: P({base.top}) crosses 0.5 ({p0:.2f} to {p:.2f})")
    return bool(reasons), reasons


@dataclass
class _Context:
    est: Any  # allolaw.answers.density.DensityEstimate of the population exponent
    named: list[tuple[str, float, float]]
    other_weight: float
    delta: float
    m0: float
    s0: float
    k_max: float
    ess_min: float


def _answer(ctx: _Context, component: str, alpha: float, weights: np.ndarray | None,
            k: float) -> ScaledAnswer:
    """The headline quantities with ``component`` scaled by ``alpha`` (weights given)."""
    draws = ctx.est.draws
    w = np.full(draws.size, 1.0 / draws.size) if weights is None else weights
    scaled_sd = ctx.s0 / math.sqrt(alpha) if component == "exponent" else ctx.s0
    pi = np.array([h[2] for h in ctx.named] + [ctx.other_weight])
    if component == "named_weights":
        pi = pi**alpha
    log_bf = []
    for _, v, _ in ctx.named:
        if component == "likelihood":
            log_post = float(ctx.est.parametric(weights).logpdf(v))
        else:
            log_post = ctx.est.logpdf(v, weights, scaled_sd if component == "exponent"
                                      else None)
        log_bf.append(log_post - float(stats.norm.logpdf(v, ctx.m0, scaled_sd)))
    with np.errstate(divide="ignore"):
        lp = np.log(pi) + np.append(log_bf, 0.0)
    probs = np.exp(lp - special.logsumexp(lp))
    labels = [h[0] for h in ctx.named] + [OTHER]
    inside = {h[0]: float(np.sum(w * (np.abs(draws - h[1]) < ctx.delta))) for h in ctx.named}
    ess = float(1.0 / np.sum(w**2))
    return ScaledAnswer(component=component, alpha=float(alpha), pareto_k=k, ess=ess,
                        reliable=bool(k <= ctx.k_max and ess >= ctx.ess_min),
                        exponent_mean=float(np.sum(w * draws)),
                        probs=dict(zip(labels, map(float, probs), strict=True)),
                        interval_probs=inside, top=labels[int(np.argmax(probs))])


def _scaled_answers(ctx: _Context, base: ScaledAnswer, logs: Mapping[str, np.ndarray],
                    components: Sequence[str], alphas: Sequence[float]) -> list[ScaledAnswer]:
    scaled: list[ScaledAnswer] = []
    for component in components:
        if component == "named_weights":
            scaled += [_answer(ctx, component, a, None, -math.inf) for a in alphas]
            continue
        if component not in logs:
            continue
        # the likelihood rows are compared with their own α = 1 (same density method)
        reference = (_answer(ctx, "likelihood", 1.0, None, -math.inf)
                     if component == "likelihood" else base)
        for alpha in alphas:
            w, k = power_scale_weights(logs[component], alpha)
            got = _answer(ctx, component, alpha, w, k)
            if component == "likelihood":
                got = _shift(got, reference, base)
            scaled.append(got)
    return scaled


def _shift(got: ScaledAnswer, reference: ScaledAnswer, base: ScaledAnswer) -> ScaledAnswer:
    # likelihood rows: the change against their own α = 1, applied to the base probabilities
    # on the log-odds scale, so that a change of density method is not read as sensitivity
    labels = list(base.probs)
    lp = np.array([math.log(max(base.probs[n], 1e-300)) + math.log(max(got.probs[n], 1e-300))
                   - math.log(max(reference.probs[n], 1e-300)) for n in labels])
    probs = np.exp(lp - special.logsumexp(lp))
    return ScaledAnswer(component=got.component, alpha=got.alpha, pareto_k=got.pareto_k,
                        ess=got.ess, reliable=got.reliable, exponent_mean=got.exponent_mean,
                        probs=dict(zip(labels, map(float, probs), strict=True)),
                        interval_probs=got.interval_probs,
                        top=labels[int(np.argmax(probs))])


def _sentence(base: ScaledAnswer, changes: bool, reasons: Sequence[str],
              unreliable: Sequence[str], ranges: Mapping[str, tuple[float, float]]) -> str:
    lo, hi = ranges[base.top]
    if changes:
        text = (f"The answer depends on the prior or the data weighting: {base.top} is most "
                f"probable ({base.probs[base.top]:.2f}), but " + "; ".join(reasons) + ".")
    else:
        text = (f"The answer holds under power-scaling of the prior and the likelihood: "
                f"{base.top} stays most probable, its probability between {lo:.2f} and "
                f"{hi:.2f}.")
    if unreliable:
        text += (" Not assessed (importance weights unreliable): " + ", ".join(unreliable)
                 + ".")
    return text


def _flat(da: Any) -> np.ndarray:
    return np.asarray(da.values, dtype=float).reshape(-1)
