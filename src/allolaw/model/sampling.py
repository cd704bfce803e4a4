"""Sampling: NUTS on one of three backends, every InferenceData group, provenance attributes.

:func:`fit_model` runs NUTS on a built PyMC model and returns an InferenceData with the
posterior, sampler statistics, the pointwise log-likelihood of the observed trait, posterior
and prior predictive draws, and the observed and constant data. The ``fit`` stage around it is
:func:`allolaw.model.fitting.fit_dataset_model`; compile modes are in
:mod:`allolaw.model.compiling`.

Backends: ``pymc`` (PyMC's own NUTS, pytensor C code), ``numpyro`` (JAX), ``nutpie`` (Rust
sampler with low-rank mass-matrix adaptation; log density compiled with JAX, which uses the
persistent compile cache, or with numba when ``ALLOLAW_NUTPIE_BACKEND=numba``). ``auto`` is
numpyro for models with at most :data:`AUTO_NUMPYRO_MAX` unconstrained values (its whole NUTS
loop is one XLA program, no Python call per gradient) and nutpie above (its low-rank mass
matrix; measured only up to ``benchmarks/README.md``'s sizes, see "A compiled sampler loop").
A backend that fails (missing library, compile error) falls back to ``pymc``; the failure is
logged and kept in the attributes.
"""

from __future__ import annotations

import json
import logging
import os
import sys
import time
import warnings
from typing import TYPE_CHECKING, Any

import numpy as np

from allolaw.errors import UserError

if TYPE_CHECKING:
    import arviz as az
    import pymc as pm
from allolaw.model.compiling import (
    NUMBA_FROM_TREE_SPECIES,
    NUTPIE_COMPILE,
    PREDICTIVE_COMPILE,
    apply_jax_cache,
    describe_cache_use,
    jax_cache_counts,
    lighter_jax_rewrites,
    nutpie_compiler,
    per_draw_compile,
)
from allolaw.model.extending import (
    AdaptedState,
    adapted_state_from_draws,
    adapted_state_from_nutpie,
    extend_if_short,
)

__all__ = ["AUTO_NUMPYRO_MAX", "BACKENDS", "fit_model", "resolve_backend",
           "unconstrained_size"]

log = logging.getLogger(__name__)

#: Backends :func:`fit_model` knows.
BACKENDS = ("pymc", "numpyro", "nutpie")

#: ``backend="auto"`` is numpyro up to this many unconstrained values, nutpie above. Our own
#: choice from measurements on the project machine (benchmarks/README.md, "A compiled sampler
#: loop"): with numpyro's compiled loop the demo batch (fits of at most 573 values) took
#: 8:14 against nutpie's 11:49, 15 of 16 fits faster, none refitted or extended, and min
#: bulk ESS per wall second was higher on every fit with size errors or a tree (lower on three
#: small fits, all far above the ESS threshold); on reference problem B (670 values) 1.26x
#: nutpie's ESS per wall second. nutpie-JAX (low-rank mass matrix) is kept for C (3,189
#: values) and larger, where numpyro was not measured at full length.
AUTO_NUMPYRO_MAX = 2000
#: Deterministics with at least this many values per draw are recomputed after nutpie's run
#: instead of stored by it (memory; :func:`_large_deterministics`). Engineering choice: the
#: demo's per-species deterministics (172 values) stay stored, so small fits are unchanged.
LARGE_DETERMINISTIC = 2000

#: The observed variable whose pointwise log-likelihood is kept (model comparison uses it).
OBSERVED = "trait"


