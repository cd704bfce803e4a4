"""Wall time and memory of the pipeline's whole phylogenetic fit, by tree size.

Invented data with known truth: for random ultrametric trees (allolaw's seeded generator,
scaled to unit height) of 1k, 3k, 10k (and 30k) tips, true log sizes evolve by Brownian
motion along the tree from 2.0 at the root (SD 1.5 at the tips), each is measured once with
a known error SD 0.1 (given per row), and the log trait is ``a + b·size + residual`` with
``a = 0.3``, ``b = 0.75`` and residuals ``N(0, σ²(λC + (1 − λ)D))``, ``σ = 0.3``, ``λ = 0.6``.
The table goes to the model builder as a ``clean.csv`` table (one row per species, column
``sd_log_size``) with the tree in table order, as the fit stage hands them over.

Each size runs in its own process (so the peak memory is that size's), which does what the
``fit`` stage does: :func:`allolaw.runtime.configure_job` with ``--cores`` threads before
PyMC is imported, :func:`allolaw.model.builder.build_model` of the spec :data:`SPEC` (the
island demo's ``ancestry_errors`` model with size errors given instead of from replicates:
no taxon levels, size measured with known error, true sizes along the tree
(``size_tree_mean``, ``size_tree_sd``, potential ``size_ancestry_density``), residuals
along the tree with Pagel's λ estimated) and of its prior-draw form, then
:func:`allolaw.model.sampling.fit_model` with the fit stage's target acceptance (0.9), 500
prior draws and backend ``--backend`` (default ``auto``). No chain extension
(``extension_draws`` 0), so every size runs the same number of draws. The log reference
size is 0, so the intercept is ``a``. Free parameters: the n size shifts, ``size_tree_mean``,
``size_tree_sd``, ``intercept``, ``exponent``, ``sigma``, ``ancestry_signal``.

Printed per size (seconds from ``time.perf_counter`` and the fit's own attributes):

* build s: both ``build_model`` calls (the model and its prior-draw form);
* compile s and sample s: ``fit_model``'s ``compile_seconds`` and ``sampling_seconds``.
  With nutpie the compile seconds are PyTensor's rewrites and nutpie's compile of the
  model; the XLA compile of the log density happens at its first evaluation, inside
  ``nutpie.sample``, so it is counted in the sample seconds (as the fits count it), and it
  is short when the JAX persistent cache (``.cache/allolaw/jax`` in the working folder)
  already holds the program: the JSON rows keep the fit's cache note;
* predict s: ``predictive_seconds`` (pointwise leave-one-out log-likelihood along the tree,
  posterior and prior predictive draws), which the fit stage also spends;
* total s: from the first ``build_model`` call to the return of ``fit_model``;
* peak MB: ``ru_maxrss`` of the size's process (imports, data, model, draws);
* divergences, leapfrog steps per kept draw (JSON only), the largest R-hat over all free
  parameters (rank-normalised split R-hat, Vehtari et al. 2021), the smallest bulk ESS,
  and the posterior means of b and λ against the truth (the JSON rows add their central 90%
  intervals).

Then the growth exponent: the least-squares slope of log time on log tips, for the sampling
time and the total. ``--json OUT`` writes the rows, the command and the load averages.

Run: PYTHONPATH=src python benchmarks/phylo_fit_speed.py [--draws D] [--warmup W]
[--chains C] [--cores K] [--backend B] [--json OUT] [sizes ...]   (defaults 1000, 1000, 4,
2, auto; sizes 1000 3000 10000)

References
----------
Pagel, M. (1999). Inferring the historical patterns of biological evolution. Nature 401,
877–884.
Vehtari, A., Gelman, A., Simpson, D., Carpenter, B. & Bürkner, P.-C. (2021). Rank-
normalization, folding, and localization: an improved R-hat. Bayesian Anal. 16, 667–718.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

TRUE = {"a": 0.3, "b": 0.75, "sigma": 0.3, "lam": 0.6, "size_mean": 2.0, "size_sd": 1.5}
ERROR_SD = 0.1
#: Plain-word spec of the fitted model (models/ancestry_errors.yaml with known size errors).
SPEC = {
    "taxa": {"levels": "none"},
    "size_error": "known",
    "trait_error": "none",
    "shared_ancestry": "signal",
    "priors": {"ancestry_signal": {"alpha": 1.0, "beta": 1.0}},
}
#: Table columns: (heading, row key, width, format).
COLUMNS = (
    ("tips", "tips", 7, "d"), ("build s", "build_s", 8, ".1f"),
    ("compile s", "compile_s", 10, ".1f"), ("sample s", "sample_s", 9, ".1f"),
    ("predict s", "predict_s", 10, ".1f"), ("total s", "total_s", 8, ".1f"),
    ("peak MB", "peak_mb", 8, ".0f"), ("diverg.", "divergences", 8, "d"),
    ("max R-hat", "max_rhat", 10, ".4f"), ("min ESS", "min_ess_bulk", 8, ".0f"),
    ("b (0.75)", "b_mean", 9, ".3f"), ("λ (0.6)", "lam_mean", 8, ".3f"),
)


def main() -> None:
    """Run each size in its own process, print the table and growth exponents."""
    args = _parser().parse_args()
    if args.one:
        print(json.dumps(_fit_one(args.one, args)))
        return
    sizes = args.sizes or [1_000, 3_000, 10_000]
    load_start = _load_average()
    rows = []
    print("".join(f"{head:>{width}}" for head, _, width, _ in COLUMNS), flush=True)
    for n in sizes:
        cmd = [sys.executable, __file__, "--one", str(n), "--draws", str(args.draws),
               "--warmup", str(args.warmup), "--chains", str(args.chains),
               "--cores", str(args.cores), "--backend", args.backend]
        # the child's log and warnings go to this process's stderr, its row to stdout
        out = subprocess.run(cmd, check=True, stdout=subprocess.PIPE, text=True).stdout
        r = json.loads(out.strip().splitlines()[-1])
        rows.append(r)
        print("".join(f"{r[key]:>{width}{fmt}}" for _, key, width, fmt in COLUMNS), flush=True)
    growth = {}
    if len(rows) >= 2:
        logn = np.log([r["tips"] for r in rows])
        for key in ("sample_s", "total_s"):
            growth[key] = float(np.polyfit(logn, np.log([r[key] for r in rows]), 1)[0])
            print(f"growth exponent of {key} against tips: {growth[key]:.2f}")
    for r in rows:
        print(f"{r['tips']} tips: backend {r['backend']} (log density compiled with "
              f"{r.get('compiler') or 'n/a'}); {r['compile_cache']}")
    load_end = _load_average()
    print(f"load average (1, 5, 15 min): at start {load_start}, at end {load_end}")
    if args.json:
        record = {"command": sys.argv, "spec": SPEC, "truth": TRUE, "error_sd": ERROR_SD,
                  "load_average_start": load_start, "load_average_end": load_end,
                  "growth_exponent": growth, "rows": rows}
        Path(args.json).write_text(json.dumps(record, indent=1) + "\n", encoding="utf-8")


def _load_average() -> list[float]:
    return [round(v, 2) for v in os.getloadavg()]


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("sizes", nargs="*", type=int)
    p.add_argument("--draws", type=int, default=1000)
    p.add_argument("--warmup", type=int, default=1000)
    p.add_argument("--chains", type=int, default=4)
    p.add_argument("--cores", type=int, default=2, help="threads of each fit (configure_job)")
    p.add_argument("--backend", default="auto", help="auto, pymc, numpyro or nutpie")
    p.add_argument("--json", metavar="OUT", default="", help="write the rows to this file")
    p.add_argument("--one", type=int, default=0, help=argparse.SUPPRESS)
    return p


def _simulate(n: int, seed: int):
    """Tree (species in table order) and clean table of one invented dataset."""
    from allolaw.model.phylo_terms import scale_to_unit_height, simulate_residuals
    from allolaw.phylogeny.simulate import random_tree
    from allolaw.testing import as_clean_table

    rng = np.random.default_rng(seed)
    phylo = scale_to_unit_height(random_tree(n, seed=seed, ultrametric=True))
    sizes = TRUE["size_mean"] + simulate_residuals(TRUE["size_sd"], 1.0, phylo, rng=rng)
    measured = sizes + rng.normal(0.0, ERROR_SD, n)
    resid = simulate_residuals(TRUE["sigma"], TRUE["lam"], phylo, rng=rng)
    trait = TRUE["a"] + TRUE["b"] * sizes + resid
    table = as_clean_table(list(phylo.species), measured, trait, sd_log_size=ERROR_SD,
                           source="invented")
    return phylo, table


def _fit_one(n: int, args: argparse.Namespace) -> dict:
    """Build and fit the pipeline's model for one tree size, as the fit stage does."""
    from allolaw.runtime import configure_job, import_arviz_without_numba

    configure_job(args.cores)  # before PyTensor, JAX or PyMC are imported
    import_arviz_without_numba()
    from allolaw.model.builder import build_model
    from allolaw.model.sampling import fit_model
    from allolaw.model.spec import parse_spec

    phylo, table = _simulate(n, seed=n)
    spec = parse_spec(SPEC, name="phylo_fit_speed")
    t0 = time.perf_counter()
    model = build_model(table, spec, levels=[], log_reference_size=0.0, phylogeny=phylo)
    prior_model = build_model(table, spec, levels=[], log_reference_size=0.0,
                              prior_only=True, phylogeny=phylo)
    t1 = time.perf_counter()
    idata = fit_model(model, chains=args.chains, draws=args.draws, warmup=args.warmup,
                      target_acceptance=0.9, seed=n, backend=args.backend,
                      threads=args.cores, prior_draws=500, prior_model=prior_model,
                      extension_draws=0)
    t2 = time.perf_counter()
    return {
        "tips": n,
        "draws": args.draws, "warmup": args.warmup, "chains": args.chains, "cores": args.cores,
        "backend": idata.attrs["backend"], "backend_fallback": idata.attrs["backend_fallback"],
        "compile_cache": idata.attrs["compile_cache"],
        "compiler": idata.attrs.get("compiler", ""),
        "build_s": t1 - t0,
        "compile_s": float(idata.attrs["compile_seconds"]),
        "sample_s": float(idata.attrs["sampling_seconds"]),
        "predict_s": float(idata.attrs["predictive_seconds"]),
        "total_s": t2 - t0,
        "peak_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
        **_summarise(idata, [rv.name for rv in model.free_RVs]),
    }


