"""Sampling: NUTS on one of three backends, every InferenceData group, provenance attributes.

:func:`fit_model` runs NUTS on a built PyMC model and returns an InferenceData with the
posterior, sampler statistics, the pointwise log-likelihood of the observed trait, posterior
and prior predictive draws, and the observed and constant data. :func:`fit_dataset_model` is the
``fit`` stage: it reads a prepared dataset and a model spec, fits, records how the fit was made
and writes ``results/<dataset>/<model>/posterior.nc`` atomically.

Backends: ``pymc`` (PyMC's own NUTS, pytensor C code), ``numpyro`` (JAX), ``nutpie`` (Rust
sampler with low-rank mass-matrix adaptation; log density compiled with JAX, which uses the
persistent compile cache, or with numba when ``ALLOLAW_NUTPIE_BACKEND=numba``). ``auto`` is
:data:`AUTO_BACKEND`, chosen from ``benchmarks/speed.py`` on the project machine. A backend
that fails (missing library, compile error) falls back to ``pymc``; the failure is logged and
kept in the attributes.
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
import sys
import time
import warnings
from importlib import metadata
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from allolaw import __version__
from allolaw.errors import UserError
from allolaw.io import atomic_path
from allolaw.paths import clean_path, posterior_path, prepared_path
from allolaw.runtime import LIGHTER_REWRITES

if TYPE_CHECKING:
    import arviz as az
    import pymc as pm

__all__ = [
    "AUTO_BACKEND",
    "BACKENDS",
    "derive_seed",
    "fit_dataset_model",
    "fit_model",
    "resolve_backend",
]

log = logging.getLogger(__name__)

#: Backends :func:`fit_model` knows.
BACKENDS = ("pymc", "numpyro", "nutpie")

#: What ``backend="auto"`` means on this project's machine (see ``benchmarks/README.md``).
AUTO_BACKEND = "nutpie"

#: The observed variable whose pointwise log-likelihood is kept (model comparison uses it).
OBSERVED = "trait"

#: How nutpie compiles the log density (see benchmarks/README.md for the measured choice).
_NUTPIE_COMPILE: dict[str, str] = {"backend": os.environ.get("ALLOLAW_NUTPIE_BACKEND", "jax")}

# The log-likelihood and prior draws are computed once per fit, so their compile time is
# pure overhead: with PyTensor's default C mode a cold cache cost 32-35 s each on the
# 172-species island models (measured here), against 5-9 s without C compilation
# (FAST_COMPILE runs each operation through NumPy; the values are the same functions).
# The prior draws keep FAST_COMPILE (the prior-only graph is small). The log-likelihood and
# posterior predictive draws evaluate the whitened taxon tree once per draw (a few hundred
# small operations): on island taxa_errors_curved_by_taxon, 4000 draws, FAST_COMPILE took
# 20.1 s + 17.3 s, JAX (compiled once, persistent cache) 5.1 s + 3.8 s, same values.
_PREDICTIVE_COMPILE: dict[str, str] = {"mode": "FAST_COMPILE"}  # copied per call: PyMC edits it


def lighter_jax_rewrites() -> None:
    """Leave :data:`allolaw.runtime.LIGHTER_REWRITES` out of PyTensor's JAX mode (idempotent)."""
    # nutpie and PyMC's log-likelihood name the mode "JAX" (looked up in predefined_modes);
    # PyMC's numpyro path uses pytensor.compile.mode.JAX directly: both are replaced
    from pytensor.compile import mode

    if all(name in mode.JAX.provided_optimizer.exclude for name in LIGHTER_REWRITES):
        return
    lighter = mode.JAX.excluding(*LIGHTER_REWRITES)
    mode.JAX = lighter
    mode.predefined_modes["JAX"] = lighter


def _per_draw_compile() -> dict[str, str]:
    # compile mode of the functions called once per posterior draw (a fresh dict per call)
    try:
        import jax  # noqa: F401
    except ImportError:  # pragma: no cover - jax is a dependency; kept as a safe fallback
        return dict(_PREDICTIVE_COMPILE)
    _apply_jax_cache()
    return {"mode": "JAX"}

_VERSION_PACKAGES = (
    "pymc",
    "pytensor",
    "arviz",
    "numpy",
    "jax",
    "jaxlib",
    "numpyro",
    "nutpie",
    "xarray",
    "h5netcdf",
)


