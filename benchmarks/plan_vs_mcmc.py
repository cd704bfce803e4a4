"""Fast plan analysis against allolaw's MCMC fit on simulated tables; writes JSON.

    PYTHONPATH=src python benchmarks/plan_vs_mcmc.py [--tables 40] [--cache DIR]
        [--out benchmarks/plan_vs_mcmc.json]

The tables are spread in turn over 8 designs (20 or 60 species, 4 or 10 taxa, size error SD 0
or 0.2, size range 4) with a truth near the metabolic law (exponent 0.75, taxon SDs 0.3 and
0.05, scatter 0.2; invented truth for this check). Agreement: |P_fast − P_MCMC| ≤ 0.05 for
the posterior probability of the true hypothesis.
"""

from __future__ import annotations

import argparse
import json
import time
from pathlib import Path

from allolaw.planning.design import read_plan
from allolaw.planning.mcmc_check import check_against_mcmc, pick_tables
from allolaw.planning.simulate import DesignPrior

CONFIG = {
    "hypotheses": {"exponents": [{"name": "surface law", "value": 0.6667, "weight": 1},
                                 {"name": "metabolic law", "value": 0.75, "weight": 1},
                                 {"name": "isometry", "value": 1.0, "weight": 1}],
                   "other_weight": 1, "interval_halfwidth": 0.03},
    "plans": {"check": {
        "truth": {"exponent": 0.75, "intercept_sd": 0.3, "exponent_sd": 0.05,
                  "scatter_sd": 0.2},
        "designs": {"species": [20, 60], "taxa": [4, 10], "size_range": [4.0],
                    "size_error_sd": [0.0, 0.2]},
        "simulations": 100, "seed": 20261204}},
}


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--tables", type=int, default=40)
    parser.add_argument("--out", default="benchmarks/plan_vs_mcmc.json")
    parser.add_argument("--cache", default=None,
                        help="folder keeping each MCMC result (a rerun refits nothing)")
    args = parser.parse_args()
    plan = read_plan(CONFIG, "check")
    start = time.perf_counter()
    rows = check_against_mcmc(plan, DesignPrior.point(plan.truth),
                              pick_tables(plan, args.tables), cache=args.cache)
    within = (rows["abs_difference"] <= 0.05)
    # R-hat 1.01 (Vehtari et al. 2021, Bayesian Analysis 16:667-718): a fit above it is not
    # a reference for the approximation; its row is kept and counted apart
    converged = (rows["rhat_max"] <= 1.01) & (rows["divergences"] == 0)
    result = {
        "tables": len(rows), "share_within_0.05": float(within.mean()),
        "converged_fits": int(converged.sum()),
        "share_within_0.05_converged": float(within[converged].mean()),
        "max_abs_difference": float(rows["abs_difference"].max()),
        "wall_seconds": round(time.perf_counter() - start, 1),
        "config": CONFIG, "rows": rows.to_dict(orient="records"),
    }
    Path(args.out).write_text(json.dumps(result, indent=1))
    print(rows[["design", "table", "model", "true_hypothesis", "prob_fast", "prob_mcmc",
                "mean_fast", "mean_mcmc", "sd_fast", "sd_mcmc", "rhat_max",
                "seconds"]].to_string())
    print(f"converged fits: {int(converged.sum())}; within 0.05 among them: "
          f"{int(within[converged].sum())}")
    print(f"within 0.05: {within.sum()} of {len(rows)}; max |diff| "
          f"{result['max_abs_difference']:.3f}; {result['wall_seconds']} s")


if __name__ == "__main__":
    main()
