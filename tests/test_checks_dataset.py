"""The check stage: refit once on divergences, the check JSON, fit and check in one process."""

import json
import sys
import time
import types

import arviz as az
import pytest

from allolaw import paths
from allolaw.checks.dataset import check_dataset_model
from allolaw.config import validate_config
from allolaw.testing.posteriors import line_posterior


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

    def fake_fit(config, dataset, model, *, threads=1, target_acceptance=None):
        calls.append(target_acceptance)
        time.sleep(0.05)
        idata = line_posterior(seed=12)
        idata.to_netcdf(str(post))
        return idata

    monkeypatch.setitem(sys.modules, "allolaw.model.fitting",
                        types.SimpleNamespace(fit_dataset_model=fake_fit))
    verdict = check_dataset_model(config, "toy", "pooled")
    assert calls == [0.99]
    assert verdict == "pass"
    report = json.loads(paths.check_path(config["results_dir"], "toy", "pooled").read_text())
    assert report["refit"]["before"]["n_divergent"] == 12
    assert report["refit"]["after"]["n_divergent"] == 0
    assert "refitted once" in report["findings"][0]
    recorded = json.loads(az.from_netcdf(post).attrs["refit"])
    assert recorded["target_acceptance"] == 0.99
    # the refit's wall time is kept with the posterior (not in the JSON, which reruns
    # reproduce byte for byte)
    assert recorded["seconds"] >= 0.05
    assert "seconds" not in report["refit"]


def test_failed_check_is_written_not_hidden(tmp_path, monkeypatch):
    config = _config(tmp_path)
    _write_fit(config, line_posterior(seed=13, shift_chain=5.0))
    monkeypatch.setitem(sys.modules, "allolaw.model.fitting", types.SimpleNamespace())
    assert check_dataset_model(config, "toy", "pooled") == "fail"
    report = json.loads(paths.check_path(config["results_dir"], "toy", "pooled").read_text())
    assert report["verdict"] == "fail"
    assert report["refit"] is None
    assert {d["name"] for d in report["diagnostics"]} >= {"rhat", "ess_bulk", "bfmi", "pareto_k"}
    assert "loo_pit" in report["ppc"]


def test_fit_with_check_writes_both_outputs_in_one_process(tmp_path, monkeypatch, caplog):
    # the workflow's fit job runs `allolaw fit --check`: the fit, then the check stage on the
    # posterior it wrote, with the check's own seconds in the log (benchmarks/batch_cost.py)
    import yaml

    from allolaw import runtime
    from allolaw.cli import main
    from allolaw.model import fitting

    config = _config(tmp_path)
    config_file = tmp_path / "config.yaml"
    config_file.write_text(yaml.safe_dump({"results_dir": config["results_dir"],
                                           "datasets": config["datasets"]}))
    fitted = []

    def fake_fit(config, dataset, model, *, threads=1, target_acceptance=None):
        fitted.append((dataset, model, threads))
        return _write_fit(config, line_posterior(seed=15))

    monkeypatch.setattr(fitting, "fit_dataset_model", fake_fit)
    monkeypatch.setattr(runtime, "configure_job", lambda threads: {})  # keep this process's env
    with caplog.at_level("INFO", logger="allolaw.checks.dataset"):
        code = main(["fit", "--config", str(config_file), "--dataset", "toy", "--model",
                     "pooled", "--threads", "2", "--check"])
    assert code == 0
    assert fitted == [("toy", "pooled", 2)]
    report = json.loads(paths.check_path(config["results_dir"], "toy", "pooled").read_text())
    assert report["verdict"] == "pass"
    assert any("check done in" in r.getMessage() for r in caplog.records)


def test_chain_extension_of_the_fit_is_copied_into_the_check_json(tmp_path, monkeypatch):
    config = _config(tmp_path)
    idata = line_posterior(seed=14)
    record = {"status": "extended", "reason": "smallest bulk ESS 250 below 400",
              "backend": "nutpie", "extra_draws_per_chain": 1000,
              "draws_per_chain_before": 1000, "draws_per_chain_after": 2000,
              "before": {"rhat": 1.004, "ess_bulk": 250.0, "ess_tail": 380.0},
              "after": {"rhat": 1.002, "ess_bulk": 520.0, "ess_tail": 700.0}}
    idata.attrs["chain_extension"] = json.dumps(record)
    _write_fit(config, idata)
    monkeypatch.setitem(sys.modules, "allolaw.model.fitting", types.SimpleNamespace())
    check_dataset_model(config, "toy", "pooled")
    report = json.loads(paths.check_path(config["results_dir"], "toy", "pooled").read_text())
    assert report["extension"] == record
    assert "1000 draws further" in report["findings"][0]
    assert "250.0 → 520.0" in report["findings"][0]


