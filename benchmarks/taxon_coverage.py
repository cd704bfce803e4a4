"""Coverage of 90% intervals of taxon exponents on datasets from the demo generator.

For each seed, the demo generator (``allolaw.demo.write_demo_data``) writes a fresh set of
invented tables with their truth; the island survey is prepared as in the batch and fitted
with a model spec (default ``taxa_errors``, the dataset's primary model); the central 90%
interval of every family's exponent is compared with the family's true exponent. Over many
datasets about 90% of the intervals should cover (the issue's target band: 85-95%).

    .venv/bin/python benchmarks/taxon_coverage.py --seeds 10 --out benchmarks/taxon_coverage.json

Each fit runs in a worker process (a long run of JAX-compiled samplers in one process ran out
of JIT code memory in the SBC study).
"""

from __future__ import annotations

import argparse
import json
import logging
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
DATASET = "island_metabolism"
LEVEL = "family"


def fit_one(seed: int, model: str, draws: int, warmup: int) -> dict:
    """Generate the demo data with ``seed``, fit ``model`` to the island survey, score it."""
    import numpy as np

    from allolaw.config import load_config
    from allolaw.demo import write_demo_data
    from allolaw.intake import prepare_dataset, read_clean, read_prepared
    from allolaw.model.builder import build_model
    from allolaw.model.spec import load_spec
    from allolaw.testing import quick_sample

    with tempfile.TemporaryDirectory() as tmp:
        data_dir = Path(tmp) / "demo"
        write_demo_data(data_dir, seed=seed)
        truth = json.loads((data_dir / "truth.json").read_text())[DATASET]
        config = load_config(REPO / "config" / "config.yaml", [f"results_dir={tmp}/results"])
        for source in config["datasets"][DATASET]["sources"]:
            source["file"] = str(data_dir / Path(source["file"]).name)
        if config["datasets"][DATASET].get("tree"):  # this seed's tree, not the committed one
            tree = Path(config["datasets"][DATASET]["tree"]).name
            config["datasets"][DATASET]["tree"] = str(data_dir / tree)
        prepare_dataset(config, DATASET)
        data = read_clean(Path(tmp) / "results", DATASET)
        prepared = read_prepared(Path(tmp) / "results", DATASET)
    levels = list(config["datasets"][DATASET]["sources"][0]["columns"]["levels"])
    spec = load_spec(REPO / "models", model)
    fit = quick_sample(build_model(data, spec, levels=levels,
                                   log_reference_size=float(prepared["log_reference_size"])),
                       seed=seed, draws=draws, warmup=warmup, chains=2, target_acceptance=0.9)
    post = fit.posterior[f"taxon_exponent__{LEVEL}"]
    labels = [str(v) for v in post[LEVEL].values]
    values = post.values.reshape(-1, len(labels))
    lo, hi = np.quantile(values, [0.05, 0.95], axis=0)
    true = np.array([truth["taxon_exponent"][LEVEL][name] for name in labels])
    inside = (lo < true) & (true < hi)
    return {"seed": seed, "taxa": labels, "inside": inside.tolist(),
            "divergences": int(fit.sample_stats["diverging"].sum())}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=int, default=10, help="datasets (seeds 1..N)")
    parser.add_argument("--model", default="taxa_errors")
    parser.add_argument("--draws", type=int, default=500)
    parser.add_argument("--warmup", type=int, default=700)
    parser.add_argument("--jobs", type=int, default=1,
                        help="datasets fitted at a time (each fit is single-threaded)")
    parser.add_argument("--out", default="benchmarks/taxon_coverage.json")
    parser.add_argument("--worker", type=int, help=argparse.SUPPRESS)
    parser.add_argument("--record", help=argparse.SUPPRESS)
    args = parser.parse_args()
    logging.basicConfig(level=logging.WARNING)
    if args.worker is not None:
        from allolaw.runtime import configure_job

        configure_job(1)
        record = fit_one(args.worker, args.model, args.draws, args.warmup)
        Path(args.record).write_text(json.dumps(record), encoding="utf-8")
        return
    start = time.perf_counter()
    from allolaw.testing.workers import run_commands

    seeds = list(range(1, args.seeds + 1))
    finished: list[dict] = []
    with tempfile.TemporaryDirectory() as tmp:
        outs = [Path(tmp) / f"{seed}.json" for seed in seeds]
        commands = [[sys.executable, __file__, "--worker", str(seed), "--record", str(out),
                     "--model", args.model, "--draws", str(args.draws), "--warmup",
                     str(args.warmup)] for seed, out in zip(seeds, outs, strict=True)]

        def done(i: int) -> None:
            finished.append(json.loads(outs[i].read_text(encoding="utf-8")))
            hits = sum(sum(r["inside"]) for r in finished)
            total = sum(len(r["inside"]) for r in finished)
            print(f"dataset {seeds[i]}/{args.seeds}: {sum(finished[-1]['inside'])} of "
                  f"{len(finished[-1]['inside'])} intervals cover; so far {hits}/{total}, "
                  f"{time.perf_counter() - start:.0f} s", flush=True)

        run_commands(commands, jobs=args.jobs, on_done=done)
        records = [json.loads(out.read_text(encoding="utf-8")) for out in outs]
    hits = sum(sum(r["inside"]) for r in records)
    total = sum(len(r["inside"]) for r in records)
    share = hits / total
    se = (share * (1 - share) / total) ** 0.5
    print(f"coverage of 90% intervals of {LEVEL} exponents ({args.model}): {share:.3f} "
          f"({hits} of {total}; binomial SE {se:.3f}; target 0.85-0.95)")
    out = {"model": args.model, "level": LEVEL, "coverage": share, "intervals": total,
           "hits": hits, "records": records, "draws": args.draws, "warmup": args.warmup,
           "seconds": time.perf_counter() - start}
    Path(args.out).write_text(json.dumps(out, indent=2) + "\n", encoding="utf-8")
    print(f"wrote {args.out}")


if __name__ == "__main__":
    main()
