"""Shared ancestry in the model: spec option, tree likelihood, predictive draws, LOO values.

Data here are invented (random trees from the seeded generator, Brownian residuals with known
truth).
"""

from __future__ import annotations

import arviz as az
import numpy as np
import pymc as pm
import pytensor
import pytest
from pytensor.graph.traversal import ancestors
from scipy import stats

from allolaw.errors import UserError
from allolaw.model.builder import build_model
from allolaw.model.describing import describe_spec
from allolaw.model.phylo_terms import (
    add_ancestry_log_likelihood,
    scale_to_unit_height,
    simulate_residuals,
)
from allolaw.model.spec import parse_spec
from allolaw.phylogeny import random_tree, tree_covariance
from allolaw.testing import as_clean_table, quick_sample


def _dataset(n: int, *, seed: int, lam: float = 0.8, sigma: float = 0.4,
             exponent: float = 0.75):
    tree = scale_to_unit_height(random_tree(n, seed=seed))
    rng = np.random.default_rng(seed + 1)
    x = rng.normal(0.0, 1.5, n)
    y = 0.5 + exponent * x + simulate_residuals(sigma, lam, tree, rng=rng)
    return tree, as_clean_table(list(tree.species), x, y)


def _spec(**keys):
    return parse_spec({"taxa": {"levels": "none"}, **keys}, name="phylo")


def _pagel_cov(tree, sigma, lam):
    c = tree_covariance(tree)
    return sigma**2 * (lam * c + (1.0 - lam) * np.diag(np.diag(c)))


def test_spec_without_shared_ancestry_says_none_and_signal_gets_a_uniform_prior():
    assert _spec().shared_ancestry == "none"
    spec = _spec(shared_ancestry="signal")
    assert spec.priors["ancestry_signal"] == {"alpha": 1.0, "beta": 1.0}
    assert "Pagel's λ" in describe_spec(spec)
    assert spec.cost_rank > _spec().cost_rank


def test_a_fixed_ancestry_signal_takes_no_beta_parameters():
    spec = _spec(shared_ancestry="signal", priors={"ancestry_signal": {"fixed": 0}})
    assert spec.priors["ancestry_signal"] == {"fixed": 0}
    assert "fixed at 0" in describe_spec(spec)


@pytest.mark.parametrize(("keys", "words"), [
    ({"residuals": "student_t"}, "needs normal residuals"),
    ({"trait_error": "known"}, "trait_error 'known'"),
])
def test_shared_ancestry_with_unsupported_terms_is_refused(keys, words):
    with pytest.raises(UserError, match=words):
        _spec(shared_ancestry="full", **keys)


def test_ancestry_signal_outside_zero_to_one_is_refused():
    with pytest.raises(UserError, match="ancestry_signal"):
        _spec(shared_ancestry="signal", priors={"ancestry_signal": {"fixed": 1.5}})


def test_shared_ancestry_without_a_tree_is_a_user_error():
    _, data = _dataset(8, seed=1)
    with pytest.raises(UserError, match="needs the dataset's tree"):
        build_model(data, _spec(shared_ancestry="full"), levels=[], log_reference_size=0.0)


def test_trait_log_density_equals_the_dense_multivariate_normal():
    tree, data = _dataset(12, seed=2)
    model = build_model(data, _spec(shared_ancestry="signal"), levels=[],
                        log_reference_size=0.0, phylogeny=tree)
    a, b, sigma, lam = 0.3, 0.7, 0.5, 0.6
    point = {"intercept": a, "exponent": b, "sigma_log__": np.log(sigma),
             "ancestry_signal_logodds__": np.log(lam / (1 - lam))}
    got = model.compile_logp(vars=[model["trait"]])(point)
    mean = a + b * data["log_size"].to_numpy()
    # reference: scipy's dense normal with Pagel's covariance σ²(λC + (1 − λ)D) (Pagel 1999)
    want = stats.multivariate_normal(mean, _pagel_cov(tree, sigma, lam)).logpdf(
        data["log_trait"].to_numpy())
    assert got == pytest.approx(want, rel=1e-10)


def test_trait_log_density_graph_holds_no_species_by_species_matrix():
    tree, data = _dataset(300, seed=3)
    model = build_model(data, _spec(shared_ancestry="signal"), levels=[],
                        log_reference_size=0.0, phylogeny=tree)
    logp = model.logp(vars=[model["trait"]])
    grads = pytensor.grad(logp, model.value_vars)
    graph = ancestors([logp, *grads])
    assert all(v.type.ndim <= 1 for v in graph if hasattr(v.type, "ndim"))


