"""Within- and between-species exponents (``within_species: separate``, model/within.py)."""

from __future__ import annotations

import arviz as az
import numpy as np
import pandas as pd
import pytensor.tensor as pt
import pytest

from allolaw.errors import UserError
from allolaw.model.builder import build_model
from allolaw.model.spec import parse_spec
from allolaw.model.within import (
    latent_split,
    species_grouping_warning,
    split_log_size,
    within_term,
)
from allolaw.testing import as_clean_table, quick_sample
from allolaw.testing.individuals import simulate_individuals

LEVELS = ["genus", "species_level"]


def _table(sim):
    labels = [f"{s} #{k}" for k, s in enumerate(sim["species"])]
    return as_clean_table(labels, sim["log_size"].to_numpy(), sim["log_trait"].to_numpy(),
                          taxa={"genus": sim["genus"], "species_level": sim["species"]})


def _spec(**extra):
    raw = {"taxa": {"levels": "none"}, "within_species": "separate"}
    raw.update(extra)
    return parse_spec(raw, name="within")


def test_split_gives_group_means_and_deviations_that_sum_to_zero_per_species():
    sim = simulate_individuals(n_species=6, per_species=4, seed=1)
    split = split_log_size(_table(sim), _spec(), levels=LEVELS)
    assert split.level == "species_level"
    sums = np.bincount(np.repeat(np.arange(6), 4), weights=split.deviation)
    np.testing.assert_allclose(sums, 0.0, atol=1e-12)
    means = sim.groupby("species", sort=False)["log_size"].mean().to_numpy()
    np.testing.assert_allclose(split.group_mean, np.repeat(means, 4), rtol=1e-12)


def test_split_needs_a_level_and_refuses_curvature():
    table = _table(simulate_individuals(n_species=3, per_species=2, seed=1))
    with pytest.raises(UserError, match="needs a taxon level"):
        split_log_size(table, _spec(), levels=[])
    with pytest.raises(UserError, match="curvature"):
        build_model(table, _spec(curvature="shared"), levels=LEVELS, log_reference_size=0.0)


def test_latent_split_of_a_size_vector_equals_numpy_group_means_and_deviations():
    # the split of the true sizes is the same linear map as the split of the measured ones
    sim = simulate_individuals(n_species=5, per_species=3, seed=4)
    split = split_log_size(_table(sim), _spec(), levels=LEVELS)
    values = np.random.default_rng(5).normal(0.0, 1.0, len(sim))
    mean, deviation = latent_split(split, pt.as_tensor_variable(values))
    groups = pd.Series(values).groupby(split.index).transform("mean").to_numpy()
    np.testing.assert_allclose(mean.eval(), groups, rtol=1e-12)
    np.testing.assert_allclose(deviation.eval(), values - groups, atol=1e-12)


@pytest.mark.slow  # about a minute: CI runs it in the round-two studies step
@pytest.mark.mcmc
def test_within_exponent_with_size_error_is_not_diluted():
    # Invented individuals with known truth: within 1.0, between 0.75, individuals spread
    # around their species mean with SD 0.3 and measured with log-size error SD 0.2, so the
    # within-species reliability is 0.09 / (0.09 + 0.04) = 0.69 and a slope on measured
    # deviations is diluted to about 0.69 (Fuller 1987, Measurement Error Models, §1.1).
    sim = simulate_individuals(n_species=30, per_species=6, between=0.75, within=1.0,
                               size_error_sd=0.2, seed=11)
    labels = [f"{s} #{k}" for k, s in enumerate(sim["species"])]
    table = as_clean_table(labels, sim["log_size"].to_numpy(), sim["log_trait"].to_numpy(),
                           taxa={"genus": sim["genus"], "species_level": sim["species"]},
                           sd_log_size=0.2)
    taxa = {"levels": "all", "vary": ["intercept"]}
    corrected = build_model(table, _spec(taxa=taxa, size_error="known"), levels=LEVELS,
                            log_reference_size=0.0)
    naive = build_model(table, _spec(taxa=taxa), levels=LEVELS, log_reference_size=0.0)
    fit = quick_sample(corrected, seed=5, draws=400, warmup=400)
    plain = quick_sample(naive, seed=5, draws=400, warmup=400)
    assert int(fit.sample_stats["diverging"].sum()) == 0
    low, high = np.quantile(fit.posterior["within_exponent"].values, [0.05, 0.95])
    assert low < 1.0 < high, (low, high)
    low_b, high_b = np.quantile(fit.posterior["exponent"].values, [0.05, 0.95])
    assert low_b < 0.75 < high_b, (low_b, high_b)
    # without the error model the within slope is diluted: its interval lies below 1
    assert float(np.quantile(plain.posterior["within_exponent"].values, 0.95)) < 1.0


