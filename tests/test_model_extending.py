"""Tests of allolaw.model.extending: one chain extension from the adapted sampler state.

Hand-built draws for the decision (no MCMC); small seeded nutpie fits of a conjugate normal
model for the extension itself, checked against its closed-form posterior.
"""

from __future__ import annotations

import json
import math

import arviz as az
import numpy as np
import pytest

from allolaw.model.extending import (
    ESS_MIN,
    RHAT_MAX,
    AdaptedState,
    convergence_numbers,
    extend_if_short,
)

# --- the decision, on hand-built draws ------------------------------------------------------


def _iid(chains, draws, seed, shift=0.0):
    # invented draws: independent normal values, so R-hat ≈ 1 and ESS ≈ chains × draws
    rng = np.random.default_rng(seed)
    mu = rng.normal(size=(chains, draws))
    mu[0] += shift
    return az.from_dict(posterior={"mu": mu, "fixed": np.ones((chains, draws))},
                        sample_stats={"diverging": np.zeros((chains, draws), dtype=bool)})


def test_run_that_meets_the_thresholds_is_not_extended():
    idata = _iid(4, 1000, seed=1)
    out, record = extend_if_short(None, idata, None, extra_draws=1000, seed=1,
                                  backend="nutpie", target_acceptance=0.9)
    assert out is idata
    assert record["status"] == "not needed"
    assert record["extra_draws_per_chain"] == 0
    assert record["draws_per_chain_after"] == 1000
    assert record["before"]["rhat"] <= RHAT_MAX
    assert record["before"]["ess_bulk"] >= ESS_MIN


def test_short_run_without_an_adapted_state_is_reported_not_extended():
    idata = _iid(2, 50, seed=2, shift=3.0)
    out, record = extend_if_short(None, idata, None, extra_draws=50, seed=1, backend="pymc",
                                  target_acceptance=0.9)
    assert out is idata
    assert record["status"] == "not available"
    assert "backend pymc" in record["reason"]
    assert "R-hat" in record["reason"]
    assert "bulk ESS" in record["reason"]


def test_short_run_with_extension_off_says_so_without_computing_r_hat(monkeypatch):
    from allolaw.model import extending

    def refuse(posterior):
        raise AssertionError("R-hat and ESS computed with the extension off")

    monkeypatch.setattr(extending, "convergence_numbers", refuse)
    idata = _iid(2, 50, seed=3)
    out, record = extend_if_short(None, idata, None, extra_draws=0, seed=1,
                                  backend="nutpie", target_acceptance=0.9)
    assert out is idata
    assert record["status"] == "off"
    assert "extension_draws is 0" in record["reason"]
    assert record["before"] is None
    assert record["after"] is None


def test_low_rank_fit_without_its_unconstrained_draws_is_reported_not_extended():
    idata = _iid(2, 50, seed=5, shift=3.0)
    # nutpie's low-rank part in use, but the posterior lacks the value variable mu_log__
    state = AdaptedState(value_vars=("mu_log__",), inverse_mass=np.ones((2, 1)),
                         step_size=np.array([0.5, 0.5]), low_rank_left_out=np.array([0, 2]))
    out, record = extend_if_short(None, idata, state, extra_draws=50, seed=1,
                                  backend="nutpie", target_acceptance=0.9)
    assert out is idata
    assert record["status"] == "not available"
    assert "low-rank part (2 direction(s))" in record["reason"]
    assert "unconstrained draws" in record["reason"]
    assert record["low_rank_directions_left_out"] == [0, 2]


def test_regularised_covariance_matches_stans_formula():
    # Stan's metric regularisation: (n/(n+5))·S + 1e-3·(5/(n+5))·I with S the sample
    # covariance (divisor n − 1) (stan-dev/stan src/stan/mcmc/covar_adaptation.hpp; Stan
    # Reference Manual, HMC automatic parameter tuning); numpy's np.cov as the reference S.
    from allolaw.model.mass_matrix import regularised_covariance

    draws = np.random.default_rng(3).normal(size=(30, 3)) @ np.array(
        [[1.0, 0.5, 0.0], [0.0, 2.0, 0.3], [0.0, 0.0, 0.1]])
    n = 30
    s = np.cov(draws.T)  # ddof 1
    expected = n / (n + 5) * s + 1e-3 * 5 / (n + 5) * np.eye(3)
    np.testing.assert_allclose(regularised_covariance(draws), expected, rtol=1e-12)
    np.testing.assert_allclose(regularised_covariance(draws, dense=False), np.diag(expected),
                               rtol=1e-12)
    # a value fixed in every draw still gets a positive variance: 1e-3·5/(n+5)
    fixed = np.column_stack([draws[:, 0], np.zeros(n)])
    assert regularised_covariance(fixed)[1, 1] == pytest.approx(1e-3 * 5 / 35, rel=1e-12)


