"""Error SDs estimated from replicates (model/error_sd.py).

Outside checks: the replicate-variance likelihood against scipy.stats.chi2; recovery and
coverage on invented data with known truth (simulations, said so at each test).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import scipy.stats

from allolaw.errors import UserError
from allolaw.model.builder import build_model
from allolaw.model.describing import describe_spec
from allolaw.model.error_sd import (
    read_replicate_errors,
    replicate_variance_kernel,
    replicate_variance_logp,
)
from allolaw.model.spec import load_spec, parse_spec
from allolaw.testing import quick_sample, simulate_pooled
from allolaw.testing.misspecified import simulate_correlated_errors
from allolaw.testing.misspecified_study import interval_covers, score_fit

REPO_MODELS = Path(__file__).resolve().parents[1] / "models"
POOLED_REPLICATES = {"size_error": "replicates", "taxa": {"levels": "none"}}


def _pooled_spec():
    return parse_spec(dict(POOLED_REPLICATES), name="pooled_replicates")


# --- the likelihood term --------------------------------------------------------------------

@pytest.mark.parametrize("n", [2, 3, 5, 20])
def test_replicate_variance_density_equals_scaled_chi_square(n):
    # (n − 1) s² / σ² ~ χ²(n − 1) for normal samples (Cochran 1934; Casella & Berger 2002,
    # Statistical Inference, 2nd ed., Thm 5.3.1 — theorem number from memory), so s² has the
    # χ² density with scale σ²/(n − 1); scipy's `scale` includes the 1/scale Jacobian
    # (scipy.stats docs: pdf(x, df, scale) = pdf(x/scale, df)/scale).
    rng = np.random.default_rng(n)
    variance = rng.gamma(2.0, 0.02, 50)
    sd = rng.uniform(0.02, 0.8, 50)
    reference = scipy.stats.chi2.logpdf(variance, df=n - 1, scale=sd**2 / (n - 1))
    assert np.allclose(replicate_variance_logp(variance, n, sd), reference, rtol=1e-10)
    # the kernel differs from it by a term free of σ, so it gives the same posterior
    diff = replicate_variance_logp(variance, n, sd) - replicate_variance_kernel(variance, n, sd)
    other = replicate_variance_logp(variance, n, 2 * sd) - replicate_variance_kernel(
        variance, n, 2 * sd)
    assert np.allclose(diff, other, rtol=0, atol=1e-9)


def test_model_replicate_term_changes_with_sd_as_scipy_chi_square():
    # the potential in the built model, between two values of the common error SD, moves
    # exactly as the sum of scipy χ² log densities (same reference as above)
    sim = simulate_pooled(seed=4, n_species=12, size_error_sd=0.1, replicates=3)
    model = build_model(sim.data, _pooled_spec(), levels=[], log_reference_size=0.0)
    term = model["size_replicate_variance"]
    point = model.initial_point()
    f = model.compile_fn(model.replace_rvs_by_values([term])[0], inputs=model.value_vars,
                         on_unused_input="ignore")
    variance = sim.data["replicate_var_log_size"].to_numpy()
    values = []
    refs = []
    for log_common in (np.log(0.05), np.log(0.3)):
        point["size_error_log_sd_common"] = log_common
        point["size_error_sd_w"] = np.linspace(-1, 1, 12)
        spread = np.exp(point["size_error_sd_spread_log__"])
        sd = np.exp(log_common + spread * np.linspace(-1, 1, 12))
        values.append(float(f(point)))
        refs.append(scipy.stats.chi2.logpdf(variance, df=2, scale=sd**2 / 2).sum())
    assert values[1] - values[0] == pytest.approx(refs[1] - refs[0], rel=1e-9)


def test_given_sds_stay_as_given_and_others_are_estimated():
    sim = simulate_pooled(seed=5, n_species=10, size_error_sd=0.1, replicates=2)
    data = sim.data.copy()
    data.loc[[0, 1], "sd_source_size"] = "given"
    data.loc[[0, 1], "sd_log_size"] = [0.2, 0.3]
    data.loc[2, ["sd_source_size", "replicate_n_size"]] = ["pooled", 1]
    model = build_model(data, _pooled_spec(), levels=[], log_reference_size=0.0)
    assert list(model.coords["size_error_species"]) == list(data["species"][2:])
    sd_mean = model.compile_fn(model.replace_rvs_by_values([model["size_error_sd_mean"]])[0],
                               inputs=model.value_vars,
                               on_unused_input="ignore")(model.initial_point())
    assert sd_mean[:2] == pytest.approx([0.2, 0.3])
    per_rep = np.exp(model.initial_point()["size_error_log_sd_common"])  # w = 0 at start
    assert sd_mean[2] == pytest.approx(per_rep)  # one value: SD of one replicate
    assert sd_mean[3:] == pytest.approx(per_rep / np.sqrt(2))


def test_species_without_any_replicates_or_given_sd_is_refused():
    sim = simulate_pooled(seed=6, n_species=8, size_error_sd=0.1, replicates=2)
    data = sim.data.copy()
    data.loc[3, "sd_source_size"] = "none"
    with pytest.raises(UserError, match=r"line 5, column 'sd_source_size', value 'none'"):
        read_replicate_errors(data, "size", "p", "clean.csv")


def test_missing_replicate_columns_name_the_column():
    sim = simulate_pooled(seed=6, n_species=8, size_error_sd=0.1, replicates=2)
    data = sim.data.drop(columns=["replicate_var_log_size"])
    with pytest.raises(UserError, match="column 'replicate_var_log_size' is needed"):
        build_model(data, _pooled_spec(), levels=[], log_reference_size=0.0)


def test_bad_replicate_count_or_variance_names_line_column_and_value():
    sim = simulate_pooled(seed=6, n_species=8, size_error_sd=0.1, replicates=2)
    data = sim.data.copy()
    data.loc[2, "replicate_n_size"] = 0
    with pytest.raises(UserError, match=r"line 4, column 'replicate_n_size', value 0"):
        read_replicate_errors(data, "size", "p", "clean.csv")
    data = sim.data.copy()
    data.loc[5, "replicate_var_log_size"] = -0.1
    with pytest.raises(UserError, match=r"line 7, column 'replicate_var_log_size', value -0.1"):
        read_replicate_errors(data, "size", "p", "clean.csv")


def test_estimated_error_sds_use_the_non_centred_forms():
    sim = simulate_pooled(seed=7, n_species=10, size_error_sd=0.1, trait_error_sd=0.05,
                          replicates=2)
    spec = parse_spec({**POOLED_REPLICATES, "trait_error": "replicates"}, name="p")
    model = build_model(sim.data, spec, levels=[], log_reference_size=0.0)
    free = {v.name for v in model.free_RVs}
    # one standard normal per species and axis; true sizes in units of their error SD
    assert {"size_error_sd_w", "trait_error_sd_w", "size_error_u"} <= free
    assert "true_log_size" not in free
    prior = build_model(sim.data, spec, levels=[], log_reference_size=0.0, prior_only=True)
    assert not prior.potentials  # prior draws: no replicate data, plain population form


def test_methods_text_states_the_error_sd_model_and_its_priors():
    text = describe_spec(parse_spec({"size_error": "replicates", "trait_error": "known",
                                     "priors": {"error_sd_common": {"median": 0.2,
                                                                    "log_sd": 1.0}}},
                                    name="p"))
    assert "normal(ln 0.2, 1)" in text
    assert "half-normal(0.5)" in text
    assert "chi-square with n − 1 degrees of freedom" in text
    assert "one value takes its error SD from the pooled distribution" in text
    assert "The trait's measurement-error variance of each species (SD given per species, " \
        "taken as exact)" in text
    assert "independent between replicates, between size and trait" in text
    known = describe_spec(parse_spec({"size_error": "known"}, name="k"))
    assert "chi-square" not in known
    assert "taken as exact" in known


# --- exact agreement of two replicates (the old failure) ------------------------------------

@pytest.mark.mcmc
def test_two_replicates_that_agree_exactly_do_not_give_a_near_zero_error_sd():
    # Invented data with known truth: 30 species, 2 replicates each, SD of the species mean
    # 0.1 (one replicate 0.141). Species 1's replicates are made to agree exactly: its
    # clean-table SD is 0, which the former model took as exact (floored at 1e-3).
    sim = simulate_pooled(seed=19, n_species=30, size_error_sd=0.1, replicates=2)
    data = sim.data.copy()
    data.loc[0, ["within_sd_log_size", "sd_log_size", "replicate_var_log_size"]] = 0.0
    model = build_model(data, _pooled_spec(), levels=[], log_reference_size=0.0)
    idata = quick_sample(model, seed=19, draws=300, warmup=300, chains=1)
    post = idata.posterior
    sd0 = post["size_error_sd_mean"].values[..., 0].reshape(-1)
    true0 = post["true_log_size"].values[..., 0].reshape(-1)
    assert int(idata.sample_stats["diverging"].sum()) == 0
    # not near zero: its 5% quantile is at least a fifth of the truth (100× the old floor)
    assert np.quantile(sd0, 0.05) > 0.02
    assert np.median(sd0) == pytest.approx(0.1, rel=0.5)
    assert true0.std() > 0.04  # its true size is uncertain by about the error SD


# --- recovery studies (slow) ----------------------------------------------------------------

@pytest.mark.slow
@pytest.mark.mcmc
def test_true_sizes_from_two_replicates_cover_at_the_nominal_rate():
    # Invented data with known truth: 200 species, one law (exponent 0.75, residual SD 0.1),
    # true log sizes normal(0, 1.5), two replicates per species with SD 0.141 each (the SD
    # of the species mean 0.1). Design: 90% central intervals of the 200 true log sizes;
    # nominal 0.9, binomial SD sqrt(0.09/200) = 0.021, so 85–95% is about ±2.4 SD.
    sim = simulate_pooled(seed=1919, n_species=200, size_error_sd=0.1, replicates=2)
    model = build_model(sim.data, _pooled_spec(), levels=[], log_reference_size=0.0)
    idata = quick_sample(model, seed=1919, draws=400, warmup=400, chains=1)
    draws = idata.posterior["true_log_size"].values.reshape(-1, len(sim.data))
    truth = np.asarray(sim.truth["true_log_size"])
    _, _, inside = interval_covers(draws, truth, prob=0.9)
    coverage = float(inside.mean())
    assert int(idata.sample_stats["diverging"].sum()) == 0
    assert 0.85 <= coverage <= 0.95, coverage
    # the former reading (each SD from two replicates taken as exact): measured ± 1.645 SD
    # covers far less (a t with 1 degree of freedom read as a normal: 2·atan(1.645)/π ≈ 0.65)
    obs, sd = sim.data["log_size"].to_numpy(), sim.data["sd_log_size"].to_numpy()
    exact = float((np.abs(truth - obs) <= 1.645 * sd).mean())
    assert exact < 0.8, exact


@pytest.mark.slow
@pytest.mark.mcmc
@pytest.mark.xfail(strict=True, reason=(
    "measured 2026-12-04, seed 1923, 2 chains × 400: with the estimated error correlation "
    "(0.915, 90% 0.899-0.929; the data's pooled replicate correlation 0.914) the exponent is "
    "0.836 (90% 0.786-0.893), down from 0.857 (0.793-0.927) with independent errors. The "
    "overshoot is gone but this realisation lies high: the least-squares slopes of the "
    "species means within each genus average 0.832 (true values within genus: 0.808), and "
    "the population exponent is close to that average; seed 2077 covers (test below)"))
def test_correlated_size_and_trait_errors_do_not_push_the_exponent_out_of_its_interval():
    # Invented data with known truth (testing.misspecified.simulate_correlated_errors): 8
    # genera × 12 species, 4 individuals each; an individual's trait follows its own size with
    # the between-species exponent 0.75, so a species mean's size and trait errors are
    # correlated (0.91). The errors and their correlation are estimated from the individuals'
    # spread (error_correlation: estimated, the default). Design: one fit; the truth must lie
    # in the 90% interval of the population exponent.
    sim = simulate_correlated_errors(seed=1923)
    spec = load_spec(REPO_MODELS, "taxa_errors")
    model = build_model(sim.data, spec, levels=sim.levels, log_reference_size=0.0)
    idata = quick_sample(model, seed=1923, draws=400, warmup=400, chains=2)
    record = score_fit(idata, sim, spec)
    assert record["divergences"] == 0
    assert record["lo"] <= 0.75 <= record["hi"], record
    assert record["max_rhat"] < 1.05


@pytest.mark.slow
@pytest.mark.mcmc
def test_estimated_error_correlation_keeps_the_exponent_in_its_interval_on_a_fresh_seed():
    # Invented data with known truth, as above, seed 2077 (chosen before its fit; seed 1923
    # is the xfail test above). Measured 2026-12-04, 2 chains × 400: exponent 0.773 (90%
    # 0.713-0.829), correlation 0.935 (0.921-0.947). The correlation is checked against the
    # data's own pooled replicate correlation Σ cov / sqrt(Σ var_x · Σ var_y) (0.934; the
    # pooled moment estimate, common practice, no source), not the generating 0.914, which
    # this realisation misses by about two standard errors ((1 − ρ²)/sqrt(288 df) ≈ 0.01,
    # large-sample SE of a correlation, from memory).
    sim = simulate_correlated_errors(seed=2077)
    spec = load_spec(REPO_MODELS, "taxa_errors")
    assert spec.error_correlation == "estimated"
    model = build_model(sim.data, spec, levels=sim.levels, log_reference_size=0.0)
    idata = quick_sample(model, seed=2077, draws=400, warmup=400, chains=2)
    record = score_fit(idata, sim, spec)
    assert record["divergences"] == 0
    assert record["max_rhat"] < 1.05
    assert record["lo"] <= 0.75 <= record["hi"], record
    d = sim.data
    pooled = d["replicate_cov_log_size_trait"].sum() / np.sqrt(
        d["replicate_var_log_size"].sum() * d["replicate_var_log_trait"].sum())
    rho = idata.posterior["error_correlation"].values.reshape(-1)
    assert np.quantile(rho, 0.05) <= pooled <= np.quantile(rho, 0.95), (pooled, rho.mean())


@pytest.mark.slow  # ten fits: about 10 minutes on the shared machine; not in CI (seed 2077 is)
@pytest.mark.mcmc
def test_correlated_errors_exponent_intervals_cover_at_the_nominal_rate_over_ten_seeds():
    # Invented data with known truth, as above; seeds 1923-1932 fixed before any of their fits
    # except 1923 (the realisation above that misses), which is kept in on purpose. One seed
    # is one draw of a 90% interval: a single miss says little (a calibrated interval misses
    # one time in ten), so "does not push the exponent out of its interval" is judged as a
    # rate. Calibrated 90% intervals give at least 7 hits of 10 with probability
    # P(Binomial(10, 0.9) >= 7) = 0.987 (scipy.stats.binom). The mean of the posterior means
    # must also lie within 3 standard errors (their spread / sqrt(10)) of the truth 0.75.
    # Measured 2026-12-04 (10 min): 9 of 10 cover (the miss is 1923), mean of the posterior
    # means 0.752 (range 0.706-0.836), 3/4 the most probable named value in 9 of 10, no
    # divergence, largest R-hat 1.015.
    spec = load_spec(REPO_MODELS, "taxa_errors")
    records = []
    for seed in range(1923, 1933):
        sim = simulate_correlated_errors(seed=seed)
        model = build_model(sim.data, spec, levels=sim.levels, log_reference_size=0.0)
        idata = quick_sample(model, seed=seed, draws=400, warmup=400, chains=2)
        records.append(score_fit(idata, sim, spec))
    hits = sum(r["covers"] for r in records)
    means = np.array([r["mean"] for r in records])
    assert scipy.stats.binom.sf(6, 10, 0.9) == pytest.approx(0.987, abs=5e-4)
    assert hits >= 7, [(r["lo"], r["hi"]) for r in records]
    assert abs(means.mean() - 0.75) < 3 * means.std(ddof=1) / np.sqrt(len(means)), means
