"""Column names are data: any name works for any role, through prepare and fit."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from allolaw.config import validate_config
from allolaw.intake import prepare_dataset, read_clean, read_prepared
from allolaw.model.builder import build_model
from allolaw.model.spec import load_spec

REPO = Path(__file__).resolve().parents[1]


def _table(header: list[str], seed: int = 3) -> str:
    # Invented rows with known truth (exponent 0.75): 2 families x 2 genera x 3 species.
    rng = np.random.default_rng(seed)
    lines = [",".join(header)]
    for g in range(4):
        for s in range(3):
            mass = float(np.exp(rng.uniform(0, 6)))
            rate = 0.1 * mass ** 0.75 * float(np.exp(rng.normal(0, 0.1)))
            lines.append(f"id{g}{s},Fam{g // 2},Gen{g},Gen{g} sp{s},{mass:.6g},{rate:.6g}")
    return "\n".join(lines) + "\n"


def _config(tmp_path: Path, header: list[str], columns: dict, *, sampler: dict | None = None,
            ) -> dict:
    path = tmp_path / "names.csv"
    path.write_text(_table(header), encoding="utf-8")
    ds = {
        "sources": [{"file": str(path), "columns": columns, "units": {"size": "g", "trait": "W"}}],
        "size": {"quantity": "mass", "unit": "g"},
        "trait": {"quantity": "power", "unit": "W"},
        "models": ["taxa"],
    }
    raw = {"results_dir": str(tmp_path / "results"), "models_dir": str(REPO / "models"),
           "datasets": {"d": ds}}
    if sampler:
        raw["sampler"] = sampler
    return validate_config(raw)


def _levels_and_model(config: dict, tmp_path: Path):
    prepare_dataset(config, "d")
    results = tmp_path / "results"
    clean = read_clean(results, "d")
    prepared = read_prepared(results, "d")
    spec = load_spec(REPO / "models", "taxa")
    model = build_model(clean, spec, levels=prepared["levels"],
                        log_reference_size=prepared["log_reference_size"])
    return clean, prepared, model


def test_level_called_species_with_an_id_column_as_unit_prepares_and_builds(tmp_path):
    header = ["id", "family", "genus", "species", "mass", "rate"]
    columns = {"species": "id", "size": "mass", "trait": "rate", "levels": ["genus", "species"]}
    clean, prepared, model = _levels_and_model(_config(tmp_path, header, columns), tmp_path)
    assert prepared["level_columns"] == ["genus", "species"]
    assert prepared["levels"] == ["genus", "species_level"]
    assert len(clean) == 12
    assert set(clean["species"]) == {f"id{g}{s}" for g in range(4) for s in range(3)}
    assert model.coords["species_level"] == tuple(sorted(set(clean["species_level"])))


def test_genus_used_as_the_observation_unit_and_non_ascii_level_names(tmp_path):
    header = ["id", "Familie_ö", "Gattung_ä", "Art", "Körpermasse", "Umsatz"]
    columns = {"species": "Gattung_ä", "size": "Körpermasse", "trait": "Umsatz",
               "levels": ["Familie_ö"]}
    clean, prepared, model = _levels_and_model(_config(tmp_path, header, columns), tmp_path)
    assert prepared["levels"] == ["Familie_ö"]
    assert set(clean["species"]) == {f"Gen{g}" for g in range(4)}
    assert clean["n_rows"].tolist() == [3, 3, 3, 3]
    assert model.coords["Familie_ö"] == ("Fam0", "Fam1")


@pytest.mark.mcmc
# The JAX-compiled parts of the fit drop a shape assertion of the taxon terms and say so; the
# shapes are fixed by the data here, so the warning is expected.
@pytest.mark.filterwarnings("ignore:Skipping Assert:UserWarning")
def test_level_called_species_fits_with_the_level_as_a_posterior_dimension(tmp_path):
    from allolaw.model.fitting import fit_dataset_model

    header = ["id", "family", "genus", "species", "mass", "rate"]
    columns = {"species": "id", "size": "mass", "trait": "rate", "levels": ["genus", "species"]}
    sampler = {"chains": 2, "draws": 100, "warmup": 100, "seed": 5, "prior_draws": 20,
               "extension_draws": 0}  # shapes only: no chain extension
    config = _config(tmp_path, header, columns, sampler=sampler)
    prepare_dataset(config, "d")
    idata = fit_dataset_model(config, "d", "taxa")
    assert "taxon_exponent__species_level" in idata.posterior
    taxa = idata.posterior["taxon_exponent__species_level"].coords["species_level"].values
    assert len(taxa) == 12
    assert idata.posterior["exponent"].shape[:2] == (2, 100)
