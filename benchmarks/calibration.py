"""SBC and coverage study of the taxa + errors + curvature model (prints a table, writes JSON).

    .venv/bin/python benchmarks/calibration.py --replicates 100 --out benchmarks/calibration.json

Replicates run in worker processes of ``--per-process`` replicates each (default 10),
``--jobs`` of them at a time (default 1; 2 on a 2-core machine).

Each replicate draws all parameters from the prior, simulates a small dataset (4 genera x 8
species, errors in size and trait) and fits it (Talts et al. 2018, arXiv:1804.06788). The ranks
of exponent, curvature, exponent SD and sigma should be uniform (chi-square p-values not small),
and 90% intervals of the taxon exponents should cover the truth 85-95% of the time.
"""

from __future__ import annotations

import argparse
import json
import logging
import sys
import tempfile
import time
from pathlib import Path

from allolaw.model.spec import parse_spec
from allolaw.testing import simulate_law
from allolaw.testing.calibration import calibration_records, summarise_calibration

# Priors fixed numbers (no data-dependent centring), narrow enough that prior datasets look
# like scaling data; SBC is valid for any proper prior.
SBC_SPEC = {
    "taxa": {"levels": "all", "vary": ["intercept", "exponent"], "parameterisation": "auto"},
    "size_error": "known",
    "trait_error": "known",
    "curvature": "shared",
    "priors": {
        "intercept": {"mean": 0.0, "sd": 1.0},
        "exponent": {"mean": 0.75, "sd": 0.2},
        "curvature": {"mean": 0.0, "sd": 0.1},
        "sigma": {"sd": 0.3},
        "intercept_sd": {"sd": 0.5},
        "exponent_sd": {"sd": 0.1},
        "size_population": {"mean": 0.0, "sd": 0.5, "sd_scale": 1.5},
    },
}
PARAMETERS = ["exponent", "curvature", "exponent_sd__genus", "sigma"]
COVERAGE_OF = "taxon_exponent__genus"


def template_table(seed: int = 1):
    """The design shared by every replicate: 4 genera x 8 species, error SDs 0.1 (given)."""
    return simulate_law(seed=seed, taxa=(4,), level_names=("genus",), species_per_taxon=8,
                        size_error_sd=0.1, trait_error_sd=0.1)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--replicates", type=int, default=100)
    parser.add_argument("--seed", type=int, default=20261202)
    parser.add_argument("--draws", type=int, default=500)
    parser.add_argument("--warmup", type=int, default=700)
    parser.add_argument("--bins", type=int, default=10, help="rank histogram bins")
    parser.add_argument("--per-process", type=int, default=10,
                        help="replicates fitted by one worker process before a fresh one starts")
    parser.add_argument("--jobs", type=int, default=1,
                        help="worker processes at a time (each fit is single-threaded)")
    parser.add_argument("--out", default="benchmarks/calibration.json")
    parser.add_argument("--worker", nargs=2, type=int, metavar=("START", "STOP"),
                        help=argparse.SUPPRESS)
    parser.add_argument("--records", help=argparse.SUPPRESS)
    args = parser.parse_args()
    logging.basicConfig(level=logging.INFO, format="%(asctime)s %(message)s")
    sampler = {"draws": args.draws, "warmup": args.warmup, "target_acceptance": 0.95}
    spec = parse_spec(SBC_SPEC, name="sbc_taxa_errors_curved")
    if args.worker:
        sim = template_table()
        records = calibration_records(
            sim.data, spec, levels=sim.levels, log_reference_size=0.0, parameters=PARAMETERS,
            coverage_of=COVERAGE_OF, replicates=args.replicates, indices=range(*args.worker),
            seed=args.seed, sampler=sampler,
        )
        Path(args.records).write_text(json.dumps(records), encoding="utf-8")
        return
    # Each worker process fits a batch of replicates and exits: one long process compiling a
    # JAX sampler per replicate ran out of JIT code memory after ~30 replicates ("LLVM ERROR:
    # Unable to allocate section memory"). The prior draws are seeded, so the split does not
    # change any replicate.
    start = time.perf_counter()
    from allolaw.testing.workers import run_commands

    batches = [(lo, min(lo + args.per_process, args.replicates))
               for lo in range(0, args.replicates, args.per_process)]
    with tempfile.TemporaryDirectory() as tmp:
        outs = [Path(tmp) / f"records_{lo}.json" for lo, _ in batches]
        commands = [[sys.executable, __file__, "--replicates", str(args.replicates),
                     "--seed", str(args.seed), "--draws", str(args.draws), "--warmup",
                     str(args.warmup), "--worker", str(lo), str(hi), "--records", str(out)]
                    for (lo, hi), out in zip(batches, outs, strict=True)]

        def done(i: int) -> None:
            lo, hi = batches[i]
            print(f"replicates {lo + 1}-{hi} of {args.replicates} done, "
                  f"{time.perf_counter() - start:.0f} s", flush=True)

        run_commands(commands, jobs=args.jobs, on_done=done)
        # records in replicate order, whichever batch finished first
        records: list[dict] = []
        for out in outs:
            records += json.loads(out.read_text(encoding="utf-8"))
    result = summarise_calibration(records, parameters=PARAMETERS, coverage_of=COVERAGE_OF,
                                   bins=args.bins)
    seconds = time.perf_counter() - start
    print(f"SBC: {args.replicates} replicates, {result.n_draws} thinned draws, "
          f"{result.bins} bins, {seconds:.0f} s")
    print(f"{'parameter':<22}{'chi2':>8}{'df':>5}{'p':>8}  histogram")
    for name, test in result.uniformity.items():
        hist = result.to_dict()["histograms"][name]
        print(f"{name:<22}{test['chi2']:>8.2f}{test['df']:>5.0f}{test['p_value']:>8.3f}  {hist}")
    for name, value in result.coverage.items():
        if name != "intervals":
            print(f"coverage of 90% intervals, {name}: {value:.3f} "
                  f"({result.coverage['intervals']:.0f} intervals; target 0.85-0.95)")
    print(f"replicates with divergences: {sum(d > 0 for d in result.divergences)}; "
          f"max R-hat over replicates: {max(result.max_rhat):.3f}")
    out = result.to_dict() | {"replicates": args.replicates, "seed": args.seed,
                              "seconds": seconds, "jobs": args.jobs, "spec": spec.to_dict(),
                              "sampler": sampler}
    Path(args.out).write_text(json.dumps(out, indent=2, sort_keys=True) + "\n", encoding="utf-8")
    print(f"wrote {args.out}")


if __name__ == "__main__":
    main()
