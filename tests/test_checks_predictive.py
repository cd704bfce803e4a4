"""Predictive checks of one fit, on hand-built InferenceData with known defects (no MCMC)."""

from allolaw.checks.predictive import predictive_checks
from allolaw.testing.posteriors import line_posterior


def test_loo_pit_is_uniform_for_a_right_model_and_not_for_a_too_narrow_one():
    # LOO-PIT of a calibrated model is uniform (Gabry et al. 2019, JRSS A 182:389).
    right = predictive_checks(line_posterior(seed=9))["loo_pit"]
    narrow = predictive_checks(line_posterior(seed=9, spread_factor=0.4))["loo_pit"]
    assert right["ks_pvalue"] > 0.01
    assert narrow["ks_pvalue"] < 0.01
    assert narrow["share_outside_05_95"] > 2 * right["share_outside_05_95"]


def test_bayesian_p_value_of_taxon_residual_sd_flags_a_too_narrow_model():
    groups = ["a", "b"] * 20
    narrow = predictive_checks(line_posterior(seed=10, spread_factor=0.4), groups=groups)
    rows = {r["statistic"]: r for r in narrow["test_statistics"]}
    assert rows["residual_sd[a]"]["p_value"] < 0.01
    right = predictive_checks(line_posterior(seed=10), groups=groups)
    rows = {r["statistic"]: r for r in right["test_statistics"]}
    assert 0.01 < rows["residual_sd[a]"]["p_value"] < 0.99