def test_mass_matrix_from_draws_is_dense_up_to_its_limit_and_diagonal_beyond():
    from allolaw.model.mass_matrix import (
        MASS_DENSE,
        MASS_DIAGONAL,
        mass_matrix_from_draws,
        regularised_covariance,
    )

    rng = np.random.default_rng(4)
    post = az.from_dict(posterior={"a_log__": rng.normal(size=(2, 50)),
                                   "b": rng.normal(size=(2, 50, 3))}).posterior
    steps = np.array([0.3, 0.4])
    dense = mass_matrix_from_draws(post, ("a_log__", "b"), steps)
    # pooled over chains, value variables in the sampler's order, each flattened
    pooled = np.column_stack([post["a_log__"].values.reshape(100),
                              post["b"].values.reshape(100, 3)])
    assert dense.kind == MASS_DENSE
    np.testing.assert_allclose(dense.inverse_mass, regularised_covariance(pooled))
    diag = mass_matrix_from_draws(post, ("a_log__", "b"), steps, dense_max=3)
    assert diag.kind == MASS_DIAGONAL
    assert diag.inverse_mass.shape == (2, 4)
    np.testing.assert_allclose(diag.inverse_mass[1], regularised_covariance(pooled, dense=False))
    # a value variable the fit did not store: no matrix
    assert mass_matrix_from_draws(post, ("a_log__", "c"), steps) is None


def test_convergence_numbers_leave_out_fixed_values_and_match_arviz():
    idata = _iid(4, 200, seed=4)
    numbers = convergence_numbers(idata.posterior)
    # the constant variable "fixed" has no R-hat; the numbers are those of "mu" alone
    mu = idata.posterior[["mu"]]
    assert numbers["rhat"] == pytest.approx(float(az.rhat(mu, method="rank")["mu"]), abs=1e-4)
    assert numbers["ess_tail"] == pytest.approx(float(az.ess(mu, method="tail")["mu"]), abs=1e-3)


# --- the extension itself: small seeded nutpie fits -----------------------------------------

# Conjugate normal model with known noise SD 1 and prior mu ~ N(0, 10²); 20 invented
# observations. Posterior: N(m, s²) with 1/s² = 1/10² + n and m = s²·Σy (Gelman et al. 2013,
# Bayesian Data Analysis 3rd ed., section 2.5, eq. 2.12).
_Y = np.random.default_rng(7).normal(1.5, 1.0, size=20)


def _model():
    import pymc as pm

    with pm.Model() as model:
        mu = pm.Normal("mu", 0.0, 10.0)
        pm.Normal("trait", mu, 1.0, observed=_Y)
    return model


def _closed_form():
    s2 = 1.0 / (1.0 / 100.0 + _Y.size)
    return s2 * _Y.sum(), math.sqrt(s2)


@pytest.mark.mcmc
def test_short_run_is_extended_once_and_the_draws_follow_the_first_ones():
    from allolaw.model.sampling import fit_model

    model = _model()
    plain = fit_model(model, chains=2, draws=40, warmup=200, seed=11, backend="nutpie",
                      prior_draws=10)
    longer = fit_model(model, chains=2, draws=40, warmup=200, seed=11, backend="nutpie",
                       prior_draws=10, extension_draws=500)
    record = json.loads(longer.attrs["chain_extension"])
    assert json.loads(plain.attrs["chain_extension"])["status"] == "off"
    assert record["status"] == "extended"
    # capped at draws: at most twice as long
    assert record["extra_draws_per_chain"] == 40
    assert record["draws_per_chain_before"] == 40
    assert record["draws_per_chain_after"] == 80
    assert record["before"]["ess_bulk"] < ESS_MIN
    assert set(record["after"]) == {"rhat", "ess_bulk", "ess_tail"}
    assert len(record["seeds"]) == 2
    assert len(record["step_size"]) == 2
    # shapes: same chains, draws appended; every later group sees all draws
    assert dict(longer.posterior["mu"].sizes) == {"chain": 2, "draw": 80}
    assert list(longer.posterior.chain.values) == list(plain.posterior.chain.values)
    assert list(longer.posterior.draw.values) == list(range(80))
    assert longer.sample_stats.sizes["draw"] == 80
    assert not np.isnan(longer.sample_stats["diverging"].values.astype(float)).any()
    assert longer.log_likelihood["trait"].sizes["draw"] == 80
    assert longer.posterior_predictive["trait"].sizes["draw"] == 80
    # the first 40 draws of each chain are the unextended fit's, unchanged
    np.testing.assert_array_equal(longer.posterior["mu"].values[:, :40],
                                  plain.posterior["mu"].values)
    # the added draws differ per chain (own seeds) and are new draws
    added = longer.posterior["mu"].values[:, 40:]
    assert not np.array_equal(added[0], added[1])