def fit_model(
    model: pm.Model,
    *,
    chains: int = 4,
    draws: int = 1000,
    warmup: int = 1000,
    target_acceptance: float = 0.9,
    seed: int,
    backend: str = "auto",
    threads: int = 1,
    prior_draws: int = 500,
    prior_model: pm.Model | None = None,
    extension_draws: int = 0,
) -> az.InferenceData:
    """Sample a model's posterior with NUTS and add every group the later stages read.

    Parameters
    ----------
    model
        A PyMC model with an observed variable named ``trait``.
    chains, draws, warmup
        Number of chains, kept draws per chain and warm-up draws per chain.
    target_acceptance
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
        :func:`allolaw.model.builder.build_model`); ``model`` itself when not given.
    extension_draws
        When R-hat or ESS fall short, every chain is run this many draws further, once, from
        its adapted state (:func:`allolaw.model.extending.extend_if_short`; capped at
        ``draws``); 0 never extends. Only the nutpie backend hands back its adapted state.

    Returns
    -------
    arviz.InferenceData
        Groups ``posterior``, ``sample_stats``, ``log_likelihood`` (``trait`` only),
        ``posterior_predictive`` (``trait``), ``prior``, ``prior_predictive``,
        ``observed_data``, ``constant_data``. ``idata.attrs`` holds ``backend`` (the one that
        ran), ``backend_requested``, ``backend_fallback`` (the error of a failed backend, or
        empty), ``compiler`` (how nutpie compiled the log density:
        :func:`~allolaw.model.compiling.nutpie_compiler`; empty for the other backends),
        ``seed``, ``threads``, ``chain_extension`` (JSON record of
        :func:`~allolaw.model.extending.extend_if_short`) and the timings
        ``compile_seconds``, ``sampling_seconds``, ``extension_seconds``,
        ``predictive_seconds`` and ``wall_seconds``.

    References
    ----------
    Hoffman, M. D. and Gelman, A. (2014). The No-U-Turn Sampler. JMLR 15, 1593–1623.
    """

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
    from allolaw.model.phylo_terms import tree_species

    n_values, species_in_tree = unconstrained_size(model), tree_species(model)
    chosen = resolve_backend(backend, n_values, species_in_tree)
    seeds = np.random.SeedSequence(int(seed)).generate_state(3)
    progress = _show_progress()
    fallback = ""
    log.info(
        "fit: backend %s%s, %d unconstrained values, %d chains x (%d warm-up + %d draws), "
        "%d thread(s), seed %d", chosen, " (auto)" if backend == "auto" else "", n_values,
        chains, warmup, draws, threads, seed,
    )
    keep_state = extension_draws > 0
    compiler = nutpie_compiler(species_in_tree)  # used when nutpie runs
    cached_before = jax_cache_counts()
    try:
        idata, compile_s, sampling_s, state = _sample(
            model, chosen, chains=chains, draws=draws, warmup=warmup,
            target_acceptance=target_acceptance,
            seed=int(seed), threads=threads, progress=progress, keep_state=keep_state,
            compiler=compiler,
        )
        used = chosen
    except Exception as err:  # any backend failure: fall back to PyMC's own sampler
        if chosen == "pymc":
            raise
        fallback = f"{chosen} failed: {type(err).__name__}: {err}"
        log.warning("fit: %s; falling back to pymc", fallback)
        idata, compile_s, sampling_s, state = _sample(
            model, "pymc", chains=chains, draws=draws, warmup=warmup,
            target_acceptance=target_acceptance,
            seed=int(seed), threads=threads, progress=progress, keep_state=keep_state,
            compiler=compiler,
        )
        used = "pymc"
    log.info("fit: sampled in %.1f s (compile %.1f s)", sampling_s, compile_s)
    phase = time.perf_counter()
    idata, extension = extend_if_short(
        model, idata, state, extra_draws=min(int(extension_draws), int(draws)),
        seed=int(seed), backend=used, target_acceptance=target_acceptance, progress=progress)
    extension_s = time.perf_counter() - phase
    log.info("fit: chain extension %s (%s)", extension["status"], extension["reason"])
    _drop_sampler_values(idata, model)  # before the predictive arrays add to the memory

    predictive_s = _add_predictive_groups(idata, model, prior_model=prior_model, seeds=seeds,
                                          prior_draws=prior_draws)
    cache_use = describe_cache_use(cached_before, jax_cache_counts())
    log.info("fit: %s", cache_use)

    idata.attrs.update(
        {
            "backend": used,
            "backend_requested": backend,
            "backend_fallback": fallback,
            "compiler": compiler if used == "nutpie" else "",
            "seed": int(seed),
            "threads": int(threads),
            "compile_seconds": round(compile_s, 3),
            "sampling_seconds": round(sampling_s, 3),
            "chain_extension": json.dumps(extension, sort_keys=True),
            "extension_seconds": round(extension_s, 3),
            "predictive_seconds": round(predictive_s, 3),
            "compile_cache": cache_use,
            "wall_seconds": round(time.perf_counter() - wall_start, 3),
        }
    )
    return idata


