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
from allolaw.planning.mcmc_check import (
    CHECK_CONFIG,
    check_against_mcmc,
    converged_references,
    pick_tables,
)
from allolaw.planning.simulate import DesignPrior


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--tables", type=int, default=40)
    parser.add_argument("--out", default="benchmarks/plan_vs_mcmc.json")
    parser.add_argument("--cache", default=None,
                        help="folder keeping each MCMC result (a rerun refits nothing)")
    args = parser.parse_args()
    plan = read_plan(CHECK_CONFIG, "check")
    start = time.perf_counter()
    rows = check_against_mcmc(plan, DesignPrior.point(plan.truth),
                              pick_tables(plan, args.tables), cache=args.cache)
    within = (rows["abs_difference"] <= 0.05)
    converged = converged_references(rows)
    result = {
        "tables": len(rows), "share_within_0.05": float(within.mean()),
        "converged_fits": int(converged.sum()),
        "share_within_0.05_converged": float(within[converged].mean()),
        "max_abs_difference": float(rows["abs_difference"].max()),
        "wall_seconds": round(time.perf_counter() - start, 1),
        "config": CHECK_CONFIG, "rows": rows.to_dict(orient="records"),
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
