"""A dataset's tree at the prepare stage: species matched, missing ones dropped, tips pruned."""

import hashlib
import json
from pathlib import Path

import pandas as pd
import pytest

from allolaw.config import validate_config
from allolaw.errors import UserError
from allolaw.intake import prepare_dataset, read_clean, read_prepared
from allolaw.model.phylo_terms import load_phylogeny
from allolaw.paths import ledger_path, manifest_path, tree_path
from allolaw.phylogeny import tree_covariance

TABLE = """species,family,mass,rate
Sorex alpha,Soricidae,10,0.1
Sorex alpha,Soricidae,20,0.2
Sorex beta,Soricidae,5,0.05
Mus gamma,Muridae,30,0.3
Mus delta,Muridae,40,0.35
"""
# invented tree: Mus delta is not a tip, Rattus x has no data
TREE = "((Sorex_alpha:1,Sorex_beta:1):2,(Mus_gamma:1.5,Rattus_x:1):1.5);\n"


def _prepare(tmp_path: Path, **dataset) -> Path:
    table = tmp_path / "t.csv"
    table.write_text(TABLE, encoding="utf-8")
    tree = tmp_path / "t.nwk"
    tree.write_text(TREE, encoding="utf-8")
    source = {"file": str(table), "units": {"size": "g", "trait": "W"},
              "columns": {"species": "species", "size": "mass", "trait": "rate",
                          "levels": ["family"]}}
    ds = {"sources": [source], "size": {"quantity": "mass", "unit": "g"},
          "trait": {"quantity": "power", "unit": "W"}, "models": ["pooled"],
          "tree": str(tree), **dataset}
    results = tmp_path / "results"
    prepare_dataset(validate_config({"results_dir": str(results), "datasets": {"d": ds}}), "d")
    return results


def test_species_not_in_the_tree_are_dropped_with_a_ledger_reason_and_extra_tips_pruned(
        tmp_path):
    results = _prepare(tmp_path)
    clean = read_clean(results, "d")
    assert clean["species"].tolist() == ["Mus gamma", "Sorex alpha", "Sorex beta"]
    ledger = pd.read_csv(ledger_path(results, "d"), keep_default_na=False)
    dropped = ledger[ledger["fate"] == "dropped"]
    assert dropped["line"].tolist() == [6]
    assert dropped["reason"].iloc[0].startswith("species not a tip of the tree")
    prepared = read_prepared(results, "d")
    assert prepared["counts"]["dropped"] == 1
    record = prepared["tree"]
    assert record["species_not_in_tree"] == ["Mus delta"]
    assert record["pruned_tips"] == ["Rattus_x"]
    assert record["sha256"] == hashlib.sha256(TREE.encode()).hexdigest()
    manifest = json.loads(manifest_path(results, "d").read_text())
    assert {"file": str(tmp_path / "t.nwk"), "sha256": record["sha256"]} in (
        manifest["inputs"]["files"])
    assert "tree.nwk" in manifest["outputs"]


def test_the_pruned_tree_keeps_the_shared_branch_lengths_of_the_kept_species(tmp_path):
    results = _prepare(tmp_path)
    species = read_clean(results, "d")["species"].tolist()
    tree = load_phylogeny(tree_path(results, "d"), species)
    # by hand from TREE: heights 3 (Sorex), 3 (Mus gamma, root stem kept); Sorex pair share 2;
    # the tree is divided by its height 3 (model/phylo_terms.scale_to_unit_height)
    want = [[3, 0, 0], [0, 3, 2], [0, 2, 3]]
    assert tree_covariance(tree).tolist() == pytest.approx((pd.DataFrame(want) / 3).values)


def test_missing_species_with_stop_is_a_user_error_naming_the_tree_and_species(tmp_path):
    with pytest.raises(UserError, match=r"tree: .*t\.nwk: 1 species not in the tree: 'Mus delta'"):
        _prepare(tmp_path, missing_species="stop")


def test_an_edited_tree_file_makes_the_readers_refuse_the_prepared_set(tmp_path):
    results = _prepare(tmp_path)
    (tmp_path / "t.nwk").write_text(TREE.replace("1.5", "2.5"), encoding="utf-8")
    with pytest.raises(UserError, match=r"t\.nwk: the input file has changed"):
        read_clean(results, "d")
