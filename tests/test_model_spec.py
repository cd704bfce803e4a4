"""Model specs: the demo specs are valid, bad specs name the file and key, defaults fill in."""

from pathlib import Path

import pytest
import yaml

from allolaw.config import load_config
from allolaw.errors import UserError
from allolaw.model.describing import describe_spec
from allolaw.model.spec import load_spec, parse_spec

REPO = Path(__file__).resolve().parents[1]
MODELS = REPO / "models"


def _write(tmp_path: Path, name: str, body: dict) -> Path:
    path = tmp_path / f"{name}.yaml"
    path.write_text(yaml.safe_dump(body), encoding="utf-8")
    return path


def test_every_model_named_in_the_demo_config_has_a_valid_spec():
    config = load_config(REPO / "config" / "config.yaml")
    names = {m for d in config["datasets"].values() for m in d["models"]}
    for name in sorted(names):
        spec = load_spec(MODELS, name)
        assert spec.name == name
        assert set(spec.priors["exponent"]) == {"mean", "sd"}


def test_demo_specs_say_what_their_names_promise():
    taxa_errors = load_spec(MODELS, "taxa_errors")
    assert taxa_errors.size_error == "replicates"
    assert taxa_errors.trait_error == "replicates"
    assert taxa_errors.taxa["vary"] == ["intercept", "exponent"]
    assert load_spec(MODELS, "taxa_errors_curved").curvature == "shared"
    assert load_spec(MODELS, "taxa_errors_curved_by_taxon").curvature == "shared_and_taxa"
    brk = load_spec(MODELS, "breakpoint")
    assert brk.breakpoint == "one"
    assert brk.taxa["vary"] == ["intercept"]
    assert load_spec(MODELS, "pooled").taxa["levels"] == "none"
    assert load_spec(MODELS, "pooled_robust").residuals == "student_t"


def test_unknown_key_is_a_user_error_naming_file_and_key(tmp_path):
    path = _write(tmp_path, "bad", {"taxa": {"levels": "all", "slopes": True}})
    with pytest.raises(UserError) as err:
        load_spec(tmp_path, "bad")
    assert str(path) in str(err.value)
    assert "taxa.slopes" in str(err.value)


def test_unknown_top_level_key_is_named(tmp_path):
    _write(tmp_path, "bad", {"curvatures": "shared"})
    with pytest.raises(UserError, match="unknown key 'curvatures'"):
        load_spec(tmp_path, "bad")


def test_bad_value_is_a_user_error_naming_key_and_value(tmp_path):
    path = _write(tmp_path, "bad", {"size_error": "sometimes"})
    with pytest.raises(UserError) as err:
        load_spec(tmp_path, "bad")
    message = str(err.value)
    assert str(path) in message
    assert "'size_error'" in message
    assert "sometimes" in message


def test_bad_taxa_levels_value_lists_the_choices(tmp_path):
    _write(tmp_path, "bad", {"taxa": {"levels": "most"}})
    with pytest.raises(UserError, match=r"taxa\.levels.*'most'.*innermost"):
        load_spec(tmp_path, "bad")


def test_bad_prior_value_names_the_nested_key(tmp_path):
    _write(tmp_path, "bad", {"priors": {"exponent": {"mean": 0.75, "sd": -1}}})
    with pytest.raises(UserError, match=r"priors\.exponent\.sd"):
        load_spec(tmp_path, "bad")


def test_ratio_errors_need_both_axes(tmp_path):
    _write(tmp_path, "bad", {"size_error": "ratio"})
    with pytest.raises(UserError, match="trait_error"):
        load_spec(tmp_path, "bad")


def test_ratio_mode_with_an_uncertain_ratio_is_refused_naming_file_and_key(tmp_path):
    _write(tmp_path, "bad", {"size_error": "ratio", "trait_error": "ratio",
                             "priors": {"error_ratio": {"value": 2.0, "log_sd": 0.5}}})
    with pytest.raises(UserError, match=r"bad\.yaml.*'priors\.error_ratio\.log_sd'.*0\.5"):
        load_spec(tmp_path, "bad")
    _write(tmp_path, "good", {"size_error": "ratio", "trait_error": "ratio"})
    spec = load_spec(tmp_path, "good")
    assert spec.priors["error_ratio"] == {"value": 1.0, "log_sd": 0}
    assert "no scatter about the law beyond measurement error" in describe_spec(spec)


def test_methods_text_says_how_the_true_sizes_are_modelled_without_overstating():
    nested = describe_spec(load_spec(MODELS, "taxa_errors"))
    assert "each taxon's mean size is normal around its parent's" in nested
    assert "taken as exact" in nested
    assert "not diluted" not in nested
    pooled = describe_spec(parse_spec({"size_error": "replicates", "taxa": {"levels": "none"}},
                                      name="p"))
    assert "one normal population" in pooled


def test_missing_spec_lists_known_specs(tmp_path):
    _write(tmp_path, "pooled", {})
    with pytest.raises(UserError, match="known specs: pooled"):
        load_spec(tmp_path, "nothere")


def test_partial_prior_keeps_the_default_of_the_other_entry():
    spec = parse_spec({"priors": {"exponent": {"mean": 0.75, "sd": 0.1}, "intercept": {"sd": 2}}},
                      name="p")
    assert spec.priors["exponent"] == {"mean": 0.75, "sd": 0.1}
    assert spec.priors["intercept"] == {"mean": "auto", "sd": 2}
    assert spec.priors["sigma"] == {"sd": 1.0}


def test_fixed_sigma_does_not_gain_a_default_scale():
    spec = parse_spec({"priors": {"sigma": {"fixed": 0.3}}}, name="p")
    assert spec.priors["sigma"] == {"fixed": 0.3}


def test_spec_round_trips_through_to_dict():
    spec = load_spec(MODELS, "taxa_errors_curved_by_taxon")
    again = parse_spec({k: v for k, v in spec.to_dict().items() if k != "name"}, name=spec.name)
    assert again == spec


def test_description_names_the_terms_of_the_model():
    text = describe_spec(load_spec(MODELS, "taxa_errors_curved_by_taxon"))
    assert "latent" in text
    assert "own curvature" in text
    assert "normal(1, 1)" in text
    robust = describe_spec(load_spec(MODELS, "pooled_robust"))
    assert "Student-t" in robust
    assert "share one law" in robust


def test_cost_rank_grows_with_each_block_of_parameters():
    # The workflow starts fits in descending cost rank (longest job first); each added block
    # of parameters must raise the rank. The shipped specs, simplest to richest.
    chain = ["pooled", "taxa", "taxa_errors", "taxa_errors_curved", "taxa_errors_curved_by_taxon"]
    ranks = [load_spec(MODELS, name).cost_rank for name in chain]
    assert ranks == sorted(set(ranks))
    assert load_spec(MODELS, "taxa_robust").cost_rank > load_spec(MODELS, "taxa").cost_rank
    assert load_spec(MODELS, "breakpoint").cost_rank > load_spec(MODELS, "pooled").cost_rank