@pytest.mark.mcmc
def test_extended_draws_sample_the_closed_form_posterior():
    from allolaw.model.extending import extend_chains
    from allolaw.model.sampling import _sample

    model = _model()
    idata, _, _, state = _sample(model, "nutpie", chains=2, draws=50, warmup=300,
                                 target_acceptance=0.9, seed=5, threads=1, progress=False,
                                 keep_state=True)
    assert state is not None
    assert state.value_vars == ("mu",)
    assert "mass_matrix_stds" not in idata.sample_stats  # read, then dropped
    out, added = extend_chains(model, idata, state, extra_draws=1500, seeds=[1, 2],
                               target_acceptance=0.9)
    assert dict(added["diverging"].sizes) == {"chain": 2, "draw": 1500}
    draws = out.posterior["mu"].values[:, 50:]
    m, s = _closed_form()
    mcse = float(az.mcse(out.posterior[["mu"]].isel(draw=slice(50, None)))["mu"])
    assert abs(draws.mean() - m) < 4 * mcse
    assert draws.std() == pytest.approx(s, rel=0.1)
    # the adapted step size was used as it was, not re-tuned
    np.testing.assert_allclose(added["step_size"].values[:, 0], state.step_size, rtol=1e-9)


@pytest.mark.mcmc
def test_each_chain_samples_the_closed_form_posterior_with_its_own_diagonal():
    import dataclasses

    from allolaw.model.extending import extend_chains
    from allolaw.model.sampling import _sample

    model = _model()
    idata, _, _, state = _sample(model, "nutpie", chains=2, draws=50, warmup=300,
                                 target_acceptance=0.9, seed=5, threads=1, progress=False,
                                 keep_state=True)
    # chain 1: inverse mass 25 times chain 0's and a step a fifth as long (the same motion).
    # Were chain 1's momentum drawn from its own matrix but its energy taken from chain 0's,
    # its draws would have the wrong spread (measured: SD 0.046 against 0.224).
    d, e = state.inverse_mass[0], state.step_size[0]
    skewed = dataclasses.replace(state, inverse_mass=np.stack([d, 25 * d]),
                                 step_size=np.array([e, e / 5]))
    out, _ = extend_chains(model, idata, skewed, extra_draws=1000, seeds=[1, 2],
                           target_acceptance=0.9)
    _, s = _closed_form()
    for chain in out.posterior["mu"].values[:, 50:]:
        assert chain.std() == pytest.approx(s, rel=0.15)


@pytest.mark.mcmc
def test_extension_that_diverges_is_discarded_and_the_fit_kept():
    import dataclasses

    from allolaw.model.sampling import _sample

    model = _model()
    idata, _, _, state = _sample(model, "nutpie", chains=2, draws=40, warmup=200,
                                 target_acceptance=0.9, seed=8, threads=1, progress=False,
                                 keep_state=True)
    # a step size 200 times the adapted one: the continuation cannot follow the posterior
    wild = dataclasses.replace(state, step_size=state.step_size * 200)
    out, record = extend_if_short(model, idata, wild, extra_draws=40, seed=8,
                                  backend="nutpie", target_acceptance=0.9)
    assert record["status"] == "discarded"
    assert record["divergences"] > 0
    assert out is idata
    assert out.posterior.sizes["draw"] == 40
    assert record["draws_per_chain_after"] == 40


# A correlated 5-D normal (invented mean and covariance) beside a log-normal scale: the target
# is the model itself, so its moments are known in closed form: x ~ N(_MEAN, _COV) and
# log s ~ N(0, 0.5²).
_MEAN = np.array([0.0, 1.0, 2.0, 3.0, 4.0])
_SD = np.array([1.0, 2.0, 1.0, 0.5, 3.0])
_COV = np.array([[1.0, 0.9, 0.5, 0.0, 0.2], [0.9, 1.0, 0.6, 0.1, 0.2],
                 [0.5, 0.6, 1.0, 0.3, 0.0], [0.0, 0.1, 0.3, 1.0, -0.4],
                 [0.2, 0.2, 0.0, -0.4, 1.0]]) * np.outer(_SD, _SD)