def _add_predictive_groups(idata: az.InferenceData, model: pm.Model, *,
                           prior_model: pm.Model | None, seeds: np.ndarray,
                           prior_draws: int) -> float:
    # Adds log_likelihood, posterior_predictive, prior, prior_predictive, observed_data and
    # constant_data to the sampled idata (in place). Returns the seconds it took.
    import pymc as pm

    from allolaw.model.phylo_terms import add_ancestry_log_likelihood, has_ancestry

    start = time.perf_counter()
    with model:
        if "log_likelihood" in idata.groups():
            del idata.log_likelihood
        if has_ancestry(model):  # one joint density: pointwise LOO values instead
            add_ancestry_log_likelihood(idata, model, OBSERVED)
        else:
            pm.compute_log_likelihood(
                idata, var_names=[OBSERVED], model=model, progressbar=False,
                compile_kwargs=per_draw_compile(),
            )
        log.info("fit: log-likelihood of %r in %.1f s", OBSERVED, time.perf_counter() - start)
        phase = time.perf_counter()
        with warnings.catch_warnings():
            # The taxon-tree potential (model.terms.taxon_terms) is part of the posterior the
            # draws come from; the predictive draws only recompute the taxon values from the
            # sampled standard normals and draw the trait, so PyMC's generic warning that
            # potentials are ignored does not apply.
            warnings.filterwarnings("ignore", message="The effect of Potentials",
                                    category=UserWarning)
            # JAX mode compiles a copy of the (already seeded) random generator; the draws
            # stay seeded (tests/test_model_sampling.py checks that a rerun gives identical draws)
            warnings.filterwarnings("ignore", message="The RandomType SharedVariables",
                                    category=UserWarning)
            pm.sample_posterior_predictive(
                idata,
                var_names=[OBSERVED],
                random_seed=int(seeds[1]),
                progressbar=False,
                extend_inferencedata=True,
                compile_kwargs=per_draw_compile(),
            )
        log.info("fit: posterior predictive in %.1f s", time.perf_counter() - phase)
        phase = time.perf_counter()
        prior = pm.sample_prior_predictive(draws=prior_draws, random_seed=int(seeds[2]),
                                           model=prior_model or model,
                                           compile_kwargs=dict(PREDICTIVE_COMPILE))
        log.info("fit: %d prior draws in %.1f s", prior_draws, time.perf_counter() - phase)
    for group in ("prior", "prior_predictive", "observed_data", "constant_data"):
        if group in prior.groups() and group not in idata.groups():
            idata.add_groups({group: getattr(prior, group)})
    predictive_s = time.perf_counter() - start
    log.info("fit: log-likelihood and predictive draws in %.1f s in all", predictive_s)
    return predictive_s


def _drop_sampler_values(idata: az.InferenceData, model: pm.Model) -> None:
    # Warm-up groups (if a backend kept them) and the sampler's unconstrained values, which
    # nutpie stores (sigma_log__ …) and the other backends do not: only the model's own
    # variables stay, so every backend gives the same posterior. In place.
    for group in ("warmup_posterior", "warmup_sample_stats"):
        if group in idata.groups():
            delattr(idata, group)
    unconstrained = {v.name for v in model.value_vars if v.name not in model.named_vars}
    unconstrained |= {n for n in idata.posterior.data_vars
                      if str(n).endswith("__") and n not in model.named_vars}
    present = [n for n in unconstrained if n in idata.posterior]
    if present:
        idata.posterior = idata.posterior.drop_vars(present)


