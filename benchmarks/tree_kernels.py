"""Kernels and cost of one log density + gradient: the whitened tree as one operation or not.

    .venv/bin/python benchmarks/tree_kernels.py                   # B, C, D and the island fits
    .venv/bin/python benchmarks/tree_kernels.py --problems B --repeats 5

For each problem and each form of the whitened tree map (``ALLOLAW_WHITENED_TREE=graph``: the
PyTensor graph of model/treemsg.py; ``operation``: one WhitenedTree operation per tree,
model/whitened_op.py) the model's log density + gradient is compiled as nutpie's JAX
compiler does (PyTensor's gradient graph, JAX mode, the XLA flags of ``runtime.configure_job``)
and the script prints: PyTensor nodes after rewriting; the compiled XLA program's fusions,
while loops and scatters; compile seconds (PyTensor rewrites + XLA, cold in-process JAX cache,
no persistent cache); the median over ``--repeats`` of µs per call of the jitted function
(500 calls each, the same random point for both forms); and the largest difference between
the two forms' log densities and gradients. Problems B, C, D are benchmarks/speed.py's
(invented data, seeded); the island fits use the demo's island table (prepared into a
temporary directory). Writes ``benchmarks/out/tree-kernels-<time>.json``. Not a test.
"""

from __future__ import annotations

import argparse
import json
import os
import re
import statistics
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
ISLAND_MODELS = ("taxa", "taxa_errors", "taxa_errors_curved", "taxa_errors_curved_by_taxon")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--problems", default="B,C,D," + ",".join(
        f"island:{m}" for m in ISLAND_MODELS), help="comma-separated; island:<model spec>")
    parser.add_argument("--repeats", type=int, default=5)
    parser.add_argument("--calls", type=int, default=500)
    args = parser.parse_args(argv)
    os.environ["ALLOLAW_NO_PROGRESS"] = "1"
    os.environ.pop("JAX_COMPILATION_CACHE_DIR", None)
    from allolaw.runtime import configure_job

    configure_job(1)
    rows = []
    island = None
    for problem in args.problems.split(","):
        if problem.startswith("island:") and island is None:
            island = _island_table()
        build = _builder(problem, island)
        results = {}
        for form in ("graph", "operation"):
            os.environ["ALLOLAW_WHITENED_TREE"] = form
            row, values = _measure(build, repeats=args.repeats, calls=args.calls)
            row |= {"problem": problem, "form": form}
            results[form] = values
            rows.append(row)
        diff = float(np.max(np.abs(results["graph"] - results["operation"])))
        for row in rows[-2:]:
            row["max_abs_difference"] = diff
        for row in rows[-2:]:
            _print(row, header=len(rows) == 2 and row is rows[-2])
    out = HERE / "out" / f"tree-kernels-{time.strftime('%Y%m%dT%H%M%S')}.json"
    out.parent.mkdir(exist_ok=True)
    out.write_text(json.dumps(rows, indent=1))
    print(f"wrote {out}")
    return 0


def _island_table() -> dict[str, Any]:
    from allolaw.config import load_config
    from allolaw.intake import prepare_dataset, read_clean, read_prepared
    from allolaw.intake.manifest import dataset_config_sha256
    from allolaw.model.fitting import _levels, _log_reference_size
    from allolaw.paths import prepared_path

    tmp = Path(tempfile.mkdtemp(prefix="allolaw-kernels-"))
    os.chdir(ROOT)
    config = load_config(["config/config.yaml"], [f"results_dir={tmp}"])
    prepare_dataset(config, "island_metabolism")
    sha = dataset_config_sha256(config, "island_metabolism")
    results = Path(config["results_dir"])
    prepared = read_prepared(results, "island_metabolism", config_sha256=sha)
    return {"data": read_clean(results, "island_metabolism", config_sha256=sha),
            "levels": _levels(config, "island_metabolism", prepared),
            "log_ref": _log_reference_size(prepared, prepared_path(results, "island_metabolism")),
            "models_dir": config["models_dir"]}


def _builder(problem: str, island: dict[str, Any] | None) -> Any:
    from allolaw.model.builder import build_model
    from allolaw.model.spec import load_spec, parse_spec

    if problem.startswith("island:"):
        spec = load_spec(island["models_dir"], problem.split(":", 1)[1])
        return lambda: build_model(island["data"], spec, levels=island["levels"],
                                   log_reference_size=island["log_ref"])
    sys.path.insert(0, str(HERE))
    import speed

    data, levels, log_ref, spec_raw = speed.simulate(problem, seed=speed.SEED)
    spec = parse_spec(spec_raw, name=f"bench_{problem}")
    return lambda: build_model(data, spec, levels=levels, log_reference_size=log_ref)


def _measure(build: Any, *, repeats: int, calls: int) -> tuple[dict[str, Any], np.ndarray]:
    import jax
    from pytensor.link.jax.dispatch import jax_funcify

    from allolaw.model.compiling import lighter_jax_rewrites

    lighter_jax_rewrites()
    jax.clear_caches()
    model = build()
    start = time.perf_counter()
    fn = model.logp_dlogp_function(ravel_inputs=True, mode="JAX")
    fn.set_extra_values({})
    fgraph = fn._pytensor_function.maker.fgraph
    rewrite_s = time.perf_counter() - start
    point = model.initial_point()
    flat = np.concatenate([np.ravel(point[v.name]) for v in model.value_vars])
    flat = flat + np.random.default_rng(0).normal(0.0, 0.1, size=flat.shape)
    # the program nutpie runs: PyTensor's graph of density + gradient, funcified and jitted
    args = [flat] + [np.asarray(v.get_value()) for v in fgraph.inputs[1:]]
    jitted = jax.jit(jax_funcify(fgraph))
    start = time.perf_counter()
    compiled = jitted.lower(*args).compile()
    xla_s = time.perf_counter() - start
    text = compiled.as_text()
    out = jax.block_until_ready(compiled(*args))
    per_call = []
    for _ in range(repeats):
        start = time.perf_counter()
        for _ in range(calls):
            out = compiled(*args)
        jax.block_until_ready(out)
        per_call.append((time.perf_counter() - start) / calls * 1e6)
    logp, grad = fn(flat)
    row = {
        "nodes": len(fgraph.apply_nodes),
        "fusions": len(re.findall(r"^\s*\S+ = \S+ fusion\(", text, re.MULTILINE)),
        "while_loops": len(re.findall(r" while\(", text)),
        "scatters": len(re.findall(r" scatter\(", text)),
        "rewrite_s": rewrite_s, "xla_compile_s": xla_s,
        "us_per_call": statistics.median(per_call), "us_per_call_all": per_call,
        "dimension": int(flat.size),
    }
    return row, np.concatenate([[logp], grad])


def _print(row: dict[str, Any], *, header: bool) -> None:
    if header:
        print(f"{'problem':34} {'form':9} {'dim':>6} {'nodes':>6} {'fusions':>7} {'while':>5} "
              f"{'scatter':>7} {'rewrite s':>9} {'XLA s':>6} {'µs/call':>8} {'max |Δ|':>8}")
    print(f"{row['problem']:34} {row['form']:9} {row['dimension']:6d} {row['nodes']:6d} "
          f"{row['fusions']:7d} {row['while_loops']:5d} {row['scatters']:7d} "
          f"{row['rewrite_s']:9.1f} {row['xla_compile_s']:6.1f} {row['us_per_call']:8.1f} "
          f"{row['max_abs_difference']:8.1e}", flush=True)


if __name__ == "__main__":
    sys.exit(main())
