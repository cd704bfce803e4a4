"""Sampling (allolaw.model.sampling): groups, log-likelihood, seeding, backends and fallback."""

from __future__ import annotations

import warnings
from pathlib import Path

import arviz as az
import numpy as np
import pymc as pm
import pytest
from scipy import stats

from allolaw.errors import UserError
from allolaw.model import compiling, sampling
from allolaw.model.sampling import fit_model, resolve_backend, unconstrained_size
from allolaw.runtime import LIGHTER_REWRITES

REPO = Path(__file__).resolve().parents[1]
SIGMA = 0.3  # known residual SD of the conjugate test model
PRIOR_SD = 2.0
SMALL = {"chains": 2, "draws": 150, "warmup": 150, "threads": 1, "prior_draws": 40}


def _line_data(n: int = 25, seed: int = 7) -> tuple[np.ndarray, np.ndarray]:
    # Invented data with known truth (intercept 0.4, exponent 0.75), only for these checks.
    rng = np.random.default_rng(seed)
    x = rng.normal(0.0, 1.0, n)
    y = 0.4 + 0.75 * x + rng.normal(0.0, SIGMA, n)
    return x, y


def _tiny_model() -> pm.Model:
    # Same variable names as model.builder.build_model: intercept, exponent, sigma, observed `trait`
    # over `species`, a constant `log_size_obs`, and one taxon level with its own deviations.
    x, y = _line_data()
    n = len(x)
    family = np.arange(n) % 3
    coords = {"species": [f"sp{i}" for i in range(n)], "family": ["fa", "fb", "fc"]}
    with pm.Model(coords=coords) as model:
        log_size_obs = pm.Data("log_size_obs", x, dims="species")
        intercept = pm.Normal("intercept", 0.0, PRIOR_SD)
        exponent = pm.Normal("exponent", 0.0, PRIOR_SD)
        sd = pm.HalfNormal("intercept_sd__family", 0.1)
        z = pm.Normal("taxon_z__family", 0.0, 1.0, dims="family")
        taxon = pm.Deterministic("taxon_intercept__family", intercept + sd * z, dims="family")
        sigma = pm.HalfNormal("sigma", 1.0)
        pm.Normal("trait", taxon[family] + exponent * log_size_obs, sigma, observed=y,
                  dims="species")
    return model


def _conjugate_model() -> pm.Model:
    # Normal linear model with known residual SD and independent normal priors: the posterior
    # of (intercept, exponent) is normal in closed form.
    x, y = _line_data()
    coords = {"species": [f"sp{i}" for i in range(len(x))]}
    with pm.Model(coords=coords) as model:
        log_size_obs = pm.Data("log_size_obs", x, dims="species")
        intercept = pm.Normal("intercept", 0.0, PRIOR_SD)
        exponent = pm.Normal("exponent", 0.0, PRIOR_SD)
        sigma = pm.Deterministic("sigma", pm.math.constant(SIGMA))
        pm.Normal("trait", intercept + exponent * log_size_obs, sigma, observed=y, dims="species")
    return model


@pytest.fixture(scope="module")
def tiny_fit() -> az.InferenceData:
    return fit_model(_tiny_model(), seed=11, **SMALL)


@pytest.mark.mcmc
def test_fit_model_returns_every_group_with_model_dims(tiny_fit: az.InferenceData) -> None:
    groups = set(tiny_fit.groups())
    expected = {"posterior", "sample_stats", "log_likelihood", "posterior_predictive",
                "prior", "prior_predictive", "observed_data", "constant_data"}
    assert expected <= groups
    post = tiny_fit.posterior
    assert post["exponent"].dims == ("chain", "draw")
    assert post["taxon_intercept__family"].dims == ("chain", "draw", "family")
    assert list(post["taxon_intercept__family"].coords["family"].values) == ["fa", "fb", "fc"]
    assert post.sizes["chain"] == 2
    assert post.sizes["draw"] == 150
    assert tiny_fit.posterior_predictive["trait"].dims == ("chain", "draw", "species")
    assert tiny_fit.prior["exponent"].sizes["draw"] == 40
    assert "trait" in tiny_fit.prior_predictive
    assert "trait" in tiny_fit.observed_data
    assert "log_size_obs" in tiny_fit.constant_data
    assert "diverging" in tiny_fit.sample_stats
    for key in ("backend", "seed", "compile_seconds", "sampling_seconds", "wall_seconds"):
        assert key in tiny_fit.attrs
    # neither warm-up draws nor the sampler's unconstrained copies (sigma_log__) are kept
    assert not {"warmup_posterior", "warmup_sample_stats"} & groups
    assert not [n for n in post.data_vars if str(n).endswith("__")]


