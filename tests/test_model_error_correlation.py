"""Correlated size and trait errors of a species mean (model/error_correlation.py).

Outside checks: the conditional-normal trait term against scipy.stats.multivariate_normal,
the paired-replicate term against scipy.stats.wishart and, for two replicates, against the
bivariate normal density of the one contrast (Helmert's transformation).
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.stats

from allolaw.errors import UserError
from allolaw.model.builder import build_model
from allolaw.model.describing import describe_spec
from allolaw.model.error_correlation import conditional_trait_error, paired_covariance_kernel
from allolaw.model.error_sd import replicate_variance_kernel
from allolaw.model.spec import parse_spec
from allolaw.testing.misspecified import simulate_correlated_errors

BOTH = {"size_error": "replicates", "trait_error": "replicates", "taxa": {"levels": "none"}}


def _sigma(sd_x, sd_y, rho):
    return np.array([[sd_x**2, rho * sd_x * sd_y], [rho * sd_x * sd_y, sd_y**2]])


@pytest.mark.parametrize(("sd_x", "sd_y", "rho"), [(0.3, 0.1, 0.9), (0.05, 0.4, -0.6),
                                                   (1.0, 1.0, 0.0)])
def test_size_error_times_conditional_trait_error_is_the_bivariate_normal(sd_x, sd_y, rho):
    # p(e_x, e_y) = p(e_x) · p(e_y | e_x), the conditional of a bivariate normal (Gelman et
    # al. 2013, BDA3 §3.5; Anderson 2003, Thm 2.5.1); reference: scipy's joint density
    rng = np.random.default_rng(3)
    errors = rng.normal(size=(20, 2)) * [sd_x, sd_y]
    mean, sd = conditional_trait_error(errors[:, 0], sd_x, sd_y, rho)
    ours = (scipy.stats.norm.logpdf(errors[:, 0], 0.0, sd_x)
            + scipy.stats.norm.logpdf(errors[:, 1], mean, sd))
    reference = scipy.stats.multivariate_normal(np.zeros(2), _sigma(sd_x, sd_y, rho)).logpdf(
        errors)
    assert np.allclose(ours, reference, rtol=1e-12)


def _joint_kernel(var_x, var_y, cov, n, sd_x, sd_y, rho):
    return (replicate_variance_kernel(var_x, n, sd_x) + replicate_variance_kernel(var_y, n, sd_y)
            + paired_covariance_kernel(var_x, var_y, cov, n, sd_x, sd_y, rho))


@pytest.mark.parametrize("n", [3, 4, 10])
def test_paired_replicate_term_moves_as_the_wishart_density(n):
    # (n − 1)·S ~ Wishart(n − 1, Σ) for n normal pairs (Anderson 2003, Thm 7.2.2); the
    # kernel differs from scipy's log density by a term free of Σ, so differences between
    # two values of (σ_x, σ_y, ρ) agree
    rng = np.random.default_rng(n)
    pairs = rng.multivariate_normal([0, 0], _sigma(0.3, 0.2, 0.7), size=n)
    s = np.cov(pairs.T, ddof=1)
    points = [(0.3, 0.2, 0.7), (0.5, 0.1, -0.2), (0.2, 0.25, 0.95)]
    ours = [_joint_kernel(s[0, 0], s[1, 1], s[0, 1], n, *p) for p in points]
    ref = [scipy.stats.wishart(df=n - 1, scale=_sigma(*p)).logpdf((n - 1) * s) for p in points]
    assert np.allclose(np.diff(ours), np.diff(ref), rtol=1e-10)


def test_two_replicates_give_the_density_of_their_one_contrast():
    # with two pairs the cross-product matrix is singular (no Wishart density); the
    # likelihood of Σ is that of the contrast (p₁ − p₂)/√2 ~ N(0, Σ) (Helmert's transformation)
    pairs = np.array([[0.1, 0.3], [-0.2, 0.05]])
    s = np.cov(pairs.T, ddof=1)
    contrast = (pairs[0] - pairs[1]) / np.sqrt(2)
    points = [(0.3, 0.2, 0.7), (0.5, 0.1, -0.2), (0.2, 0.25, 0.95)]
    ours = [_joint_kernel(s[0, 0], s[1, 1], s[0, 1], 2, *p) for p in points]
    ref = [scipy.stats.multivariate_normal(np.zeros(2), _sigma(*p)).logpdf(contrast)
           for p in points]
    assert np.allclose(np.diff(ours), np.diff(ref), rtol=1e-10)


def _small():
    return simulate_correlated_errors(seed=5, genera=2, species_per_genus=6)


def _value(model, name, point):
    f = model.compile_fn(model.replace_rvs_by_values([model[name]])[0],
                         inputs=model.value_vars, on_unused_input="ignore")
    return np.asarray(f(point))


def test_built_model_trait_term_is_the_conditional_normal():
    # at a point with ρ ≠ 0 and sizes moved off their measured values, the model's trait
    # log-likelihood equals the bivariate normal of (size error, trait error) minus the
    # size error's own normal density (scipy references)
    sim = _small()
    model = build_model(sim.data, parse_spec(dict(BOTH), name="b"), levels=[],
                        log_reference_size=0.0)
    point = model.initial_point()
    point["error_correlation_interval__"] = np.array(1.2)  # ρ = tanh(0.6) ≈ 0.54
    point["size_error_u"] = np.linspace(-1.5, 1.5, len(sim.data))
    rho = float(_value(model, "error_correlation", point))
    sd_x = _value(model, "size_error_sd_mean", point)
    sd_y = _value(model, "trait_error_sd_mean", point)
    true_x = _value(model, "true_log_size", point)
    sigma = float(_value(model, "sigma", point))
    law = (_value(model, "intercept", point) + _value(model, "exponent", point) * true_x)
    e_x = sim.data["log_size"].to_numpy() - true_x
    e_y = sim.data["log_trait"].to_numpy() - law
    # the residual σ adds to the trait error: Σ = [[s_x², ρ s_x s_y], [ρ s_x s_y, s_y² + σ²]]
    joint = [scipy.stats.multivariate_normal(
        np.zeros(2), [[a**2, rho * a * b], [rho * a * b, b**2 + sigma**2]]).logpdf([ex, ey])
        for a, b, ex, ey in zip(sd_x, sd_y, e_x, e_y, strict=True)]
    reference = np.array(joint) - scipy.stats.norm.logpdf(e_x, 0.0, sd_x)
    trait = model.compile_fn(model.logp(vars=[model["trait"]], sum=False)[0],
                             inputs=model.value_vars, on_unused_input="ignore")(point)
    assert abs(rho) > 0.5
    assert np.allclose(trait, reference, rtol=1e-9)


def test_replicate_covariance_term_in_the_model_is_the_kernel():
    sim = _small()
    model = build_model(sim.data, parse_spec(dict(BOTH), name="b"), levels=[],
                        log_reference_size=0.0)
    point = model.initial_point()
    point["error_correlation_interval__"] = np.array(-0.8)
    point["size_error_sd_w"] = np.linspace(-1, 1, len(sim.data))
    term = model.compile_fn(model.replace_rvs_by_values([model["replicate_covariance"]])[0],
                            inputs=model.value_vars, on_unused_input="ignore")(point)
    d = sim.data
    expected = paired_covariance_kernel(
        d["replicate_var_log_size"].to_numpy(), d["replicate_var_log_trait"].to_numpy(),
        d["replicate_cov_log_size_trait"].to_numpy(), d["replicate_n_size"].to_numpy(float),
        _value(model, "size_error_sd_replicate", point),
        _value(model, "trait_error_sd_replicate", point),
        float(_value(model, "error_correlation", point))).sum()
    assert float(term) == pytest.approx(expected, rel=1e-9)


def test_error_correlation_none_or_one_replicate_axis_keeps_errors_independent():
    sim = _small()
    off = build_model(sim.data, parse_spec({**BOTH, "error_correlation": "none"}, name="n"),
                      levels=[], log_reference_size=0.0)
    one_axis = build_model(sim.data, parse_spec({**BOTH, "trait_error": "none"}, name="s"),
                           levels=[], log_reference_size=0.0)
    assert "error_correlation" not in off.named_vars
    assert "error_correlation" not in one_axis.named_vars
    prior = build_model(sim.data, parse_spec(dict(BOTH), name="b"), levels=[],
                        log_reference_size=0.0, prior_only=True)
    assert "error_correlation" in prior.named_vars
    assert "replicate_covariance" not in prior.named_vars  # prior draws: no replicate data


def test_no_species_with_a_replicate_covariance_keeps_errors_independent():
    # nothing to learn ρ from: no correlation parameter (its prior alone would be read)
    sim = _small()
    data = sim.data.assign(replicate_cov_log_size_trait=np.nan)
    model = build_model(data, parse_spec(dict(BOTH), name="b"), levels=[],
                        log_reference_size=0.0)
    assert "error_correlation" not in model.named_vars


def test_table_with_every_sd_given_needs_no_covariance_column():
    # SDs given per species (none estimated): ρ applies to no species, so the column of
    # replicate covariances is not needed (e.g. the planning stage's simulated tables)
    sim = _small()
    data = sim.data.drop(columns=["replicate_cov_log_size_trait"]).assign(
        sd_source_size="given", sd_source_trait="given")
    model = build_model(data, parse_spec(dict(BOTH), name="b"), levels=[],
                        log_reference_size=0.0)
    assert "error_correlation" not in model.named_vars


def test_missing_or_impossible_covariance_names_file_line_column_and_value():
    sim = _small()
    spec = parse_spec(dict(BOTH), name="b")
    with pytest.raises(UserError, match="column 'replicate_cov_log_size_trait' is needed"):
        build_model(sim.data.drop(columns=["replicate_cov_log_size_trait"]), spec, levels=[],
                    log_reference_size=0.0)
    data = sim.data.copy()
    data.loc[3, "replicate_cov_log_size_trait"] = 5.0
    with pytest.raises(UserError, match=r"line 5, column 'replicate_cov_log_size_trait', "
                                        r"value 5.0"):
        build_model(data, spec, levels=[], log_reference_size=0.0)


def test_methods_text_states_the_error_correlation():
    text = describe_spec(parse_spec(dict(BOTH), name="b"))
    assert "bivariate normal with one correlation for the dataset" in text
    assert "uniform(−1, 1)" in text
    off = describe_spec(parse_spec({**BOTH, "error_correlation": "none"}, name="n"))
    assert "independent between replicates, between size and trait" in off
