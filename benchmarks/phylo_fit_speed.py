"""Wall time and memory of a whole phylogenetic fit (latent sizes + Pagel's λ) by tree size.

For random ultrametric trees (allolaw's seeded generator; invented data with known truth) of
1k, 3k, 10k (and 30k) tips, each size in its own process (so the peak memory is that size's):
true log sizes evolve by Brownian motion along the tree from a population mean
(:func:`allolaw.phylogeny.size_log_density`), each is measured once with a known error SD
0.1, and the log trait is ``a + b·size + residual`` with residuals
``N(0, σ²(λC + (1 − λ)D))`` (:func:`allolaw.phylogeny.log_density`). The model has n + 6
free parameters (the n latent sizes, their mean and SD, a, b, σ, λ) and no n × n matrix. It is
compiled and sampled with nutpie on the JAX backend, as the fits are.

Printed per size: compile seconds (PyTensor rewrites + nutpie's compile), sampling seconds,
total wall seconds, peak resident memory (MB, ``ru_maxrss`` of the size's process),
divergences, the largest R-hat over all parameters (rank-normalised split R-hat, Vehtari et
al. 2021), the smallest bulk ESS, and the posterior mean of b and λ against the truth
(b = 0.75, λ = 0.6). Then the growth exponent: the least-squares slope of log time on log
tips, for the sampling time and the total.

Run: PYTHONPATH=src python benchmarks/phylo_fit_speed.py [--draws D] [--warmup W]
[--chains C] [--cores K] [sizes ...]   (defaults 1000, 1000, 4, 2; sizes 1000 3000 10000)

References
----------
Vehtari, A., Gelman, A., Simpson, D., Carpenter, B. & Bürkner, P.-C. (2021). Rank-
normalization, folding, and localization: an improved R-hat. Bayesian Anal. 16, 667–718.
"""

from __future__ import annotations

import argparse
import json
import logging
import resource
import subprocess
import sys
import time

import numpy as np

TRUE = {"a": 0.3, "b": 0.75, "sigma": 0.3, "lam": 0.6, "size_mean": 2.0, "size_sd": 1.5}
ERROR_SD = 0.1


def main() -> None:
    args = _parser().parse_args()
    if args.one:
        print(json.dumps(_fit_one(args.one, args)))
        return
    sizes = args.sizes or [1_000, 3_000, 10_000]
    rows = []
    print(f"{'tips':>7}{'compile s':>10}{'sample s':>9}{'total s':>8}{'peak MB':>8}"
          f"{'diverg.':>8}{'max R-hat':>10}{'min ESS':>8}{'b (0.75)':>9}{'λ (0.6)':>8}",
          flush=True)
    for n in sizes:
        cmd = [sys.executable, __file__, "--one", str(n), "--draws", str(args.draws),
               "--warmup", str(args.warmup), "--chains", str(args.chains),
               "--cores", str(args.cores)]
        out = subprocess.run(cmd, check=True, capture_output=True, text=True).stdout
        r = json.loads(out.strip().splitlines()[-1])
        rows.append(r)
        print(f"{n:>7}{r['compile_s']:>10.1f}{r['sample_s']:>9.1f}{r['total_s']:>8.1f}"
              f"{r['peak_mb']:>8.0f}{r['divergences']:>8}{r['max_rhat']:>10.4f}"
              f"{r['min_ess_bulk']:>8.0f}{r['b_mean']:>9.3f}{r['lam_mean']:>8.3f}", flush=True)
    if len(rows) >= 2:
        logn = np.log([r["tips"] for r in rows])
        for key in ("sample_s", "total_s"):
            slope = np.polyfit(logn, np.log([r[key] for r in rows]), 1)[0]
            print(f"growth exponent of {key} against tips: {slope:.2f}")


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("sizes", nargs="*", type=int)
    p.add_argument("--draws", type=int, default=1000)
    p.add_argument("--warmup", type=int, default=1000)
    p.add_argument("--chains", type=int, default=4)
    p.add_argument("--cores", type=int, default=2)
    p.add_argument("--one", type=int, default=0, help=argparse.SUPPRESS)
    return p


def _simulate(n: int, seed: int):
    from allolaw.model.phylo_terms import scale_to_unit_height, simulate_residuals
    from allolaw.phylogeny.simulate import random_tree

    rng = np.random.default_rng(seed)
    phylo = scale_to_unit_height(random_tree(n, seed=seed, ultrametric=True))
    sizes = TRUE["size_mean"] + simulate_residuals(TRUE["size_sd"], 1.0, phylo, rng=rng)
    measured = sizes + rng.normal(0.0, ERROR_SD, n)
    resid = simulate_residuals(TRUE["sigma"], TRUE["lam"], phylo, rng=rng)
    trait = TRUE["a"] + TRUE["b"] * sizes + resid
    return phylo, measured, trait


def _fit_one(n: int, args: argparse.Namespace) -> dict:
    """Build, compile and sample the model for one tree size (a straight sequence)."""
    import arviz as az
    import nutpie
    import pymc as pm

    from allolaw.model.compiling import lighter_jax_rewrites
    from allolaw.phylogeny.density import log_density, size_log_density

    logging.getLogger("pymc").setLevel(logging.ERROR)
    lighter_jax_rewrites()
    phylo, measured, trait = _simulate(n, seed=n)
    t0 = time.perf_counter()
    with pm.Model() as model:
        m = pm.Normal("size_mean", 0.0, 5.0)
        tau = pm.HalfNormal("size_sd", 2.0)
        # true minus measured log size, flat (as the fits' size_shift): starts at the data
        s = measured + pm.Flat("size_shift", shape=n)
        pm.Potential("size_tree", size_log_density(s, m, tau, phylo))
        pm.Normal("measured", s, ERROR_SD, observed=measured)
        a = pm.Normal("a", 0.0, 2.0)
        b = pm.Normal("b", 0.75, 0.5)
        sigma = pm.HalfNormal("sigma", 1.0)
        lam = pm.Beta("lam", 1.0, 1.0)
        pm.Potential("trait_tree", log_density(trait - a - b * s, sigma, lam, phylo))
    compiled = nutpie.compile_pymc_model(model, backend="jax", gradient_backend="pytensor")
    t1 = time.perf_counter()
    idata = nutpie.sample(compiled, draws=args.draws, tune=args.warmup, chains=args.chains,
                          cores=args.cores, seed=n, progress_bar=False)
    t2 = time.perf_counter()
    post = idata.posterior[["size_mean", "size_sd", "size_shift", "a", "b", "sigma", "lam"]]
    rhat = az.rhat(post)
    ess = az.ess(post)
    return {
        "tips": n,
        "draws": args.draws, "warmup": args.warmup, "chains": args.chains, "cores": args.cores,
        "compile_s": t1 - t0,
        "sample_s": t2 - t1,
        "total_s": t2 - t0,
        "peak_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
        "divergences": int(idata.sample_stats["diverging"].sum()),
        "max_rhat": float(max(float(rhat[v].max()) for v in rhat.data_vars)),
        "min_ess_bulk": float(min(float(ess[v].min()) for v in ess.data_vars)),
        "b_mean": float(post["b"].mean()),
        "lam_mean": float(post["lam"].mean()),
    }


if __name__ == "__main__":
    main()
