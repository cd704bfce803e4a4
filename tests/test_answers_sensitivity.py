"""Tests of allolaw.answers.sensitivity.

Outside reference: a line with known residual SD and normal priors has a normal posterior in
closed form (Gelman et al. 2013, *Bayesian Data Analysis*, 3rd ed., section 14.8), so the
posterior under the exponent prior with doubled SD — power-scaling by α = 1/4, since
N(m, s²)^α ∝ N(m, s²/α) (Kallioinen et al. 2023, section 2) — is known exactly. Draws are exact
posterior draws from allolaw.testing (invented data, known truth).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from allolaw.answers.sensitivity import (
    ScaledAnswer,
    judge_changes,
    log_prior_components,
    power_scale_sensitivity,
    power_scale_weights,
)
from allolaw.testing.posteriors import conjugate_line_posterior

PRIOR_MEAN, PRIOR_SD = 0.6, 0.2
SETTINGS = {"exponents": [{"name": "3/4", "value": 0.75}, {"name": "2/3", "value": 2 / 3}],
            "other_weight": 1.0, "interval_halfwidth": 0.03}


def _line(seed, prior_sd=PRIOR_SD):
    return conjugate_line_posterior(seed=seed, n_obs=12, sigma=0.5, true_exponent=0.75,
                                    prior_mean=PRIOR_MEAN, prior_sd=prior_sd, draws=4000)


def _closed_form(idata, prior_sd):
    """Posterior mean and SD of the exponent with prior N(PRIOR_MEAN, prior_sd²)."""
    x = np.asarray(idata.constant_data["log_size_obs"].values)
    y = np.asarray(idata.observed_data["trait"].values)
    design = np.column_stack([np.ones_like(x), x])
    prior_prec = np.diag([5.0**-2, prior_sd**-2])
    prec = prior_prec + design.T @ design / 0.5**2
    cov = np.linalg.inv(prec)
    mean = cov @ (prior_prec @ np.array([0.0, PRIOR_MEAN]) + design.T @ y / 0.5**2)
    return float(mean[1]), float(math.sqrt(cov[1, 1]))


def _spec(prior_sd=PRIOR_SD):
    return {"residuals": "normal", "priors": {"exponent": {"mean": PRIOR_MEAN,
                                                           "sd": prior_sd}}}


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_doubling_the_prior_sd_by_power_scaling_matches_the_closed_form(seed):
    line = _line(seed)
    out = power_scale_sensitivity(line.idata, _spec(), SETTINGS, alphas=(0.25,),
                                  components=("exponent",))
    (scaled,) = out.scaled
    assert scaled.reliable
    mean, sd = _closed_form(line.idata, 2 * PRIOR_SD)
    assert abs(mean - _closed_form(line.idata, PRIOR_SD)[0]) > 0.02  # the prior matters here
    lp = log_prior_components(line.idata, _spec())["exponent"]
    w, _ = power_scale_weights(lp, 0.25)
    ess = 1.0 / np.sum(w**2)
    mc = sd / math.sqrt(ess)
    assert abs(scaled.exponent_mean - mean) < 4 * mc
    for h in SETTINGS["exponents"]:
        v = h["value"]
        exact = stats.norm.cdf(v + 0.03, mean, sd) - stats.norm.cdf(v - 0.03, mean, sd)
        p_mc = math.sqrt(exact * (1 - exact) / ess)
        assert abs(scaled.interval_probs[h["name"]] - exact) < 4 * p_mc + 1e-3
    # Savage–Dickey probabilities with the doubled prior, closed form (Dickey 1971)
    bf = {h["name"]: stats.norm.pdf(h["value"], mean, sd)
          / stats.norm.pdf(h["value"], PRIOR_MEAN, 2 * PRIOR_SD) for h in SETTINGS["exponents"]}
    total = sum(bf.values()) + 1.0
    for name, b in bf.items():
        assert scaled.probs[name] == pytest.approx(b / total, abs=0.02)


def test_base_answer_equals_the_closed_form_without_scaling():
    line = _line(4)
    out = power_scale_sensitivity(line.idata, _spec(), SETTINGS, components=())
    mean, sd = _closed_form(line.idata, PRIOR_SD)
    bf = {h["name"]: stats.norm.pdf(h["value"], mean, sd)
          / stats.norm.pdf(h["value"], PRIOR_MEAN, PRIOR_SD) for h in SETTINGS["exponents"]}
    total = sum(bf.values()) + 1.0
    for name, b in bf.items():
        assert out.base.probs[name] == pytest.approx(b / total, abs=0.01)


def test_named_weights_power_scaling_changes_probabilities_analytically():
    line = _line(5)
    settings = {**SETTINGS, "exponents": [{"name": "3/4", "value": 0.75, "weight": 2.0},
                                          {"name": "2/3", "value": 2 / 3, "weight": 1.0}]}
    out = power_scale_sensitivity(line.idata, _spec(), settings, alphas=(2.0,),
                                  components=("named_weights",))
    (scaled,) = out.scaled
    base = out.base.probs
    # weights (2, 1, 1) → (4, 1, 1): the odds of 3/4 against the others double
    assert scaled.probs["3/4"] / scaled.probs["2/3"] == pytest.approx(
        2 * base["3/4"] / base["2/3"])
    assert scaled.probs["2/3"] / scaled.probs["another value"] == pytest.approx(
        base["2/3"] / base["another value"])


def test_every_scaled_answer_reports_a_pareto_k_and_probability_ranges():
    line = _line(6)
    out = power_scale_sensitivity(line.idata, _spec(), SETTINGS)
    assert {a.component for a in out.scaled} >= {"exponent", "named_weights"}
    for a in out.scaled:
        if a.component == "exponent":
            assert np.isfinite(a.pareto_k)
    for name, (lo, hi) in out.ranges.items():
        assert lo <= out.base.probs[name] <= hi


def test_extreme_power_scaling_is_flagged_unreliable():
    # a tight prior (SD 0.05) that dominates the posterior: α = 0.01 flattens it, so the
    # weights are heavy-tailed (Pareto k > 0.7); α = 10⁵ sharpens it far beyond the
    # posterior: the weights fall on few draws (low ESS)
    line = _line(7, prior_sd=0.05)
    out = power_scale_sensitivity(line.idata, _spec(0.05), SETTINGS, alphas=(0.01, 1e5),
                                  components=("exponent",))
    flat, sharp = out.scaled
    assert flat.pareto_k > 0.7
    assert not flat.reliable
    assert sharp.ess < 100
    assert not sharp.reliable
    assert "Not assessed" in out.sentence


def _answer(top, probs, *, reliable=True, alpha=2.0):
    return ScaledAnswer(component="exponent", alpha=alpha, pareto_k=0.1 if reliable else 1.2,
                        ess=1000.0,
                        reliable=reliable, exponent_mean=0.7, probs=probs,
                        interval_probs={}, top=top)


@pytest.mark.parametrize(("scaled", "changes", "why"), [
    (_answer("3/4", {"3/4": 0.62, "2/3": 0.2}), False, ""),
    (_answer("2/3", {"3/4": 0.3, "2/3": 0.5}), True, "most probable becomes 2/3"),
    (_answer("3/4", {"3/4": 0.93, "2/3": 0.02}), True, "moves from 0.70 to 0.93"),
    (_answer("3/4", {"3/4": 0.49, "2/3": 0.2}), True, "moves"),
    (_answer("2/3", {"3/4": 0.1, "2/3": 0.8}, reliable=False), False, ""),
])
def test_changes_rule_on_hand_built_answers(scaled, changes, why):
    base = _answer("3/4", {"3/4": 0.70, "2/3": 0.15}, alpha=1.0)
    got, reasons = judge_changes(base, [scaled])
    assert got is changes
    assert why in " ".join(reasons)


def test_crossing_one_half_counts_as_a_change():
    base = _answer("3/4", {"3/4": 0.55, "2/3": 0.2}, alpha=1.0)
    got, reasons = judge_changes(base, [_answer("3/4", {"3/4": 0.45, "2/3": 0.3})])
    assert got
    assert "crosses 0.5" in reasons[0]


def test_taxon_sd_scaling_of_a_fixed_sd_changes_nothing():
    from allolaw.testing.posteriors import conjugate_hierarchy_posterior

    # the taxon SD is fixed in these draws (constant log prior): weights stay uniform
    h = conjugate_hierarchy_posterior(seed=3, prior_mean=0.6, prior_sd=0.2)
    spec = {"residuals": "normal", "priors": {"exponent": {"mean": 0.6, "sd": 0.2},
                                              "exponent_sd": {"sd": 0.25}}}
    out = power_scale_sensitivity(h.idata, spec, SETTINGS, alphas=(0.5, 2.0),
                                  components=("taxon_sd",))
    for a in out.scaled:
        assert a.probs == pytest.approx(out.base.probs)
        assert a.reliable
    assert not out.changes


def _mcmc_taxa_fit(prior_sd, seed):
    import warnings

    from allolaw.model.builder import build_model
    from allolaw.model.sampling import fit_model
    from allolaw.model.spec import parse_spec
    from allolaw.testing.data import simulate_taxa

    # invented data with known truth: 3 orders × 2 families × 4 species, exponent 0.75
    sim = simulate_taxa(seed=41, species_per_taxon=4, sigma=0.2, exponent_sd=0.05)
    spec = parse_spec({"taxa": {"levels": "all", "vary": ["intercept", "exponent"]},
                       "priors": {"exponent": {"mean": 0.6, "sd": prior_sd}}}, name="t")
    model = build_model(sim.data, spec, levels=sim.levels, log_reference_size=0.0)
    prior_model = build_model(sim.data, spec, levels=sim.levels, log_reference_size=0.0,
                              prior_only=True)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # short chains: convergence warnings expected
        idata = fit_model(model, chains=2, draws=1000, warmup=500, seed=seed, prior_draws=20,
                          prior_model=prior_model)
    return idata, spec


@pytest.mark.slow
@pytest.mark.mcmc
def test_reweighting_a_real_fit_matches_a_refit_with_the_doubled_prior_sd():
    # reference: a second MCMC fit with the exponent prior SD doubled (α = 1/4)
    base, spec = _mcmc_taxa_fit(0.08, 1)
    refit, spec2 = _mcmc_taxa_fit(0.16, 2)
    out = power_scale_sensitivity(base, spec, SETTINGS, alphas=(0.25,),
                                  components=("exponent",))
    (scaled,) = out.scaled
    ref = power_scale_sensitivity(refit, spec2, SETTINGS, components=()).base
    b = refit.posterior["exponent"].values.ravel()
    assert scaled.reliable
    assert abs(scaled.exponent_mean - b.mean()) < 4 * b.std() / math.sqrt(400)
    for name, p in ref.probs.items():
        assert scaled.probs[name] == pytest.approx(p, abs=0.05)


def test_likelihood_power_scaling_matches_the_closed_form():
    # likelihood^α with normal residuals is the same model with residual SD σ/√α, so the
    # scaled posterior is again the closed-form conjugate one (section 14.8 as above)
    import xarray as xr

    line = _line(8)
    idata = line.idata
    x = np.asarray(idata.constant_data["log_size_obs"].values)
    y = np.asarray(idata.observed_data["trait"].values)
    a = idata.posterior["intercept"].values[..., None]
    b = idata.posterior["exponent"].values[..., None]
    ll = stats.norm.logpdf(y, a + b * x, 0.5)
    idata.add_groups(log_likelihood=xr.Dataset(
        {"trait": (("chain", "draw", "species"), ll)},
        coords={"chain": idata.posterior.chain, "draw": idata.posterior.draw}))
    out = power_scale_sensitivity(idata, _spec(), SETTINGS, alphas=(0.5,),
                                  components=("likelihood",))
    (scaled,) = out.scaled
    assert scaled.reliable
    design = np.column_stack([np.ones_like(x), x])
    prior_prec = np.diag([5.0**-2, PRIOR_SD**-2])
    prec = prior_prec + 0.5 * design.T @ design / 0.5**2
    cov = np.linalg.inv(prec)
    mean = (cov @ (prior_prec @ np.array([0.0, PRIOR_MEAN]) + 0.5 * design.T @ y / 0.5**2))[1]
    sd = math.sqrt(cov[1, 1])
    assert abs(scaled.exponent_mean - mean) < 4 * sd / math.sqrt(scaled.ess)
    exact = stats.norm.cdf(0.78, mean, sd) - stats.norm.cdf(0.72, mean, sd)
    assert abs(scaled.interval_probs["3/4"] - exact) < 4 * math.sqrt(exact / scaled.ess) + 1e-3
