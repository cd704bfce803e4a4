"""Convergence diagnostics of one fit, on hand-built InferenceData with known defects (no MCMC)."""

import numpy as np
import pytest

from allolaw.checks.convergence import check_fit, pareto_k_threshold
from allolaw.testing.posteriors import line_posterior


def test_clean_draws_pass_every_check():
    result, findings = check_fit(line_posterior(seed=1))
    assert result.verdict == "pass"
    assert findings == []
    # R-hat 1.01 and ESS 400 for four chains: Vehtari et al. 2021, Bayesian Analysis 16:667.
    assert result.diagnostic("rhat").value <= 1.01
    assert result.diagnostic("ess_bulk").value >= 400


def test_shifted_chain_means_fail_rhat():
    # One chain offset by 4 posterior SDs: rank-normalised R-hat far above 1.01
    # (Vehtari et al. 2021, Bayesian Analysis 16:667, threshold 1.01).
    result, findings = check_fit(line_posterior(seed=2, shift_chain=4.0))
    assert result.verdict == "fail"
    assert result.diagnostic("rhat").status == "fail"
    assert any("exponent" in f and "R-hat" in f for f in findings)


def test_small_chain_shift_is_below_the_rhat_threshold():
    # A shift of 0.02 SD is noise: the check must not cry wolf.
    result, _ = check_fit(line_posterior(seed=3, shift_chain=0.02))
    assert result.diagnostic("rhat").status == "pass"


def test_stuck_chain_fails():
    result, _ = check_fit(line_posterior(seed=4, stuck_chain=True))
    assert result.verdict == "fail"
    assert result.diagnostic("rhat").status == "fail"
    assert result.diagnostic("ess_bulk").status == "warn"


def test_injected_divergences_are_counted_and_reported():
    result, findings = check_fit(line_posterior(seed=5, n_divergent=7))
    assert result.n_divergent == 7
    assert result.diagnostic("divergences").value == 7
    assert result.verdict == "fail"
    assert any("7 of 2000 transitions diverged" in f for f in findings)


def test_low_energy_bfmi_fails():
    # E-BFMI below 0.3 signals poor exploration (Betancourt 2016, arXiv:1604.00695).
    result, findings = check_fit(line_posterior(seed=6, low_bfmi=True))
    assert result.diagnostic("bfmi").value < 0.3
    assert result.diagnostic("bfmi").status == "fail"
    assert result.verdict == "fail"
    assert any("BFMI" in f for f in findings)


def test_bfmi_matches_its_definition():
    # E-BFMI = sum (E_n - E_{n-1})^2 / sum (E_n - mean E)^2 (Betancourt 2016, eq. 3.9 / Stan).
    idata = line_posterior(seed=6, low_bfmi=True)
    energy = idata.sample_stats["energy"].values
    by_hand = np.sum(np.diff(energy, axis=1) ** 2, axis=1) / np.sum(
        (energy - energy.mean(axis=1, keepdims=True)) ** 2, axis=1
    )
    result, _ = check_fit(idata)
    assert result.diagnostic("bfmi").value == pytest.approx(by_hand.min(), rel=1e-6)


def test_outlier_gives_high_pareto_k_and_a_warning():
    result, findings = check_fit(line_posterior(seed=7, outlier_sd=12.0))
    diag = result.diagnostic("pareto_k")
    assert diag.status == "warn"
    assert diag.value > 0.7
    assert result.verdict == "warn"
    assert any("Pareto k" in f for f in findings)


def test_pareto_k_threshold_depends_on_sample_size():
    # min(1 - 1/log10(S), 0.7): Vehtari et al. 2024, JMLR 25(72), section 3.2.4.
    assert pareto_k_threshold(100) == pytest.approx(0.5)
    assert pareto_k_threshold(1000) == pytest.approx(2 / 3)
    assert pareto_k_threshold(4000) == pytest.approx(0.7)


@pytest.mark.parametrize("style", ["pymc", "numpyro", "nutpie"])
def test_tree_depth_saturation_is_read_from_each_backend(style):
    result, _ = check_fit(line_posterior(seed=8, treedepth_saturated_share=0.05, stats_style=style))
    diag = result.diagnostic("treedepth_saturation")
    assert diag.value == pytest.approx(0.05)
    assert diag.status == "warn"


def test_a_fixed_parameter_is_not_mistaken_for_a_convergence_failure():
    idata = line_posterior(seed=14)
    idata.posterior["error_ratio"] = idata.posterior["sigma"] * 0 + 1.0  # fixed at 1
    result, _ = check_fit(idata)
    assert result.verdict == "pass"


def test_stuck_chain_is_caught_even_when_other_parameters_are_fixed():
    idata = line_posterior(seed=15, stuck_chain=True)
    idata.posterior["error_ratio"] = idata.posterior["sigma"] * 0 + 1.0
    result, _ = check_fit(idata)
    assert result.diagnostic("rhat").status == "fail"
