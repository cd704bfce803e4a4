"""The invented tree of the demo's island survey: its shape follows the taxonomy in the files.

Checked on the committed files with TreeSwift (the tree library allolaw reads trees with),
independently of the generator's own tree code.
"""

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import treeswift

from allolaw.demo_tree import ROOT_AGE, island_tree

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "data" / "demo"
TREE = DEMO / "island_metabolism_tree.nwk"


@pytest.fixture(scope="module")
def survey():
    a = pd.read_csv(DEMO / "island_metabolism_team_a.csv", dtype=str, keep_default_na=False)
    b = pd.read_csv(DEMO / "island_metabolism_team_b.tsv", sep="\t", dtype=str,
                    keep_default_na=False)
    rows = pd.concat([a, b])
    rows = rows[rows["family"] != ""]  # the blemish with an empty family
    return rows[["species", "order", "family"]].drop_duplicates()


@pytest.fixture(scope="module")
def tree():
    return treeswift.read_tree_newick(TREE.read_text())


def test_tree_tips_are_exactly_the_survey_species(survey, tree):
    tips = sorted(leaf.label.replace("_", " ") for leaf in tree.traverse_leaves())
    assert tips == sorted(survey["species"].unique())


@pytest.mark.parametrize("level", ["order", "family"])
def test_every_order_and_family_is_one_clade_of_the_tree(survey, tree, level):
    for taxon, group in survey.groupby(level):
        labels = {s.replace(" ", "_") for s in group["species"]}
        if len(labels) == 1:
            continue
        crown = tree.mrca(labels)
        below = {leaf.label for leaf in crown.traverse_leaves()}
        assert below == labels, (level, taxon)


def test_genera_are_clades_and_the_tree_is_ultrametric_at_the_root_age(survey, tree):
    for genus, group in survey.groupby(survey["species"].str.split(" ").str[0]):
        labels = {s.replace(" ", "_") for s in group["species"]}
        if len(labels) > 1:
            assert {leaf.label for leaf in tree.mrca(labels).traverse_leaves()} == labels, genus
    depths = np.array(list(tree.distances_from_root(internal=False)), dtype=object)[:, 1]
    assert np.allclose(depths.astype(float), ROOT_AGE, atol=1e-3)


def test_truth_names_the_tree_and_the_lambda_of_its_residuals():
    truth = json.loads((DEMO / "truth.json").read_text())["island_metabolism"]
    sa = truth["shared_ancestry"]
    assert sa["tree_file"] == TREE.name
    lam = sa["tree_sd"] ** 2 / (sa["tree_sd"] ** 2 + sa["independent_sd"] ** 2)
    assert sa["signal_lambda_beyond_taxon_shifts"] == pytest.approx(lam)
    assert sa["independent_sd"] == truth["sigma"]


def test_tree_residuals_have_the_brownian_variance_at_the_tips():
    # Brownian motion along a tree of unit height: each tip's residual has variance sd²
    # (Felsenstein 1985); over many seeded trees of a 60-species survey the pooled variance of
    # the tip residuals is sd² within its sampling error.
    species = [{"species": f"G{g}{'ab'[k % 2]} s{k}", "order": f"O{g % 2}", "family": f"F{g}"}
               for g in range(6) for k in range(10)]
    values = []
    for seed in range(300):
        out = island_tree(species, rng=np.random.default_rng(seed), sd=0.2,
                          independent_sd=0.1, file="t.nwk")
        values.append(next(iter(out.residual.values())))
    assert np.var(values) == pytest.approx(0.04, rel=0.25)