def resolve_backend(backend: str, n_values: int, tree_species: int = 0) -> str:
    """Return the backend ``backend`` names for a model of ``n_values`` unconstrained values.

    ``"auto"`` is numpyro up to :data:`AUTO_NUMPYRO_MAX` values, and nutpie above or when the
    model's tree has ``tree_species`` ≥ :data:`~allolaw.model.compiling.NUMBA_FROM_TREE_SPECIES`
    (nutpie then compiles with numba, whose tree density is the faster one there; numpyro
    would run JAX's). A named backend is kept.

    Raises
    ------
    UserError
        If ``backend`` is not ``auto`` or one of :data:`BACKENDS`.
    """
    if backend == "auto":
        small = n_values <= AUTO_NUMPYRO_MAX and tree_species < NUMBA_FROM_TREE_SPECIES
        return "numpyro" if small else "nutpie"
    if backend not in BACKENDS:
        msg = f"sampler.backend: unknown backend {backend!r}; use auto, {', '.join(BACKENDS)}"
        raise UserError(msg)
    return backend


def unconstrained_size(model: pm.Model) -> int:
    """Number of values the sampler moves: every free variable in its unconstrained space."""
    shapes = model.eval_rv_shapes()
    return int(sum(int(np.prod(shapes[v.name])) for v in model.value_vars))


def _sample(
    model: pm.Model,
    backend: str,
    *,
    chains: int,
    draws: int,
    warmup: int,
    target_acceptance: float,
    seed: int,
    threads: int,
    progress: bool,
    keep_state: bool = False,
    compiler: str | None = None,
) -> tuple[az.InferenceData, float, float, AdaptedState | None]:
    # Returns (idata, compile seconds, sampling seconds, adapted state: with keep_state
    # from nutpie or numpyro, else None). The sampling seconds are the backend's
    # own clock of its sampling loop; everything else inside pm.sample (graph rewriting, C or
    # numba compilation, initial points) counts as compile time. With numpyro the loop's JIT
    # compilation happens inside its clock, so there "sampling" includes XLA compilation unless
    # the persistent cache is warm.
    import pymc as pm

    kwargs: dict[str, Any] = {
        "draws": draws,
        "tune": warmup,  # the library's own keywords from here on
        "chains": chains,
        "target_accept": target_acceptance,
        "random_seed": seed,
        "progressbar": progress,
        "model": model,
        "compute_convergence_checks": False,
    }
    if backend == "pymc":
        kwargs["cores"] = max(1, min(threads, chains))
    elif backend == "numpyro":
        apply_jax_cache()
        import jax

        parallel = threads >= chains and jax.local_device_count() >= chains
        kwargs["nuts_sampler"] = "numpyro"
        kwargs["nuts_sampler_kwargs"] = {"chain_method": "parallel" if parallel else "sequential",
                                         # the sampler's own transformed values (sd_log__ …),
                                         # from which a chain extension builds its mass matrix
                                         "keep_untransformed": keep_state}
    elif backend == "nutpie":
        compiler = compiler or NUTPIE_COMPILE["backend"]
        if compiler == "jax":
            apply_jax_cache()
        log.info("fit: %s sampling started (log density compiled with %s)", backend, compiler)
        start = time.perf_counter()
        idata, sampling, state = _sample_nutpie(
            model, draws=draws, warmup=warmup, chains=chains,
            target_acceptance=target_acceptance, compiler=compiler,
            seed=seed, cores=max(1, threads), progress=progress, keep_state=keep_state)
        total = time.perf_counter() - start
        return idata, total - sampling, sampling, state
    log.info("fit: %s sampling started", backend)
    start = time.perf_counter()
    idata = pm.sample(**kwargs)
    total = time.perf_counter() - start
    sampling = float(idata.posterior.attrs.get("sampling_time", total))
    sampling = min(sampling, total)
    state = None
    if keep_state and backend == "numpyro":
        state = adapted_state_from_draws(idata, [model.rvs_to_values[rv].name
                                                 for rv in model.free_RVs])
    return idata, total - sampling, sampling, state


