"""The batch config: validation names the key, defaults come from the schema."""

from pathlib import Path

import pytest
import yaml

from allolaw.config import config_sha256, hypotheses_config, load_config, validate_config
from allolaw.errors import UserError

REPO = Path(__file__).resolve().parents[1]
DEMO_CONFIG = REPO / "config" / "config.yaml"


def _minimal() -> dict:
    return {
        "datasets": {
            "toy": {
                "sources": [
                    {"file": "toy.csv", "columns": {"species": "sp", "size": "m", "trait": "r"}}
                ],
                "size": {"quantity": "mass", "unit": "g"},
                "trait": {"quantity": "power", "unit": "W"},
                "models": ["pooled"],
            }
        }
    }


def test_demo_config_is_valid_and_filled_with_schema_defaults():
    config = load_config(DEMO_CONFIG)
    assert config["sampler"]["chains"] == 4
    assert config["datasets"]["cell_scaling"]["outliers"] == {"robust_z": 5, "remove": False}
    source = config["datasets"]["tree_biomass"]["sources"][0]
    assert source["delimiter"] == "auto"
    assert source["sd_scale"] == "original"


def test_defaults_fill_a_minimal_config():
    config = validate_config(_minimal())
    assert config["results_dir"] == "results"
    assert config["sampler"]["target_acceptance"] == 0.9
    names = [h["name"] for h in config["hypotheses"]["exponents"]]
    assert names == ["surface law", "metabolic law", "isometry"]
    assert config["datasets"]["toy"]["sources"][0]["columns"]["levels"] == []


def test_unknown_key_is_an_error_naming_the_key():
    config = _minimal()
    config["datasets"]["toy"]["colour"] = "red"
    with pytest.raises(UserError, match=r"key 'datasets\.toy'.*colour"):
        validate_config(config)


def test_wrong_type_is_an_error_naming_the_key():
    config = _minimal()
    config["sampler"] = {"chains": "four"}
    with pytest.raises(UserError, match=r"key 'sampler\.chains'"):
        validate_config(config)


@pytest.mark.parametrize(("old", "new"), [("tune", "warmup"),
                                           ("target_accept", "target_acceptance"),
                                           ("refit_target_accept", "refit_target_acceptance")])
def test_renamed_sampler_key_stops_with_the_new_name(tmp_path, old, new):
    path = tmp_path / "old.yaml"
    path.write_text(yaml.safe_dump({**_minimal(), "sampler": {old: 0.5}}))
    with pytest.raises(UserError, match=rf"old\.yaml: key 'sampler\.{old}'.*renamed.*"
                                        rf"'sampler\.{new}'"):
        load_config(path)
    with pytest.raises(UserError, match=rf"'sampler\.{new}'"):  # an override alike
        load_config(_write(tmp_path, _minimal()),
                    [f"sampler.{old}=0.5"])


def _write(tmp_path, config):
    path = tmp_path / "c.yaml"
    path.write_text(yaml.safe_dump(config))
    return path


def test_overrides_merge_nested_keys(tmp_path):
    path = tmp_path / "c.yaml"
    path.write_text(yaml.safe_dump(_minimal()))
    config = load_config(path, ["sampler.draws=200", 'sampler={"warmup": 150}'])
    assert config["sampler"]["draws"] == 200
    assert config["sampler"]["warmup"] == 150
    assert config["sampler"]["chains"] == 4


def test_later_config_files_win_key_by_key(tmp_path):
    base = tmp_path / "base.yaml"
    base.write_text(yaml.safe_dump(_minimal()))
    extra = tmp_path / "extra.yaml"
    extra.write_text("sampler:\n  draws: 123\n")
    config = load_config([base, extra])
    assert config["sampler"]["draws"] == 123
    assert "toy" in config["datasets"]


def test_missing_config_file_is_a_user_error(tmp_path):
    with pytest.raises(UserError, match="config file not found"):
        load_config(tmp_path / "nope.yaml")


def test_dataset_hypotheses_override_batch_hypotheses():
    config = load_config(DEMO_CONFIG)
    trees = hypotheses_config(config, "tree_biomass")
    assert [h["value"] for h in trees["exponents"]] == [2.0, 2.6667, 3.0]
    assert hypotheses_config(config, "island_metabolism")["interval_halfwidth"] == 0.03


def test_config_hash_is_stable_and_sensitive():
    a = validate_config(_minimal())
    b = validate_config(_minimal())
    assert config_sha256(a) == config_sha256(b)
    b["sampler"]["draws"] = 999
    assert config_sha256(a) != config_sha256(b)


def test_every_schema_property_has_a_description():
    from allolaw.config import load_schema

    missing = []

    def walk(node, where):
        if isinstance(node, dict):
            for key, sub in node.get("properties", {}).items():
                if isinstance(sub, dict) and "description" not in sub and "$ref" not in sub:
                    missing.append(f"{where}.{key}")
                walk(sub, f"{where}.{key}")
            for key in ("items", "additionalProperties"):
                if isinstance(node.get(key), dict):
                    walk(node[key], where)
            for key, sub in node.get("$defs", {}).items():
                walk(sub, key)

    walk(load_schema("config"), "")
    assert missing == []
