"""How the fit's functions are compiled: PyTensor's JAX mode, the JAX cache, per-draw modes.

The choices are measured on the project machine (see ``benchmarks/README.md``).
"""

from __future__ import annotations

import os

from allolaw.runtime import LIGHTER_REWRITES

#: How nutpie compiles the log density by default (see benchmarks/README.md for the measured
#: choice); the environment variable ALLOLAW_NUTPIE_BACKEND (jax or numba) forces one for
#: every fit.
NUTPIE_COMPILE: dict[str, str] = {"backend": os.environ.get("ALLOLAW_NUTPIE_BACKEND", "jax")}

#: Models with shared ancestry on a tree of at least this many species compile with numba.
#: Their tree density is one operation (phylogeny.tree_op.TreeDensity) whose numba form is a
#: loop over the nodes: 0.35 ms per density + gradient at 10,000 tips against 2.4 ms for the
#: JAX level form (benchmarks/phylo_density.py, 2026-12-05); a whole 10,000-tip fit, 4 x
#: (1000 + 1000), took 275-280 s with 8-13 s of compiling, and at 1,000 tips 42 s with numba
#: against 151 s with JAX (benchmarks/README.md "The tree density as one operation"). Below
#: 1,000 species JAX stays (not measured there): the per-gradient gain shrinks with the tree,
#: and JAX's programs come from the persistent cache across a batch while nutpie compiles
#: numba's anew in every process (about 13 s).
NUMBA_FROM_TREE_SPECIES = 1000


def nutpie_compiler(tree_species: int) -> str:
    """How nutpie compiles a model whose tree has ``tree_species`` species (0: no tree).

    ``numba`` from :data:`NUMBA_FROM_TREE_SPECIES` species on, else ``jax``; the environment
    variable ``ALLOLAW_NUTPIE_BACKEND`` overrides both.
    """
    forced = os.environ.get("ALLOLAW_NUTPIE_BACKEND")
    if forced:
        return forced
    return "numba" if tree_species >= NUMBA_FROM_TREE_SPECIES else NUTPIE_COMPILE["backend"]

# The log-likelihood and prior draws are computed once per fit, so their compile time is
# pure overhead: with PyTensor's default C mode a cold cache cost 32-35 s each on the
# 172-species island models (measured here), against 5-9 s without C compilation
# (FAST_COMPILE runs each operation through NumPy; the values are the same functions).
# The prior draws keep FAST_COMPILE (the prior-only graph is small). The log-likelihood and
# posterior predictive draws evaluate the whitened taxon tree once per draw (a few hundred
# small operations): on island taxa_errors_curved_by_taxon, 4000 draws, FAST_COMPILE took
# 20.1 s + 17.3 s, JAX (compiled once, persistent cache) 5.1 s + 3.8 s, same values.
PREDICTIVE_COMPILE: dict[str, str] = {"mode": "FAST_COMPILE"}  # copied per call: PyMC edits it


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


def per_draw_compile() -> dict[str, str]:
    # compile mode of the functions called once per posterior draw (a fresh dict per call)
    try:
        import jax  # noqa: F401
    except ImportError:  # pragma: no cover - jax is a dependency; kept as a safe fallback
        return dict(PREDICTIVE_COMPILE)
    apply_jax_cache()
    return {"mode": "JAX"}


def apply_jax_cache() -> None:
    # JAX reads JAX_COMPILATION_CACHE_DIR only when it is first imported; set the options
    # again in case JAX was imported before runtime.configure_job ran.
    import jax

    cache_dir = os.environ.get("JAX_COMPILATION_CACHE_DIR")
    if cache_dir and jax.config.jax_compilation_cache_dir != cache_dir:
        jax.config.update("jax_compilation_cache_dir", cache_dir)
        jax.config.update("jax_persistent_cache_min_compile_time_secs", 0.0)



# Persistent-cache events of this process, counted by a jax.monitoring listener: per fit,
# unlike the cache folder, which other jobs of the batch write to at the same time.
_CACHE_EVENTS = {"/jax/compilation_cache/cache_hits": "hits",
                 "/jax/compilation_cache/cache_misses": "compiled"}
_cache_counts = {"hits": 0, "compiled": 0}
_listening = False


def _count_cache_event(event: str, **_: object) -> None:
    key = _CACHE_EVENTS.get(event)
    if key is not None:
        _cache_counts[key] += 1


def jax_cache_counts() -> dict[str, int] | None:
    """Programs this process took from the JAX persistent cache and compiled into it so far.

    ``None`` when no cache folder is set (``runtime.configure_job`` sets one for every job).
    JAX keys each program by its text and compile options, so a fit whose functions have the
    same structure and data shapes as an earlier fit's finds them there. Call once before a
    fit (it starts the count) and once after; the difference is the fit's.
    """
    global _listening
    if not os.environ.get("JAX_COMPILATION_CACHE_DIR"):
        return None
    if not _listening:
        import jax.monitoring

        jax.monitoring.register_event_listener(_count_cache_event)
        _listening = True
    return dict(_cache_counts)


def describe_cache_use(before: dict[str, int] | None, after: dict[str, int] | None) -> str:
    """One phrase for the fit log: the fit's programs from the JAX cache and compiled."""
    if before is None or after is None:
        return "no JAX compile cache set"
    hits = after["hits"] - before["hits"]
    compiled = after["compiled"] - before["compiled"]
    if compiled == 0 and hits > 0:
        return f"JAX compile cache hit: all {hits} program(s) came from the cache"
    return (f"JAX compile cache: {hits} program(s) from the cache, {compiled} compiled and "
            "stored")
