"""How often the curvature and break verdicts are right on invented data with known truth.

Curvature study: three scenarios (no taxon spread and no curvature with genera at different
sizes; one curved law with genera at different sizes; real taxon differences with genera over
one size range), three fits each (taxon exponents; one curved law; curved with taxon
exponents). Break study: a straight law (60 species, 3 groups) and a change of 0.3 in the
exponent at mid-range, two fits each (break; matched straight). Scenarios and fits are in
:mod:`allolaw.testing.verdict_study`; seeds are those of the slow tests (curvature 500…,
break null 300…, break change 400…).

    nice -n 10 .venv/bin/python benchmarks/verdict_studies.py --study curvature --seeds 20 \
        --out benchmarks/curvature_verdict_study.json

Seeds run in turn across the scenarios (seed 1 of every scenario, then seed 2, ...) and the
JSON is rewritten after every dataset, so a run stopped early leaves balanced counts and says
how many seeds it finished. Each dataset is fitted in a worker process, one core.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

FIRST_SEED = {("curvature", "null"): 500, ("curvature", "curve"): 500,
              ("curvature", "taxa"): 500, ("break", "null"): 300,
              ("break", "change_0.3"): 400}


def run_one(study: str, scenario: str, seed: int, draws: int, warmup: int) -> dict:
    """Fit one simulated dataset and return its record."""
    from allolaw.runtime import configure_job

    configure_job(1)
    from allolaw.testing.verdict_study import break_verdict, curvature_verdict

    start = time.perf_counter()
    judge = curvature_verdict if study == "curvature" else break_verdict
    record = judge(scenario, seed, draws=draws, warmup=warmup)
    return {"scenario": scenario, "seed": seed, **record,
            "seconds": round(time.perf_counter() - start, 1)}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--study", choices=("curvature", "break"), required=True)
    parser.add_argument("--seeds", type=int, default=20, help="seeds per scenario")
    parser.add_argument("--seed-offset", type=int, default=0,
                        help="added to every scenario's first seed (fresh seeds)")
    parser.add_argument("--draws", type=int, default=300)
    parser.add_argument("--warmup", type=int, default=300)
    parser.add_argument("--out", help="the study JSON (required unless a worker)")
    parser.add_argument("--worker", nargs=2, help=argparse.SUPPRESS)
    parser.add_argument("--record", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.worker is not None:
        scenario, seed = args.worker[0], int(args.worker[1])
        record = run_one(args.study, scenario, seed, args.draws, args.warmup)
        Path(args.record).write_text(json.dumps(record), encoding="utf-8")
        return
    if not args.out:
        parser.error("--out is required")
    from allolaw.testing.verdict_study import BREAK_SCENARIOS, CURVATURE_SCENARIOS

    scenarios = list(CURVATURE_SCENARIOS if args.study == "curvature" else BREAK_SCENARIOS)
    start = time.perf_counter()
    records: list[dict] = []
    with tempfile.TemporaryDirectory() as tmp:
        for k in range(args.seeds):
            for scenario in scenarios:
                seed = FIRST_SEED[(args.study, scenario)] + args.seed_offset + k
                out = Path(tmp) / f"{scenario}_{seed}.json"
                done = subprocess.run([sys.executable, __file__, "--study", args.study,
                                       "--worker", scenario, str(seed), "--record", str(out),
                                       "--draws", str(args.draws), "--warmup",
                                       str(args.warmup)], check=False)
                if done.returncode == 0:
                    records.append(json.loads(out.read_text(encoding="utf-8")))
                else:  # counted and shown, not dropped
                    records.append({"scenario": scenario, "seed": seed,
                                    "verdict": f"worker failed (exit {done.returncode})"})
                print(f"{scenario} seed {seed}: {records[-1]['verdict']} "
                      f"({records[-1].get('seconds', '?')} s)", flush=True)
            _write(args, scenarios, records, k + 1, time.perf_counter() - start)
    print(json.dumps(_counts(scenarios, records), indent=1))


def _counts(scenarios: list[str], records: list[dict]) -> dict:
    counts: dict[str, dict[str, int]] = {}
    for scenario in scenarios:
        verdicts = [r["verdict"] for r in records if r["scenario"] == scenario]
        counts[scenario] = {v: verdicts.count(v) for v in sorted(set(verdicts))}
    return counts


def _write(args: argparse.Namespace, scenarios: list[str], records: list[dict],
           seeds_done: int, seconds: float) -> None:
    payload = {
        "study": args.study,
        "seeds_requested": args.seeds,
        "seeds_run": seeds_done,
        "first_seeds": {s: FIRST_SEED[(args.study, s)] + args.seed_offset for s in scenarios},
        "sampler": {"chains": 2, "draws": args.draws, "warmup": args.warmup,
                    "backend": "auto"},
        "counts": _counts(scenarios, records),
        "seconds": round(seconds, 1),
        "records": records,
    }
    Path(args.out).write_text(json.dumps(payload, indent=1) + "\n", encoding="utf-8")


if __name__ == "__main__":
    main()