def _correlated_model():
    import pymc as pm

    with pm.Model() as model:
        pm.MvNormal("x", mu=_MEAN, cov=_COV)
        pm.LogNormal("s", 0.0, 0.5)
    return model


def _within_mcse(draws, truth, k=4.0):
    # |mean − truth| < k MCSE, the MCSE from ArviZ (Vehtari et al. 2021) over both chains
    mcse = float(az.mcse(az.from_dict(posterior={"v": draws}))["v"])
    return abs(float(draws.mean()) - truth) < k * mcse


@pytest.mark.mcmc
def test_short_low_rank_fit_is_extended_with_the_draws_covariance_and_samples_the_target():
    from allolaw.model.mass_matrix import MASS_DENSE
    from allolaw.model.sampling import _sample

    model = _correlated_model()
    idata, _, _, state = _sample(model, "nutpie", chains=2, draws=40, warmup=200,
                                 target_acceptance=0.9, seed=3, threads=1, progress=False,
                                 keep_state=True)
    assert state.low_rank_left_out.max() > 0  # nutpie's low-rank part was in use
    out, record = extend_if_short(model, idata, state, extra_draws=1000, seed=3,
                                  backend="nutpie", target_acceptance=0.9)
    assert record["status"] == "extended"
    assert record["mass_matrix"] == MASS_DENSE
    assert record["unconstrained_values"] == 6
    assert record["step_size_tuning_steps"] == 200
    assert len(record["step_size"]) == 2
    assert out.posterior["x"].sizes["draw"] == 1040
    # the added draws (tuning draws thrown away) follow the closed-form target
    x = out.posterior["x"].values[:, 40:]
    assert x.shape == (2, 1000, 5)
    for i in range(5):
        assert _within_mcse(x[..., i], _MEAN[i])
        for j in range(i, 5):
            products = (x[..., i] - _MEAN[i]) * (x[..., j] - _MEAN[j])
            assert _within_mcse(products, _COV[i, j]), (i, j)
    log_s = np.log(out.posterior["s"].values[:, 40:])
    assert _within_mcse(log_s, 0.0)
    assert _within_mcse(log_s ** 2, 0.25)


@pytest.mark.mcmc
def test_numpyro_fit_is_extended_with_a_mass_matrix_from_its_draws():
    # numpyro through PyMC keeps its adapted mass matrix; the fit keeps the unconstrained
    # draws instead, the extension builds its matrix from them, and the extended draws
    # sample the closed-form posterior (normal mean, known SD: conjugate normal)
    import pymc as pm

    from allolaw.model.mass_matrix import MASS_DENSE
    from allolaw.model.sampling import _sample, fit_model

    model = _model()
    idata, _, _, state = _sample(model, "numpyro", chains=2, draws=40, warmup=200,
                                 target_acceptance=0.9, seed=4, threads=1, progress=False,
                                 keep_state=True)
    assert state is not None
    assert state.inverse_mass is None
    assert state.value_vars == ("mu",)
    np.testing.assert_allclose(state.step_size,
                               idata.sample_stats["step_size"].values[:, -1])
    # 2 x 150 draws fall short of the ESS threshold (400); the extension adds as many
    fit = fit_model(model, chains=2, draws=150, warmup=200, seed=4, backend="numpyro",
                    prior_draws=10, extension_draws=1000)
    record = json.loads(fit.attrs["chain_extension"])
    assert record["status"] == "extended", record
    assert record["mass_matrix"] == MASS_DENSE
    assert record["draws_per_chain_after"] == 300
    added = fit.posterior[["mu"]].isel(draw=slice(150, None))
    m, s = _closed_form()
    assert abs(float(added["mu"].mean()) - m) < 4 * float(az.mcse(added)["mu"])
    assert float(added["mu"].std()) == pytest.approx(s, rel=0.15)

    # a transformed variable: its unconstrained draws are kept for the extension, then
    # dropped with the sampler's other values
    with pm.Model() as scaled:
        sd = pm.HalfNormal("sd", 1.0)
        pm.Normal("trait", 0.0, sd, observed=_Y)
    idata, _, _, state = _sample(scaled, "numpyro", chains=2, draws=30, warmup=100,
                                 target_acceptance=0.9, seed=4, threads=1, progress=False,
                                 keep_state=True)
    assert state.value_vars == ("sd_log__",)
    assert "sd_log__" in idata.posterior
    fit = fit_model(scaled, chains=2, draws=30, warmup=100, seed=4, backend="numpyro",
                    prior_draws=10)
    assert "sd_log__" not in fit.posterior
    assert "sd" in fit.posterior
