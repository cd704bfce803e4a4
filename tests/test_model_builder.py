"""The model builder: contract names and dims, nesting, input errors, small fits."""

from pathlib import Path

import arviz as az
import numpy as np
import pymc as pm
import pytest

from allolaw.errors import UserError
from allolaw.model.builder import build_model
from allolaw.model.inputs import BOLTZMANN_EV_PER_K, select_levels
from allolaw.model.law import expected_log_trait
from allolaw.model.spec import load_spec, parse_spec
from allolaw.testing import (
    quick_sample,
    simulate_breakpoint,
    simulate_law,
    simulate_taxa,
)

REPO = Path(__file__).resolve().parents[1]
MODELS = REPO / "models"
DEMO_MODELS = [
    "pooled",
    "taxa",
    "taxa_errors",
    "taxa_errors_curved",
    "taxa_errors_curved_by_taxon",
    "breakpoint",
    "pooled_robust",
    "taxa_robust",
    "taxa_errors_robust",
    "taxa_errors_temperature",
    "taxa_errors_scatter",
]


def _nested_data():
    sim = simulate_taxa(seed=3, taxa=(3, 2), species_per_taxon=6, size_error_sd=0.05,
                        trait_error_sd=0.05, replicates=3)
    sim.data["cov_body_temp_c"] = 300.0 + (np.arange(len(sim.data)) % 7)
    return sim


@pytest.mark.parametrize("name", DEMO_MODELS)
def test_every_demo_model_builds_with_the_contract_names_and_dims(name):
    sim = _nested_data()
    spec = load_spec(MODELS, name)
    model = build_model(sim.data, spec, levels=sim.levels, log_reference_size=0.5)
    names = set(model.named_vars)
    assert {"intercept", "exponent", "sigma", "trait", "log_size_obs", "log_size_ref"} <= names
    assert model.named_vars_to_dims["trait"] == ("species",)
    assert list(model.coords["species"]) == list(sim.data["species"])
    assert model["trait"] in model.observed_RVs
    if spec.taxa["levels"] != "none":
        for level in sim.levels:
            assert model.named_vars_to_dims[f"taxon_intercept__{level}"] == (level,)
            assert f"intercept_sd__{level}" in names
            if "exponent" in spec.taxa["vary"]:
                assert model.named_vars_to_dims[f"taxon_exponent__{level}"] == (level,)
                assert f"exponent_sd__{level}" in names
            assert model[f"taxon_intercept__{level}"] in model.deterministics
    if spec.has_size_error:
        assert model.named_vars_to_dims["true_log_size"] == ("species",)
    else:
        assert "true_log_size" not in names
    assert ("curvature" in names) == (spec.curvature != "none")
    if spec.curvature == "shared_and_taxa":
        assert model.named_vars_to_dims["taxon_curvature__family"] == ("family",)
    assert ("break_log_size" in names) == ("exponent_above" in names) == (spec.breakpoint == "one")
    assert ("nu" in names) == (spec.residuals == "student_t")
    for cov in spec.covariates:
        assert f"coef__{cov['column']}" in names


