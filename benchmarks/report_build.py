"""Build time of the audit report: render each dataset's page from an existing results folder.

    .venv/bin/python benchmarks/report_build.py                       # config/config.yaml
    .venv/bin/python benchmarks/report_build.py --config config/config.yaml --repeat 3
    .venv/bin/python benchmarks/report_build.py --results-dir /tmp/run/results --datasets a,b

Reads whatever the earlier stages left under ``results_dir`` (missing inputs only make the
page shorter) and writes the pages into a temporary folder, so ``reports/`` is untouched.
Prints, per dataset, the first render (with imports and first reads) and the best of the
repeats, the page size and its count of inline figures. Not part of the test run.
"""

from __future__ import annotations

import argparse
import tempfile
import time

from allolaw.config import load_config


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--config", default="config/config.yaml")
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--results-dir", default=None, help="override results_dir")
    parser.add_argument("--datasets", default=None, help="comma-separated subset")
    args = parser.parse_args()
    config = load_config(args.config)
    if args.results_dir:
        config["results_dir"] = args.results_dir
    names = args.datasets.split(",") if args.datasets else sorted(config["datasets"])
    with tempfile.TemporaryDirectory() as out:
        config["reports_dir"] = out
        t0 = time.perf_counter()
        from allolaw.report.rendering import render_dataset_report, render_index

        print(f"import allolaw.report: {time.perf_counter() - t0:.2f} s")
        print(f"{'dataset':<22}{'first s':>9}{'best s':>9}{'kB':>9}{'figures':>9}")
        for dataset in names:
            times = []
            for _ in range(max(args.repeat, 1)):
                start = time.perf_counter()
                path = render_dataset_report(config, dataset)
                times.append(time.perf_counter() - start)
            html = path.read_text(encoding="utf-8")
            print(f"{dataset:<22}{times[0]:>9.2f}{min(times):>9.2f}"
                  f"{len(html.encode()) / 1e3:>9.0f}{html.count('<svg'):>9}")
        start = time.perf_counter()
        render_index(config)
        print(f"index: {time.perf_counter() - start:.2f} s")


if __name__ == "__main__":
    main()
