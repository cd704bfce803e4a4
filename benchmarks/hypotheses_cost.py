"""Extra cost of the hypothesis probabilities over the fit they are computed from.

Prepares one demo dataset into a temporary results folder, fits one model with the given
sampler settings, then times ``compare_hypotheses`` on the fit, and prints both wall times and
their ratio (target: hypotheses under 10% of the fit).

    .venv/bin/python benchmarks/hypotheses_cost.py --dataset tree_biomass --model taxa_errors
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--dataset", default="tree_biomass")
    parser.add_argument("--model", default="taxa_errors")
    parser.add_argument("--chains", type=int, default=2)
    parser.add_argument("--draws", type=int, default=1000)
    parser.add_argument("--warmup", type=int, default=1000)
    parser.add_argument("--repeats", type=int, default=3, help="timings of the hypotheses")
    args = parser.parse_args()

    from allolaw.runtime import configure_job

    configure_job(1)
    import os

    os.chdir(REPO)
    from allolaw.answers.hypotheses import compare_hypotheses
    from allolaw.config import hypotheses_config, load_config
    from allolaw.intake import prepare_dataset
    from allolaw.model.fitting import fit_dataset_model
    from allolaw.model.spec import load_spec

    with tempfile.TemporaryDirectory() as tmp:
        config = load_config(REPO / "config" / "config.yaml", [
            f"results_dir={tmp}", f"sampler.chains={args.chains}",
            f"sampler.draws={args.draws}", f"sampler.warmup={args.warmup}",
            "sampler.backend=pymc",
        ])
        prepare_dataset(config, args.dataset)
        start = time.perf_counter()
        idata = fit_dataset_model(config, args.dataset, args.model, threads=1)
        fit_s = time.perf_counter() - start
        spec = load_spec(config["models_dir"], args.model)
        settings = hypotheses_config(config, args.dataset)
        times = []
        for _ in range(args.repeats):
            start = time.perf_counter()
            table = compare_hypotheses(idata, spec, settings)
            times.append(time.perf_counter() - start)
    hyp_s = min(times)
    n_params = table.groupby(["parameter", "taxon"]).ngroups
    print(f"dataset {args.dataset}, model {args.model}: {args.chains} chains x {args.draws} "
          f"draws (+{args.warmup} warm-up), backend pymc, 1 core")
    print(f"fit wall time (build + sample + all groups + write): {fit_s:8.2f} s")
    print(f"hypotheses wall time (best of {args.repeats}):            {hyp_s:8.2f} s  "
          f"(all: {', '.join(f'{t:.2f}' for t in times)})")
    print(f"exponents weighed: {n_params}; rows: {len(table)}; methods: "
          f"{sorted(set(table['method']))}")
    print(f"hypotheses / fit: {100 * hyp_s / fit_s:.1f}% (target < 10%)")
    pop = table[(table["parameter"] == "exponent") & (table["kind"] != "bound")]
    print(pop[["hypothesis", "value", "log_bf", "posterior_prob"]].to_string(index=False))


if __name__ == "__main__":
    main()
