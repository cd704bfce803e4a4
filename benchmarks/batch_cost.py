"""Where a finished demo batch spent its time: fits, refits, and everything else, per dataset.

Reads the Snakemake benchmark files of a batch (``logs/benchmarks/<dataset>/<job>.tsv``, one
per job, written by the ``benchmark:`` directive of each rule), the check's own seconds from
each fit job's log (the fit job runs the check too; its line "check done in X s"), and the
refit wall times the check keeps in each ``posterior.nc`` (attribute ``refit``). Prints, per
dataset, the seconds of the fits (job seconds less the check's), of the refits, of the rest
(prepare, checks without their refits, hypotheses and report), and the share of the rest in
the fit time (the speed target: hypotheses + checks + report ≤ 10% of fit time). The compare
job writes the report too; its log line "report <dataset>: wrote ... (N kB, X s)" moves those
seconds from compare to report. Batches run before the check moved into the fit job (separate
``check_<model>`` jobs) or before the report moved into the compare job (``report`` jobs) are
read too.

    .venv/bin/python benchmarks/batch_cost.py            # the batch in this checkout
    .venv/bin/python benchmarks/batch_cost.py /tmp/run   # the batch run in another folder
"""

from __future__ import annotations

import argparse
import json
import re
import sys
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("workdir", nargs="?", default=str(REPO),
                        help="folder the batch ran in (holds logs/ and results/)")
    parser.add_argument("--results", default="results", help="results folder, below workdir")
    parser.add_argument("--json", help="also write the table here")
    args = parser.parse_args()
    work = Path(args.workdir)

    import pandas as pd

    from allolaw.checks.reading import read_posterior
    from allolaw.report.benchmarks import read_benchmarks

    jobs = read_benchmarks(work / "logs")
    if jobs.empty:
        sys.exit(f"{work / 'logs' / 'benchmarks'}: no benchmark files; run the batch first")
    jobs["stage"] = jobs["job"].str.split("/").str[-1].str.split("_").str[0]
    rows = []
    for dataset, part in jobs[jobs["dataset"] != ""].groupby("dataset"):
        refit_s, n_refits = 0.0, 0
        for post in sorted((work / args.results / dataset).glob("*/posterior.nc")):
            # the fit stage writes true/false; the check stage replaces it with a record of
            # its refit, which holds the refit's wall time
            refit = json.loads(read_posterior(post).attrs.get("refit", "false"))
            if isinstance(refit, dict):
                refit_s += float(refit.get("seconds", 0.0))
                n_refits += 1
        by_stage = part.groupby("stage")["s"].sum()
        # checks run inside the fit jobs: their seconds move from "fit" to "check"
        inside = sum(_check_seconds(log) for log in (work / "logs" / dataset).glob("fit_*.log"))
        by_stage["fit"] = by_stage.get("fit", 0.0) - inside
        by_stage["check"] = by_stage.get("check", 0.0) + inside
        # the report runs inside the compare job: its seconds move from "compare" to "report"
        inside = _report_seconds(work / "logs" / dataset / "compare.log")
        by_stage["compare"] = by_stage.get("compare", 0.0) - inside
        by_stage["report"] = by_stage.get("report", 0.0) + inside
        fit_s = float(by_stage.get("fit", 0.0))
        rest_s = float(by_stage.sum()) - fit_s - refit_s
        rows.append({
            "dataset": dataset,
            "fits": int((part["stage"] == "fit").sum()),
            "fit_s": round(fit_s, 1),
            "refits": n_refits,
            "refit_s": round(refit_s, 1),
            "prepare_s": round(float(by_stage.get("prepare", 0.0)), 1),
            "check_s_without_refits": round(float(by_stage.get("check", 0.0)) - refit_s, 1),
            "compare_s": round(float(by_stage.get("compare", 0.0)), 1),
            "report_s": round(float(by_stage.get("report", 0.0)), 1),
            "rest_share_of_fits": round(rest_s / (fit_s + refit_s), 3) if fit_s else None,
            # the issue's own definition: hypotheses + checks + report (prepare left out)
            "checks_hypotheses_report_share": (
                round((rest_s - float(by_stage.get("prepare", 0.0))) / (fit_s + refit_s), 3)
                if fit_s else None),
        })
    table = pd.DataFrame(rows)
    index_s = float(jobs.loc[jobs["dataset"] == "", "s"].sum())
    print(table.to_string(index=False))
    print(f"batch-wide jobs (index page): {index_s:.1f} s; sum of all job seconds "
          f"{jobs['s'].sum():.1f} s (jobs run side by side, so wall time is less)")
    print("rest = prepare + checks without refits + compare (hypotheses) + report; the target "
          "counts checks + hypotheses + report: <= 10% of fits + refits")
    if args.json:
        Path(args.json).write_text(table.to_json(orient="records", indent=1))


def _check_seconds(log: Path) -> float:
    # the check stage's own line in a fit job's log (diagnostics.check_dataset_model)
    return _logged_seconds(log, r"check done in ([0-9.]+) s")


def _report_seconds(log: Path) -> float:
    # the report's own line in a compare job's log (report.render_dataset_report)
    return _logged_seconds(log, r"report \S+: wrote .* \([0-9.]+ kB, ([0-9.]+) s\)")


def _logged_seconds(log: Path, pattern: str) -> float:
    # the seconds in the last line of ``log`` matching ``pattern``; 0 without log or line
    if not log.is_file():
        return 0.0
    found = re.findall(pattern, log.read_text(errors="replace"))
    return float(found[-1]) if found else 0.0


if __name__ == "__main__":
    main()
