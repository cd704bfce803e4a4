"""Named-value probabilities of the plan analysis, against the closed form."""

from __future__ import annotations

import numpy as np
from scipy import stats

from allolaw.planning.decide import (
    curvature_outcomes,
    named_probabilities,
    outcomes,
    true_hypothesis,
)
from allolaw.planning.design import Analysis, Question
from allolaw.planning.mixture import NormalMixture

QUESTION = Question(exponents=(("surface law", 2 / 3, 1.0), ("metabolic law", 0.75, 2.0)),
                    other_weight=1.0, interval_halfwidth=0.03, target=0.9)


def test_normal_posterior_gives_savage_dickey_probabilities() -> None:
    # Savage–Dickey: BF = p(v | y) / p(v) (Dickey 1971, Ann. Math. Stat. 42:204-223); with a
    # normal posterior N(0.74, 0.02²) and the N(1, 1) prior both densities are closed form,
    # and P(H_k | y) = π_k BF_k / (Σ_j π_j BF_j + π_other).
    post = NormalMixture(np.ones((1, 1)), np.array([[0.74]]), np.array([[0.02]]))
    probs = named_probabilities(post, QUESTION, Analysis())[0]
    bf = [stats.norm.pdf(v, 0.74, 0.02) / stats.norm.pdf(v, 1, 1) for v in (2 / 3, 0.75)]
    raw = np.array([1.0 * bf[0], 2.0 * bf[1], 1.0])
    np.testing.assert_allclose(probs, raw / raw.sum(), rtol=1e-12)


def test_mixture_density_is_the_weighted_average_of_its_normals() -> None:
    post = NormalMixture(np.array([[0.25, 0.75]]), np.array([[0.7, 0.8]]),
                         np.array([[0.05, 0.1]]))
    expected = 0.25 * stats.norm.pdf(0.72, 0.7, 0.05) + 0.75 * stats.norm.pdf(0.72, 0.8, 0.1)
    assert np.isclose(np.exp(post.logpdf(0.72))[0], expected, rtol=1e-12)
    q = post.quantile(0.3)[0]
    assert np.isclose(post.cdf(q)[0], 0.3, atol=1e-9)


def test_truth_outside_every_interval_is_another_value() -> None:
    idx = true_hypothesis(np.array([0.75, 0.68, 0.71, 0.9]), QUESTION)
    assert list(idx) == [1, 0, 2, 2]


def test_confident_answer_for_the_wrong_value_counts_as_wrong_not_success() -> None:
    post = NormalMixture(np.ones((2, 1)), np.array([[0.667], [0.75]]),
                         np.array([[0.005], [0.005]]))
    res = outcomes(post, np.array([0.75, 0.75]), QUESTION, Analysis())
    assert list(res["wrong"]) == [True, False]
    assert list(res["success"]) == [False, True]
    np.testing.assert_allclose(res["width90"], 2 * 1.6448536 * 0.005, rtol=1e-6)


def test_confident_curvature_sign_on_a_straight_truth_is_a_false_detection() -> None:
    post = NormalMixture(np.ones((3, 1)), np.array([[0.1], [0.1], [-0.1]]),
                         np.array([[0.02], [0.02], [0.02]]))
    res = curvature_outcomes(post, np.array([0.0, 0.05, 0.05]), QUESTION)
    assert list(res["success"]) == [False, True, False]
    assert list(res["wrong"]) == [True, False, True]
    assert np.isnan(res["prob_true"][0])