def test_predictive_draws_have_the_tree_covariance():
    tree, data = _dataset(6, seed=4)
    spec = _spec(shared_ancestry="signal", priors={"sigma": {"fixed": 0.5},
                                                    "ancestry_signal": {"fixed": 0.6}})
    model = build_model(data, spec, levels=[], log_reference_size=0.0, phylogeny=tree)
    fixed = pm.do(model, {"intercept": 0.0, "exponent": 0.0})
    n_draws = 8000
    draws = pm.draw(fixed["trait"], draws=n_draws, random_seed=5)
    want = _pagel_cov(tree, 0.5, 0.6)
    got = np.cov(draws, rowvar=False)
    # SE of a sample covariance of normals: sqrt((Σii Σjj + Σij²) / N) (Anderson 2003, §3.4)
    se = np.sqrt((np.outer(np.diag(want), np.diag(want)) + want**2) / n_draws)
    assert np.all(np.abs(got - want) < 5 * se)
    assert np.abs(draws.mean(axis=0)).max() < 5 * np.sqrt(np.diag(want).max() / n_draws)


def test_loo_values_are_the_conditional_densities_of_each_species_given_the_others():
    tree, data = _dataset(10, seed=6)
    model = build_model(data, _spec(shared_ancestry="signal"), levels=[],
                        log_reference_size=0.0, phylogeny=tree)
    draws = {"intercept": [[0.4, 0.6]], "exponent": [[0.7, 0.8]], "sigma": [[0.3, 0.5]],
             "ancestry_signal": [[0.2, 0.9]]}
    idata = az.from_dict(posterior=draws)
    add_ancestry_log_likelihood(idata, model, "trait")
    got = idata.log_likelihood["trait"]
    assert got.dims == ("chain", "draw", "species")
    x, y = data["log_size"].to_numpy(), data["log_trait"].to_numpy()
    for k in range(2):
        r = y - draws["intercept"][0][k] - draws["exponent"][0][k] * x
        q = np.linalg.inv(_pagel_cov(tree, draws["sigma"][0][k], draws["ancestry_signal"][0][k]))
        # y_i | y_−i is normal, mean r_i − (Qr)_i / Q_ii, variance 1 / Q_ii (Bürkner, Gabry &
        # Vehtari 2020, eqs. 8-9)
        want = stats.norm(r - q @ r / np.diag(q), np.sqrt(1 / np.diag(q))).logpdf(r)
        np.testing.assert_allclose(got.values[0, k], want, rtol=1e-9)


@pytest.mark.mcmc
def test_phylogenetic_fit_recovers_exponent_and_signal_and_writes_pointwise_loo_values():
    from allolaw.model.sampling import fit_model

    tree, data = _dataset(60, seed=7, lam=0.8, exponent=0.75)
    spec = _spec(shared_ancestry="signal")
    model = build_model(data, spec, levels=[], log_reference_size=0.0, phylogeny=tree)
    idata = fit_model(model, chains=2, draws=300, warmup=300, seed=8, backend="numpyro",
                      prior_draws=50)
    post = idata.posterior
    assert abs(float(post["exponent"].mean()) - 0.75) < 0.1
    lo, hi = np.quantile(post["ancestry_signal"].values, [0.05, 0.95])
    assert lo <= 0.8 <= hi
    assert idata.log_likelihood["trait"].shape == (2, 300, 60)
    assert idata.posterior_predictive["trait"].shape == (2, 300, 60)
    assert np.isfinite(az.loo(idata).elpd_loo)


@pytest.mark.slow
@pytest.mark.mcmc
def test_exponent_with_full_ancestry_and_known_sigma_equals_phylogenetic_gls():
    sm = pytest.importorskip("statsmodels.api")
    tree, data = _dataset(40, seed=9, lam=1.0, sigma=0.3)
    flat = {"mean": 0.0, "sd": 1000.0}
    spec = _spec(shared_ancestry="full", priors={"sigma": {"fixed": 0.3}, "exponent": flat,
                                                 "intercept": flat})
    model = build_model(data, spec, levels=[], log_reference_size=0.0, phylogeny=tree)
    idata = quick_sample(model, seed=10, draws=1000, warmup=500)
    x, y = data["log_size"].to_numpy(), data["log_trait"].to_numpy()
    # reference: GLS with the tree covariance (Grafen 1989), statsmodels; with σ known and
    # flat priors the posterior of the coefficients is normal around the GLS estimate
    gls = sm.GLS(y, sm.add_constant(x), sigma=tree_covariance(tree)).fit()
    mean = float(idata.posterior["exponent"].mean())
    mcse = float(az.mcse(idata, var_names=["exponent"])["exponent"])
    assert abs(mean - gls.params[1]) < 3 * mcse


def test_taxon_terms_with_shared_ancestry_are_non_centred_without_the_whitening_potential():
    tree, data = _dataset(12, seed=11)
    data["family"] = [f"F{i % 3}" for i in range(12)]
    spec = parse_spec({"taxa": {"levels": "all"}, "shared_ancestry": "signal"}, name="t")
    model = build_model(data, spec, levels=["family"], log_reference_size=0.0,
                        phylogeny=tree)
    assert model.potentials == []
    assert "taxon_exponent__family" in model.named_vars


