"""``rows_are: individuals``: one row per individual, the species as the innermost level."""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import pytest

from allolaw.config import validate_config
from allolaw.intake import prepare_dataset, read_clean, read_prepared
from allolaw.paths import ledger_path
from allolaw.testing.individuals import write_individuals_csv

SMALL = """species,genus,mass,rate
Mus a,Mus,10,0.1
Mus a,Mus,12,0.11
Mus b,Mus,20,0.2

Sorex c,Sorex,5,0.05
Sorex c,Sorex,NA,0.06
"""


def _config(tmp_path: Path, path: Path, columns: dict | None = None) -> dict:
    source = {"file": str(path),
              "columns": columns or {"species": "species", "size": "mass", "trait": "rate",
                                     "levels": ["genus"]},
              "units": {"size": "g", "trait": "W"}}
    ds = {"sources": [source], "rows_are": "individuals",
          "size": {"quantity": "mass", "unit": "g"},
          "trait": {"quantity": "power", "unit": "W"}, "models": ["taxa"]}
    return validate_config({"results_dir": str(tmp_path / "results"), "datasets": {"d": ds}})


def test_individuals_stay_one_row_each_with_species_as_innermost_level(tmp_path):
    path = tmp_path / "ind.csv"
    path.write_text(SMALL, encoding="utf-8")
    prepare_dataset(_config(tmp_path, path), "d")
    results = tmp_path / "results"
    clean = read_clean(results, "d")
    prepared = read_prepared(results, "d")
    ledger = pd.read_csv(ledger_path(results, "d"), keep_default_na=False)
    assert prepared["rows_are"] == "individuals"
    assert prepared["levels"] == ["genus", "species_level"]
    assert prepared["level_columns"] == ["genus", "species"]
    assert sorted(clean["species"]) == ["Mus a #1", "Mus a #2", "Mus b #1", "Sorex c #1"]
    assert clean.set_index("species").loc["Mus a #2", "species_level"] == "Mus a"
    assert (clean["n_rows"] == 1).all()
    # No replicate-SD step: no species value is made from replicates, nothing is pooled.
    assert set(clean["sd_source_size"]) == {"none"}
    assert clean["within_sd_log_size"].isna().all()
    assert list(ledger["fate"]) == ["kept", "kept", "kept", "kept", "dropped"]
    assert (ledger["merged_into"] == "").all()
    assert prepared["counts"]["merged"] == 0


def test_a_level_called_species_with_individuals_is_refused_nowhere(tmp_path):
    # The species column itself is the innermost level; an outer level keeps its name.
    path = tmp_path / "ind.csv"
    path.write_text(SMALL.replace("species,genus", "taxon,genus"), encoding="utf-8")
    columns = {"species": "taxon", "size": "mass", "trait": "rate", "levels": ["genus"]}
    prepare_dataset(_config(tmp_path, path, columns), "d")
    prepared = read_prepared(tmp_path / "results", "d")
    assert prepared["levels"] == ["genus", "taxon"]


@pytest.mark.slow
def test_ledger_accounts_for_every_line_of_100000_individuals(tmp_path):
    # Invented data (allolaw.testing.individuals); measured: about 20 s on a loaded machine.
    path = write_individuals_csv(tmp_path / "big.csv", n_rows=100_000, seed=1)
    columns = {"species": "species", "size": "mass_g", "trait": "rate_w", "levels": ["genus"]}
    prepare_dataset(_config(tmp_path, path, columns), "d")
    results = tmp_path / "results"
    ledger = pd.read_csv(ledger_path(results, "d"), keep_default_na=False)
    prepared = read_prepared(results, "d")
    with path.open("rb") as handle:
        physical = sum(1 for _ in handle)
    source = prepared["sources"][0]
    assert source["physical_lines"] == physical
    assert 1 + source["blank_lines_ignored"] + len(ledger) == physical
    assert len(ledger) == 100_000
    assert (ledger["fate"] == "kept").all()
    assert len(read_clean(results, "d")) == 100_000
    assert ledger["species"].is_unique


@pytest.mark.mcmc
# The JAX-compiled parts of the fit drop a shape assertion of the taxon terms and say so; the
# shapes are fixed by the data here, so the warning is expected.
@pytest.mark.filterwarnings("ignore:Skipping Assert:UserWarning")
def test_individuals_fit_with_species_as_innermost_level_and_a_within_exponent(tmp_path):
    from allolaw.model.fitting import fit_dataset_model

    path = write_individuals_csv(tmp_path / "ind.csv", n_rows=60, per_species=6, seed=2)
    columns = {"species": "species", "size": "mass_g", "trait": "rate_w", "levels": ["genus"]}
    config = _config(tmp_path, path, columns)
    config["models_dir"] = str(Path(__file__).resolve().parents[1] / "models")
    config["sampler"].update(chains=2, draws=100, warmup=100, prior_draws=20, seed=4,
                             extension_draws=0)  # shapes only: no chain extension
    config["datasets"]["d"]["models"] = ["individuals_within"]
    prepare_dataset(config, "d")
    idata = fit_dataset_model(config, "d", "individuals_within")
    assert idata.posterior["taxon_intercept__species_level"].shape[-1] == 10
    assert idata.posterior["within_exponent"].shape[:2] == (2, 100)
    assert idata.observed_data.sizes["species"] == 60
