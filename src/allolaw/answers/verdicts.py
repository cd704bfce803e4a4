"""The compare stage's verdicts: curvature audit, break evidence, model average, sensitivity.

Each function takes the dataset's fits (and specs) and returns the JSON-ready block that the
compare stage writes, built on the computational cores:

* :func:`curvature_block` — the four-way verdict of
  :mod:`allolaw.answers.curvature_verdict` and the numbers it rests on;
* :func:`break_block` — Savage–Dickey evidence (:mod:`allolaw.answers.evidence`) for one
  breakpoint fit, its LOO difference against the matched model without the break, and the
  verdict that needs both;
* :func:`headline_block` — stacking weights, the exponent averaged over the fitted models
  (:mod:`allolaw.answers.stacking`) beside the primary model's, and whether they disagree;
* :func:`sensitivity_block` — power-scaling sensitivity (:mod:`allolaw.answers.sensitivity`)
  of one fit's answers: the range of each probability and whether the answer changes.
"""

from __future__ import annotations

import dataclasses
import math
import warnings
from collections.abc import Mapping
from typing import Any

import arviz as az
import numpy as np
from scipy import stats

from allolaw.answers.curvature_verdict import audit_evidence, judge_curvature
from allolaw.answers.evidence import break_evidence, judge_break, loo_difference
from allolaw.answers.sensitivity import power_scale_sensitivity
from allolaw.answers.stacking import (
    average_exponent,
    average_probabilities,
    judge_agreement,
    stack_fits,
)

__all__ = ["break_block", "curvature_block", "headline_block", "sensitivity_block"]


def curvature_block(
    taxa_linear: az.InferenceData,
    taxa_curved: az.InferenceData,
    one_curve: az.InferenceData | None = None,
) -> dict[str, Any]:
    """The four-way curvature verdict, its sentence and the numbers it rests on.

    Parameters
    ----------
    taxa_linear
        Taxon exponents, no curvature.
    taxa_curved
        The same plus one shared curvature.
    one_curve
        One curved law without taxon exponents (optional; feeds the LOO comparison).

    Returns
    -------
    dict
        ``verdict`` (one of the four phrases), ``sentence`` and ``evidence`` (every field of
        :class:`allolaw.answers.curvature_verdict.AuditEvidence`; intervals as
        ``{q05, median, q95}``).

    References
    ----------
    Kolokotrones, T., Savage, V., Deeds, E. J., Fontana, W. (2010). Curvature in metabolic
    scaling. Nature 464:753–756.
    """
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        ev = audit_evidence(taxa_linear, taxa_curved, one_curve)
    judged = judge_curvature(ev)
    evidence: dict[str, Any] = {}
    for field in dataclasses.fields(ev):
        value = getattr(ev, field.name)
        if isinstance(value, tuple) and len(value) == 3:
            value = {"q05": value[0], "median": value[1], "q95": value[2]}
        elif isinstance(value, tuple) and len(value) == 2:
            value = {"elpd_difference": value[0], "elpd_difference_se": value[1]}
        evidence[field.name] = value
    return {"verdict": judged.verdict, "sentence": judged.sentence, "evidence": evidence}