def test_extension_with_a_mass_matrix_from_the_draws_is_named_in_the_finding(
        tmp_path, monkeypatch):
    config = _config(tmp_path)
    idata = line_posterior(seed=16)
    record = {"status": "extended", "reason": "smallest bulk ESS 120 below 400",
              "backend": "nutpie", "extra_draws_per_chain": 300,
              "draws_per_chain_before": 300, "draws_per_chain_after": 600,
              "before": {"rhat": 1.02, "ess_bulk": 120.0, "ess_tail": 200.0},
              "after": {"rhat": 1.006, "ess_bulk": 410.0, "ess_tail": 500.0},
              "mass_matrix": "draws' covariance (dense)", "step_size_tuning_steps": 200}
    idata.attrs["chain_extension"] = json.dumps(record)
    _write_fit(config, idata)
    monkeypatch.setitem(sys.modules, "allolaw.model.fitting", types.SimpleNamespace())
    check_dataset_model(config, "toy", "pooled")
    report = json.loads(paths.check_path(config["results_dir"], "toy", "pooled").read_text())
    assert report["extension"]["mass_matrix"] == "draws' covariance (dense)"
    finding = report["findings"][0]
    assert "draws' covariance (dense)" in finding
    assert "tuned again over 200 steps" in finding
    assert "no new warm-up" not in finding


@pytest.mark.parametrize(("shift", "said"), [(5.0, True), (0.0, False)])
def test_extension_off_is_said_only_when_the_check_falls_short(tmp_path, monkeypatch,
                                                                shift, said):
    config = _config(tmp_path)
    idata = line_posterior(seed=13, shift_chain=shift)
    record = {"status": "off", "reason": "chain extension is off (sampler.extension_draws is 0)",
              "backend": "nutpie", "extra_draws_per_chain": 0, "draws_per_chain_before": 1000,
              "draws_per_chain_after": 1000, "before": None, "after": None}
    idata.attrs["chain_extension"] = json.dumps(record)
    _write_fit(config, idata)
    monkeypatch.setitem(sys.modules, "allolaw.model.fitting", types.SimpleNamespace())
    verdict = check_dataset_model(config, "toy", "pooled")
    report = json.loads(paths.check_path(config["results_dir"], "toy", "pooled").read_text())
    assert (verdict == "fail") is said
    assert report["extension"] == record
    assert any("not extended: chain extension is off" in f
               for f in report["findings"]) is said


def test_fit_without_an_extension_record_writes_null(tmp_path, monkeypatch):
    config = _config(tmp_path)
    _write_fit(config, line_posterior(seed=15))
    monkeypatch.setitem(sys.modules, "allolaw.model.fitting", types.SimpleNamespace())
    check_dataset_model(config, "toy", "pooled")
    report = json.loads(paths.check_path(config["results_dir"], "toy", "pooled").read_text())
    assert report["extension"] is None


def test_warnings_of_the_fit_lead_the_check_findings(tmp_path, monkeypatch):
    # the fit stage keeps its warnings (e.g. individuals fitted without a species term,
    # model/within.py) in the posterior's attributes; the check shows them first
    config = _config(tmp_path)
    idata = line_posterior(seed=16)
    warning = ("rows are individuals but the spec has no term at the species level: every "
               "individual is treated as an independent observation")
    idata.attrs["warnings"] = json.dumps([warning])
    _write_fit(config, idata)
    monkeypatch.setitem(sys.modules, "allolaw.model.fitting", types.SimpleNamespace())
    check_dataset_model(config, "toy", "pooled")
    report = json.loads(paths.check_path(config["results_dir"], "toy", "pooled").read_text())
    assert report["findings"][0] == warning
