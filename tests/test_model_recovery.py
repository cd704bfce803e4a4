"""Recovery of known truth by the built models: simulated data, the demo truth, SBC."""

import json

import numpy as np
import pandas as pd
import pytest

from allolaw.model.builder import build_model
from allolaw.model.law import smooth_hinge
from allolaw.model.spec import load_spec, parse_spec
from allolaw.testing import quick_sample, simulate_breakpoint, simulate_curvature, simulate_taxa
from test_model_builder import MODELS, REPO


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
    idata = quick_sample(model, seed=13, draws=500, warmup=700, target_acceptance=0.95)
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
    idata = quick_sample(model, seed=14, draws=500, warmup=700, target_acceptance=0.95)
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
    ssr = [sm.OLS(y, np.column_stack([group, x, smooth_hinge(x - b, spec.hinge_width)
                                      - smooth_hinge(-b, spec.hinge_width)])).fit().ssr
           for b in grid]
    least_squares_break = grid[int(np.argmin(ssr))]
    assert abs(np.median(post["break_log_size"].values) - least_squares_break) < 0.05


@pytest.mark.mcmc
@pytest.mark.slow
@pytest.mark.parametrize(
    ("dataset", "model", "parameters"),
    [
        ("cell_scaling", "breakpoint", ["break_log_size", "exponent_above"]),
        ("tree_biomass", "individuals_within", ["exponent", "within_exponent"]),
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
    levels = list(prepared["levels"])  # with individuals the species level comes last
    log_ref = float(prepared["log_reference_size"])
    idata = quick_sample(build_model(data, load_spec(MODELS, model), levels=levels,
                                     log_reference_size=log_ref),
                         seed=15, draws=500, warmup=700, target_acceptance=0.95)
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
                    "--seeds", "4", "--jobs", "2", "--out", str(out)], check=True, cwd=REPO)
    result = json.loads(out.read_text())
    assert result["intervals"] == 40
    assert 0.7 <= result["coverage"] <= 1.0, result["coverage"]
    assert all(r["divergences"] == 0 for r in result["records"])


def test_simulated_tables_have_the_clean_csv_columns():
    sim = simulate_taxa(seed=1)
    expected = ["species", "order", "family", "log_size", "log_trait", "n_rows",
                "within_sd_log_size", "within_sd_log_trait", "sd_log_size", "sd_log_trait",
                "sd_source_size", "sd_source_trait", "replicate_var_log_size",
                "replicate_n_size", "replicate_var_log_trait", "replicate_n_trait",
                "replicate_cov_log_size_trait", "source", "flag_outlier", "flag_singleton_taxon"]
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
    # sampler per replicate crashed after many fits; the two run side by side).
    import subprocess
    import sys

    sys.path.insert(0, str(REPO / "benchmarks"))
    from calibration import PARAMETERS

    out = tmp_path / "sbc.json"
    subprocess.run(
        [sys.executable, str(REPO / "benchmarks" / "calibration.py"), "--replicates", "20",
         "--per-process", "10", "--jobs", "2", "--bins", "5", "--seed", "5", "--draws",
         "400", "--warmup", "600", "--out", str(out)], check=True, cwd=REPO,
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
                sampler={"draws": 50, "warmup": 50, "chains": 2})
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
