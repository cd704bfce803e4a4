"""The model builder: contract names and dims, nesting, the law's formula, recovery of truth."""

import json
from pathlib import Path

import arviz as az
import numpy as np
import pandas as pd
import pymc as pm
import pytest

from allolaw.errors import UserError
from allolaw.law import _softplus_np
from allolaw.modeling import (
    BOLTZMANN_EV_PER_K,
    build_model,
    expected_log_trait,
    select_levels,
)
from allolaw.spec import load_spec, parse_spec
from allolaw.testing import (
    quick_sample,
    simulate_breakpoint,
    simulate_curvature,
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
    for term in ("intercept", "exponent"):
        population = prior[term].values.ravel()
        order = prior[f"taxon_{term}__order"]
        family = prior[f"taxon_{term}__family"]
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


def test_expected_log_trait_follows_the_law_term_by_term():
    # hand-built posterior: 2 chains x 3 draws, one level with two taxa, a hinge
    rng = np.random.default_rng(0)
    shape = (2, 3)
    a, b, brk, above = (rng.normal(m, 0.1, shape) for m in (1.0, 0.8, 1.0, 0.4))
    ta = np.stack([a + 0.2, a - 0.2], axis=-1)
    tb = np.stack([b + 0.1, b - 0.1], axis=-1)
    idata = az.from_dict(
        posterior={"intercept": a, "exponent": b, "break_log_size": brk, "exponent_above": above,
                   "taxon_intercept__genus": ta, "taxon_exponent__genus": tb},
        coords={"genus": ["g1", "g2"]},
        dims={"taxon_intercept__genus": ["genus"], "taxon_exponent__genus": ["genus"]},
        constant_data={"log_size_ref": np.array(0.5), "hinge_width": np.array(0.1)},
    )
    grid = np.array([-1.0, 0.5, 3.0])

    def hinge(d):
        return 0.1 * np.logaddexp(0.0, d / 0.1)

    def law(i, s):
        slope_change = (above - b).reshape(-1, 1)
        return (i.reshape(-1, 1) + s.reshape(-1, 1) * (grid - 0.5)
                + slope_change * (hinge(grid - brk.reshape(-1, 1))
                                  - hinge(0.5 - brk.reshape(-1, 1))))

    np.testing.assert_allclose(expected_log_trait(idata, grid), law(a, b))
    np.testing.assert_allclose(expected_log_trait(idata, grid, level="genus", taxon="g2"),
                               law(a - 0.2, b - 0.1))
    # the intercept is the law at the reference size, hinge included
    np.testing.assert_allclose(expected_log_trait(idata, 0.5)[:, 0], a.reshape(-1))
    with pytest.raises(UserError, match="g3"):
        expected_log_trait(idata, grid, level="genus", taxon="g3")
    with pytest.raises(UserError, match="no taxon terms at level 'order'"):
        expected_log_trait(idata, grid, level="order", taxon="o1")


def test_expected_log_trait_adds_curvature_per_taxon():
    c = np.full((1, 2), -0.1)
    idata = az.from_dict(
        posterior={"intercept": np.zeros((1, 2)), "exponent": np.ones((1, 2)), "curvature": c,
                   "taxon_curvature__genus": np.stack([c - 0.05, c + 0.05], axis=-1)},
        coords={"genus": ["g1", "g2"]},
        dims={"taxon_curvature__genus": ["genus"]},
        constant_data={"log_size_ref": np.array(0.0)},
    )
    grid = np.array([-2.0, 2.0])
    np.testing.assert_allclose(expected_log_trait(idata, grid)[0], grid - 0.1 * grid**2)
    np.testing.assert_allclose(expected_log_trait(idata, grid, level="genus", taxon="g1")[0],
                               grid - 0.15 * grid**2)


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
    from allolaw.fitting import fit_model

    sim = _smoke_data("taxa_errors")
    spec = load_spec(MODELS, "taxa_errors")
    model = build_model(sim.data, spec, levels=sim.levels, log_reference_size=0.0)
    with pytest.raises(ValueError, match="prior_only"):  # prior draws need the prior form
        fit_model(model, seed=11)
    prior_model = build_model(sim.data, spec, levels=sim.levels, log_reference_size=0.0,
                              prior_only=True)
    idata = fit_model(model, chains=2, draws=300, tune=400, target_accept=0.95, seed=11,
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
    idata = quick_sample(model, seed=12, draws=1000, tune=1000, target_accept=0.95)
    assert int(idata.sample_stats["diverging"].sum()) == 0
    rhat = az.rhat(idata)
    worst = max(float(rhat[v].max()) for v in rhat.data_vars)
    assert worst < 1.01, {v: float(rhat[v].max()) for v in rhat.data_vars}


def _inside_90(draws: np.ndarray, value: float) -> bool:
    lo, hi = np.quantile(draws, [0.05, 0.95])
    return bool(lo < value < hi)


@pytest.mark.mcmc
@pytest.mark.slow
def test_curvature_model_recovers_exponent_and_curvature_of_taxa_in_different_size_ranges():
    # 8 genera x 20 species whose size ranges differ (centres spread 1.5 log units), so a curved
    # law looks like differences between taxa. (An earlier 4 x 12 design was too small: on it
    # the fixed-effects least squares below put the mean taxon exponent at 0.63 against the
    # realised 0.71, so the truth sat outside any honest 90% interval by chance.)
    import statsmodels.api as sm

    sim = simulate_curvature(seed=41, curvature=-0.1, sigma=0.1, size_error_sd=0.05,
                             trait_error_sd=0.05, taxa=(8,), species_per_taxon=20)
    model = build_model(sim.data, load_spec(MODELS, "taxa_errors_curved"), levels=sim.levels,
                        log_reference_size=0.0)
    idata = quick_sample(model, seed=13, draws=500, tune=700, target_accept=0.95)
    post = idata.posterior
    assert _inside_90(post["exponent"].values.ravel(), sim.truth["exponent"])
    assert _inside_90(post["curvature"].values.ravel(), sim.truth["curvature"])
    assert np.quantile(post["curvature"].values, 0.95) < 0
    # outside reference: ordinary least squares (statsmodels) with one intercept and one
    # exponent per genus and a shared quadratic term; the size errors are small (SD 0.05
    # against a spread of 0.8 within genera, reliability 0.996), so its curvature and mean
    # genus exponent should agree with the posterior means within 2 posterior SDs
    x, y = sim.data["log_size"].to_numpy(), sim.data["log_trait"].to_numpy()
    genus = pd.get_dummies(sim.data["genus"], dtype=float).to_numpy()
    ols = sm.OLS(y, np.column_stack([genus, genus * x[:, None], x**2])).fit().params
    curvature = post["curvature"].values
    assert abs(curvature.mean() - ols[-1]) < 2 * curvature.std()
    genus_exponents = post["taxon_exponent__genus"].values.mean(axis=-1)
    assert abs(genus_exponents.mean() - ols[genus.shape[1]:-1].mean()) < 2 * genus_exponents.std()


@pytest.mark.mcmc
@pytest.mark.slow
def test_breakpoint_model_recovers_break_location_and_both_exponents():
    # 3 groups x 60 species. (An earlier 3 x 25 design put the least-squares break at 0.65 with
    # the truth 0.5 at the edge of its 90% profile interval, 0.51-0.79: too little data.)
    import statsmodels.api as sm

    sim = simulate_breakpoint(seed=42, break_log_size=0.5, exponent=0.9, exponent_above=0.5,
                              sigma=0.1, species_per_taxon=60)
    spec = load_spec(MODELS, "breakpoint")
    model = build_model(sim.data, spec, levels=sim.levels,
                        log_reference_size=0.0)
    idata = quick_sample(model, seed=14, draws=500, tune=700, target_accept=0.95)
    post = idata.posterior
    for name in ("break_log_size", "exponent", "exponent_above"):
        assert _inside_90(post[name].values.ravel(), sim.truth[name]), name
    # outside reference: the least-squares break found by grid search over the break location,
    # ordinary least squares (statsmodels) at each grid point (Hudson 1966, J. Am. Stat. Assoc.
    # 61:1097-1129, for the grid-search estimate of a join point); with a flat prior on the
    # break the posterior median should sit within 0.05 log units of it
    x, y = sim.data["log_size"].to_numpy(), sim.data["log_trait"].to_numpy()
    group = pd.get_dummies(sim.data["group"], dtype=float).to_numpy()
    grid = np.linspace(-1.0, 2.0, 601)
    # the model's own hinge (zero at the reference size 0)
    ssr = [sm.OLS(y, np.column_stack([group, x, _softplus_np(x - b, spec.hinge_width)
                                      - _softplus_np(-b, spec.hinge_width)])).fit().ssr
           for b in grid]
    least_squares_break = grid[int(np.argmin(ssr))]
    assert abs(np.median(post["break_log_size"].values) - least_squares_break) < 0.05


@pytest.mark.mcmc
@pytest.mark.slow
@pytest.mark.parametrize(
    ("dataset", "model", "parameters"),
    [
        ("cell_scaling", "breakpoint", ["break_log_size", "exponent_above"]),
        ("tree_biomass", "taxa_errors_curved", ["exponent", "curvature"]),
    ],
)
def test_demo_truth_is_recovered(tmp_path, dataset, model, parameters):
    # the invented demo data and their truth.json (written by allolaw.demo)
    from allolaw.config import load_config
    from allolaw.intake import prepare_dataset, read_clean, read_prepared

    config = load_config(REPO / "config" / "config.yaml",
                         [f"results_dir={tmp_path}"])
    truth = json.loads((REPO / "data" / "demo" / "truth.json").read_text())[dataset]
    for source in config["datasets"][dataset]["sources"]:
        source["file"] = str(REPO / source["file"])
    prepare_dataset(config, dataset)
    data = read_clean(tmp_path, dataset)
    prepared = read_prepared(tmp_path, dataset)
    levels = list(config["datasets"][dataset]["sources"][0]["columns"].get("levels", []))
    log_ref = float(prepared["log_reference_size"])
    idata = quick_sample(build_model(data, load_spec(MODELS, model), levels=levels,
                                     log_reference_size=log_ref),
                         seed=15, draws=500, tune=700, target_accept=0.95)
    for name in parameters:
        draws = idata.posterior[name].values.ravel()
        value = truth[name]
        if name == "exponent" and "curvature" in truth and truth["log_reference_size"] != log_ref:
            # the exponent at our reference size on a curved law: b + 2c(x_ref − x_truth)
            value = truth["exponent"] + 2 * truth["curvature"] * (
                log_ref - truth["log_reference_size"])
        assert _inside_90(draws, value), (name, np.quantile(draws, [0.05, 0.95]), value)


@pytest.mark.mcmc
@pytest.mark.slow  # four fits of the 172-species island survey: a few minutes
def test_taxon_exponent_intervals_cover_the_demo_truth(tmp_path):
    # Coverage study on the demo generator (benchmarks/taxon_coverage.py, small version):
    # four fresh island surveys, 40 family exponents; central 90% intervals should cover
    # about 90%. With 40 intervals the binomial SE is ~0.05, so the band 0.7-1.0 is about
    # ±4 SE (common practice, no source); the full study runs more datasets by script.
    import subprocess
    import sys

    out = tmp_path / "coverage.json"
    subprocess.run([sys.executable, str(REPO / "benchmarks" / "taxon_coverage.py"),
                    "--seeds", "4", "--out", str(out)], check=True, cwd=REPO)
    result = json.loads(out.read_text())
    assert result["intervals"] == 40
    assert 0.7 <= result["coverage"] <= 1.0, result["coverage"]
    assert all(r["divergences"] == 0 for r in result["records"])


def test_simulated_tables_have_the_clean_csv_columns():
    sim = simulate_taxa(seed=1)
    expected = ["species", "order", "family", "log_size", "log_trait", "n_rows",
                "within_sd_log_size", "within_sd_log_trait", "sd_log_size", "sd_log_trait",
                "sd_source_size", "sd_source_trait", "source", "flag_outlier",
                "flag_singleton_taxon"]
    assert list(sim.data.columns) == expected
    assert isinstance(sim.data, pd.DataFrame)
    assert sim.data["species"].is_unique
    # same seed, same table
    pd.testing.assert_frame_equal(sim.data, simulate_taxa(seed=1).data)


@pytest.mark.mcmc
@pytest.mark.slow  # 20 fits: 10-20 minutes on the shared machine
def test_sbc_ranks_of_the_curved_errors_model_are_uniform_and_intervals_cover(tmp_path):
    # Simulation-based calibration (Talts et al. 2018, arXiv:1804.06788): ranks of the true
    # value among posterior draws are uniform for correct model code and sampler. A small
    # study: 20 replicates, 5 bins; the chi-square test rejects at p < 0.001 only. The
    # full study is benchmarks/calibration.py, run here on 20 replicates (in worker
    # processes of 10, as the script does for long studies: one process compiling a JAX
    # sampler per replicate crashed after many fits).
    import subprocess
    import sys

    sys.path.insert(0, str(REPO / "benchmarks"))
    from calibration import PARAMETERS

    out = tmp_path / "sbc.json"
    subprocess.run(
        [sys.executable, str(REPO / "benchmarks" / "calibration.py"), "--replicates", "20",
         "--per-process", "10", "--bins", "5", "--seed", "5", "--draws", "400", "--tune",
         "600", "--out", str(out)], check=True, cwd=REPO,
    )
    result = json.loads(out.read_text())
    assert len(result["ranks"]["exponent"]) == 20
    for name in PARAMETERS:
        assert result["uniformity"][name]["p_value"] > 0.001, (name, result["uniformity"][name])
    # 80 intervals: the SD of the coverage estimate is about 0.034, so 0.9 ± 0.12 (≈ 3.5 SD)
    assert 0.78 < result["coverage"]["taxon_exponent__genus"] < 1.0


@pytest.mark.mcmc
def test_sbc_replicates_split_over_calls_give_the_same_records():
    # the full SBC study runs its replicates in several processes (benchmarks/calibration.py);
    # a replicate's data and fit must not depend on which other replicates share its call
    import sys

    sys.path.insert(0, str(REPO / "benchmarks"))
    from calibration import COVERAGE_OF, PARAMETERS, SBC_SPEC, template_table

    from allolaw.testing.calibration import calibration_records, summarise_calibration

    sim = template_table()
    args = dict(levels=sim.levels, log_reference_size=0.0, parameters=PARAMETERS,
                coverage_of=COVERAGE_OF, replicates=4, seed=3,
                sampler={"draws": 50, "tune": 50, "chains": 2})
    spec = parse_spec(SBC_SPEC, name="sbc")
    together = calibration_records(sim.data, spec, indices=[1, 2], **args)
    alone = calibration_records(sim.data, spec, indices=[2], **args)
    assert alone == together[1:]
    assert [rec["replicate"] for rec in together] == [1, 2]
    assert all(rec["intervals"] == 4 for rec in together)  # four genera
    summary = summarise_calibration(together[::-1], parameters=PARAMETERS,
                                    coverage_of=COVERAGE_OF)
    assert summary.ranks["exponent"] == [rec["ranks"]["exponent"] for rec in together]
    hits = sum(rec["hits"] for rec in together)
    assert summary.coverage[COVERAGE_OF] == pytest.approx(hits / 8)


def test_rank_uniformity_flags_piled_up_ranks_and_passes_flat_ones():
    from allolaw.testing.calibration import rank_uniformity

    flat = np.tile(np.arange(100), 2)
    assert rank_uniformity(flat, n_draws=99, bins=10)["p_value"] > 0.99
    piled = np.r_[np.zeros(150, dtype=int), np.arange(50)]  # an over-confident posterior
    assert rank_uniformity(piled, n_draws=99, bins=10)["p_value"] < 1e-6


def test_only_the_terms_named_in_vary_get_taxon_deviations():
    sim = _nested_data()
    spec = parse_spec({"taxa": {"levels": "innermost", "vary": ["exponent"]}}, name="v")
    names = set(build_model(sim.data, spec, levels=sim.levels, log_reference_size=0.0).named_vars)
    assert "taxon_exponent__family" in names
    assert not any(n.startswith(("taxon_intercept__", "intercept_sd__")) for n in names)
    assert "taxon_exponent__order" not in names


@pytest.mark.parametrize("case", ["two levels, three terms", "one level, intercept only"])
def test_whitened_taxon_values_give_the_exact_marginal_likelihood(case):
    # The sampler sees each taxon value through its exact conditional given its parent and
    # the data below it (modeling._taxon_terms), plus a potential (prior density and
    # log-Jacobian). For a law linear in the taxon values with normal noise, the trait's
    # density plus that potential must equal the marginal density of the data with every
    # taxon value integrated out, for ANY value of the standard normals w. Outside check:
    # the marginal from the dense covariance of the nested normal model, y ~ N(F m, F C Fᵀ +
    # σ² I) (e.g. Gelman et al. 2013, Bayesian Data Analysis 3rd ed., ch. 15), evaluated with
    # scipy.stats.multivariate_normal.
    from scipy import stats

    sim = _nested_data()
    first = sim.data["family"].iloc[0]  # a family with a single species
    drop = sim.data.index[sim.data["family"] == first][1:]
    data = sim.data.drop(index=drop).reset_index(drop=True)
    sigma, ref = 0.3, 0.2
    if case == "two levels, three terms":
        levels = sim.levels
        spec = {"taxa": {"levels": "all", "vary": ["intercept", "exponent"]},
                "curvature": "shared_and_taxa"}
        terms = ["intercept", "exponent", "curvature"]
    else:
        levels = sim.levels
        spec = {"taxa": {"levels": "innermost", "vary": ["intercept"]}}
        terms = ["intercept"]
    spec["priors"] = {"sigma": {"fixed": sigma}, "intercept": {"mean": 0.4, "sd": 2.0}}
    spec = parse_spec(spec, name="w")
    model = build_model(data, spec, levels=levels, log_reference_size=ref)
    used = levels if len(terms) == 3 else levels[-1:]
    logp = model.compile_logp(vars=[model["trait"], *model.potentials], sum=True)

    rng = np.random.default_rng(7)
    x = data["log_size"].to_numpy() - ref
    y = data["log_trait"].to_numpy()
    feature = {"intercept": np.ones_like(x), "exponent": x, "curvature": x**2}
    prior = {"intercept": (0.4, 2.0), "exponent": (1.0, 1.0), "curvature": (0.0, 0.25)}
    for trial in range(3):
        point = model.initial_point()
        sds = {}
        for term in terms:
            for level in used:
                sds[term, level] = rng.uniform(0.05, 1.5) if trial else 1e-3  # near zero too
                point[f"{term}_sd__{level}_log__"] = np.log(sds[term, level])
        for name in point:
            if name.endswith("_w"):
                point[name] = rng.normal(0.0, 3.0, point[name].shape)
        shared_exponent = None
        if "exponent" not in terms:
            shared_exponent = 0.7
            point["exponent"] = np.array(shared_exponent)
        # dense nested model: each species' term value is the sum of the steps on its path
        mean = np.zeros(len(y))
        cov = sigma**2 * np.eye(len(y))
        for term in terms:
            m0, s0 = prior[term]
            paths = [np.ones((len(y), 1)) * s0]
            for level in used:
                onehot = pd.get_dummies(data[level]).to_numpy(dtype=float)
                paths.append(onehot * sds[term, level])
            loading = np.concatenate(paths, axis=1) * feature[term][:, None]
            mean += m0 * feature[term]
            cov += loading @ loading.T
        if shared_exponent is not None:
            mean += shared_exponent * x
        expected = stats.multivariate_normal(mean, cov).logpdf(y)
        assert float(logp(point)) == pytest.approx(expected, abs=1e-7), trial


def test_whitened_map_is_an_exact_change_of_variables_for_robust_models_too():
    # With Student-t residuals the data messages are only an approximation, but the model
    # must stay exact: the potential plus the N(0, 1) density of w must equal the nested
    # normal prior density of the taxon values θ(w) plus log |det ∂θ/∂w| (change of
    # variables). Outside check: the prior density from the dense covariance with
    # scipy.stats.multivariate_normal, the determinant with numpy (θ is linear in w given
    # the rest, so ∂θ/∂w is read off unit vectors).
    from scipy import stats

    sim = _nested_data()
    spec = parse_spec({"taxa": {"levels": "all"}, "residuals": "student_t",
                       "priors": {"intercept": {"mean": 0.4, "sd": 2.0}}}, name="t")
    model = build_model(sim.data, spec, levels=sim.levels, log_reference_size=0.1)
    assert len(model.potentials) == 1
    names = ["intercept", "exponent"]
    nodes = [[t, *(f"taxon_{t}__{lv}" for lv in sim.levels)] for t in names]
    outs = model.replace_rvs_by_values([model[n] for group in nodes for n in group]
                                       + list(model.potentials))
    fn = model.compile_fn(outs, inputs=model.value_vars, point_fn=True,
                          on_unused_input="ignore")
    rng = np.random.default_rng(5)
    point = model.initial_point()
    sds = {(t, lv): rng.uniform(0.1, 1.0) for t in names for lv in sim.levels}
    for (t, lv), v in sds.items():
        point[f"{t}_sd__{lv}_log__"] = np.log(v)
    point["nu_log__"] = np.log(4.0)
    sizes = [point[f"{t}_w"].size for t in names]

    def theta(w):
        for t, part in zip(names, np.split(w, np.cumsum(sizes)[:-1]), strict=True):
            point[f"{t}_w"] = part
        out = fn(point)
        return np.concatenate([np.atleast_1d(v) for v in out[:-1]]), float(out[-1])

    w = rng.normal(size=sum(sizes))
    value, potential = theta(w)
    base, _ = theta(np.zeros_like(w))
    jac = np.array([theta(e)[0] - base for e in np.eye(len(w))]).T
    # dense nested prior of (population, orders, families) per term
    parent = sim.data.groupby("family", sort=False)["order"].first()
    orders = list(dict.fromkeys(sim.data["order"]))
    mean, blocks = [], []
    for t, (m0, s0) in zip(names, [(0.4, 2.0), (1.0, 1.0)], strict=True):
        n_o, n_f = len(orders), len(parent)
        load = np.zeros((1 + n_o + n_f, 1 + n_o + n_f))
        load[:, 0] = s0
        for i in range(n_o):
            load[1 + i, 1 + i] = sds[t, "order"]
        for j, fam in enumerate(parent.index):
            o = orders.index(parent[fam])
            load[1 + n_o + j, 1 + o] = sds[t, "order"]
            load[1 + n_o + j, 1 + n_o + j] = sds[t, "family"]
        mean += [m0] * (1 + n_o + n_f)
        blocks.append(load @ load.T)
    cov = np.zeros((len(mean), len(mean)))
    at = 0
    for block in blocks:
        cov[at:at + len(block), at:at + len(block)] = block
        at += len(block)
    expected = (stats.multivariate_normal(mean, cov).logpdf(value)
                + np.linalg.slogdet(jac)[1])
    got = potential + stats.norm.logpdf(w).sum()
    assert got == pytest.approx(expected, abs=1e-7)


def test_taxon_values_are_drawn_down_the_tree_from_their_conditional():
    # The same map with no data messages is the plain non-centred form: value = parent +
    # SD × w, level by level (what prior draws and `parameterisation: non-centred` use).
    sim = _nested_data()
    spec = parse_spec({"taxa": {"levels": "all", "parameterisation": "non-centred"}}, name="n")
    model = build_model(sim.data, spec, levels=sim.levels, log_reference_size=0.0)
    assert not model.potentials
    outs = model.replace_rvs_by_values([model["taxon_intercept__family"],
                                        model["taxon_intercept__order"], model["intercept"]])
    fn = model.compile_fn(outs, inputs=model.value_vars, point_fn=True,
                          on_unused_input="ignore")
    point = model.initial_point()
    rng = np.random.default_rng(2)
    point["intercept_w"] = rng.normal(size=point["intercept_w"].shape)
    point["intercept_sd__order_log__"] = np.log(0.5)
    point["intercept_sd__family_log__"] = np.log(0.2)
    family, order, population = fn(point)
    w = point["intercept_w"]
    prior_mean = float(np.median(sim.data["log_trait"]))
    assert population == pytest.approx(prior_mean + 5.0 * w[0])
    parent = sim.data.groupby("family", sort=False)["order"].first()
    orders = list(dict.fromkeys(sim.data["order"]))
    np.testing.assert_allclose(order, population + 0.5 * w[1:1 + len(orders)])
    expected = [order[orders.index(parent[f])] for f in parent.index]
    np.testing.assert_allclose(family, np.array(expected) + 0.2 * w[1 + len(orders):])