def fit_model(
    model: pm.Model,
    *,
    chains: int = 4,
    draws: int = 1000,
    tune: int = 1000,
    target_accept: float = 0.9,
    seed: int,
    backend: str = "auto",
    threads: int = 1,
    prior_draws: int = 500,
    prior_model: pm.Model | None = None,
) -> az.InferenceData:
    """Sample a model's posterior with NUTS and add every group the later stages read.

    Parameters
    ----------
    model
        A PyMC model with an observed variable named ``trait``.
    chains, draws, tune
        Number of chains, kept draws per chain and warm-up draws per chain.
    target_accept
        NUTS target acceptance rate (step-size adaptation).
    seed
        Base seed. The same seed gives the same draws on rerun on the same machine; the
        predictive draws use seeds derived from it.
    backend
        ``"auto"``, ``"pymc"``, ``"numpyro"`` or ``"nutpie"``.
    threads
        Cores for the chains: ``cores`` for PyMC and nutpie; for numpyro the chains run in
        parallel on XLA host devices when ``threads >= chains`` (the device count is set by
        :func:`allolaw.runtime.configure_job`), else one after another.
    prior_draws
        Draws from the prior and prior predictive distribution.
    prior_model
        The model to draw those from: ``build_model(..., prior_only=True)`` for models with
        taxon terms, whose sampled form depends on the data (see
        :func:`allolaw.modeling.build_model`); ``model`` itself when not given.

    Returns
    -------
    arviz.InferenceData
        Groups ``posterior``, ``sample_stats``, ``log_likelihood`` (``trait`` only),
        ``posterior_predictive`` (``trait``), ``prior``, ``prior_predictive``,
        ``observed_data``, ``constant_data``. ``idata.attrs`` holds ``backend`` (the one that
        ran), ``backend_requested``, ``backend_fallback`` (the error of a failed backend, or
        empty), ``seed``, ``threads`` and the timings ``compile_seconds``,
        ``sampling_seconds``, ``predictive_seconds`` and ``wall_seconds``.

    References
    ----------
    Hoffman, M. D. and Gelman, A. (2014). The No-U-Turn Sampler. JMLR 15, 1593–1623.
    """
    import pymc as pm

    if OBSERVED not in model.named_vars or model[OBSERVED] not in model.observed_RVs:
        msg = f"the model has no observed variable named {OBSERVED!r}"
        raise ValueError(msg)
    if prior_model is None and model.potentials:
        # prior sampling ignores potentials: the prior draws would be wrong, not just noisy
        msg = ("the model has potentials (taxon terms whitened by the data); pass "
               "prior_model=build_model(..., prior_only=True) for its prior draws")
        raise ValueError(msg)
    wall_start = time.perf_counter()
    lighter_jax_rewrites()  # every JAX compile of the fit: sampling, log-likelihood, predictive
    chosen = resolve_backend(backend)
    seeds = np.random.SeedSequence(int(seed)).generate_state(3)
    progress = _show_progress()
    fallback = ""
    log.info(
        "fit: backend %s, %d chains x (%d tune + %d draws), %d thread(s), seed %d",
        chosen, chains, tune, draws, threads, seed,
    )
    try:
        idata, compile_s, sampling_s = _sample(
            model, chosen, chains=chains, draws=draws, tune=tune, target_accept=target_accept,
            seed=int(seed), threads=threads, progress=progress,
        )
        used = chosen
    except Exception as err:  # any backend failure: fall back to PyMC's own sampler
        if chosen == "pymc":
            raise
        fallback = f"{chosen} failed: {type(err).__name__}: {err}"
        log.warning("fit: %s; falling back to pymc", fallback)
        idata, compile_s, sampling_s = _sample(
            model, "pymc", chains=chains, draws=draws, tune=tune, target_accept=target_accept,
            seed=int(seed), threads=threads, progress=progress,
        )
        used = "pymc"
    log.info("fit: sampled in %.1f s (compile %.1f s)", sampling_s, compile_s)

    start = time.perf_counter()
    with model:
        if "log_likelihood" in idata.groups():
            del idata.log_likelihood
        pm.compute_log_likelihood(
            idata, var_names=[OBSERVED], model=model, progressbar=False,
            compile_kwargs=_per_draw_compile(),
        )
        log.info("fit: log-likelihood of %r in %.1f s", OBSERVED, time.perf_counter() - start)
        phase = time.perf_counter()
        with warnings.catch_warnings():
            # The taxon-tree potential (modeling._taxon_terms) is part of the posterior the
            # draws come from; the predictive draws only recompute the taxon values from the
            # sampled standard normals and draw the trait, so PyMC's generic warning that
            # potentials are ignored does not apply.
            warnings.filterwarnings("ignore", message="The effect of Potentials",
                                    category=UserWarning)
            # JAX mode compiles a copy of the (already seeded) random generator; the draws
            # stay seeded (test_fitting checks that a rerun gives identical draws)
            warnings.filterwarnings("ignore", message="The RandomType SharedVariables",
                                    category=UserWarning)
            pm.sample_posterior_predictive(
                idata,
                var_names=[OBSERVED],
                random_seed=int(seeds[1]),
                progressbar=False,
                extend_inferencedata=True,
                compile_kwargs=_per_draw_compile(),
            )
        log.info("fit: posterior predictive in %.1f s", time.perf_counter() - phase)
        phase = time.perf_counter()
        prior = pm.sample_prior_predictive(draws=prior_draws, random_seed=int(seeds[2]),
                                           model=prior_model or model,
                                           compile_kwargs=dict(_PREDICTIVE_COMPILE))
        log.info("fit: %d prior draws in %.1f s", prior_draws, time.perf_counter() - phase)
    for group in ("warmup_posterior", "warmup_sample_stats"):  # nutpie keeps the warm-up
        if group in idata.groups():
            delattr(idata, group)
    # nutpie also stores the sampler's unconstrained values (sigma_log__ …); the other backends
    # do not. Keep only the model's own variables, so every backend gives the same posterior.
    unconstrained = [v.name for v in model.value_vars if v.name not in model.named_vars]
    unconstrained += [
        n for n in idata.posterior.data_vars
        if n.endswith("__") and n not in model.named_vars
    ]
    if unconstrained:
        idata.posterior = idata.posterior.drop_vars(
            [n for n in set(unconstrained) if n in idata.posterior]
        )
    for group in ("prior", "prior_predictive", "observed_data", "constant_data"):
        if group in prior.groups() and group not in idata.groups():
            idata.add_groups({group: getattr(prior, group)})
    predictive_s = time.perf_counter() - start
    log.info("fit: log-likelihood and predictive draws in %.1f s in all", predictive_s)

    idata.attrs.update(
        {
            "backend": used,
            "backend_requested": backend,
            "backend_fallback": fallback,
            "seed": int(seed),
            "threads": int(threads),
            "compile_seconds": round(compile_s, 3),
            "sampling_seconds": round(sampling_s, 3),
            "predictive_seconds": round(predictive_s, 3),
            "wall_seconds": round(time.perf_counter() - wall_start, 3),
        }
    )
    return idata


