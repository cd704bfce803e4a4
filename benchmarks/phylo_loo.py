"""Cost of the linear-time LOO conditional densities (allolaw.phylogeny.loo) by tree size.

For random trees (seeded, invented) of 1k to 30k tips: seconds for 256 posterior draws of
``loo_log_density`` (one chunk), the seconds per draw, and the growth exponent of the time
in the number of tips (least-squares slope on log-log). NumPy only (the LOO stage runs once
per fit, outside the sampler).

Run: PYTHONPATH=src python benchmarks/phylo_loo.py [sizes ...]
"""

from __future__ import annotations

import sys
import time

import numpy as np

from allolaw.phylogeny.loo import loo_log_density
from allolaw.phylogeny.simulate import random_tree


def main() -> None:
    sizes = [int(a) for a in sys.argv[1:]] or [1_000, 3_000, 10_000, 30_000]
    draws = 256
    print(f"{'tips':>7}{'levels':>7}{'depths':>7}{f'{draws} draws s':>15}{'ms/draw':>9}")
    times = []
    for n in sizes:
        phylo = random_tree(n, seed=n)
        rng = np.random.default_rng(n)
        r = rng.normal(size=(draws, n))
        sigma = rng.uniform(0.5, 2.0, draws)
        lam = rng.uniform(size=draws)
        loo_log_density(r[:2], sigma[:2], lam[:2], phylo)  # plan built once per tree
        t0 = time.perf_counter()
        loo_log_density(r, sigma, lam, phylo)
        sec = time.perf_counter() - t0
        times.append(sec)
        print(f"{n:>7}{len(phylo.levels):>7}{len(phylo.depth_groups):>7}{sec:>15.2f}"
              f"{1e3 * sec / draws:>9.2f}")
    if len(sizes) > 1:
        slope = np.polyfit(np.log(sizes), np.log(times), 1)[0]
        print(f"time grows as tips^{slope:.2f} over {sizes[0]}-{sizes[-1]}")


if __name__ == "__main__":
    main()