@pytest.mark.parametrize("form", ["non-centred", "auto"])
def test_prior_draws_follow_the_nested_normal_model_exactly(form):
    # Prior draws come from build_model(..., prior_only=True) (the sampled form of the
    # whitened model depends on the data); they must follow the textbook nested model: population
    # ~ N(m0, s0), each order ~ N(population, s_order), each family ~ N(its order, s_family)
    # (e.g. Gelman et al. 2013, Bayesian Data Analysis 3rd ed., ch. 5). Standardised
    # increments drawn from the prior must be independent N(0, 1): checked with
    # Kolmogorov–Smirnov tests against scipy's normal and with their correlations.
    from scipy import stats

    sim = _nested_data()
    # one family with a single species (its deviation is written apart, from its parent)
    first = sim.data["family"].iloc[0]
    drop = sim.data.index[sim.data["family"] == first][1:]
    sim.data = sim.data.drop(index=drop).reset_index(drop=True)
    spec = parse_spec({"taxa": {"levels": "all", "parameterisation": form},
                       "priors": {"exponent": {"mean": 0.7, "sd": 0.4}}}, name="n")
    model = build_model(sim.data, spec, levels=sim.levels, log_reference_size=0.0,
                        prior_only=True)
    assert not model.potentials
    with model:
        prior = pm.sample_prior_predictive(draws=2000, random_seed=1).prior
    parent = sim.data.groupby("family")["order"].first()
    # the taxon SDs are those of deviations at the data's centre (model/correlated.py): an
    # intercept deviation there is the one at the reference minus Δ times the exponent's
    shift = 0.0 - float(sim.data["log_size"].mean())
    for term in ("intercept", "exponent"):
        population = prior[term].values.ravel()
        order = prior[f"taxon_{term}__order"]
        family = prior[f"taxon_{term}__family"]
        if term == "intercept":
            order = order - shift * (prior["taxon_exponent__order"] - prior["exponent"])
            family = family - shift * (prior["taxon_exponent__family"]
                                       - prior["exponent"])
        s_order = prior[f"{term}_sd__order"].values.ravel()
        s_family = prior[f"{term}_sd__family"].values.ravel()
        if term == "exponent":
            assert stats.kstest((population - 0.7) / 0.4, "norm").pvalue > 0.001
        orders = [(order.sel(order=o).values.ravel() - population) / s_order
                  for o in order["order"].values]
        families = [(family.sel(family=f).values.ravel()
                     - order.sel(order=parent[f]).values.ravel()) / s_family
                    for f in family["family"].values]
        for z in orders + families:
            assert stats.kstest(z, "norm").pvalue > 0.001, term
        corr = np.corrcoef(np.array(orders + families))
        off = corr[~np.eye(len(corr), dtype=bool)]
        assert np.max(np.abs(off)) < 0.12, term  # 2000 draws: SD of a correlation ~0.022


def test_level_choice_follows_the_spec_and_rejects_unknown_levels():
    levels = ["order", "family"]
    assert select_levels(parse_spec({}, name="x"), levels) == levels
    assert select_levels(parse_spec({"taxa": {"levels": "innermost"}}, name="x"), levels) == [
        "family"]
    assert select_levels(parse_spec({"taxa": {"levels": ["family"]}}, name="x"), levels) == [
        "family"]
    with pytest.raises(UserError, match="'genus'"):
        select_levels(parse_spec({"taxa": {"levels": ["genus"]}}, name="x"), levels)


def test_missing_error_column_is_a_user_error_naming_the_column():
    sim = simulate_law(seed=1, n_species=20)
    data = sim.data.drop(columns=["sd_log_size"])
    with pytest.raises(UserError, match="column 'sd_log_size'"):
        build_model(data, load_spec(MODELS, "taxa_errors"), levels=[], log_reference_size=0.0)


def test_missing_error_sd_names_line_column_and_value():
    sim = simulate_law(seed=1, n_species=20, size_error_sd=0.1, trait_error_sd=0.1)
    sim.data.loc[4, "sd_log_size"] = np.nan
    with pytest.raises(UserError, match=r"line 6, column 'sd_log_size', value nan"):
        build_model(sim.data, load_spec(MODELS, "taxa_errors"), levels=[],
                    log_reference_size=0.0)


def test_known_errors_refuse_sds_that_were_not_given():
    sim = simulate_law(seed=1, n_species=20, size_error_sd=0.1, replicates=3)
    spec = parse_spec({"taxa": {"levels": "none"}, "size_error": "known"}, name="k")
    with pytest.raises(UserError, match=r"sd_source_size', value 'replicates'"):
        build_model(sim.data, spec, levels=[], log_reference_size=0.0)


def test_taxa_that_do_not_nest_are_a_user_error():
    sim = simulate_taxa(seed=1, taxa=(2, 2), species_per_taxon=3)
    sim.data.loc[0, "family"] = sim.data.loc[len(sim.data) - 1, "family"]
    with pytest.raises(UserError, match="must nest"):
        build_model(sim.data, load_spec(MODELS, "taxa"), levels=sim.levels,
                    log_reference_size=0.0)