def fit_dataset_model(
    config: dict[str, Any],
    dataset: str,
    model_name: str,
    *,
    threads: int = 1,
    target_accept: float | None = None,
) -> az.InferenceData:
    """Fit one model spec to one prepared dataset and write its ``posterior.nc``.

    Parameters
    ----------
    config
        The validated batch config (:func:`allolaw.config.load_config`).
    dataset
        Dataset name; ``results/<dataset>/clean.csv`` and ``prepared.json`` must exist.
    model_name
        Model spec name (``models/<name>.yaml``).
    threads
        Cores for the job.
    target_accept
        Overrides ``sampler.target_accept`` (the check stage's refit after divergences).

    Returns
    -------
    arviz.InferenceData
        The fit, with the attributes listed in DEVELOPERS.md.

    Raises
    ------
    UserError
        If the prepared files are missing or lack a needed entry.
    """
    from allolaw.modeling import build_model
    from allolaw.spec import load_spec

    wall_start = time.perf_counter()
    results = Path(config["results_dir"])
    clean_file = clean_path(results, dataset)
    from allolaw.intake import read_clean, read_prepared

    data = read_clean(results, dataset)
    prepared = read_prepared(results, dataset)
    levels = _levels(config, dataset, prepared)
    log_reference_size = _log_reference_size(prepared, prepared_path(results, dataset))
    spec = load_spec(config["models_dir"], model_name)
    sampler = dict(config["sampler"])
    if target_accept is not None:
        sampler["target_accept"] = float(target_accept)
    seed = derive_seed(int(sampler["seed"]), dataset, model_name)

    log.info("fit %s/%s: building the model (%d species)", dataset, model_name, len(data))
    model = build_model(data, spec, levels=levels, log_reference_size=log_reference_size)
    prior_model = build_model(data, spec, levels=levels, log_reference_size=log_reference_size,
                              prior_only=True)
    idata = fit_model(
        model,
        chains=int(sampler["chains"]),
        draws=int(sampler["draws"]),
        tune=int(sampler["tune"]),
        target_accept=float(sampler["target_accept"]),
        seed=seed,
        backend=str(sampler.get("backend", "auto")),
        threads=threads,
        prior_draws=int(sampler.get("prior_draws", 500)),
        prior_model=prior_model,
    )
    idata.attrs.update(
        {
            "allolaw_version": __version__,
            "dataset": dataset,
            "model": model_name,
            "spec": json.dumps(spec.to_dict(), sort_keys=True, default=str),
            "sampler": json.dumps(sampler, sort_keys=True),
            "data_sha256": _sha256(clean_file),
            "versions": json.dumps(_versions(), sort_keys=True),
            "log_reference_size": float(log_reference_size),
            "refit": json.dumps(target_accept is not None),
            "wall_seconds": round(time.perf_counter() - wall_start, 3),
        }
    )
    out = posterior_path(results, dataset, model_name)
    with atomic_path(out) as tmp:
        idata.to_netcdf(str(tmp), engine="h5netcdf")
    log.info("fit %s/%s: wrote %s", dataset, model_name, out)
    return idata