def break_block(
    with_break: az.InferenceData,
    spec: Any,
    without_break: az.InferenceData | None,
    *,
    delta: float,
    matched_model: str,
) -> dict[str, Any]:
    """Savage–Dickey evidence for the break, LOO against the matched model, and the verdict.

    Parameters
    ----------
    with_break
        The breakpoint fit.
    spec
        Its spec (or the spec's dict).
    without_break
        Fit of the matched model without the break (same taxon terms); ``None`` when it is
        missing, and then no verdict is given.
    delta
        The hypotheses' δ, for P(|difference| > δ) under the prior and the posterior.
    matched_model
        Name of the matched model, for the output.

    References
    ----------
    Wagenmakers, E.-J., Lodewyckx, T., Kuriyal, H., Grasman, R. (2010). Bayesian hypothesis
    testing for psychologists: a tutorial on the Savage–Dickey method. Cognitive Psychology
    60:158–189.
    """
    ev = break_evidence(with_break, spec, delta=delta)
    out: dict[str, Any] = {"evidence": dataclasses.asdict(ev), "matched_model": matched_model}
    # prior P(exponent_above > exponent): the prior difference is N(m_a − m_b, s_a² + s_b²)
    pri = (spec.to_dict() if hasattr(spec, "to_dict") else dict(spec))["priors"]
    out["prior_p_exponent_increases"] = float(stats.norm.sf(
        0.0, float(pri["exponent_above"]["mean"]) - float(pri["exponent"]["mean"]),
        math.hypot(float(pri["exponent_above"]["sd"]), float(pri["exponent"]["sd"]))))
    if without_break is None:
        out.update(loo_against_matched=None, verdict="unclear",
                   sentence=(f"No verdict: the matched model without the break "
                             f"('{matched_model}') has no fit, so the LOO comparison is "
                             f"missing. Bayes factor {ev.bf_break:.3g} for a change of "
                             f"exponent at the break."))
        return out
    loo = loo_difference(with_break, without_break)
    judged = judge_break(ev, loo)
    out["loo_against_matched"] = dataclasses.asdict(loo)
    out.update(verdict=judged.verdict, bayes_says=judged.bayes_says, loo_says=judged.loo_says,
               sentence=judged.sentence)
    return out


def headline_block(
    fits: Mapping[str, az.InferenceData],
    hyp: Any,
    *,
    primary: str,
    weights: Mapping[str, float] | None = None,
) -> dict[str, Any]:
    """Stacking weights and the exponent averaged over the fits, beside the primary model's.

    Parameters
    ----------
    fits
        Every fit of the dataset (model name → InferenceData); those without a population
        ``exponent`` get a weight but no draws in the average.
    hyp
        The rows of ``hypotheses.csv`` (for the named values' posterior probabilities).
    primary
        The headline model.
    weights
        Stacking weights by model (default: :func:`allolaw.answers.stacking.stack_fits`).

    Returns
    -------
    dict
        ``stacking_weights``, ``averaged_exponent {mean, weighted_mean, q05, median, q95,
        draws_by_model}``, ``primary_exponent {mean, q05, median, q95}``, ``averaged_probs``,
        ``primary_probs``, ``disagree``, ``reasons``, ``sentence``, ``left_out`` (models
        whose ``exponent`` is another quantity than the primary's: with and without a
        within/between split).

    References
    ----------
    Yao, Y., Vehtari, A., Simpson, D., Gelman, A. (2018). Using stacking to average Bayesian
    predictive distributions. Bayesian Analysis 13:917–1007.
    """
    if not fits:
        return {"applicable": False, "reason": "no fits"}
    weights = dict(weights) if weights is not None else stack_fits(fits).as_dict()
    draws = {m: np.asarray(f.posterior["exponent"].values, dtype=float).reshape(-1)
             for m, f in fits.items() if "exponent" in f.posterior}
    # a model that splits within- from between-species slopes (model/within.py) has the
    # between-species exponent in `exponent`; one without the split has one slope for both:
    # another quantity, so the average takes only the models of the primary's kind
    other_kind = sorted(m for m in draws if primary in fits
                        and _splits_within(fits[m]) != _splits_within(fits[primary]))
    draws = {m: d for m, d in draws.items() if m not in other_kind}
    probs = _named_probs(hyp)
    out: dict[str, Any] = {"applicable": True, "stacking_weights": weights,
                           "note": ("stacking weights are weights of the best predictive "
                                    "mixture, not posterior model probabilities")}
    usable = {m: d for m, d in draws.items() if weights.get(m, 0.0) > 0}
    if not usable or primary not in draws:
        out.update(applicable=False, reason="no model with a population exponent has weight, "
                   "or the primary model has no fit")
        return out
    avg = average_exponent(usable, weights)
    avg_probs = average_probabilities({m: probs[m] for m in usable if m in probs}, weights) \
        if any(m in probs for m in usable) else None
    agree = judge_agreement(avg, draws[primary], primary=primary,
                            primary_probs=probs.get(primary), averaged_probs=avg_probs)
    out["averaged_exponent"] = {
        "mean": avg.mean, "weighted_mean": avg.weighted_mean, "q05": avg.q05,
        "median": float(np.median(avg.draws)), "q95": avg.q95,
        "draws_by_model": {m: int(c) for m, c in zip(avg.models, avg.counts, strict=True)},
    }
    q05, q50, q95 = np.quantile(draws[primary], [0.05, 0.5, 0.95])
    out["primary_exponent"] = {"model": primary, "mean": float(draws[primary].mean()),
                               "q05": float(q05), "median": float(q50), "q95": float(q95)}
    out["averaged_probs"] = avg_probs
    out["primary_probs"] = probs.get(primary)
    sentence = agree.sentence
    if other_kind:
        sentence += (" Left out of the average, as their exponent is another quantity (one "
                     "slope for rows within and between species, or the reverse): "
                     + ", ".join(f"'{m}'" for m in other_kind) + ".")
    out.update(disagree=agree.disagree, reasons=list(agree.reasons), sentence=sentence,
               left_out=other_kind)
    return out