def test_boltzmann_covariate_is_centred_inverse_temperature():
    # 1/(kT) with k = 8.617e-5 eV/K (Gillooly et al. 2001, Science 293:2248)
    sim = simulate_law(seed=1, n_species=10, size_error_sd=0.1, trait_error_sd=0.1)
    kelvin = np.linspace(290.0, 310.0, 10)
    sim.data["cov_body_temp_c"] = kelvin
    model = build_model(sim.data, load_spec(MODELS, "taxa_errors_temperature"), levels=[],
                        log_reference_size=0.0)
    inverse = 1.0 / (BOLTZMANN_EV_PER_K * kelvin)
    np.testing.assert_allclose(model["covariate__body_temp_c"].get_value(),
                               inverse - inverse.mean())
    sim.data.loc[2, "cov_body_temp_c"] = -5.0
    with pytest.raises(UserError, match="kelvin"):
        build_model(sim.data, load_spec(MODELS, "taxa_errors_temperature"), levels=[],
                    log_reference_size=0.0)


def _smoke_data(name: str):
    if name == "breakpoint":
        return simulate_breakpoint(seed=8, species_per_taxon=15, sigma=0.1)
    curved = "curved" in name
    return simulate_law(
        seed=7, taxa=(5,), level_names=("genus",), species_per_taxon=10, sigma=0.15,
        intercept_sd=0.3, exponent_sd=0.1, curvature=-0.05 if curved else 0.0,
        curvature_sd=0.03 if "by_taxon" in name else 0.0, size_error_sd=0.05,
        trait_error_sd=0.05, replicates=3,
    )


@pytest.mark.mcmc
def test_a_fit_through_the_fit_stage_recovers_the_exponent_without_divergences():
    from allolaw.model.sampling import fit_model

    sim = _smoke_data("taxa_errors")
    spec = load_spec(MODELS, "taxa_errors")
    model = build_model(sim.data, spec, levels=sim.levels, log_reference_size=0.0)
    with pytest.raises(ValueError, match="prior_only"):  # prior draws need the prior form
        fit_model(model, seed=11)
    prior_model = build_model(sim.data, spec, levels=sim.levels, log_reference_size=0.0,
                              prior_only=True)
    idata = fit_model(model, chains=2, draws=300, warmup=400, target_acceptance=0.95, seed=11,
                      prior_draws=20, prior_model=prior_model)
    assert int(idata.sample_stats["diverging"].sum()) == 0
    assert list(idata.log_likelihood.data_vars) == ["trait"]
    assert {"log_size_obs", "log_size_ref"} <= set(idata.constant_data.data_vars)
    law = expected_log_trait(idata, np.array([0.0, 1.0]))
    slope = law[:, 1] - law[:, 0]
    lo, hi = np.quantile(slope, [0.05, 0.95])
    assert lo < sim.truth["exponent"] < hi


@pytest.mark.mcmc
@pytest.mark.slow  # ten fits: several minutes on the shared machine
@pytest.mark.parametrize("name", DEMO_MODELS)
def test_every_demo_model_fits_small_data_without_divergences(name):
    sim = _smoke_data(name)
    if "temperature" in name:
        sim.data["cov_body_temp_c"] = np.linspace(295.0, 310.0, len(sim.data))
    model = build_model(sim.data, load_spec(MODELS, name), levels=sim.levels,
                        log_reference_size=0.0)
    # R-hat < 1.01 needs enough draws to be a stable statistic: 2 x 1000
    idata = quick_sample(model, seed=12, draws=1000, warmup=1000, target_acceptance=0.95)
    assert int(idata.sample_stats["diverging"].sum()) == 0
    rhat = az.rhat(idata)
    worst = max(float(rhat[v].max()) for v in rhat.data_vars)
    assert worst < 1.01, {v: float(rhat[v].max()) for v in rhat.data_vars}
