"""The fit stage (allolaw.model.fitting): the posterior file, its attributes, seeds, failures."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import arviz as az
import numpy as np
import pandas as pd
import pytest

from allolaw.errors import UserError
from allolaw.intake.manifest import write_manifest
from allolaw.model import fitting
from allolaw.model.fitting import derive_seed, fit_dataset_model
from test_model_sampling import _line_data

REPO = Path(__file__).resolve().parents[1]


def test_derived_seed_is_stable_across_processes_and_separates_models() -> None:
    code = ("from allolaw.model.fitting import derive_seed; "
            "print(derive_seed(20261202, 'island_metabolism', 'taxa'))")
    outs = set()
    for hash_seed in ("0", "1"):
        out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                             check=True, env={"PYTHONHASHSEED": hash_seed, "PATH": ""})
        outs.add(int(out.stdout.strip()))
    assert outs == {derive_seed(20261202, "island_metabolism", "taxa")}
    seeds = {derive_seed(20261202, d, m) for d in ("a", "b") for m in ("taxa", "pooled")}
    assert len(seeds) == 4
    assert all(0 <= s < 2**32 for s in seeds)


# --- the fit stage -------------------------------------------------------------------------

def _write_prepared(results: Path, dataset: str) -> None:
    # A clean.csv per the DEVELOPERS.md contract (invented values with known truth).
    x, y = _line_data(n=20, seed=2)
    n = len(x)
    table = pd.DataFrame({
        "species": [f"Species {i}" for i in range(n)],
        "family": [f"F{i % 3}" for i in range(n)],
        "log_size": x + np.log(50.0),
        "log_trait": y,
        "n_rows": 1,
        "within_sd_log_size": np.nan,
        "within_sd_log_trait": np.nan,
        "sd_log_size": 0.05,
        "sd_log_trait": 0.05,
        "sd_source_size": "pooled",
        "sd_source_trait": "pooled",
        "source": "test",
        "flag_outlier": False,
        "flag_singleton_taxon": False,
    })
    folder = results / dataset
    folder.mkdir(parents=True)
    table.to_csv(folder / "clean.csv", index=False)
    prepared = {"dataset": dataset, "reference_size": 50.0,
                "log_reference_size": float(np.log(50.0)), "levels": ["family"]}
    (folder / "prepared.json").write_text(json.dumps(prepared), encoding="utf-8")
    write_manifest(results, dataset, inputs=[], config_sha256=None)


def _stage_config(tmp_path: Path) -> dict:
    from allolaw.config import validate_config

    raw = {
        "results_dir": str(tmp_path / "results"),
        "models_dir": str(REPO / "models"),
        "sampler": {"chains": 2, "draws": 100, "warmup": 100, "seed": 99, "prior_draws": 20},
        "datasets": {"toy": {
            "title": "toy",
            "size": {"quantity": "mass", "unit": "g", "label": "mass"},
            "trait": {"quantity": "power", "unit": "W", "label": "rate"},
            "reference_size": 50,
            "sources": [{"file": "toy.csv", "columns": {"species": "species", "size": "m",
                                                         "trait": "r", "levels": ["family"]},
                         "units": {"size": "g", "trait": "W"}}],
            "models": ["pooled"],
        }},
    }
    return validate_config(raw)


@pytest.mark.mcmc
def test_fit_dataset_model_writes_posterior_with_every_attribute(tmp_path: Path) -> None:
    config = _stage_config(tmp_path)
    results = Path(config["results_dir"])
    _write_prepared(results, "toy")
    idata = fit_dataset_model(config, "toy", "pooled")
    path = results / "toy" / "pooled" / "posterior.nc"
    assert path.is_file()
    assert not list(path.parent.glob("*.partial"))
    back = az.from_netcdf(path)
    for key in ("allolaw_version", "dataset", "model", "spec", "sampler", "backend", "seed",
                "data_sha256", "versions", "log_reference_size", "compile_seconds",
                "sampling_seconds", "wall_seconds"):
        assert key in back.attrs, key
    assert back.attrs["dataset"] == "toy"
    assert back.attrs["model"] == "pooled"
    assert int(back.attrs["seed"]) == derive_seed(99, "toy", "pooled")
    import hashlib
    digest = hashlib.sha256((results / "toy" / "clean.csv").read_bytes()).hexdigest()
    assert back.attrs["data_sha256"] == digest
    assert json.loads(back.attrs["sampler"])["draws"] == 100
    assert "pymc" in json.loads(back.attrs["versions"])
    assert float(back.attrs["log_reference_size"]) == pytest.approx(np.log(50.0))
    assert set(idata.groups()) <= set(back.groups())
    np.testing.assert_array_equal(back.posterior["exponent"].values,
                                  idata.posterior["exponent"].values)
    assert list(back.log_likelihood.data_vars) == ["trait"]


def test_failed_fit_leaves_no_posterior_file(tmp_path: Path,
                                             monkeypatch: pytest.MonkeyPatch) -> None:
    config = _stage_config(tmp_path)
    results = Path(config["results_dir"])
    _write_prepared(results, "toy")

    def broken_fit(*args, **kwargs):
        msg = "sampler exploded"
        raise RuntimeError(msg)

    monkeypatch.setattr(fitting, "fit_model", broken_fit)
    with pytest.raises(RuntimeError, match="exploded"):
        fit_dataset_model(config, "toy", "pooled")
    assert not (results / "toy" / "pooled" / "posterior.nc").exists()


def test_interrupted_write_leaves_no_partial_file(tmp_path: Path,
                                                  monkeypatch: pytest.MonkeyPatch) -> None:
    config = _stage_config(tmp_path)
    results = Path(config["results_dir"])
    _write_prepared(results, "toy")
    small = az.from_dict(posterior={"exponent": np.zeros((1, 5))})

    def fake_fit(model, **kwargs):
        return small

    def half_write(self, filename, **kwargs):
        Path(filename).write_bytes(b"half a file")
        msg = "disk full"
        raise OSError(msg)

    monkeypatch.setattr(fitting, "fit_model", fake_fit)
    monkeypatch.setattr(az.InferenceData, "to_netcdf", half_write)
    with pytest.raises(OSError, match="disk full"):
        fit_dataset_model(config, "toy", "pooled")
    folder = results / "toy" / "pooled"
    assert not (folder / "posterior.nc").exists()
    assert list(folder.iterdir()) == []


def test_missing_prepared_table_is_a_user_error(tmp_path: Path) -> None:
    config = _stage_config(tmp_path)
    with pytest.raises(UserError, match="allolaw prepare"):
        fit_dataset_model(config, "toy", "pooled")


@pytest.mark.parametrize(("rows_are", "warned"), [("individuals", True),
                                                  ("species_values", False)])
def test_fit_of_individuals_without_a_species_term_records_the_warning(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch, caplog: pytest.LogCaptureFixture,
        rows_are: str, warned: bool) -> None:
    # The prepared set says its rows are individuals (family stands in for the species level
    # here); the pooled spec has no term there, so the fit logs the warning and keeps it in
    # the posterior's attributes, where the check stage reads it.
    config = _stage_config(tmp_path)
    results = Path(config["results_dir"])
    _write_prepared(results, "toy")
    prepared_file = results / "toy" / "prepared.json"
    prepared = json.loads(prepared_file.read_text(encoding="utf-8"))
    prepared["rows_are"] = rows_are
    prepared_file.write_text(json.dumps(prepared), encoding="utf-8")
    write_manifest(results, "toy", inputs=[], config_sha256=None)
    monkeypatch.setattr(fitting, "fit_model", lambda model, **kwargs: az.from_dict(
        posterior={"exponent": np.zeros((1, 5))}))
    idata = fit_dataset_model(config, "toy", "pooled")
    recorded = json.loads(idata.attrs["warnings"])
    assert bool(recorded) is warned
    if warned:
        assert "'family'" in recorded[0]
        assert any("rows_are: individuals" in r.getMessage() for r in caplog.records)