def _summarise(idata, names: list[str]) -> dict:
    """Divergences, worst R-hat and bulk ESS over the free parameters, means of b and λ."""
    import arviz as az

    post = idata.posterior[names]
    rhat = az.rhat(post)
    ess = az.ess(post)
    return {
        "parameters": int(sum(post[v].size // (post.sizes["chain"] * post.sizes["draw"])
                              for v in names)),
        "divergences": int(idata.sample_stats["diverging"].sum()),
        # leapfrog steps per kept draw (nutpie's n_steps; the warm-up's are not kept)
        "steps_per_draw": (float(idata.sample_stats["n_steps"].mean())
                           if "n_steps" in idata.sample_stats else None),
        "max_rhat": float(max(float(rhat[v].max()) for v in rhat.data_vars)),
        "min_ess_bulk": float(min(float(ess[v].min()) for v in ess.data_vars)),
        "b_mean": float(idata.posterior["exponent"].mean()),
        "lam_mean": float(idata.posterior["ancestry_signal"].mean()),
        "b_90": [float(q) for q in np.quantile(idata.posterior["exponent"], [0.05, 0.95])],
        "lam_90": [float(q) for q in
                   np.quantile(idata.posterior["ancestry_signal"], [0.05, 0.95])],
    }


if __name__ == "__main__":
    main()