@pytest.mark.mcmc
def test_log_likelihood_holds_only_trait_and_equals_normal_density(
    tiny_fit: az.InferenceData,
) -> None:
    assert list(tiny_fit.log_likelihood.data_vars) == ["trait"]
    ll = tiny_fit.log_likelihood["trait"]
    assert ll.dims == ("chain", "draw", "species")
    # Recompute for a few draws with scipy's normal log-density (the model's likelihood).
    post = tiny_fit.posterior
    x = tiny_fit.constant_data["log_size_obs"].values
    y = tiny_fit.observed_data["trait"].values
    family = np.arange(len(x)) % 3
    for chain, draw in [(0, 0), (1, 77), (0, 149)]:
        taxon = post["taxon_intercept__family"].values[chain, draw]
        mu = taxon[family] + post["exponent"].values[chain, draw] * x
        expected = stats.norm.logpdf(y, mu, post["sigma"].values[chain, draw])
        np.testing.assert_allclose(ll.values[chain, draw], expected, rtol=1e-6, atol=1e-9)


@pytest.mark.mcmc
def test_same_seed_gives_identical_draws_on_the_default_backend(
    tiny_fit: az.InferenceData,
) -> None:
    again = fit_model(_tiny_model(), seed=11, **SMALL)
    auto = resolve_backend("auto", unconstrained_size(_tiny_model()))
    assert again.attrs["backend"] == tiny_fit.attrs["backend"] == auto
    for name in ("intercept", "exponent", "sigma", "taxon_intercept__family"):
        np.testing.assert_array_equal(again.posterior[name].values,
                                      tiny_fit.posterior[name].values)
    np.testing.assert_array_equal(again.prior["exponent"].values,
                                  tiny_fit.prior["exponent"].values)
    np.testing.assert_array_equal(again.posterior_predictive["trait"].values,
                                  tiny_fit.posterior_predictive["trait"].values)
    other = fit_model(_tiny_model(), seed=12, **SMALL)
    assert not np.array_equal(other.posterior["exponent"].values,
                              tiny_fit.posterior["exponent"].values)
    # the predictive draws follow the seed too (JAX mode compiles a copy of the generator)
    assert not np.array_equal(other.posterior_predictive["trait"].values,
                              tiny_fit.posterior_predictive["trait"].values)


@pytest.mark.mcmc
def test_nutpie_called_directly_gives_pm_sample_own_nutpie_draws() -> None:
    # fitting calls nutpie itself rather than through pm.sample (which first differentiates
    # the model once per free variable to choose step methods). The reference is PyMC's own
    # route, pm.sample(nuts_sampler="nutpie"), with the same seed and settings: same draws,
    # same constant and observed data.
    settings = {"draws": 60, "chains": 2}
    compiling.lighter_jax_rewrites()
    ours, _, _ = sampling._sample_nutpie(_tiny_model(), **settings, warmup=60,
                                        target_acceptance=0.9, seed=21, cores=1, progress=False)
    reference = pm.sample(model=_tiny_model(), **settings, tune=60, target_accept=0.9,
                          random_seed=21, progressbar=False,
                          nuts_sampler="nutpie", compute_convergence_checks=False,
                          nuts_sampler_kwargs={"cores": 1, "low_rank_modified_mass_matrix": True,
                                               **compiling.NUTPIE_COMPILE})
    for name in ("intercept", "exponent", "sigma", "taxon_intercept__family"):
        np.testing.assert_array_equal(ours.posterior[name].values,
                                      reference.posterior[name].values)
    np.testing.assert_array_equal(ours.sample_stats["diverging"].values,
                                  reference.sample_stats["diverging"].values)
    for group in ("constant_data", "observed_data"):
        assert getattr(ours, group).equals(getattr(reference, group))
    # the warm-up draws are not kept (memory: they were dropped unread)
    assert "warmup_posterior" in reference.groups()
    assert not {"warmup_posterior", "warmup_sample_stats"} & set(ours.groups())