def test_shared_ancestry_with_errors_in_size_builds_a_finite_density():
    tree, data = _dataset(10, seed=13)
    data["sd_log_size"] = 0.1
    data["sd_source_size"] = "given"
    spec = _spec(shared_ancestry="full", size_error="known")
    model = build_model(data, spec, levels=[], log_reference_size=0.0, phylogeny=tree)
    assert "true_log_size" in model.named_vars
    assert all(np.isfinite(v) for v in model.point_logps().values())


@pytest.mark.mcmc
def test_fit_stage_reads_the_prepared_tree_and_records_its_hash(tmp_path):
    from allolaw.config import validate_config
    from allolaw.intake import prepare_dataset
    from allolaw.model.fitting import fit_dataset_model
    from allolaw.phylogeny import write_newick

    tree, data = _dataset(15, seed=12)
    table = tmp_path / "t.csv"
    lines = ["species,mass,rate"] + [
        f"{s},{np.exp(x):.6g},{np.exp(y):.6g}"
        for s, x, y in zip(data["species"], data["log_size"], data["log_trait"], strict=True)]
    table.write_text("\n".join(lines) + "\n", encoding="utf-8")
    (tmp_path / "t.nwk").write_text(write_newick(tree), encoding="utf-8")
    models = tmp_path / "models"
    models.mkdir()
    (models / "phylo.yaml").write_text("taxa: {levels: none}\nshared_ancestry: signal\n")
    source = {"file": str(table), "units": {"size": "g", "trait": "W"},
              "columns": {"species": "species", "size": "mass", "trait": "rate"}}
    config = validate_config({
        "results_dir": str(tmp_path / "results"), "models_dir": str(models),
        "sampler": {"chains": 1, "draws": 50, "warmup": 50, "backend": "numpyro",
                    "prior_draws": 10},
        "datasets": {"d": {"sources": [source], "size": {"quantity": "mass", "unit": "g"},
                           "trait": {"quantity": "power", "unit": "W"}, "models": ["phylo"],
                           "tree": str(tmp_path / "t.nwk")}}})
    prepare_dataset(config, "d")
    idata = fit_dataset_model(config, "d", "phylo")
    assert idata.attrs["tree_sha256"] == _file_sha256(tmp_path / "t.nwk")
    assert idata.log_likelihood["trait"].sizes["species"] == 15
    assert "ancestry_signal" in idata.posterior


def _file_sha256(path):
    import hashlib

    return hashlib.sha256(path.read_bytes()).hexdigest()


def test_nutpie_compiles_with_numba_from_the_tree_size_threshold_on(monkeypatch):
    from allolaw.model import compiling
    from allolaw.model.phylo_terms import tree_species

    monkeypatch.delenv("ALLOLAW_NUTPIE_BACKEND", raising=False)
    limit = compiling.NUMBA_FROM_TREE_SPECIES
    assert compiling.nutpie_compiler(0) == "jax"
    assert compiling.nutpie_compiler(limit - 1) == "jax"
    assert compiling.nutpie_compiler(limit) == "numba"
    monkeypatch.setenv("ALLOLAW_NUTPIE_BACKEND", "jax")  # the override wins
    assert compiling.nutpie_compiler(limit) == "jax"
    tree, data = _dataset(12, seed=3)
    with_tree = build_model(data, _spec(shared_ancestry="signal"), levels=[],
                            log_reference_size=0.0, phylogeny=tree)
    without = build_model(data, _spec(), levels=[], log_reference_size=0.0)
    assert tree_species(with_tree) == 12
    assert tree_species(without) == 0


@pytest.mark.slow  # two fits, one compiled by numba: about 40 s
@pytest.mark.mcmc
def test_tree_model_over_the_threshold_is_fitted_with_numba_and_gives_the_same_answer(
        monkeypatch):
    # same data and seed through both compilers: the draws differ (different floating-point
    # order), the posterior does not beyond Monte Carlo error
    from allolaw.model import compiling
    from allolaw.model.sampling import fit_model

    monkeypatch.delenv("ALLOLAW_NUTPIE_BACKEND", raising=False)
    tree, data = _dataset(40, seed=7, lam=0.8, exponent=0.75)
    spec = _spec(shared_ancestry="signal")
    fits = {}
    for limit in (10**9, 10):
        monkeypatch.setattr(compiling, "NUMBA_FROM_TREE_SPECIES", limit)
        model = build_model(data, spec, levels=[], log_reference_size=0.0, phylogeny=tree)
        idata = fit_model(model, chains=2, draws=400, warmup=400, seed=8, backend="nutpie",
                          prior_draws=20)
        fits[idata.attrs["compiler"]] = idata
    assert set(fits) == {"jax", "numba"}
    jax_b = fits["jax"].posterior["exponent"]
    numba_b = fits["numba"].posterior["exponent"]
    se = float(np.hypot(*(az.mcse(fits[c].posterior, var_names=["exponent"])["exponent"].item()
                          for c in ("jax", "numba"))))
    assert abs(float(jax_b.mean()) - float(numba_b.mean())) < 4 * se
    assert fits["numba"].log_likelihood["trait"].shape == (2, 400, 40)
    assert int(fits["numba"].sample_stats["diverging"].sum()) == 0
