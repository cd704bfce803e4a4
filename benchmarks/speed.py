"""Speed benchmark: allolaw's fit against the straightforward PyMC script, side by side.

    .venv/bin/python benchmarks/speed.py                      # A and B, full length
    .venv/bin/python benchmarks/speed.py --problems B --backends all
    .venv/bin/python benchmarks/speed.py --problems C,D --quick
    .venv/bin/python benchmarks/speed.py --problems B --cache-study

Reference problems (simulated with a seeded generator; invented data with known truth):

A  pooled law, n = 200, no measurement error
B  20 taxa, errors in both axes, shared curvature, n = 600
C  60 taxa, errors in both axes, n = 3000
D  300 families nested in 30 orders, errors in both axes, n = 10,000

Each fit runs in its own subprocess (clean peak memory, honest import and compile cost). The
baseline is what a user would write by hand: one non-centred hierarchical PyMC model with a
latent true size per species, sampled with ``pm.sample()`` defaults. allolaw's fit is
``model.builder.build_model`` + ``model.sampling.fit_model`` with the batch defaults (4 chains,
1000 + 1000, target acceptance 0.9, ``backend=auto`` unless ``--backends`` says otherwise).

Columns: wall, compile and sampling seconds; min bulk and tail ESS over every element of every
posterior variable; min bulk ESS per sampling second and per wall second; divergences; max
R-hat; mean leapfrog steps per draw; peak resident memory; ESS/s ratio to the baseline; and
``limit`` = (one log-density + gradient evaluation) × (all leapfrog steps, warm-up included,
estimated from the kept draws) / (cores used), the time a sampler with zero overhead would need.

Prints a table and writes ``benchmarks/out/speed-<time>.json``. Not part of the test run.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np

HERE = Path(__file__).resolve().parent
OUT = HERE / "out"
PROBLEMS = ("A", "B", "C", "D")
BACKENDS = ("pymc", "numpyro", "nutpie")
SEED = 20261202

_PROBLEM = {
    # n species, taxa per level (outer → inner), errors in both axes, curvature
    "A": {"n": 200, "levels": [], "errors": False, "curvature": False},
    "B": {"n": 600, "levels": [20], "errors": True, "curvature": True},
    "C": {"n": 3000, "levels": [60], "errors": True, "curvature": False},
    "D": {"n": 10_000, "levels": [30, 300], "errors": True, "curvature": False},
}


def main(argv: list[str] | None = None) -> int:
    """Run the benchmark (parent) or one fit (``--worker``)."""
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--problems", default="A,B", help="comma list from A,B,C,D")
    parser.add_argument("--quick", action="store_true",
                        help="300 + 300 draws per chain instead of 1000 + 1000")
    parser.add_argument("--backends", default="auto",
                        help="allolaw backends to run: auto, all, or a comma list")
    parser.add_argument("--threads", type=int, default=2, help="cores per fit (default 2)")
    parser.add_argument("--no-baseline", action="store_true", help="skip the baseline fits")
    parser.add_argument("--cache-study", action="store_true",
                        help="default backend twice (300 + 300) on a fresh compile cache, on the "
                        "last problem: cold vs warm")
    parser.add_argument("--worker", help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.worker:
        print(json.dumps(_work(json.loads(args.worker))))
        return 0

    problems = [p.strip().upper() for p in args.problems.split(",") if p.strip()]
    bad = [p for p in problems if p not in PROBLEMS]
    if bad:
        parser.error(f"unknown problem {bad[0]!r}; choose from {','.join(PROBLEMS)}")
    backends = {"auto": ["auto"], "all": ["auto", *BACKENDS]}.get(
        args.backends, [b.strip() for b in args.backends.split(",") if b.strip()])
    draws = 300 if args.quick else 1000
    cache = OUT / "cache"
    rows: list[dict[str, Any]] = []
    for problem in problems:
        jobs = [] if args.no_baseline else [("baseline", "pymc")]
        jobs += [("allolaw", b) for b in backends]
        base = None
        for runner, backend in jobs:
            job = {"problem": problem, "runner": runner, "backend": backend, "draws": draws,
                   "threads": args.threads, "cache": str(cache)}
            row = _spawn(job)
            if runner == "baseline":
                base = row
            if base and "min_ess_per_s" in row and base.get("min_ess_per_s"):
                row["ratio_ess_per_s"] = row["min_ess_per_s"] / base["min_ess_per_s"]
                row["ratio_wall"] = base["wall_s"] / row["wall_s"]
            rows.append(row)
            _print_row(row, header=len(rows) == 1)
    if args.cache_study:
        fresh = tempfile.mkdtemp(prefix="allolaw-cold-cache-")
        for label in ("cold", "warm"):
            # compile cost does not depend on the draws: the short run is enough
            job = {"problem": problems[-1], "runner": "allolaw", "backend": "auto",
                   "draws": 300, "threads": args.threads, "cache": fresh, "label": label}
            row = _spawn(job)
            rows.append(row)
            _print_row(row, header=False)
    OUT.mkdir(parents=True, exist_ok=True)
    stamp = time.strftime("%Y%m%dT%H%M%S", time.gmtime())
    path = OUT / f"speed-{stamp}.json"
    meta = {"machine_cores": os.cpu_count(), "argv": sys.argv[1:], "utc": stamp,
            "load_average_start": os.getloadavg()}
    path.write_text(json.dumps({"meta": meta, "rows": rows}, indent=2) + "\n", encoding="utf-8")
    _print_growth(rows)
    print(f"\nwrote {path}")
    return 0


# --- parent side ---------------------------------------------------------------------------

_COLUMNS = [
    ("problem", "{}"), ("runner", "{}"), ("backend", "{}"), ("label", "{}"),
    ("wall_s", "{:.1f}"), ("compile_s", "{:.1f}"), ("sampling_s", "{:.1f}"),
    ("ess_bulk_min", "{:.0f}"), ("ess_tail_min", "{:.0f}"), ("min_ess_per_s", "{:.1f}"),
    ("min_ess_per_wall_s", "{:.1f}"), ("divergences", "{}"), ("rhat_max", "{:.3f}"),
    ("steps_per_draw", "{:.1f}"), ("grad_us", "{:.0f}"), ("limit_s", "{:.1f}"),
    ("peak_rss_mb", "{:.0f}"), ("ratio_ess_per_s", "{:.2f}"), ("ratio_wall", "{:.2f}"),
]


def _spawn(job: dict[str, Any]) -> dict[str, Any]:
    cmd = [sys.executable, str(Path(__file__).resolve()), "--worker", json.dumps(job)]
    start = time.perf_counter()
    proc = subprocess.run(cmd, capture_output=True, text=True, check=False)
    elapsed = time.perf_counter() - start
    if proc.returncode != 0:
        tail = proc.stderr.strip().splitlines()[-3:]
        return {**job, "error": " | ".join(tail), "process_s": elapsed}
    row = json.loads(proc.stdout.strip().splitlines()[-1])
    row["process_s"] = elapsed
    return row


def _print_row(row: dict[str, Any], *, header: bool) -> None:
    if header:
        print(" | ".join(name for name, _ in _COLUMNS))
    if "error" in row:
        print(f"{row['problem']} | {row['runner']} | {row['backend']} | FAILED: {row['error']}")
        return
    cells = []
    for name, fmt in _COLUMNS:
        value = row.get(name)
        cells.append("-" if value is None else fmt.format(value))
    print(" | ".join(cells), flush=True)


def _print_growth(rows: list[dict[str, Any]]) -> None:
    # Growth exponent of allolaw's sampling time in n: slope of log time on log n.
    for runner, backend in (("baseline", "pymc"), ("allolaw", "auto")):
        pts = [(r["n"], r["sampling_s"]) for r in rows
               if r.get("runner") == runner and r.get("backend") == backend
               and r.get("label") is None and "sampling_s" in r and r["problem"] in "BCD"]
        if len(pts) >= 2:
            n, t = np.log(np.array(pts, dtype=float)).T
            slope = np.polyfit(n, t, 1)[0]
            print(f"growth of sampling time in n ({runner}, problems B/C/D): n^{slope:.2f}")


# --- worker side ---------------------------------------------------------------------------

def _work(job: dict[str, Any]) -> dict[str, Any]:
    t0 = time.perf_counter()
    if job["runner"] == "allolaw":
        os.environ["ALLOLAW_CACHE_DIR"] = job["cache"]
        os.environ["ALLOLAW_NO_PROGRESS"] = "1"
        from allolaw.runtime import configure_job

        configure_job(job["threads"])
    import pymc as pm

    import_s = time.perf_counter() - t0
    data, levels, log_ref, spec_raw = simulate(job["problem"], seed=SEED)
    draws = job["draws"]
    start = time.perf_counter()
    if job["runner"] == "baseline":
        model = baseline_model(data, levels, log_ref, curvature=_PROBLEM[job["problem"]]
                               ["curvature"], errors=_PROBLEM[job["problem"]]["errors"])
        with model:
            idata = pm.sample(draws=draws, tune=draws, random_seed=SEED, progressbar=False)
        wall = time.perf_counter() - start
        sampling = float(idata.posterior.attrs.get("sampling_time", wall))
        compile_s = wall - sampling
        backend_used = "pymc"
        cores = min(4, os.cpu_count() or 1)
    else:
        from allolaw.model.builder import build_model
        from allolaw.model.sampling import fit_model
        from allolaw.model.spec import parse_spec

        spec = parse_spec(spec_raw, name=f"bench_{job['problem']}")
        model = build_model(data, spec, levels=levels, log_reference_size=log_ref)
        prior_model = build_model(data, spec, levels=levels, log_reference_size=log_ref,
                                  prior_only=True)
        idata = fit_model(model, chains=4, draws=draws, warmup=draws, target_acceptance=0.9,
                          seed=SEED, backend=job["backend"], threads=job["threads"],
                          prior_draws=100, prior_model=prior_model)
        wall = time.perf_counter() - start
        sampling = float(idata.attrs["sampling_seconds"])
        compile_s = float(idata.attrs["compile_seconds"])
        backend_used = idata.attrs["backend"]
        cores = min(job["threads"], 4)
    row = {**job, "n": len(data), "backend_used": backend_used, "import_s": import_s,
           "wall_s": wall, "compile_s": compile_s, "sampling_s": sampling}
    row.update(_quality(idata))
    row["min_ess_per_s"] = row["ess_bulk_min"] / max(sampling, 1e-9)
    row["min_ess_per_wall_s"] = row["ess_bulk_min"] / max(wall, 1e-9)
    grad = _gradient_seconds(model, backend_used, idata.attrs.get("compiler", "")
                             if job["runner"] == "allolaw" else "")
    row["grad_us"] = grad * 1e6
    total_steps = row["steps_per_draw"] * 4 * 2 * draws
    row["limit_s"] = grad * total_steps / cores
    usage = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    children = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
    row["peak_rss_mb"] = max(usage, children)
    row["peak_rss_self_mb"] = usage
    row["peak_rss_child_mb"] = children
    return row


def simulate(problem: str, *, seed: int) -> tuple[Any, list[str], float, dict[str, Any]]:
    """Seeded data for one reference problem in the clean.csv format, plus its allolaw spec.

    Returns (table, taxon levels, log reference size, spec mapping).
    """
    import pandas as pd

    setup = _PROBLEM[problem]
    rng = np.random.default_rng([seed, ord(problem)])
    n = setup["n"]
    log_ref = np.log(100.0)
    x_true = rng.normal(log_ref, 1.5, n)
    a, b, c = 1.0, 0.75, 0.04 if setup["curvature"] else 0.0
    levels: list[str] = []
    intercept = np.full(n, a)
    exponent = np.full(n, b)
    table: dict[str, Any] = {"species": [f"sp{i:05d}" for i in range(n)]}
    if setup["levels"]:
        names = ["genus"] if len(setup["levels"]) == 1 else ["order", "family"]
        inner_n = setup["levels"][-1]
        inner = rng.permutation(np.arange(n) % inner_n)
        dev_a = rng.normal(0, 0.3, inner_n)
        dev_b = rng.normal(0, 0.08, inner_n)
        if len(setup["levels"]) == 2:
            outer_n = setup["levels"][0]
            parent = np.arange(inner_n) % outer_n
            dev_a += rng.normal(0, 0.3, outer_n)[parent]
            dev_b += rng.normal(0, 0.05, outer_n)[parent]
            table["order"] = [f"O{parent[k]:03d}" for k in inner]
        table[names[-1]] = [f"T{k:03d}" for k in inner]
        levels = names
        intercept = a + dev_a[inner]
        exponent = b + dev_b[inner]
    d = x_true - log_ref
    y_true = intercept + exponent * d + c * d**2 + rng.normal(0, 0.15, n)
    if setup["errors"]:
        sd_x = rng.uniform(0.03, 0.12, n)
        sd_y = rng.uniform(0.03, 0.10, n)
    else:
        sd_x = np.zeros(n)
        sd_y = np.zeros(n)
    table.update({
        "log_size": x_true + rng.normal(0, 1, n) * sd_x,
        "log_trait": y_true + rng.normal(0, 1, n) * sd_y,
        "n_rows": 1,
        "sd_log_size": sd_x,
        "sd_log_trait": sd_y,
        "sd_source_size": "given",
        "sd_source_trait": "given",
    })
    spec: dict[str, Any] = {"taxa": {"levels": "none"}}
    if levels:
        spec = {"taxa": {"levels": "all", "vary": ["intercept", "exponent"],
                         "parameterisation": "auto"}}
    if setup["errors"]:
        spec.update({"size_error": "known", "trait_error": "known"})
    if setup["curvature"]:
        spec["curvature"] = "shared"
    return pd.DataFrame(table), levels, float(log_ref), spec


def baseline_model(data: Any, levels: list[str], log_ref: float, *, curvature: bool,
                   errors: bool) -> Any:
    """The model a user would write by hand: non-centred taxa, latent true sizes."""
    import pymc as pm

    x = data["log_size"].to_numpy()
    y = data["log_trait"].to_numpy()
    with pm.Model() as model:
        a = pm.Normal("a", 0, 5)
        b = pm.Normal("b", 1, 1)
        sigma = pm.HalfNormal("sigma", 1)
        if errors:
            mu_x = pm.Normal("mu_x", float(np.mean(x)), 5)
            sd_x = pm.HalfNormal("sd_x", 5)
            x_true = pm.Normal("x_true", mu_x, sd_x, shape=len(x))
            pm.Normal("x_obs", x_true, data["sd_log_size"].to_numpy(), observed=x)
        else:
            x_true = x
        d = x_true - log_ref
        at, bt = a, b
        if levels:
            inner = data[levels[-1]].astype("category").cat.codes.to_numpy()
            n_inner = int(inner.max()) + 1
            if len(levels) == 2:
                outer_of = (data.groupby(levels[-1], observed=True)[levels[0]].first()
                            .astype("category").cat.codes.to_numpy())
                n_outer = int(outer_of.max()) + 1
                s_ao = pm.HalfNormal("s_a_outer", 1)
                s_bo = pm.HalfNormal("s_b_outer", 0.25)
                a_outer = a + s_ao * pm.Normal("z_a_outer", 0, 1, shape=n_outer)
                b_outer = b + s_bo * pm.Normal("z_b_outer", 0, 1, shape=n_outer)
                a_parent, b_parent = a_outer[outer_of], b_outer[outer_of]
            else:
                a_parent, b_parent = a, b
            s_a = pm.HalfNormal("s_a", 1)
            s_b = pm.HalfNormal("s_b", 0.25)
            at = (a_parent + s_a * pm.Normal("z_a", 0, 1, shape=n_inner))[inner]
            bt = (b_parent + s_b * pm.Normal("z_b", 0, 1, shape=n_inner))[inner]
        mu = at + bt * d
        if curvature:
            mu = mu + pm.Normal("c", 0, 0.25) * d**2
        sd_total = pm.math.sqrt(sigma**2 + data["sd_log_trait"].to_numpy() ** 2)
        pm.Normal("y", mu, sd_total, observed=y)
    return model


def _quality(idata: Any) -> dict[str, Any]:
    import arviz as az

    post = idata.posterior
    bulk = az.ess(post, method="bulk")
    tail = az.ess(post, method="tail")
    rhat = az.rhat(post)
    stats = idata.sample_stats
    steps = None
    for name in ("n_steps", "num_steps"):
        if name in stats:
            steps = float(stats[name].mean())
            break
    if steps is None and "tree_depth" in stats:
        steps = float((2.0 ** stats["tree_depth"] - 1).mean())
    return {
        "ess_bulk_min": float(min(bulk[v].min() for v in bulk.data_vars)),
        "ess_tail_min": float(min(tail[v].min() for v in tail.data_vars)),
        "rhat_max": float(max(rhat[v].max() for v in rhat.data_vars)),
        "divergences": int(stats["diverging"].sum()),
        "steps_per_draw": steps if steps is not None else float("nan"),
    }


def _gradient_seconds(model: Any, backend: str, compiler: str = "", *,
                      repeats: int = 300) -> float:
    # One log-density + gradient evaluation, in the implementation the backend uses
    # (pytensor C for pymc, JAX for numpyro, nutpie's compiler for nutpie: JAX or numba), at
    # the initial point.
    point = model.initial_point()
    if backend == "numpyro":
        import jax
        from pymc.sampling.jax import get_jaxified_logp

        logp = get_jaxified_logp(model, negative_logp=False)
        fn = jax.jit(jax.value_and_grad(logp))
        args = [point[v.name] for v in model.value_vars]
        jax.block_until_ready(fn(args))
        start = time.perf_counter()
        for _ in range(repeats):
            out = fn(args)
        jax.block_until_ready(out)
        return (time.perf_counter() - start) / repeats
    mode = None
    if backend == "nutpie":
        mode = "JAX" if compiler == "jax" else "NUMBA"
    fn = model.logp_dlogp_function(ravel_inputs=True, mode=mode)
    fn.set_extra_values({})
    flat = np.concatenate([np.ravel(point[v.name]) for v in model.value_vars])
    fn(flat)
    start = time.perf_counter()
    for _ in range(repeats):
        fn(flat)
    return (time.perf_counter() - start) / repeats


if __name__ == "__main__":
    sys.exit(main())
