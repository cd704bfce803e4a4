"""Fixed cost of a stage process: importing ArviZ, exiting, and compare + report of one dataset.

    .venv/bin/python benchmarks/startup_cost.py                         # import and exit only
    .venv/bin/python benchmarks/startup_cost.py --workdir /tmp/run --dataset cell_scaling

Each figure is the median (and range) of ``--repeat`` fresh processes, run one after another:

* a process that imports ArviZ and exits: as PyPI ships it (ArviZ finds Numba, which PyTensor
  installs, and compiles a Numba ufunc while importing); as the CLI stages import it
  (:func:`allolaw.runtime.import_arviz_without_numba`); and the same with :func:`gc.freeze`
  before the exit (what :func:`allolaw.cli.run` does);
* with ``--workdir``/``--dataset`` (a folder holding a finished batch: config/, models/,
  results/): the compare stage and the report stage as two processes, as the workflow ran
  them before, and as one (``allolaw compare --report``, as it runs them now). These rewrite
  the dataset's comparison files and page with the same content.

Not part of the test run.
"""

from __future__ import annotations

import argparse
import statistics
import subprocess
import sys
import time
from pathlib import Path

_HIDDEN = "from allolaw.runtime import import_arviz_without_numba; import_arviz_without_numba()"
# each process imports ArviZ and exits
_IMPORT = {
    "import arviz, exit (ArviZ finds Numba)": "import arviz",
    "import arviz with Numba hidden (CLI stages), exit": _HIDDEN,
    "the same, gc.freeze before the exit (allolaw.cli.run)": _HIDDEN + "; import gc; gc.freeze()",
}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeat", type=int, default=5)
    parser.add_argument("--workdir", help="folder of a finished batch (config/, results/)")
    parser.add_argument("--dataset", help="dataset of that batch")
    parser.add_argument("--config", default="config/config.yaml", help="below --workdir")
    args = parser.parse_args()

    rows = []
    for label, code in _IMPORT.items():
        rows.append((label, _times([[sys.executable, "-c", code]], args.repeat)))
    if args.workdir and args.dataset:
        cli = [sys.executable, "-m", "allolaw"]
        opts = ["--config", args.config, "--dataset", args.dataset]
        two = [[*cli, "compare", *opts], [*cli, "report", *opts]]
        one = [[*cli, "compare", *opts, "--report"]]
        rows.append((f"{args.dataset}: compare, then report (two processes)",
                     _times(two, args.repeat, cwd=args.workdir)))
        rows.append((f"{args.dataset}: compare --report (one process)",
                     _times(one, args.repeat, cwd=args.workdir)))
    width = max(len(label) for label, _ in rows)
    print(f"{'what':<{width}}  median s  (min - max, {args.repeat} runs)")
    for label, times in rows:
        print(f"{label:<{width}}  {statistics.median(times):8.2f}  "
              f"({min(times):.2f} - {max(times):.2f})")


def _times(commands: list[list[str]], repeat: int, *, cwd: str | None = None) -> list[float]:
    # wall seconds of running ``commands`` one after another, ``repeat`` times
    out = []
    for _ in range(repeat):
        start = time.perf_counter()
        for command in commands:
            subprocess.run(command, cwd=cwd and Path(cwd), check=True,
                           stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        out.append(time.perf_counter() - start)
    return out


if __name__ == "__main__":
    main()
