"""The invented demo data: reproducible, matching the config, carrying the truth it claims."""

import csv
import json
import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from allolaw.config import load_config
from allolaw.demo import DEFAULT_SEED, write_demo_data

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "data" / "demo"


@pytest.fixture(scope="module")
def regenerated(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo")
    return out, write_demo_data(out)


@pytest.fixture(scope="module")
def config():
    return load_config(ROOT / "config" / "config.yaml")


def _read(name: str) -> pd.DataFrame:
    sep = "\t" if name.endswith(".tsv") else ","
    return pd.read_csv(DEMO / name, sep=sep, dtype=str, keep_default_na=False)


def _numeric(frame: pd.DataFrame, *columns: str) -> pd.DataFrame:
    out = frame.copy()
    for c in columns:
        out[c] = pd.to_numeric(out[c], errors="coerce")
    return out.dropna(subset=list(columns))


def test_default_seed_reproduces_the_committed_files_byte_for_byte(regenerated):
    _, paths = regenerated
    assert [p.name for p in paths][-1] == "truth.json"
    for path in paths:
        assert path.read_bytes() == (DEMO / path.name).read_bytes(), path.name


def test_another_seed_gives_other_data(tmp_path):
    paths = write_demo_data(tmp_path, seed=DEFAULT_SEED + 1)
    different = [p.name for p in paths if p.read_bytes() != (DEMO / p.name).read_bytes()]
    assert len(different) == len(paths)


def test_demo_files_are_small():
    total = sum(p.stat().st_size for p in DEMO.iterdir())
    assert total < 200_000


def test_every_file_and_column_of_the_config_exists(config):
    for ds in config["datasets"].values():
        for source in ds["sources"]:
            path = ROOT / source["file"]
            assert path.is_file(), path
            delimiter = "\t" if path.suffix == ".tsv" else ","
            with path.open(encoding="utf-8", newline="") as handle:
                header = next(csv.reader(handle, delimiter=delimiter))
            cols = source["columns"]
            wanted = [cols["species"], cols["size"], cols["trait"], *cols["levels"],
                      *cols["covariates"], *source["unit_columns"].values()]
            assert set(wanted) <= set(header), (path, wanted, header)


def test_island_survey_has_the_promised_shape():
    a = _read("island_metabolism_team_a.csv")
    b = _read("island_metabolism_team_b.tsv")
    both = pd.concat([a, b])
    assert both["species"].nunique() >= 160
    assert both.loc[both["family"] != "", "family"].nunique() >= 8
    assert both["order"].nunique() >= 2
    assert set(b["mass_unit"]) == {"g", "kg"}
    assert set(b["rate_unit"]) == {"mW", "W"}
    assert len(set(a["species"]) & set(b["species"])) == 30


def test_island_replicates_are_one_to_four_per_species():
    a = _read("island_metabolism_team_a.csv")
    b = _read("island_metabolism_team_b.tsv")
    a = a[~a.duplicated(keep="first")]  # the exact-duplicate blemish is not a replicate
    rows = pd.concat([_numeric(a, "body_mass_g", "rmr_ml_o2_h"), _numeric(b, "mass", "rate")])
    rows = rows[(rows["family"] != "") & (pd.to_numeric(rows["body_mass_g"]).fillna(1) > 0)]
    counts = rows.groupby("species").size()
    assert counts.min() >= 1
    assert counts.max() <= 4


def test_island_truth_has_exponent_0_75_at_100_grams():
    truth = json.loads((DEMO / "truth.json").read_text())["island_metabolism"]
    assert truth["exponent"] == 0.75
    assert truth["reference_size"] == 100.0
    assert truth["log_reference_size"] == pytest.approx(math.log(100.0))
    family = truth["taxon_exponent"]["family"]
    assert len(family) >= 8
    # Family deviations are centred, so their mean is the population exponent.
    assert np.mean(list(family.values())) == pytest.approx(0.75, abs=1e-12)
    assert 0.01 < np.std(list(family.values()), ddof=1) < 0.12


def test_island_data_recover_the_exponent_by_least_squares():
    # Ordinary least squares on species means with family dummies (statsmodels OLS): the
    # within-family slope must sit near the known 0.75. Outside check on the generated files:
    # the truth written to truth.json is the truth the numbers carry.
    a = _numeric(_read("island_metabolism_team_a.csv"), "body_mass_g", "rmr_ml_o2_h")
    a = a[a["body_mass_g"] > 0]
    a["x"] = np.log(a["body_mass_g"])
    a["y"] = np.log(a["rmr_ml_o2_h"] * 20.1 / 3600)  # mL O2/h → W, 20.1 J/mL
    b = _numeric(_read("island_metabolism_team_b.tsv"), "mass", "rate")
    b["x"] = np.log(b["mass"] * np.where(b["mass_unit"] == "kg", 1000.0, 1.0))
    b["y"] = np.log(b["rate"] * np.where(b["rate_unit"] == "mW", 0.001, 1.0))
    rows = pd.concat([a, b[b["family"] != ""]])
    means = rows.groupby(["species", "family"], as_index=False)[["x", "y"]].mean()
    dummies = pd.get_dummies(means["family"], drop_first=True, dtype=float)
    design = pd.concat([means[["x"]], dummies], axis=1)
    fit = sm.OLS(means["y"], sm.add_constant(design)).fit()
    assert fit.params["x"] == pytest.approx(0.75, abs=3 * fit.bse["x"] + 0.01)
    assert fit.bse["x"] < 0.04


def _trees() -> pd.DataFrame:
    trees = _numeric(_read("tree_biomass.csv"), "diameter_cm", "mass_kg")
    trees = trees[trees["diameter_cm"] > 0].copy()
    trees["x"] = np.log(trees["diameter_cm"])
    trees["y"] = np.log(trees["mass_kg"])
    return trees


def test_trees_are_individuals_with_ids_several_per_species():
    raw = _read("tree_biomass.csv")
    assert raw["tree_id"].is_unique
    trees = _trees()
    assert trees["species"].nunique() >= 30
    assert trees["genus"].nunique() >= 5
    assert trees.groupby("species").size().min() >= 5
    medians = trees.groupby("genus")["diameter_cm"].median().sort_values()
    assert medians.iloc[-1] / medians.iloc[0] > 5


def test_tree_within_and_between_species_exponents_differ_as_the_truth_says():
    # Outside check with statsmodels OLS on the generated file: the within-species slope is the
    # fixed-effects slope (one dummy per species), the between-species slope the OLS slope of
    # species-mean log mass on species-mean log diameter (Mundlak 1978; van de Pol & Wright
    # 2009); truth.json says 2 and 8/3.
    truth = json.loads((DEMO / "truth.json").read_text())["tree_biomass"]
    assert truth["rows_are"] == "individuals"
    assert truth["within_exponent"] == 2.0
    assert truth["exponent"] == pytest.approx(8 / 3)
    trees = _trees()
    dummies = pd.get_dummies(trees["species"], drop_first=True, dtype=float)
    design = sm.add_constant(pd.concat([trees[["x"]], dummies], axis=1))
    within = sm.OLS(trees["y"], design).fit()
    assert within.params["x"] == pytest.approx(2.0, abs=3 * within.bse["x"])
    means = trees.groupby("species")[["x", "y"]].mean()
    between = sm.OLS(means["y"], sm.add_constant(means["x"])).fit()
    # the species means carry the species deviation (SD 0.08) and the within-species part of
    # their sampled trees, so a wider allowance than 3 SE: 0.1 (common practice, no source)
    assert between.params["x"] == pytest.approx(8 / 3, abs=3 * between.bse["x"] + 0.1)
    assert between.params["x"] - within.params["x"] > 0.5


def test_running_speed_is_in_km_per_h_and_recovers_one_sixth_in_m_per_s():
    # km/h → m/s divides by 3.6 (SI Brochure, 9th ed., 2019, Table 8); OLS with family dummies
    # on species means (statsmodels) recovers the truth's exponent 1/6.
    truth = json.loads((DEMO / "truth.json").read_text())["running_speed"]
    assert truth["canonical_units"] == {"size": "kg", "trait": "m/s"}
    assert truth["exponent"] == pytest.approx(1 / 6)
    runs = _numeric(_read("running_speed.csv"), "mass_kg", "speed_kmh")
    runs = runs[runs["mass_kg"] > 0]
    assert runs["species"].nunique() == 48
    runs["x"] = np.log(runs["mass_kg"])
    runs["y"] = np.log(runs["speed_kmh"] / 3.6)
    means = runs.groupby(["species", "family"], as_index=False)[["x", "y"]].mean()
    dummies = pd.get_dummies(means["family"], drop_first=True, dtype=float)
    fit = sm.OLS(means["y"], sm.add_constant(pd.concat([means[["x"]], dummies], axis=1))).fit()
    assert fit.params["x"] == pytest.approx(1 / 6, abs=3 * fit.bse["x"])
    # a species of 10 kg runs near exp(intercept) m/s: the file is in km/h, not m/s
    at_reference = fit.params["const"] + fit.params["x"] * truth["log_reference_size"]
    family_shifts = [v - truth["intercept"] for v in truth["taxon_intercept"]["family"].values()]
    first_family = sorted(truth["taxon_intercept"]["family"])[0]
    assert at_reference == pytest.approx(truth["taxon_intercept"]["family"][first_family],
                                         abs=3 * fit.bse["const"] + 0.05)
    assert np.mean(family_shifts) == pytest.approx(0.0, abs=1e-12)


def test_cell_law_breaks_at_the_stated_volume():
    truth = json.loads((DEMO / "truth.json").read_text())["cell_scaling"]
    assert truth["break_log_size"] == pytest.approx(math.log(truth["break_size"]))
    assert truth["exponent"] == 1.0
    assert truth["exponent_above"] == pytest.approx(2 / 3)
    cells = _numeric(_read("cell_scaling.csv"), "volume_um3", "uptake_amol_min")
    cells = cells[cells["volume_um3"] > 0]
    assert cells["strain"].nunique() >= 60
    assert cells["group"].nunique() == 3
    x = np.log(cells["volume_um3"].to_numpy())
    y = np.log(cells["uptake_amol_min"].to_numpy())
    slopes = []
    # Fit each side away from the break (±0.5 in ln volume), where side assignment is certain.
    for side in (x < truth["break_log_size"] - 0.5, x > truth["break_log_size"] + 0.5):
        fit = sm.OLS(y[side], sm.add_constant(x[side])).fit()
        slopes.append((fit.params[1], fit.bse[1]))
    (below, se_below), (above, se_above) = slopes
    assert below == pytest.approx(1.0, abs=4 * se_below + 0.02)
    assert above == pytest.approx(2 / 3, abs=4 * se_above + 0.02)


def test_truth_lists_the_blemishes_with_their_lines():
    truth = json.loads((DEMO / "truth.json").read_text())
    for dataset in ("island_metabolism", "tree_biomass", "cell_scaling", "running_speed"):
        blemishes = truth[dataset]["blemishes"]
        assert len(blemishes) >= 2
        for blemish in blemishes:
            lines = (DEMO / blemish["file"]).read_text(encoding="utf-8").split("\n")
            assert 2 <= blemish["line"] <= len(lines)
    kinds = " ".join(b["what"] for d in truth.values() if "blemishes" in d
                     for b in d["blemishes"])
    for word in ("'NA'", "mass 0", "duplicate", "slipped"):
        assert word in kinds
