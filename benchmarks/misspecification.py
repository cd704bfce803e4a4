"""Misspecification study: fits on data whose truth departs from the model (table + JSON).

    .venv/bin/python benchmarks/misspecification.py --seeds 5 --jobs 2 \
        --out benchmarks/misspecification_before.json

Scenarios (``allolaw.testing.misspecified_study.SCENARIOS``): genera spread along the size axis
with within-genus reliabilities 0.6-0.95 (``spread_reliability``), correlated size and trait
errors of species means (``correlated_errors``), residual SD differing by genus
(``taxon_scatter``), three nested levels spread along the size axis (``three_levels``) and two
fixed designs, every genus exponent 0.75 (``wide_20x12``: 20 genera x 12 species, genus mean
log-size SD 1.5, within SD 0.3, error SD 0.1; ``wide_8x15``: 8 x 15, within 0.4, error 0.3).
Per scenario, seed (1..N) and model spec, one fit records the bias of the population exponent
(posterior mean - truth), whether its central 90% interval holds the truth, the coverage of
the taxon exponents' 90% intervals, the posterior probabilities of 2/3, 3/4 and 1 (equal
prior weights, ``allolaw.answers.hypotheses.compare_hypotheses``) and which is largest, divergences
and the largest R-hat. Each fit runs in its own worker process (JAX programs of many fits in
one process exhaust JIT code memory); ``--jobs 2`` runs two at a time.
"""

from __future__ import annotations

import argparse
import datetime
import json
import logging
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
COLUMNS = [("scenario", "{}"), ("model", "{}"), ("fits", "{}"), ("mean_estimate", "{:.3f}"),
           ("mean_bias", "{:+.3f}"), ("coverage_exponent", "{:.2f}"),
           ("coverage_taxon", "{:.2f}"), ("taxon_intervals", "{}"),
           ("top_true_share", "{:.2f}"), ("mean_p_true", "{:.3f}"), ("divergences", "{}"),
           ("max_rhat", "{:.3f}")]


def run_worker(args: argparse.Namespace) -> None:
    """Fit one scenario x seed x model and write its record."""
    from allolaw.runtime import configure_job

    configure_job(1)
    from allolaw.model.spec import load_spec
    from allolaw.testing.misspecified_study import fit_scenario

    scenario, seed, model = args.worker
    spec = load_spec(REPO / "models", model)
    record = fit_scenario(scenario, int(seed), spec, draws=args.draws, warmup=args.warmup,
                          chains=args.chains, target_acceptance=args.target_accept)
    Path(args.record).write_text(json.dumps(record), encoding="utf-8")


def markdown_table(summary: list[dict]) -> str:
    """The summary rows as a markdown table (columns of :data:`COLUMNS`)."""
    head = "| " + " | ".join(name for name, _ in COLUMNS) + " |"
    rule = "|" + "---|" * len(COLUMNS)
    lines = [head, rule]
    for row in summary:
        lines.append("| " + " | ".join(fmt.format(row[name]) for name, fmt in COLUMNS) + " |")
    return "\n".join(lines)


def main() -> None:
    from allolaw.testing.misspecified_study import SCENARIOS, summarise_records

    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--scenarios", default=",".join(SCENARIOS),
                        help=f"comma-separated, of {', '.join(SCENARIOS)}")
    parser.add_argument("--seeds", type=int, default=4, help="datasets per scenario (1..N)")
    parser.add_argument("--models", default="taxa_errors", help="comma-separated spec names")
    parser.add_argument("--draws", type=int, default=500)
    parser.add_argument("--warmup", type=int, default=500)
    parser.add_argument("--chains", type=int, default=4)
    parser.add_argument("--target-accept", type=float, default=0.9)
    parser.add_argument("--jobs", type=int, default=1, help="fits at a time (1 or 2)")
    parser.add_argument("--out", default="benchmarks/misspecification.json")
    parser.add_argument("--worker", nargs=3, help=argparse.SUPPRESS)
    parser.add_argument("--record", help=argparse.SUPPRESS)
    args = parser.parse_args()
    logging.basicConfig(level=logging.WARNING)
    if args.worker:
        run_worker(args)
        return
    scenarios = [s for s in args.scenarios.split(",") if s]
    unknown = [s for s in scenarios if s not in SCENARIOS]
    if unknown:
        parser.error(f"unknown scenario {unknown[0]!r} (known: {', '.join(SCENARIOS)})")
    jobs = [(s, seed, m) for s in scenarios for seed in range(1, args.seeds + 1)
            for m in args.models.split(",")]
    start = time.perf_counter()
    records = _run_jobs(jobs, args, start)
    summary = summarise_records(records).to_dict("records")
    seconds = time.perf_counter() - start
    print(markdown_table(summary))
    out = {
        "date": datetime.datetime.now(datetime.UTC).strftime("%Y-%m-%d %H:%M UTC"),
        "command": " ".join(["benchmarks/misspecification.py", *sys.argv[1:]]),
        "settings": {"scenarios": scenarios, "seeds": args.seeds, "models": args.models,
                     "draws": args.draws, "warmup": args.warmup, "chains": args.chains,
                     "target_accept": args.target_accept, "jobs": args.jobs},
        "seconds": seconds, "summary": summary, "records": records,
    }
    Path(args.out).write_text(json.dumps(out, indent=1) + "\n", encoding="utf-8")
    Path(f"{args.out}.partial").unlink(missing_ok=True)
    print(f"{len(records)} fits, {seconds:.0f} s; wrote {args.out}")


def _run_jobs(jobs: list[tuple[str, int, str]], args: argparse.Namespace, start: float
              ) -> list[dict]:
    # at most args.jobs worker processes at once; records come back in job order
    from allolaw.testing.workers import run_commands

    records: dict[int, dict] = {}
    with tempfile.TemporaryDirectory() as tmp:
        outs = [Path(tmp) / f"{i}.json" for i in range(len(jobs))]
        commands = [[sys.executable, __file__, "--worker", scenario, str(seed), model,
                     "--record", str(outs[i]), "--draws", str(args.draws), "--warmup",
                     str(args.warmup), "--chains", str(args.chains), "--target-accept",
                     str(args.target_accept)]
                    for i, (scenario, seed, model) in enumerate(jobs)]

        def done(i: int) -> None:
            rec = json.loads(outs[i].read_text(encoding="utf-8"))
            records[i] = rec
            # the records so far, so an interrupted study keeps its finished fits
            partial = Path(f"{args.out}.partial")
            partial.write_text(json.dumps([records[k] for k in sorted(records)]) + "\n",
                               encoding="utf-8")
            print(f"{rec['scenario']} seed {rec['seed']} {rec['model']}: mean "
                  f"{rec['mean']:.3f} [{rec['lo']:.3f}, {rec['hi']:.3f}] top {rec['top']}"
                  f", {rec['divergences']} div, R-hat {rec['max_rhat']:.3f}; "
                  f"{len(records)}/{len(jobs)} done, {time.perf_counter() - start:.0f} s",
                  flush=True)

        run_commands(commands, jobs=args.jobs, on_done=done)
    return [records[i] for i in sorted(records)]


if __name__ == "__main__":
    main()