def _splits_within(idata: az.InferenceData) -> bool:
    const = getattr(idata, "constant_data", None)
    return const is not None and "within_log_size" in const


def sensitivity_block(idata: az.InferenceData, spec: Any, settings: Mapping[str, Any]
                      ) -> dict[str, Any]:
    """Power-scaling sensitivity of one fit's answers about the population exponent.

    Returns
    -------
    dict
        ``top`` (most probable hypothesis), ``base_probs``, ``ranges {hypothesis: [low,
        high]}``, ``changes`` (the top changes, moves by more than 0.2, or crosses 0.5 under
        some reliable scaling), ``reasons``, ``unreliable``, ``sentence`` and ``scaled``
        (component, α, Pareto k, reliable, exponent mean, top, probabilities).

    References
    ----------
    Kallioinen, N., Paananen, T., Bürkner, P.-C., Vehtari, A. (2023). Detecting and
    diagnosing prior and likelihood sensitivity with power-scaling. Statistics and
    Computing 34:57.
    """
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        warnings.simplefilter("ignore", UserWarning)
        sens = power_scale_sensitivity(idata, spec, settings)
    return {
        "top": sens.base.top,
        "base_probs": sens.base.probs,
        "ranges": {k: list(v) for k, v in sens.ranges.items()},
        "changes": sens.changes,
        "reasons": list(sens.reasons),
        "unreliable": list(sens.unreliable),
        "sentence": sens.sentence,
        "scaled": [{"component": a.component, "alpha": a.alpha, "pareto_k": a.pareto_k,
                    "reliable": a.reliable, "exponent_mean": a.exponent_mean, "top": a.top,
                    "probs": a.probs} for a in sens.scaled],
    }


def _named_probs(hyp: Any) -> dict[str, dict[str, float]]:
    """Posterior probability of each named value (and "another value") by model."""
    if hyp is None or len(hyp) == 0:
        return {}
    taxon = hyp["taxon"].fillna("").astype(str) if "taxon" in hyp.columns else ""
    pop = hyp[(hyp["parameter"] == "exponent") & (taxon == "")
              & hyp["kind"].isin(["point", "other"])]
    out: dict[str, dict[str, float]] = {}
    for model, rows in pop.groupby("model"):
        out[str(model)] = {str(r["hypothesis"]): float(r["posterior_prob"])
                           for _, r in rows.iterrows()}
    return out
