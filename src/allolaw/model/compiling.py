"""How the fit's functions are compiled: PyTensor's JAX mode, the JAX cache, per-draw modes.

The choices are measured on the project machine (see ``benchmarks/README.md``).
"""

from __future__ import annotations

import os
from pathlib import Path

from allolaw.runtime import LIGHTER_REWRITES

#: How nutpie compiles the log density (see benchmarks/README.md for the measured choice).
NUTPIE_COMPILE: dict[str, str] = {"backend": os.environ.get("ALLOLAW_NUTPIE_BACKEND", "jax")}

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


def jax_cache_programs() -> set[str] | None:
    """Names of the compiled programs in the JAX persistent cache (``None``: no cache set).

    JAX writes one ``<name>-<key>-cache`` file per compiled program, keyed by the program's
    text and the compile options, so a fit whose functions have the same structure as an
    earlier fit's (same spec, same data shapes) finds its programs there and writes none.
    Comparing the names before and after a fit tells a cache hit from a miss.
    """
    cache_dir = os.environ.get("JAX_COMPILATION_CACHE_DIR")
    if not cache_dir or not Path(cache_dir).is_dir():
        return None
    return {p.name for p in Path(cache_dir).iterdir() if p.name.endswith("-cache")}


def describe_cache_use(before: set[str] | None, after: set[str] | None) -> str:
    """One phrase for the fit log: how many programs the fit added to the JAX cache."""
    if before is None or after is None:
        return "no JAX compile cache set"
    new = len(after - before)
    if new == 0:
        return f"JAX compile cache hit: every program came from the cache ({len(after)} there)"
    return f"JAX compile cache: {new} new program(s) compiled and stored ({len(after)} there)"