def _sample_nutpie(
    model: Any,
    *,
    draws: int,
    warmup: int,
    chains: int,
    target_acceptance: float,
    seed: int,
    cores: int,
    progress: bool,
    keep_state: bool = False,
    compiler: str | None = None,
) -> tuple[az.InferenceData, float, AdaptedState | None]:
    # What pm.sample(nuts_sampler="nutpie") does (pymc 5.28, sampling/mcmc.py:
    # _sample_external_nuts), called directly. pm.sample first assigns step methods, which
    # differentiates the whole log density once per free variable only to learn that NUTS
    # applies (assign_step_methods): on island taxa_errors_curved_by_taxon 31 s of the 105 s
    # pm.sample took (profiled), thrown away, as nutpie differentiates the graph itself.
    # Same compile options, seed, sampler settings and groups as PyMC's route, so the same
    # draws (tests/test_model_sampling.py checks that against pm.sample). Returns (idata, seconds
    # of nutpie.sample, which include the first evaluation's XLA compile, as PyMC counts it,
    # and with keep_state the adapted step size and mass-matrix diagonal of each chain).
    import arviz as az
    import nutpie
    import pymc as pm
    from pymc.backends.arviz import (
        coords_and_dims_for_inferencedata,
        find_constants,
        find_observations,
    )

    recomputed = _large_deterministics(model)
    kept = None if not recomputed else [v.name for v in model.unobserved_value_vars
                                        if v.name not in recomputed]
    compiled = nutpie.compile_pymc_model(model, backend=compiler or NUTPIE_COMPILE["backend"],
                                         var_names=kept)
    start = time.time()
    idata = nutpie.sample(
        compiled, draws=draws, tune=warmup, chains=chains, target_accept=target_acceptance,
        seed=int(seed), progress_bar=progress, cores=cores,
        low_rank_modified_mass_matrix=True, store_mass_matrix=keep_state,
        # the warm-up draws are never read (the fit drops those groups): not keeping them
        # saves chains x warm-up x (model values + unconstrained values) of memory, 1.3 GB of
        # the 5.1 GB peak of a 10,000-species fit with latent sizes
        save_warmup=False,
    )
    sampling = time.time() - start
    if recomputed:
        idata.posterior = pm.compute_deterministics(
            idata.posterior, var_names=recomputed, model=model, merge_dataset=True,
            progressbar=False, compile_kwargs=dict(PREDICTIVE_COMPILE))
    # nutpie joins the unconstrained values in the order of model.free_RVs (nutpie 0.16,
    # compile_pymc._make_functions)
    state = (adapted_state_from_nutpie(idata, [model.rvs_to_values[rv].name
                                               for rv in model.free_RVs])
             if keep_state else None)
    coords, dims = coords_and_dims_for_inferencedata(model)
    groups = {
        name: az.dict_to_dataset(found(model), library=pm, coords=coords, dims=dims,
                                 default_dims=[])
        for name, found in (("constant_data", find_constants),
                            ("observed_data", find_observations))
    }
    idata.add_groups(groups, coords=coords, dims=dims)
    idata.posterior.attrs.update({"sampling_time": sampling, "tuning_steps": warmup})
    return idata, sampling, state


def _large_deterministics(model: pm.Model) -> list[str]:
    """Deterministics of the model with at least :data:`LARGE_DETERMINISTIC` values per draw.

    nutpie keeps every stored value of every draw (the warm-up's too, kept until the end) in
    its own trace and copies the lot into the posterior at the end. A 10,000-species model
    with latent sizes stores the n size shifts and the n true sizes (``true_log_size``, a
    deterministic): the copy made the fit's peak (4.5 GB, benchmarks/README.md). Such
    deterministics are cheaper to recompute from the draws after sampling
    (:func:`pymc.compute_deterministics`, one vectorised call) than to store: same values.
    """
    names = []
    for var in model.deterministics:
        try:
            size = int(np.prod(var.shape.eval()))
        except Exception:  # a shape that needs inputs: keep the variable stored
            continue
        if size >= LARGE_DETERMINISTIC:
            names.append(var.name)
    return names


def _show_progress() -> bool:
    # Progress bars only for a person at a terminal; Snakemake jobs and CI get log lines.
    if os.environ.get("CI") or os.environ.get("ALLOLAW_NO_PROGRESS"):
        return False
    return sys.stderr.isatty()
