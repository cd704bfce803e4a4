"""The prepare stage with quantities outside mass and power: any unit pint knows, one dimension."""

import math
from pathlib import Path

import pytest

from allolaw.config import validate_config
from allolaw.errors import UserError
from allolaw.intake import prepare_dataset, read_clean, read_prepared

# Invented rows (not real measurements): maximum running speed against body mass.
SPEED = """species,family,mass,speed,speed_unit
Vulpes a,Canidae,4000,36,km/h
Vulpes b,Canidae,5000,10,m/s
Felis c,Felidae,3000,48,km/h
Felis d,Felidae,6000,12.5,m/s
"""


def _config(tmp_path: Path, text: str, *, size: dict, trait: dict, source: dict) -> dict:
    path = tmp_path / "run.csv"
    path.write_text(text, encoding="utf-8")
    src = {
        "file": str(path),
        "columns": {"species": "species", "size": "mass", "trait": "speed",
                    "levels": ["family"]},
    }
    src.update(source)
    ds = {"sources": [src], "size": size, "trait": trait, "models": ["pooled"]}
    return validate_config({"results_dir": str(tmp_path / "results"), "datasets": {"d": ds}})


def test_speed_in_km_per_hour_and_m_per_s_becomes_one_canonical_unit(tmp_path):
    config = _config(
        tmp_path, SPEED, size={"quantity": "mass", "unit": "kg"},
        trait={"quantity": "maximum running speed", "unit": "m/s"},
        source={"units": {"size": "g"}, "unit_columns": {"trait": "speed_unit"}},
    )
    prepare_dataset(config, "d")
    clean = read_clean(tmp_path / "results", "d").set_index("species")
    # SI Brochure, 9th ed. (BIPM 2019), Table 8: 1 km/h = 1/3.6 m/s, so 36 km/h = 10 m/s.
    assert clean.loc["Vulpes a", "log_trait"] == pytest.approx(math.log(36 / 3.6), rel=1e-12)
    assert clean.loc["Vulpes b", "log_trait"] == pytest.approx(math.log(10.0), rel=1e-12)
    assert clean.loc["Felis c", "log_size"] == pytest.approx(math.log(3.0), rel=1e-12)
    prepared = read_prepared(tmp_path / "results", "d")
    factors = {(c["from"], c["to"]): c["factor"] for c in prepared["conversions"]}
    assert factors[("km/h", "m/s")] == pytest.approx(1 / 3.6, rel=1e-12)


def test_speed_column_declared_against_a_mass_unit_names_file_column_and_both_units(tmp_path):
    config = _config(
        tmp_path, SPEED, size={"quantity": "mass", "unit": "g"},
        trait={"quantity": "mass", "unit": "g"},
        source={"units": {"size": "g"}, "unit_columns": {"trait": "speed_unit"}},
    )
    with pytest.raises(UserError) as info:
        prepare_dataset(config, "d")
    message = str(info.value)
    assert "run.csv" in message
    assert "column 'speed_unit'" in message
    assert "'km/h'" in message
    assert "canonical unit 'g'" in message


def test_free_text_quantity_refuses_a_source_unit_of_another_dimension(tmp_path):
    config = _config(
        tmp_path, SPEED, size={"quantity": "body mass", "unit": "g"},
        trait={"quantity": "stride frequency", "unit": "Hz"},
        source={"units": {"size": "g"}, "unit_columns": {"trait": "speed_unit"}},
    )
    with pytest.raises(UserError, match=r"'km/h' measures .*canonical unit 'Hz'"):
        prepare_dataset(config, "d")


def test_frequency_per_minute_becomes_hertz(tmp_path):
    text = "species,family,mass,speed\nA a,F,10,120\nA b,F,20,90\nB c,G,30,60\n"
    config = _config(
        tmp_path, text, size={"quantity": "mass", "unit": "g"},
        trait={"quantity": "frequency", "unit": "Hz"},
        source={"units": {"size": "g", "trait": "1/min"}},
    )
    prepare_dataset(config, "d")
    clean = read_clean(tmp_path / "results", "d").set_index("species")
    # SI Brochure, 9th ed. (BIPM 2019): 1 min = 60 s, so 120 per minute = 2 Hz.
    assert clean.loc["A a", "log_trait"] == pytest.approx(math.log(2.0), rel=1e-12)
