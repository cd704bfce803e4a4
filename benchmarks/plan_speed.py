"""Speed of a plan: 8 designs × 500 simulated tables with taxa and size error.

    PYTHONPATH=src python benchmarks/plan_speed.py [--simulations 500]

Prints the wall time of the whole plan in one process (chunk 1 of 1), then in two processes
(chunks 1/2 and 2/2 at once, as two workflow jobs would run them), the seconds per design and
the load average at the start (other jobs on the machine slow it down). The designs: 20, 40,
80 or 160 species in 8 taxa, size range 3 or 6, size error SD 0.2 (invented truth: exponent
0.75, taxon SDs 0.3 and 0.05, scatter 0.2).
"""

from __future__ import annotations

import argparse
import os
import time
from concurrent.futures import ProcessPoolExecutor

from allolaw.planning import DesignPrior, read_plan, run_chunk, simulate_design

CONFIG = {
    "hypotheses": {"exponents": [{"name": "surface law", "value": 0.6667, "weight": 1},
                                 {"name": "metabolic law", "value": 0.75, "weight": 1},
                                 {"name": "isometry", "value": 1.0, "weight": 1}]},
    "plans": {"speed": {
        "truth": {"exponent": 0.75, "intercept_sd": 0.3, "exponent_sd": 0.05,
                  "scatter_sd": 0.2},
        "designs": {"species": [20, 40, 80, 160], "taxa": [8], "size_range": [3.0, 6.0],
                    "size_error_sd": [0.2]},
        "simulations": 500, "seed": 1}},
}


def _chunk(args: tuple[int, int, int]) -> float:
    k, n_chunks, sims = args
    CONFIG["plans"]["speed"]["simulations"] = sims
    plan = read_plan(CONFIG, "speed")
    start = time.perf_counter()
    run_chunk(plan, DesignPrior.point(plan.truth), k, n_chunks)
    return time.perf_counter() - start


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--simulations", type=int, default=500)
    args = parser.parse_args()
    CONFIG["plans"]["speed"]["simulations"] = args.simulations
    plan = read_plan(CONFIG, "speed")
    print(f"load average at start: {os.getloadavg()[0]:.2f} on {os.cpu_count()} cores")
    print(f"{len(plan.designs)} designs x {plan.simulations} tables")
    prior = DesignPrior.point(plan.truth)
    import numpy as np

    total = 0.0
    cpu_start = time.process_time()
    for d, design in enumerate(plan.designs):
        start = time.perf_counter()
        simulate_design(plan, prior, d, np.arange(plan.simulations))
        took = time.perf_counter() - start
        total += took
        print(f"  {design.label()}: {took:.2f} s")
    print(f"one process, design by design: {total:.1f} s wall, "
          f"{time.process_time() - cpu_start:.1f} s CPU (this process and its BLAS threads)")
    start = time.perf_counter()
    with ProcessPoolExecutor(2) as pool:
        parts = list(pool.map(_chunk, [(1, 2, args.simulations), (2, 2, args.simulations)]))
    wall = time.perf_counter() - start
    print(f"two processes (chunks 1/2, 2/2): wall {wall:.1f} s "
          f"(chunks {parts[0]:.1f} s, {parts[1]:.1f} s)")


if __name__ == "__main__":
    main()