@pytest.mark.mcmc
def test_large_deterministics_are_recomputed_not_stored_and_equal_pm_sample_own(
        monkeypatch: pytest.MonkeyPatch) -> None:
    # memory: nutpie is asked not to store deterministics of >= LARGE_DETERMINISTIC values
    # per draw; they are recomputed from the draws afterwards. Reference: PyMC's own route,
    # which stores them (same seed: same draws, so the same values).
    import nutpie

    n = sampling.LARGE_DETERMINISTIC

    def model() -> pm.Model:
        with pm.Model(coords={"species": np.arange(n)}) as m:
            shift = pm.Normal("shift", 0.0, 1.0, dims="species")
            scale = pm.HalfNormal("scale", 1.0)
            pm.Deterministic("big", 2.0 + scale * shift, dims="species")
            pm.Deterministic("small", scale * 3.0)
            pm.Normal("trait", scale * shift[:5], 1.0, observed=np.zeros(5))
        return m

    asked = {}
    real = nutpie.compile_pymc_model

    def spy(m: pm.Model, **kwargs: object) -> object:
        asked["var_names"] = kwargs.get("var_names")
        return real(m, **kwargs)

    monkeypatch.setattr(nutpie, "compile_pymc_model", spy)
    settings = {"draws": 30, "chains": 2}
    compiling.lighter_jax_rewrites()
    ours, _, _ = sampling._sample_nutpie(model(), **settings, warmup=30, target_acceptance=0.8,
                                        seed=5, cores=1, progress=False)
    assert asked["var_names"] is not None
    assert "big" not in asked["var_names"]
    assert "small" in asked["var_names"]
    monkeypatch.setattr(nutpie, "compile_pymc_model", real)
    reference = pm.sample(model=model(), **settings, tune=30, target_accept=0.8, random_seed=5,
                          progressbar=False, nuts_sampler="nutpie",
                          compute_convergence_checks=False,
                          nuts_sampler_kwargs={"cores": 1, "low_rank_modified_mass_matrix": True,
                                               **compiling.NUTPIE_COMPILE})
    np.testing.assert_array_equal(ours.posterior["shift"].values,
                                  reference.posterior["shift"].values)
    assert ours.posterior["big"].dims == ("chain", "draw", "species")
    np.testing.assert_allclose(ours.posterior["big"].values, reference.posterior["big"].values,
                               rtol=1e-12, atol=1e-12)


@pytest.mark.mcmc
def test_default_backend_recovers_the_conjugate_normal_posterior() -> None:
    idata = fit_model(_conjugate_model(), seed=5, chains=2, draws=300, warmup=300,
                      prior_draws=20)
    x, y = _line_data()
    # Closed form: posterior precision = X'X/σ² + I/τ², mean = cov · X'y/σ²
    # (Gelman et al. 2013, Bayesian Data Analysis 3rd ed., section 14.8, conjugate normal prior).
    design = np.column_stack([np.ones_like(x), x])
    precision = design.T @ design / SIGMA**2 + np.eye(2) / PRIOR_SD**2
    cov = np.linalg.inv(precision)
    mean = cov @ design.T @ y / SIGMA**2
    for i, name in enumerate(("intercept", "exponent")):
        draws = idata.posterior[name]
        mcse = float(az.mcse(idata, var_names=[name])[name])
        # 5 Monte Carlo standard errors: a wrong posterior fails, MC noise does not
        # (common practice, no source).
        assert abs(float(draws.mean()) - mean[i]) < 5 * mcse
        assert float(draws.std()) == pytest.approx(np.sqrt(cov[i, i]), rel=0.15)


