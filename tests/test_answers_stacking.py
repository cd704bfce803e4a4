"""Tests of allolaw.answers.stacking against ArviZ's stacking and multinomial sampling theory.

The fits are hand-built InferenceData objects (invented data): each "model" predicts the same
observations with its own normal predictive draws, so the LOO densities differ between models.
"""

from __future__ import annotations

import warnings

import arviz as az
import numpy as np
import pytest
from scipy import stats

from allolaw.answers.stacking import (
    average_exponent,
    average_probabilities,
    judge_agreement,
    stack_fits,
    stacking_weights,
)


def _fits(seed, n_obs=40, chains=2, draws=500):
    rng = np.random.default_rng(seed)
    x = np.linspace(-2, 2, n_obs)
    y = 0.5 + 0.75 * x + 0.1 * x**2 + rng.normal(0, 0.3, n_obs)
    fits = {}
    # three imperfect models: straight, curved with wrong scale, shifted; each predicts well
    # in part of the range, so the best mixture puts weight on more than one
    for name, (b, c, s) in {"straight": (0.8, 0.0, 0.3), "curved": (0.75, 0.15, 0.45),
                            "flat": (0.6, 0.1, 0.3)}.items():
        bb = b + 0.03 * rng.standard_normal((chains, draws))
        mu = 0.5 + bb[..., None] * x + c * x**2
        fits[name] = az.from_dict(
            posterior={"exponent": bb},
            log_likelihood={"trait": stats.norm.logpdf(y, mu, s)},
            observed_data={"trait": y},
            dims={"trait": ["species"]},
        )
    return fits


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_stacking_weights_equal_arviz_compare(seed):
    fits = _fits(seed)
    ours = stack_fits(fits).as_dict()
    with warnings.catch_warnings():
        # ArviZ 0.23 warns about its own pandas call (inplace=True) and may warn on Pareto k
        warnings.simplefilter("ignore")
        table = az.compare(fits, ic="loo", method="stacking", var_name="trait")
    # reference: ArviZ 0.23 az.compare(method="stacking") (Yao et al. 2018, eq. 4)
    for name in fits:
        assert ours[name] == pytest.approx(float(table.loc[name, "weight"]), abs=1e-4)
    assert sum(ours.values()) == pytest.approx(1.0)


def test_stacking_gives_all_weight_to_a_model_that_predicts_every_point_best():
    lpd_good = np.full(30, -1.0)
    out = stacking_weights({"good": lpd_good, "bad": lpd_good - 2.0})
    assert out.as_dict()["good"] == pytest.approx(1.0, abs=1e-6)


def test_stacking_two_models_each_best_on_half_matches_the_closed_form():
    # Model A gives density 1 on the first half and e^-3 on the second, B the reverse; by
    # symmetry the log score Σ log(w p_A + (1 − w) p_B) is maximised at w = 1/2 (closed form).
    a = np.r_[np.zeros(10), np.full(10, -3.0)]
    out = stacking_weights({"a": a, "b": a[::-1]})
    assert out.weights == pytest.approx([0.5, 0.5], abs=1e-8)


def test_averaged_exponent_draw_counts_follow_the_weights():
    rng = np.random.default_rng(5)
    draws = {"a": rng.normal(0.70, 0.02, 2000), "b": rng.normal(0.75, 0.02, 2000),
             "c": rng.normal(0.67, 0.03, 2000)}
    weights = {"a": 0.5, "b": 0.3, "c": 0.2}
    n = 20000
    out = average_exponent(draws, weights, n_draws=n, seed=9)
    # multinomial counts: each within 4 binomial SDs, and a chi-square goodness of fit
    # (Pearson 1900) at the 0.001 level
    expected = n * np.array([0.5, 0.3, 0.2])
    assert np.all(np.abs(out.counts - expected) < 4 * np.sqrt(expected * (1 - expected / n)))
    assert stats.chisquare(out.counts, expected).pvalue > 0.001
    assert np.bincount(out.model_of_draw).tolist() == out.counts.tolist()
    # mixture mean = Σ w_k mean_k, within 4 Monte Carlo SDs of the mixture
    assert out.weighted_mean == pytest.approx(0.5 * draws["a"].mean() + 0.3 * draws["b"].mean()
                                              + 0.2 * draws["c"].mean())
    assert abs(out.mean - out.weighted_mean) < 4 * out.draws.std() / np.sqrt(n)


def test_averaged_exponent_rejects_negative_weights():
    with pytest.raises(ValueError, match="weights"):
        average_exponent({"a": np.zeros(3)}, {"a": -1.0})


def test_averaged_probabilities_are_the_weighted_mean_of_each_models_probabilities():
    probs = {"a": {"3/4": 0.8, "2/3": 0.1}, "b": {"3/4": 0.2, "2/3": 0.7}}
    out = average_probabilities(probs, {"a": 0.25, "b": 0.75})
    assert out == pytest.approx({"3/4": 0.35, "2/3": 0.55})


def _averaged(centre, sd, seed=0):
    rng = np.random.default_rng(seed)
    return average_exponent({"a": rng.normal(centre, sd, 4000)}, {"a": 1.0}, seed=seed)


def test_primary_outside_the_averaged_interval_disagrees():
    avg = _averaged(0.70, 0.01)
    out = judge_agreement(avg, np.full(100, 0.75), primary="taxa")
    assert out.disagree
    assert "outside the 90% interval" in out.sentence


def test_primary_inside_the_interval_with_the_same_top_value_agrees():
    avg = _averaged(0.74, 0.02)
    out = judge_agreement(avg, np.full(100, 0.745), primary="taxa",
                          primary_probs={"3/4": 0.7, "2/3": 0.2},
                          averaged_probs={"3/4": 0.6, "2/3": 0.3})
    assert not out.disagree
    assert out.sentence.startswith("The headline model agrees")


def test_a_different_top_named_value_disagrees():
    avg = _averaged(0.71, 0.05)
    out = judge_agreement(avg, np.full(100, 0.72), primary="taxa",
                          primary_probs={"3/4": 0.6, "2/3": 0.3},
                          averaged_probs={"3/4": 0.3, "2/3": 0.6})
    assert out.disagree
    assert "most probable value is 3/4" in out.sentence


def test_average_leaves_out_models_whose_exponent_is_another_quantity():
    # a within/between split puts the between-species slope in `exponent`; a model without
    # the split has one slope for both (invented draws, known by construction)
    import pandas as pd

    from allolaw.answers.verdicts import headline_block

    rng = np.random.default_rng(4)

    def fit(centre: float, split: bool) -> az.InferenceData:
        const = {"log_size_obs": np.zeros(3)}
        if split:
            const["within_log_size"] = np.zeros(3)
        return az.from_dict(posterior={"exponent": rng.normal(centre, 0.05, (2, 200))},
                            constant_data=const)

    fits = {"within": fit(2.7, True), "together": fit(2.0, False),
            "within_b": fit(2.72, True)}
    block = headline_block(fits, pd.DataFrame(), primary="within",
                           weights={"within": 0.5, "together": 0.3, "within_b": 0.2})
    assert block["left_out"] == ["together"]
    assert set(block["averaged_exponent"]["draws_by_model"]) == {"within", "within_b"}
    assert block["averaged_exponent"]["q05"] > 2.5  # with the 2.0 draws (weight 0.3) it is ~2.0
    assert "'together'" in block["sentence"]