def resolve_backend(backend: str) -> str:
    """Return the backend ``backend`` names (``"auto"`` → :data:`AUTO_BACKEND`).

    Raises
    ------
    UserError
        If ``backend`` is not ``auto`` or one of :data:`BACKENDS`.
    """
    if backend == "auto":
        return AUTO_BACKEND
    if backend not in BACKENDS:
        msg = f"sampler.backend: unknown backend {backend!r}; use auto, {', '.join(BACKENDS)}"
        raise UserError(msg)
    return backend


def derive_seed(base: int, dataset: str, model: str) -> int:
    """Return a seed in ``[0, 2**32)`` fixed by ``base``, ``dataset`` and ``model``.

    Built from SHA-256 (stable across processes and machines, unlike Python's ``hash``).
    """
    digest = hashlib.sha256(f"{int(base)}\x1f{dataset}\x1f{model}".encode()).digest()
    return int.from_bytes(digest[:4], "little")


def _sample(
    model: pm.Model,
    backend: str,
    *,
    chains: int,
    draws: int,
    tune: int,
    target_accept: float,
    seed: int,
    threads: int,
    progress: bool,
) -> tuple[az.InferenceData, float, float]:
    # Returns (idata, compile seconds, sampling seconds). The sampling seconds are the backend's
    # own clock of its sampling loop; everything else inside pm.sample (graph rewriting, C or
    # numba compilation, initial points) counts as compile time. With numpyro the loop's JIT
    # compilation happens inside its clock, so there "sampling" includes XLA compilation unless
    # the persistent cache is warm.
    import pymc as pm

    kwargs: dict[str, Any] = {
        "draws": draws,
        "tune": tune,
        "chains": chains,
        "target_accept": target_accept,
        "random_seed": seed,
        "progressbar": progress,
        "model": model,
        "compute_convergence_checks": False,
    }
    if backend == "pymc":
        kwargs["cores"] = max(1, min(threads, chains))
    elif backend == "numpyro":
        _apply_jax_cache()
        import jax

        parallel = threads >= chains and jax.local_device_count() >= chains
        kwargs["nuts_sampler"] = "numpyro"
        kwargs["nuts_sampler_kwargs"] = {"chain_method": "parallel" if parallel else "sequential"}
    elif backend == "nutpie":
        if _NUTPIE_COMPILE.get("backend") == "jax":
            _apply_jax_cache()
        log.info("fit: %s sampling started", backend)
        start = time.perf_counter()
        idata, sampling = _sample_nutpie(
            model, draws=draws, tune=tune, chains=chains, target_accept=target_accept,
            seed=seed, cores=max(1, threads), progress=progress)
        total = time.perf_counter() - start
        return idata, total - sampling, sampling
    log.info("fit: %s sampling started", backend)
    start = time.perf_counter()
    idata = pm.sample(**kwargs)
    total = time.perf_counter() - start
    sampling = float(idata.posterior.attrs.get("sampling_time", total))
    sampling = min(sampling, total)
    return idata, total - sampling, sampling


