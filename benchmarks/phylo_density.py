"""Cost of one phylogenetic log density + gradient (allolaw.phylogeny.density) by tree size.

For random trees (allolaw's seeded generator; invented) of 1k, 3k, 10k and 30k tips, the
log density of N(0, σ²(λC + (1 − λ)D)) and its gradient with respect to the residuals, σ and
λ are compiled with PyTensor's JAX and numba backends (the two compilers nutpie uses in the
fits; JAX with the same lighter rewrites as allolaw.model.compiling) and, with ``--c``,
PyTensor's default C backend. The tree's messages are one operation
(allolaw.phylogeny.tree_op.TreeDensity): numba runs its node loops, JAX its level form.
Printed per size: levels of the tree, graph build and compile seconds, the compiled graph's
node count, the median seconds per call (of 50 calls after a warm-up; JAX returns before it
has finished, so each timed call converts every output to a NumPy array), and the NumPy
twin's (density only). "rewrite s" is PyTensor's graph rewriting (``pytensor.function``),
"first call s" the backend's own compilation (XLA for JAX, LLVM for numba) plus one call;
"|diff|" the compiled value's distance from the NumPy twin's. The growth exponent is the
least-squares slope of log time per call on log tips.

Run: PYTHONPATH=src python benchmarks/phylo_density.py [--c] [sizes ...]
"""

from __future__ import annotations

import sys
import time

import numpy as np
import pytensor
import pytensor.tensor as pt

from allolaw.model.compiling import lighter_jax_rewrites
from allolaw.phylogeny.density import log_density, log_density_numpy
from allolaw.phylogeny.simulate import random_tree


def _median_call(f, *args, repeats: int = 50) -> float:
    f(*args)
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        f(*args)
        times.append(time.perf_counter() - t0)
    return float(np.median(times))


def main() -> None:
    args = [a for a in sys.argv[1:] if not a.startswith("--")]
    sizes = [int(a) for a in args] or [1_000, 3_000, 10_000, 30_000]
    modes = ["JAX", "NUMBA"] + (["C"] if "--c" in sys.argv else [])
    lighter_jax_rewrites()
    r, s, lam = pt.vector("r"), pt.scalar("sigma"), pt.scalar("lam")
    print(f"{'tips':>7}{'levels':>7}{'mode':>6}{'build s':>9}{'rewrite s':>10}"
          f"{'first call s':>13}{'nodes':>7}{'call ms':>9}{'numpy ms':>9}{'|diff|':>9}")
    results: dict[str, list[float]] = {m: [] for m in modes}
    for n in sizes:
        phylo = random_tree(n, seed=n)
        x = np.random.default_rng(n).normal(size=n)
        np_ms = 1e3 * _median_call(log_density_numpy, x, 1.0, 0.5, phylo, repeats=20)
        for mode in modes:
            t0 = time.perf_counter()
            out = log_density(r, s, lam, phylo)
            grads = pt.grad(out, [r, s, lam])
            build = time.perf_counter() - t0
            t0 = time.perf_counter()
            compiled = pytensor.function([r, s, lam], [out, *grads],
                                         mode="FAST_RUN" if mode == "C" else mode)
            rewrite = time.perf_counter() - t0

            def f(*a, compiled=compiled):
                return [np.asarray(o) for o in compiled(*a)]

            t0 = time.perf_counter()
            value = f(x, 1.0, 0.5)[0]  # JAX compiles at the first call
            first = time.perf_counter() - t0
            diff = abs(float(value) - log_density_numpy(x, 1.0, 0.5, phylo))
            nodes = len(compiled.maker.fgraph.apply_nodes)
            call = _median_call(f, x, 1.0, 0.5)
            results[mode].append(call)
            print(f"{n:>7}{len(phylo.levels):>7}{mode:>6}{build:>9.2f}{rewrite:>10.2f}"
                  f"{first:>13.2f}{nodes:>7}{1e3 * call:>9.3f}{np_ms:>9.3f}{diff:>9.1e}")
    for mode, times in results.items():
        if len(times) > 1:
            slope = np.polyfit(np.log(sizes), np.log(times), 1)[0]
            print(f"{mode}: time per call grows as tips^{slope:.2f} over {sizes[0]}-{sizes[-1]}")


if __name__ == "__main__":
    main()
