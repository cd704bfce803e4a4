"""Checks of one fit, on hand-built InferenceData with known defects (no MCMC)."""

import json
import sys
import time
import types

import arviz as az
import numpy as np
import pytest

from allolaw import paths
from allolaw.config import validate_config
from allolaw.diagnostics import (
    check_dataset_model,
    check_fit,
    pareto_k_threshold,
    predictive_checks,
)
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


def _config(tmp_path):
    return validate_config({
        "results_dir": str(tmp_path / "results"),
        "datasets": {
            "toy": {
                "sources": [{"file": "toy.csv",
                             "columns": {"species": "sp", "size": "m", "trait": "r"}}],
                "size": {"quantity": "mass", "unit": "g"},
                "trait": {"quantity": "power", "unit": "W"},
                "models": ["pooled"],
            }
        },
    })


def _write_fit(config, idata):
    path = paths.posterior_path(config["results_dir"], "toy", "pooled")
    path.parent.mkdir(parents=True, exist_ok=True)
    idata.to_netcdf(str(path))
    return path


def test_divergent_fit_is_refitted_once_and_the_refit_is_recorded(tmp_path, monkeypatch):
    config = _config(tmp_path)
    post = _write_fit(config, line_posterior(seed=11, n_divergent=12))
    calls = []

    def fake_fit(config, dataset, model, *, threads=1, target_accept=None):
        calls.append(target_accept)
        time.sleep(0.05)
        idata = line_posterior(seed=12)
        idata.to_netcdf(str(post))
        return idata

    monkeypatch.setitem(sys.modules, "allolaw.fitting",
                        types.SimpleNamespace(fit_dataset_model=fake_fit))
    verdict = check_dataset_model(config, "toy", "pooled")
    assert calls == [0.99]
    assert verdict == "pass"
    report = json.loads(paths.check_path(config["results_dir"], "toy", "pooled").read_text())
    assert report["refit"]["before"]["n_divergent"] == 12
    assert report["refit"]["after"]["n_divergent"] == 0
    assert "refitted once" in report["findings"][0]
    recorded = json.loads(az.from_netcdf(post).attrs["refit"])
    assert recorded["target_accept"] == 0.99
    # the refit's wall time is kept with the posterior (not in the JSON, which reruns
    # reproduce byte for byte)
    assert recorded["seconds"] >= 0.05
    assert "seconds" not in report["refit"]


def test_failed_check_is_written_not_hidden(tmp_path, monkeypatch):
    config = _config(tmp_path)
    _write_fit(config, line_posterior(seed=13, shift_chain=5.0))
    monkeypatch.setitem(sys.modules, "allolaw.fitting", types.SimpleNamespace())
    assert check_dataset_model(config, "toy", "pooled") == "fail"
    report = json.loads(paths.check_path(config["results_dir"], "toy", "pooled").read_text())
    assert report["verdict"] == "fail"
    assert report["refit"] is None
    assert {d["name"] for d in report["diagnostics"]} >= {"rhat", "ess_bulk", "bfmi", "pareto_k"}
    assert "loo_pit" in report["ppc"]


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


def test_fit_with_check_writes_both_outputs_in_one_process(tmp_path, monkeypatch, caplog):
    # the workflow's fit job runs `allolaw fit --check`: the fit, then the check stage on the
    # posterior it wrote, with the check's own seconds in the log (benchmarks/batch_cost.py)
    import yaml

    from allolaw import fitting, runtime
    from allolaw.cli import main

    config = _config(tmp_path)
    config_file = tmp_path / "config.yaml"
    config_file.write_text(yaml.safe_dump({"results_dir": config["results_dir"],
                                           "datasets": config["datasets"]}))
    fitted = []

    def fake_fit(config, dataset, model, *, threads=1, target_accept=None):
        fitted.append((dataset, model, threads))
        return _write_fit(config, line_posterior(seed=15))

    monkeypatch.setattr(fitting, "fit_dataset_model", fake_fit)
    monkeypatch.setattr(runtime, "configure_job", lambda threads: {})  # keep this process's env
    with caplog.at_level("INFO", logger="allolaw.diagnostics"):
        code = main(["fit", "--config", str(config_file), "--dataset", "toy", "--model",
                     "pooled", "--threads", "2", "--check"])
    assert code == 0
    assert fitted == [("toy", "pooled", 2)]
    report = json.loads(paths.check_path(config["results_dir"], "toy", "pooled").read_text())
    assert report["verdict"] == "pass"
    assert any("check done in" in r.getMessage() for r in caplog.records)