def test_separate_model_has_both_exponents_and_the_split_data():
    table = _table(simulate_individuals(n_species=5, per_species=3, seed=2))
    model = build_model(table, _spec(), levels=LEVELS, log_reference_size=0.0)
    names = {v.name for v in model.free_RVs}
    assert {"exponent", "within_exponent"} <= names
    assert "group_mean_log_size" in model
    assert "within_log_size" in model


@pytest.mark.mcmc
def test_flat_prior_exponents_equal_fixed_effects_and_species_mean_ols():
    import statsmodels.formula.api as smf

    # Invented individuals (known truth), balanced: 12 species x 8 individuals.
    sim = simulate_individuals(n_species=12, per_species=8, seed=11)
    flat = {"intercept": {"mean": 0.0, "sd": 100.0}, "exponent": {"mean": 0.0, "sd": 100.0},
            "within_exponent": {"mean": 0.0, "sd": 100.0}}
    model = build_model(_table(sim), _spec(priors=flat), levels=LEVELS, log_reference_size=0.0)
    idata = quick_sample(model, seed=5, draws=500, warmup=500)
    # Fixed-effects slope, one dummy per species; equal to the within-centred slope
    # (Mundlak 1978; van de Pol & Wright 2009, eq. 2-3).
    fixed = smf.ols("log_trait ~ log_size + C(species)", data=sim).fit().params["log_size"]
    post = idata.posterior["within_exponent"]
    mcse = float(az.mcse(idata, var_names=["within_exponent"])["within_exponent"])
    assert abs(float(post.mean()) - fixed) < 3 * mcse
    # Between: OLS of species-mean log trait on species-mean log size (balanced design).
    means = sim.groupby("species")[["log_size", "log_trait"]].mean()
    between = smf.ols("log_trait ~ log_size", data=means).fit().params["log_size"]
    assert abs(float(idata.posterior["exponent"].mean()) - between) < 0.02


@pytest.mark.mcmc
def test_within_1_and_between_0_75_are_recovered_and_told_apart():
    # Invented individuals with known truth: within-species exponent 1.0, between 0.75,
    # species intercepts deviating with SD 0.1; the model has a species random intercept.
    sim = simulate_individuals(n_species=24, per_species=6, between=0.75, within=1.0, seed=7)
    spec = _spec(taxa={"levels": "all", "vary": ["intercept"]})
    model = build_model(_table(sim), spec, levels=LEVELS, log_reference_size=0.0)
    idata = quick_sample(model, seed=3, draws=400, warmup=400)
    for name, truth in (("within_exponent", 1.0), ("exponent", 0.75)):
        low, high = np.quantile(idata.posterior[name].values, [0.05, 0.95])
        assert low < truth < high, (name, low, high)
    difference = idata.posterior["within_exponent"] - idata.posterior["exponent"]
    assert float((difference > 0).mean()) > 0.95


