"""Tests of the report's shared-ancestry part (allolaw.report.ancestry), on hand-built draws.

Nothing here runs MCMC: posteriors are InferenceData built from known draws, trees come from
allolaw's seeded generator (invented), and the tip order is checked against TreeSwift's own
traversal of the same Newick file.
"""

from __future__ import annotations

import json
import re

import arviz as az
import numpy as np
import pandas as pd
import pytest
import treeswift

from allolaw.model.phylo_terms import scale_to_unit_height, simulate_residuals
from allolaw.phylogeny import random_tree, write_newick
from allolaw.report.ancestry import (
    MAX_BINS,
    ancestry_section,
    residual_strip_svg,
    tree_order_residuals,
)

N_SPECIES = 40
REF = 1.5


def _fit(species, log_size, *, shared_ancestry, seed, lam=None, exponent_sd=0.05):
    rng = np.random.default_rng(seed)
    chains, draws = 2, 300
    post = {"intercept": rng.normal(0.2, 0.01, (chains, draws)),
            "exponent": rng.normal(0.75, exponent_sd, (chains, draws)),
            "sigma": np.abs(rng.normal(0.3, 0.01, (chains, draws)))}
    if lam is not None:
        post["ancestry_signal"] = lam.reshape(chains, draws)
    spec = {"shared_ancestry": shared_ancestry,
            "priors": {"ancestry_signal": {"alpha": 1.0, "beta": 1.0}}}
    idata = az.from_dict(
        posterior=post,
        constant_data={"log_size_obs": log_size, "log_size_ref": np.array(REF)},
        coords={"species": species}, dims={"log_size_obs": ["species"]},
        attrs={"spec": json.dumps(spec)},
    )
    return idata


@pytest.fixture
def tree_case(tmp_path):
    phylo = random_tree(N_SPECIES, seed=3, ultrametric=True)
    path = tmp_path / "tree.nwk"
    path.write_text(write_newick(phylo) + "\n")
    rng = np.random.default_rng(4)
    log_size = rng.normal(REF, 1.0, N_SPECIES)
    resid = simulate_residuals(0.4, 1.0, scale_to_unit_height(phylo), rng=rng)
    clean = pd.DataFrame({"species": list(phylo.species), "log_size": log_size,
                          "log_trait": 0.2 + 0.75 * (log_size - REF) + resid,
                          "order": [f"O{i % 3}" for i in range(N_SPECIES)]})
    return phylo, path, clean


def test_residuals_follow_the_tip_order_of_treeswift_and_equal_data_minus_law(tree_case):
    phylo, path, clean = tree_case
    idata = _fit(list(phylo.species), clean["log_size"].to_numpy(), shared_ancestry="signal",
                 seed=1)
    out = tree_order_residuals(idata, clean.set_index("species")["log_trait"], path)
    leaves = [leaf.label for leaf in treeswift.read_tree_newick(path.read_text()).
              traverse_leaves()]
    assert list(out.index) == leaves
    post = idata.posterior
    a, b = post["intercept"].values.reshape(-1), post["exponent"].values.reshape(-1)
    by_name = clean.set_index("species")
    expected = [np.mean(by_name.loc[s, "log_trait"] - a - b * (by_name.loc[s, "log_size"] - REF))
                for s in leaves]
    np.testing.assert_allclose(out.to_numpy(), expected, atol=1e-12)


def test_strip_of_10000_species_has_at_most_max_bins_cells_holding_bin_means():
    rng = np.random.default_rng(0)
    values = rng.normal(size=10_000)
    groups = [f"clade {i // 2500}" for i in range(10_000)]
    svg = residual_strip_svg(values, groups)
    cells = re.findall(r"species (\d+)–(\d+): mean departure ([+-][0-9.]+)", svg)
    assert len(cells) == MAX_BINS
    first, last = cells[0], cells[-1]
    assert int(first[0]) == 1
    assert int(last[1]) == 10_000
    lo, hi = int(first[0]) - 1, int(first[1])
    assert float(first[2]) == pytest.approx(values[lo:hi].mean(), abs=5e-4)
    assert len(svg) < 120_000


def test_strip_of_few_species_has_one_cell_per_species_named_on_hover():
    svg = residual_strip_svg(np.array([0.1, -0.2, 0.3]), None, names=["A b", "C d", "E <f>"])
    assert re.findall(r"<title>(.*?) departure", svg) == ["A b", "C d", "E &lt;f&gt;"]


def test_one_outlier_does_not_pale_the_strip():
    values = np.r_[np.linspace(-0.2, 0.2, 99), 5.0]
    svg = residual_strip_svg(values, None)
    fills = re.findall(r'fill="(#[0-9a-f]{6})"><title>', svg)
    # the 95th percentile of |values| sets full colour: the second-largest cells are saturated
    assert fills[-2] == "#d55e00"
    assert fills[-1] == "#d55e00"


def test_section_compares_lambda_with_its_uniform_prior_and_the_exponent_without_the_tree(
        tree_case):
    phylo, path, clean = tree_case
    species, log_size = list(phylo.species), clean["log_size"].to_numpy()
    lam = np.random.default_rng(2).beta(8, 3, 600)
    fits = {"plain": _fit(species, log_size, shared_ancestry="none", seed=5, exponent_sd=0.02),
            "tree": _fit(species, log_size, shared_ancestry="signal", seed=6, lam=lam,
                         exponent_sd=0.04)}
    out = ancestry_section(fits, "plain", ["plain", "tree"], clean, ["order"], path)
    assert [e["model"] for e in out] == ["tree"]
    rows = out[0]["signal"]["rows"]
    assert rows[0]["q50"] == pytest.approx(np.median(lam))
    # beta(1, 1) is uniform on [0, 1]: its quantiles are the probabilities (closed form)
    assert (rows[1]["q05"], rows[1]["q50"], rows[1]["q95"]) == pytest.approx((0.05, 0.5, 0.95))
    ex = out[0]["exponents"]
    assert [r["what"] for r in ex] == ["without the tree", "with the tree"]
    assert ex[1]["sd_ratio"] == pytest.approx(ex[1]["sd"] / ex[0]["sd"])
    assert 1.5 < ex[1]["sd_ratio"] < 2.5
    assert out[0]["strip"]["n"] == N_SPECIES
    # residuals simulated by Brownian motion along the tree: neighbours in tree order are alike
    assert out[0]["strip"]["neighbour_correlation"] > 0.3


def test_section_is_empty_without_a_model_with_shared_ancestry(tree_case):
    phylo, path, clean = tree_case
    fits = {"plain": _fit(list(phylo.species), clean["log_size"].to_numpy(),
                          shared_ancestry="none", seed=5)}
    assert ancestry_section(fits, "plain", ["plain"], clean, ["order"], path) == []


def test_missing_tree_is_said_on_the_page_not_hidden(tree_case, tmp_path):
    phylo, _, clean = tree_case
    fits = {"tree": _fit(list(phylo.species), clean["log_size"].to_numpy(),
                         shared_ancestry="full", seed=6)}
    out = ancestry_section(fits, "tree", ["tree"], clean, ["order"], tmp_path / "none.nwk")
    assert out[0]["strip"] is None
    assert "missing" in out[0]["notes"][0]
    assert out[0]["signal"]["fixed"] == 1.0
