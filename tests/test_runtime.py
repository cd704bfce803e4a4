"""Tests for allolaw.runtime: thread variables and compile caches really take effect.

Each check runs in a fresh subprocess, so the test process's environment and already-imported
libraries are untouched.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np

_PROBE = r"""
import json, os, sys
from allolaw.runtime import configure_job
env = configure_job(int(sys.argv[1]))
import pytensor
import jax
import jax.numpy as jnp
jax.jit(lambda v: jnp.sin(v) * 2.0 + 1.0)(jnp.arange(3.0)).block_until_ready()
# a gradient through a scatter-add (segment sums, as in the taxon tree) under the job's XLA
# flags, against its closed form: d/dv sum_g (sum_{i in g} sin v_i)^2 = 2 S_g(i) cos v_i
import numpy as np
idx = np.array([0, 1, 0, 2, 1])
v = np.linspace(0.1, 1.3, 5)
grad = jax.jit(jax.grad(lambda v: jnp.sum(jnp.zeros(3).at[idx].add(jnp.sin(v)) ** 2)))(v)
groups = np.bincount(idx, weights=np.sin(v), minlength=3)
grad_error = float(np.max(np.abs(np.asarray(grad) - 2.0 * groups[idx] * np.cos(v))))
print(json.dumps({
    "env": env,
    "environ": {k: os.environ[k] for k in env},
    "pytensor_base": str(pytensor.config.base_compiledir),
    "jax_cache": jax.config.jax_compilation_cache_dir,
    "jax_min_time": jax.config.jax_persistent_cache_min_compile_time_secs,
    "devices": jax.local_device_count(),
    "excluding": pytensor.config.optimizer_excluding,
    "grad_error": grad_error,
}))
"""

def _probe(tmp_path: Path, threads: int) -> dict:
    env = {k: v for k, v in os.environ.items()
           if not k.startswith(("OMP_", "MKL_", "OPENBLAS_", "NUMBA_", "PYTENSOR_", "JAX_",
                                "XLA_"))}
    env["ALLOLAW_CACHE_DIR"] = str(tmp_path / "cache")
    out = subprocess.run([sys.executable, "-c", _PROBE, str(threads)], capture_output=True,
                         text=True, env=env, cwd=tmp_path, check=False, timeout=300)
    assert out.returncode == 0, out.stderr
    return json.loads(out.stdout.strip().splitlines()[-1])


def test_configure_job_sets_threads_and_caches_that_libraries_use(tmp_path: Path) -> None:
    result = _probe(tmp_path, 3)
    cache = tmp_path / "cache"
    for var in ("OMP_NUM_THREADS", "MKL_NUM_THREADS", "OPENBLAS_NUM_THREADS",
                "NUMBA_NUM_THREADS"):
        assert result["environ"][var] == "3"
    assert result["environ"] == result["env"]
    # pytensor compiles into the job cache, JAX writes its persistent cache there.
    assert Path(result["pytensor_base"]) == cache / "pytensor"
    assert Path(result["jax_cache"]) == cache / "jax"
    assert result["jax_min_time"] == 0
    assert any((cache / "jax").iterdir()), "JAX wrote nothing to its persistent cache"
    # One XLA host device per thread, for numpyro's parallel chains.
    assert result["devices"] == 3
    assert "--xla_force_host_platform_device_count=3" in result["environ"]["XLA_FLAGS"]
    # the compile-time settings (XLA runtime flags, one rewrite left out) took effect: the
    # jitted function above ran under them
    assert "--xla_cpu_use_thunk_runtime=false" in result["environ"]["XLA_FLAGS"]
    assert result["excluding"] == "local_greedy_distributor"
    assert result["grad_error"] < 1e-6  # float32 or float64, the compiled gradient is right


def test_configure_job_counts_at_least_one_thread(tmp_path: Path) -> None:
    result = _probe(tmp_path, 0)
    assert result["environ"]["OMP_NUM_THREADS"] == "1"
    assert result["devices"] == 1


_ARVIZ_PROBE = r"""
import json, sys
import numpy as np
if sys.argv[1] == "hide":
    from allolaw.runtime import import_arviz_without_numba
    import_arviz_without_numba()
import arviz as az
state = {"numba_imported": "numba" in sys.modules, "arviz_numba": az.Numba.numba_flag}
import numba  # importable again once ArviZ is in
import pytensor.tensor as pt
from pytensor import function
x = pt.dvector("x")
state["pytensor_ok"] = float(function([x], (x ** 2).sum())(np.arange(3.0))) == 5.0
draws = np.random.default_rng(7).standard_normal((4, 500, 3)).cumsum(axis=1) * 0.05
draws += np.random.default_rng(8).standard_normal((4, 500, 3))
data = az.convert_to_dataset({"theta": draws})
state["diagnostics"] = [float(v) for v in np.concatenate([
    az.ess(data, method="bulk")["theta"].values, az.ess(data, method="tail")["theta"].values,
    az.rhat(data)["theta"].values, np.ravel(az.mcse(data, method="mean")["theta"].values)])]
print(json.dumps(state))
"""


def _arviz_probe(mode: str) -> dict:
    out = subprocess.run([sys.executable, "-c", _ARVIZ_PROBE, mode], capture_output=True,
                         text=True, check=False, timeout=300)
    assert out.returncode == 0, out.stderr
    return json.loads(out.stdout.strip().splitlines()[-1])


def test_arviz_imported_without_numba_gives_arviz_own_numba_diagnostics() -> None:
    # The CLI imports ArviZ with Numba hidden (no import-time Numba compile), so ArviZ takes
    # its NumPy paths. They must give the diagnostics of its default Numba paths (the
    # reference: ArviZ in a plain process), and Numba and PyTensor must still work after.
    hidden, plain = _arviz_probe("hide"), _arviz_probe("plain")
    assert (hidden["numba_imported"], hidden["arviz_numba"]) == (False, False)
    assert (plain["numba_imported"], plain["arviz_numba"]) == (True, True)
    assert hidden["pytensor_ok"] is True
    np.testing.assert_allclose(hidden["diagnostics"], plain["diagnostics"], rtol=1e-10)
