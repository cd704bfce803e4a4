"""Threads and compile caches for one job.

Call :func:`configure_job` before importing pytensor, JAX or PyMC: it fixes the thread count of
every math library to the job's share of cores (no oversubscription) and puts the compile
caches on local disk, where they stay warm across the jobs of a batch.
"""

from __future__ import annotations

import os
import sys
from pathlib import Path

__all__ = ["LIGHTER_REWRITES", "cache_root", "configure_job", "import_arviz_without_numba"]

#: PyTensor graph rewrites left out of compilation. The gradient of the whitened taxon tree
#: (model.terms.taxon_terms) is a graph of ~6,400 small operations; ``local_greedy_distributor``
#: (which factors a*b + a*c into a*(b + c)) took about half of its rewriting time: on island
#: taxa_errors_curved_by_taxon the JAX compile of the log density and gradient fell from
#: 20.7 s to 10.5 s without it, the rewritten graph is the same size (392 vs 391 nodes) and
#: the fit's sampling time did not change (65.1 vs 67.7 s). It only simplifies algebra; the
#: stability rewrites all stay. :func:`configure_job` passes it to PyTensor's default mode
#: (``optimizer_excluding``), :func:`allolaw.model.compiling.lighter_jax_rewrites` to its JAX mode.
LIGHTER_REWRITES = ("local_greedy_distributor",)

_THREAD_VARS = (
    "OMP_NUM_THREADS",
    "MKL_NUM_THREADS",
    "OPENBLAS_NUM_THREADS",
    "NUMBA_NUM_THREADS",
    "VECLIB_MAXIMUM_THREADS",
    "NUMEXPR_NUM_THREADS",
)


def cache_root() -> Path:
    """Local-disk cache folder.

    ``$ALLOLAW_CACHE_DIR`` if set; else, inside a SLURM job, ``/tmp/<user>/allolaw-cache`` on
    the node's own disk (the working directory there is usually a shared file system, and
    ``/tmp`` outlives the job, so later jobs on the node find the cache warm); else
    ``.cache/allolaw`` in the working directory.
    """
    if "ALLOLAW_CACHE_DIR" in os.environ:
        return Path(os.environ["ALLOLAW_CACHE_DIR"])
    if "SLURM_JOB_ID" in os.environ:
        user = os.environ.get("USER") or str(os.getuid())
        return Path("/tmp") / user / "allolaw-cache"
    return Path.cwd() / ".cache" / "allolaw"


def configure_job(threads: int) -> dict[str, str]:
    """Set thread variables and compile-cache locations for this process.

    Parameters
    ----------
    threads
        Cores given to the job (Snakemake's ``{threads}``).

    Returns
    -------
    dict
        The environment variables that were set.
    """
    threads = max(1, int(threads))
    root = cache_root()
    pytensor_dir = root / "pytensor"
    jax_dir = root / "jax"
    pytensor_dir.mkdir(parents=True, exist_ok=True)
    jax_dir.mkdir(parents=True, exist_ok=True)
    env = {var: str(threads) for var in _THREAD_VARS}
    flags = os.environ.get("PYTENSOR_FLAGS", "")
    if "base_compiledir" not in flags:
        flags = ",".join(f for f in (flags, f"base_compiledir={pytensor_dir}") if f)
    if "optimizer_excluding" not in flags:
        flags = ",".join((flags, "optimizer_excluding=" + ":".join(LIGHTER_REWRITES)))
    env["PYTENSOR_FLAGS"] = flags
    env["JAX_COMPILATION_CACHE_DIR"] = str(jax_dir)
    env["JAX_PERSISTENT_CACHE_MIN_COMPILE_TIME_SECS"] = "0"
    env["JAX_PLATFORMS"] = "cpu"
    # One XLA host device per core (numpyro runs parallel chains on devices); no Eigen thread
    # pool inside a device, so a job never uses more than its cores.
    # XLA:CPU's older whole-program runtime, without the newer fusion emitters, compiles the
    # demo models' log density and gradient in 1.7 s instead of 10.4 s at the same cost per
    # call (0.42 vs 0.41 ms; island taxa_errors_curved_by_taxon, benchmarks/README.md). Both
    # flags exist in the pinned jaxlib, which logs that the first is deprecated; XLA stops on
    # flags it does not know, so a jaxlib upgrade must re-check them.
    env["XLA_FLAGS"] = (
        f"--xla_force_host_platform_device_count={threads} --xla_cpu_multi_thread_eigen=false"
        " --xla_cpu_use_thunk_runtime=false --xla_cpu_use_fusion_emitters=false"
    )
    os.environ.update(env)
    return env


def import_arviz_without_numba() -> None:
    """Import ArviZ with Numba hidden, so ArviZ takes its NumPy paths in this process.

    ArviZ 0.23 uses Numba whenever it is installed (PyTensor installs it): it compiles a Numba
    ufunc while being imported (``arviz.stats.ecdf_utils``, for ECDF bands, which we never
    draw) and jit-compiles its variance helper on first use, about 1 s per process in all
    (a process that imports ArviZ and exits: 3.5 s with Numba, 2.6 s without;
    benchmarks/startup_cost.py). No ArviZ setting avoids the import-time compile, so Numba
    is hidden from ``sys.modules`` for the length of the import only; afterwards it imports
    as usual (PyTensor's Numba backend still works). Does nothing if ArviZ or Numba is
    already imported. Called by the CLI stages that read fits, before anything imports PyMC
    (which imports ArviZ).
    """
    if "arviz" in sys.modules or "numba" in sys.modules:
        return
    sys.modules["numba"] = None  # type: ignore[assignment]  # import numba -> ImportError
    try:
        import arviz
    finally:
        del sys.modules["numba"]
    arviz.Numba.disable_numba()  # already off (Numba was not found); say so explicitly