@pytest.mark.parametrize("order", ["first_appearance", "reversed"])
def test_within_exponent_by_species_maps_each_row_to_its_own_species(order):
    import pymc as pm

    sim = simulate_individuals(n_species=5, per_species=3, seed=2)
    table = _table(sim)
    spec = _spec(within_species="separate_by_species")
    split = split_log_size(table, spec, levels=LEVELS)
    labels = list(dict.fromkeys(sim["species"]))
    coords = {"species": list(table["species"])}
    if order == "reversed":  # the level's coords exist already, in another order
        coords["species_level"] = labels[::-1]
    with pm.Model(coords=coords) as model:
        part = within_term(model, split, spec)
    coord_labels = list(model.coords["species_level"])
    point = model.initial_point()
    point["within_exponent"] = 0.5
    point["within_exponent_sd__species_level_log__"] = 0.0  # SD 1
    point["within_exponent_z__species_level"] = np.arange(5.0)
    (on_values,) = model.replace_rvs_by_values([part])  # the point's values, not draws
    values = model.compile_fn(on_values, inputs=model.value_vars,
                              on_unused_input="ignore")(point)
    slope = 0.5 + np.array([coord_labels.index(s) for s in sim["species"]], dtype=float)
    np.testing.assert_allclose(values, slope * split.deviation, rtol=1e-12)
    assert spec.cost_rank > _spec().cost_rank


def test_by_species_model_builds_with_and_without_taxon_terms():
    table = _table(simulate_individuals(n_species=5, per_species=3, seed=2))
    for taxa in ({"levels": "none"}, {"levels": "all", "vary": ["intercept"]}):
        spec = _spec(within_species="separate_by_species", taxa=taxa)
        model = build_model(table, spec, levels=LEVELS, log_reference_size=0.0)
        assert "taxon_within_exponent__species_level" in model.named_vars
        assert len(model.coords["species_level"]) == 5


@pytest.mark.slow  # about 90 s: CI runs it in the round-two studies step
@pytest.mark.mcmc
def test_within_exponents_varying_by_species_are_partially_pooled_and_recovered():
    # Invented individuals with known truth: within exponents normal(1.0, 0.3) by species.
    sim = simulate_individuals(n_species=12, per_species=12, within_sd=0.3, within_spread=0.5,
                               seed=4)
    spec = _spec(within_species="separate_by_species",
                 taxa={"levels": "all", "vary": ["intercept"]})
    model = build_model(_table(sim), spec, levels=LEVELS, log_reference_size=0.0)
    idata = quick_sample(model, seed=8, draws=400, warmup=400)
    post = idata.posterior["taxon_within_exponent__species_level"]
    estimate = post.mean(("chain", "draw")).to_series()
    truth = sim.groupby("species")["true_within_exponent"].first()
    assert np.corrcoef(estimate[truth.index], truth)[0, 1] > 0.8
    low, high = np.quantile(idata.posterior["within_exponent_sd__species_level"].values,
                            [0.05, 0.95])
    assert low < 0.3 < high


@pytest.mark.parametrize("taxa", [{"levels": "none"}, {"levels": ["genus"], "vary": ["intercept"]}])
def test_individuals_without_a_species_term_get_a_warning_naming_model_and_level(taxa):
    spec = parse_spec({"taxa": taxa}, name="plain")
    message = species_grouping_warning(spec, levels=["genus", "species_level"],
                                       rows_are="individuals")
    assert message is not None
    assert "model plain" in message
    assert "'species_level'" in message
    assert "rows_are: individuals" in message


def test_no_species_grouping_warning_with_a_species_term_or_species_values():
    with_species = parse_spec({"taxa": {"levels": "all", "vary": ["intercept"]}}, name="t")
    assert species_grouping_warning(with_species, levels=["genus", "species_level"],
                                    rows_are="individuals") is None
    inner = parse_spec({"taxa": {"levels": "innermost", "vary": ["intercept"]}}, name="i")
    assert species_grouping_warning(inner, levels=["genus", "species_level"],
                                    rows_are="individuals") is None
    pooled = parse_spec({"taxa": {"levels": "none"}}, name="p")
    assert species_grouping_warning(pooled, levels=["genus"], rows_are="species_values") is None