@pytest.mark.mcmc
def test_failing_backend_falls_back_to_pymc_and_records_why(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    original = sampling._sample

    def broken(model, backend, **kwargs):
        if backend != "pymc":
            msg = "simulated compile failure"
            raise RuntimeError(msg)
        return original(model, backend, **kwargs)

    monkeypatch.setattr(sampling, "_sample", broken)
    idata = fit_model(_tiny_model(), seed=3, backend="nutpie", **SMALL)
    assert idata.attrs["backend"] == "pymc"
    assert idata.attrs["backend_requested"] == "nutpie"
    assert "simulated compile failure" in idata.attrs["backend_fallback"]
    assert "posterior" in idata.groups()


def test_pymc_backend_failure_is_not_hidden(monkeypatch: pytest.MonkeyPatch) -> None:
    def broken(model, backend, **kwargs):
        msg = f"{backend} broke"
        raise RuntimeError(msg)

    monkeypatch.setattr(sampling, "_sample", broken)
    with pytest.raises(RuntimeError, match="pymc broke"):
        fit_model(_tiny_model(), seed=3, backend="pymc", **SMALL)


def test_auto_backend_is_numpyro_up_to_its_size_limit_and_nutpie_above() -> None:
    from allolaw.model.sampling import AUTO_NUMPYRO_MAX

    assert resolve_backend("auto", AUTO_NUMPYRO_MAX) == "numpyro"
    assert resolve_backend("auto", AUTO_NUMPYRO_MAX + 1) == "nutpie"
    # a tree large enough for nutpie's numba compile (the faster tree density there)
    from allolaw.model.compiling import NUMBA_FROM_TREE_SPECIES

    assert resolve_backend("auto", 10, NUMBA_FROM_TREE_SPECIES - 1) == "numpyro"
    assert resolve_backend("auto", 10, NUMBA_FROM_TREE_SPECIES) == "nutpie"
    assert resolve_backend("nutpie", 1) == "nutpie"  # a named backend is kept
    assert resolve_backend("pymc", 10**6) == "pymc"


def test_unconstrained_size_counts_every_value_the_sampler_moves() -> None:
    with pm.Model(coords={"taxon": ["a", "b", "c"]}) as model:
        pm.Normal("taxon_value", 0.0, 1.0, dims="taxon")  # 3
        pm.HalfNormal("sd", 1.0)  # 1 (sampled as sd_log__)
        pm.Dirichlet("share", np.ones(4))  # 3 (simplex transform)
        pm.Normal("trait", 0.0, 1.0, observed=np.zeros(5))  # observed: none
    assert unconstrained_size(model) == 7


def test_unknown_backend_is_a_user_error() -> None:
    with pytest.raises(UserError, match="stan"):
        resolve_backend("stan", 10)


def test_model_without_observed_trait_is_refused() -> None:
    with pm.Model() as model:
        pm.Normal("intercept", 0.0, 1.0)
    with pytest.raises(ValueError, match="trait"):
        fit_model(model, seed=1)


def test_lighter_jax_rewrites_leave_the_log_density_and_gradient_unchanged() -> None:
    # compiling.lighter_jax_rewrites drops one algebraic rewrite from the JAX compile mode (for
    # compile time); the compiled log density and gradient of a whitened two-level model with
    # curvature must equal PyTensor's own evaluation of the same graph with no rewrite at all
    # (Python implementation of each operation), to rounding error.
    import pytensor
    from pytensor.compile import mode as pt_mode

    from allolaw.model.builder import build_model
    from allolaw.model.spec import load_spec
    from allolaw.testing import simulate_curvature

    compiling.lighter_jax_rewrites()
    assert set(LIGHTER_REWRITES) <= set(pt_mode.predefined_modes["JAX"]
                                                .provided_optimizer.exclude)
    assert pt_mode.JAX is pt_mode.predefined_modes["JAX"]
    sim = simulate_curvature(seed=5, curvature=-0.1, sigma=0.1, size_error_sd=0.05,
                             taxa=(3, 2), level_names=("order", "genus"))
    model = build_model(sim.data, load_spec(REPO / "models", "taxa_errors_curved_by_taxon"),
                        levels=sim.levels, log_reference_size=0.0)
    logp = model.logp()
    outputs = [logp, *pytensor.grad(logp, model.value_vars)]
    rng = np.random.default_rng(2)
    point = model.initial_point()
    values = [point[v.name] + rng.normal(0.0, 0.3, np.shape(point[v.name]))
              for v in model.value_vars]
    with warnings.catch_warnings():
        # parameter checks (sigma > 0) cannot run inside JAX; the values here are valid
        warnings.filterwarnings("ignore", message="Skipping Check", category=UserWarning)
        fast = pytensor.function(model.value_vars, outputs, mode="JAX")(*values)
    unrewritten = pt_mode.Mode(linker="py", optimizer=None)
    plain = pytensor.function(model.value_vars, outputs, mode=unrewritten)(*values)
    for a, b in zip(fast, plain, strict=True):
        np.testing.assert_allclose(np.asarray(a), np.asarray(b), rtol=1e-9, atol=1e-9)


_CACHE_SCRIPT = """
import sys
import numpy as np
import pymc as pm
from allolaw.model.sampling import fit_model

n = int(sys.argv[1])
rng = np.random.default_rng(3)
x = rng.normal(0.0, 1.0, n)
y = 0.4 + 0.75 * x + rng.normal(0.0, 0.3, n)
with pm.Model(coords={"species": [f"sp{i}" for i in range(n)]}) as model:
    log_size_obs = pm.Data("log_size_obs", x, dims="species")
    intercept = pm.Normal("intercept", 0.0, 2.0)
    exponent = pm.Normal("exponent", 0.0, 2.0)
    sigma = pm.HalfNormal("sigma", 1.0)
    pm.Normal("trait", intercept + exponent * log_size_obs, sigma, observed=y, dims="species")
idata = fit_model(model, chains=2, draws=100, warmup=100, threads=1, prior_draws=20, seed=5)
print(idata.attrs["compile_cache"])
"""


@pytest.mark.mcmc
def test_fit_of_the_same_structure_reuses_the_compiled_programs_and_says_so(tmp_path):
    # each fit in its own process, as in a batch: JAX reads its cache folder at import
    import os
    import subprocess
    import sys

    env = {**os.environ, "JAX_COMPILATION_CACHE_DIR": str(tmp_path / "jax"),
           "JAX_PERSISTENT_CACHE_MIN_COMPILE_TIME_SECS": "0",  # as runtime.configure_job sets
           "PYTHONPATH": os.pathsep.join([str(REPO / "src"), os.environ.get("PYTHONPATH", "")])}
    (tmp_path / "jax").mkdir()

    def fit(n: int) -> str:
        done = subprocess.run([sys.executable, "-c", _CACHE_SCRIPT, str(n)], env=env,
                              capture_output=True, text=True, check=True, timeout=600)
        return done.stdout.strip().splitlines()[-1]

    first, again, other = fit(30), fit(30), fit(45)
    import re

    def counts(phrase: str) -> tuple[int, int]:
        found = re.search(r"(\d+) program\(s\) from the cache, (\d+) compiled", phrase)
        assert found, phrase
        return int(found.group(1)), int(found.group(2))

    # a fresh cache: the first fit compiles (numpyro's chains, run one after another, may
    # read back the programs its first chain stored, so hits are not necessarily 0)
    assert counts(first)[1] > 0
    assert re.fullmatch(r"JAX compile cache hit: all \d+ program\(s\) came from the cache",
                        again)
    assert counts(other)[1] > 0  # other data shapes: other programs to compile
