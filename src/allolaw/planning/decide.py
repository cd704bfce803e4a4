"""What each simulated table concludes about the named exponents.

The probabilities are those of :mod:`allolaw.answers.hypotheses`, for the population
exponent: a named
value v is the point hypothesis ``exponent = v`` nested in the free model, with Bayes factor
the Savage–Dickey ratio ``p(v | y) / p(v)`` (Dickey 1971) and posterior probability
``∝ weight · BF`` against ``other_weight`` for "another value"; the interval probability is
``P(|b − v| < δ)``. Here the posterior density is the approximate normal mixture of
:mod:`allolaw.planning.approx` (in :mod:`allolaw.answers.hypotheses` it is the average over draws of
the normal full conditional: the same kind of estimate), and the prior density is the normal
exponent prior of the analysis.

References
----------
Dickey, J. M. (1971). The weighted likelihood ratio, linear hypotheses on normal location
parameters. Annals of Mathematical Statistics 42:204–223.
"""

from __future__ import annotations

import numpy as np
from scipy import special, stats

from allolaw.planning.design import Analysis, Question
from allolaw.planning.mixture import NormalMixture

__all__ = ["curvature_outcomes", "named_probabilities", "outcomes", "true_hypothesis"]


def named_probabilities(post: NormalMixture, question: Question, analysis: Analysis
                        ) -> np.ndarray:
    """Posterior probabilities (R, K + 1): the K named values, then "another value"."""
    m0, s0 = analysis.exponent_prior
    if not np.isfinite(s0):
        msg = "named-value probabilities need a proper exponent prior (finite sd)"
        raise ValueError(msg)
    values = [h[1] for h in question.exponents]
    log_bf = np.stack([post.logpdf(v) - stats.norm.logpdf(v, m0, s0) for v in values], 1)
    prior_w = np.array([h[2] for h in question.exponents] + [question.other_weight])
    with np.errstate(divide="ignore"):
        log_post = np.log(prior_w)[None, :] + np.column_stack(
            [log_bf, np.zeros(log_bf.shape[0])])
    return np.exp(log_post - special.logsumexp(log_post, axis=1, keepdims=True))


def true_hypothesis(exponent: np.ndarray, question: Question) -> np.ndarray:
    """Index of the true hypothesis per table.

    The named value nearest the true exponent when it lies within the interval half-width δ
    of it, else K ("another value").
    """
    values = np.array([h[1] for h in question.exponents])
    dist = np.abs(np.asarray(exponent)[:, None] - values[None, :])
    nearest = np.argmin(dist, axis=1)
    close = dist[np.arange(dist.shape[0]), nearest] < question.interval_halfwidth
    return np.where(close, nearest, values.size)


def outcomes(post: NormalMixture, exponent: np.ndarray, question: Question,
             analysis: Analysis) -> dict[str, np.ndarray]:
    """Per-table results: success, confident wrong answer, 90 % interval width, and more.

    Keys: ``truth_index``, ``top_index``, ``top_prob``, ``prob_true`` (posterior probability
    of the true hypothesis), ``interval_prob_true`` (P(|b − v| < δ) for a named truth, NaN
    for "another value"), ``success`` (target reached for the true value), ``wrong`` (target
    reached for a wrong value), ``width90``, ``mean``.
    """
    probs = named_probabilities(post, question, analysis)
    truth = true_hypothesis(exponent, question)
    rows = np.arange(probs.shape[0])
    top = np.argmax(probs, axis=1)
    top_prob = probs[rows, top]
    reached = top_prob >= question.target
    values = np.array([h[1] for h in question.exponents] + [np.nan])
    delta = question.interval_halfwidth
    v_true = values[truth]
    interval = np.where(np.isfinite(v_true),
                        post.cdf(np.nan_to_num(v_true) + delta)
                        - post.cdf(np.nan_to_num(v_true) - delta), np.nan)
    return {
        "truth_index": truth,
        "top_index": top,
        "top_prob": top_prob,
        "prob_true": probs[rows, truth],
        "interval_prob_true": interval,
        "success": reached & (top == truth),
        "wrong": reached & (top != truth),
        "width90": post.quantile(0.95) - post.quantile(0.05),
        "mean": post.mean(),
    }


def curvature_outcomes(post: NormalMixture, curvature: np.ndarray, question: Question
                       ) -> dict[str, np.ndarray]:
    """Per-table results when the question is the sign of the curvature.

    Keys as :func:`outcomes`; ``truth_index`` is 0 (curving down), 1 (up) or 2 (straight),
    ``top_index`` 0 or 1, ``prob_true`` P(true sign) (NaN for a straight truth).
    """
    p_up = 1.0 - post.cdf(0.0)
    top = (p_up >= 0.5).astype(int)
    top_prob = np.where(top == 1, p_up, 1.0 - p_up)
    curvature = np.asarray(curvature, dtype=float)
    truth = np.where(curvature > 0, 1, np.where(curvature < 0, 0, 2))
    reached = top_prob >= question.target
    prob_true = np.where(truth == 1, p_up, np.where(truth == 0, 1.0 - p_up, np.nan))
    return {
        "truth_index": truth,
        "top_index": top,
        "top_prob": top_prob,
        "prob_true": prob_true,
        "interval_prob_true": np.full(truth.size, np.nan),
        "success": reached & (top == truth),
        "wrong": reached & (top != truth),
        "width90": post.quantile(0.95) - post.quantile(0.05),
        "mean": post.mean(),
    }