def _sample_nutpie(
    model: Any,
    *,
    draws: int,
    tune: int,
    chains: int,
    target_accept: float,
    seed: int,
    cores: int,
    progress: bool,
) -> tuple[az.InferenceData, float]:
    # What pm.sample(nuts_sampler="nutpie") does (pymc 5.28, sampling/mcmc.py:
    # _sample_external_nuts), called directly. pm.sample first assigns step methods, which
    # differentiates the whole log density once per free variable only to learn that NUTS
    # applies (assign_step_methods): on island taxa_errors_curved_by_taxon 31 s of the 105 s
    # pm.sample took (profiled), thrown away, as nutpie differentiates the graph itself.
    # Same compile options, seed, sampler settings and groups as PyMC's route, so the same
    # draws (tests/test_fitting.py checks that against pm.sample). Returns (idata, seconds
    # of nutpie.sample, which include the first evaluation's XLA compile, as PyMC counts it).
    import arviz as az
    import nutpie
    import pymc as pm
    from pymc.backends.arviz import (
        coords_and_dims_for_inferencedata,
        find_constants,
        find_observations,
    )

    compiled = nutpie.compile_pymc_model(model, **_NUTPIE_COMPILE)
    start = time.time()
    idata = nutpie.sample(
        compiled, draws=draws, tune=tune, chains=chains, target_accept=target_accept,
        seed=int(seed), progress_bar=progress, cores=cores,
        low_rank_modified_mass_matrix=True,
    )
    sampling = time.time() - start
    coords, dims = coords_and_dims_for_inferencedata(model)
    groups = {
        name: az.dict_to_dataset(found(model), library=pm, coords=coords, dims=dims,
                                 default_dims=[])
        for name, found in (("constant_data", find_constants),
                            ("observed_data", find_observations))
    }
    idata.add_groups(groups, coords=coords, dims=dims)
    idata.posterior.attrs.update({"sampling_time": sampling, "tuning_steps": tune})
    return idata, sampling


def _apply_jax_cache() -> None:
    # JAX reads JAX_COMPILATION_CACHE_DIR only when it is first imported; set the options
    # again in case JAX was imported before runtime.configure_job ran.
    import jax

    cache_dir = os.environ.get("JAX_COMPILATION_CACHE_DIR")
    if cache_dir and jax.config.jax_compilation_cache_dir != cache_dir:
        jax.config.update("jax_compilation_cache_dir", cache_dir)
        jax.config.update("jax_persistent_cache_min_compile_time_secs", 0.0)


def _show_progress() -> bool:
    # Progress bars only for a person at a terminal; Snakemake jobs and CI get log lines.
    if os.environ.get("CI") or os.environ.get("ALLOLAW_NO_PROGRESS"):
        return False
    return sys.stderr.isatty()


def _levels(config: dict[str, Any], dataset: str, prepared: dict[str, Any]) -> list[str]:
    for key in ("levels", "taxon_levels"):
        if isinstance(prepared.get(key), list):
            return [str(level) for level in prepared[key]]
    sources = config["datasets"][dataset].get("sources", [])
    return list(sources[0].get("columns", {}).get("levels", [])) if sources else []


def _log_reference_size(prepared: dict[str, Any], path: Path) -> float:
    value = prepared.get("log_reference_size")
    if value is None and isinstance(prepared.get("reference_size"), dict):
        value = prepared["reference_size"].get("log")
    if value is None:
        msg = f"{path}: no 'log_reference_size' entry; rerun `allolaw prepare`"
        raise UserError(msg)
    return float(value)


def _sha256(path: Path) -> str:
    digest = hashlib.sha256()
    with path.open("rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def _versions() -> dict[str, str]:
    versions = {}
    for name in _VERSION_PACKAGES:
        try:
            versions[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            versions[name] = "not installed"
    return versions
