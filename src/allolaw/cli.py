"""Command line: one subcommand per stage, so every stage runs by hand as well as from Snakemake.

    allolaw prepare --config config/config.yaml --dataset island_metabolism
    allolaw fit     --config config/config.yaml --dataset island_metabolism --model taxa --threads 2
    allolaw check   --config config/config.yaml --dataset island_metabolism --model taxa
    allolaw compare --config config/config.yaml --dataset island_metabolism  [--report]
    allolaw report  --config config/config.yaml --dataset island_metabolism   (or --index)
    allolaw demo-data --out data/demo
    allolaw plan    --config config/config.yaml --config config/plans.yaml --plan P
                    [--chunk k/K | --combine]

A problem the user can fix exits with status 2 and one message naming file, line, column and
value; nothing else prints a traceback unless ``--debug`` is given.
"""

from __future__ import annotations

import argparse
import gc
import logging
import sys
import time
from collections.abc import Sequence

from allolaw import __version__
from allolaw.errors import UserError

__all__ = ["configure_logging", "main", "run"]

log = logging.getLogger("allolaw")


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; return the exit status."""
    parser = _build_parser()
    args = parser.parse_args(argv)
    configure_logging(debug=args.debug)
    start = time.perf_counter()
    try:
        args.func(args)
    except UserError as err:
        if args.debug:
            raise
        print(f"allolaw {args.command}: error: {err}", file=sys.stderr)
        return 2
    log.info("%s done in %.1f s", args.command, time.perf_counter() - start)
    return 0


def configure_logging(*, debug: bool = False) -> None:
    """Log to stderr: our own records from INFO up, libraries' only from WARNING up.

    A fit log carries what a user acts on. Libraries announce things at INFO that need no
    action (ArviZ's three "arviz_* not installed" lines on import, PyMC's "Sampling: [...]"):
    their INFO records are demoted to DEBUG, so they show only with ``--debug``. Warnings
    and errors of every library are kept. Does nothing when logging is already configured
    (as :func:`logging.basicConfig`).
    """
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(logging.Formatter("%(asctime)s allolaw %(levelname)s %(message)s",
                                           datefmt="%H:%M:%S"))
    handler.addFilter(_LibraryChatter(show=debug))
    logging.basicConfig(level=logging.DEBUG if debug else logging.INFO, handlers=[handler])


class _LibraryChatter(logging.Filter):
    # demotes INFO records of loggers outside allolaw to DEBUG; drops them unless shown
    def __init__(self, *, show: bool) -> None:
        super().__init__()
        self.show = show

    def filter(self, record: logging.LogRecord) -> bool:
        if record.name == "allolaw" or record.name.startswith("allolaw."):
            return True
        if record.levelno <= logging.INFO:
            record.levelno, record.levelname = logging.DEBUG, "DEBUG"
            return self.show
        return True


def run() -> None:
    """Entry point of the ``allolaw`` command and of ``python -m allolaw``: main(), then exit.

    Before exiting, :func:`gc.freeze` takes every live object out of the interpreter's last
    garbage collections, which otherwise walk everything the scientific stack imported:
    about 0.7 s per process here (a process that imports ArviZ and exits: 2.6 s, with the
    freeze 1.9 s; in a fit job 1.9 s -> 0.3 s after "fit done"; benchmarks/startup_cost.py).
    Only objects in reference cycles are left for the operating system to reclaim; atexit
    handlers still run and output streams are still flushed, and every file a stage writes
    is closed before its function returns. Not done in :func:`main`,
    which tests call in their own long-lived process.
    """
    status = main()
    gc.freeze()
    sys.exit(status)


def _build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="allolaw",
        description="Bayesian scaling laws for multi-species tables, one stage at a time.",
    )
    parser.add_argument("--version", action="version", version=f"allolaw {__version__}")
    parser.add_argument("--debug", action="store_true", help="show tracebacks on errors")
    sub = parser.add_subparsers(dest="command", required=True, metavar="STAGE")

    def stage(name: str, help_text: str, *, model: bool = False, dataset: bool = True):
        p = sub.add_parser(name, help=help_text, description=help_text)
        p.add_argument(
            "--config",
            dest="configs",
            action="append",
            metavar="FILE",
            help="batch config YAML (repeatable; later files win; default config/config.yaml)",
        )
        p.add_argument(
            "--set",
            dest="overrides",
            action="append",
            default=[],
            metavar="KEY=VALUE",
            help="override a config key, e.g. --set sampler.draws=200 (repeatable)",
        )
        if dataset:
            p.add_argument("--dataset", required=True, help="dataset name from the config")
        if model:
            p.add_argument("--model", required=True, help="model spec name (models/<name>.yaml)")
        return p

    p = stage("prepare", "Read, convert, validate and aggregate a dataset; write the ledger.")
    p.set_defaults(func=_run_prepare)

    p = stage("fit", "Fit one model spec to one prepared dataset.", model=True)
    p.add_argument("--threads", type=int, default=1, help="cores for this job (default 1)")
    p.add_argument("--check", action="store_true",
                   help="then run the check stage in the same process, as the workflow does "
                        "(one process start-up instead of two)")
    p.set_defaults(func=_run_fit)

    p = stage("check", "Diagnose one fit: convergence, sampler health, predictive checks.",
              model=True)
    p.add_argument("--threads", type=int, default=1, help="cores for a refit (default 1)")
    p.set_defaults(func=_run_check)

    p = stage("compare", "Compare a dataset's models; weigh the named exponents.")
    p.add_argument("--report", action="store_true",
                   help="then write the dataset's HTML report in the same process, as the "
                        "workflow does (one process start-up instead of two)")
    p.set_defaults(func=_run_compare)

    p = stage("report", "Write the HTML audit report of a dataset, or the batch index.",
              dataset=False)
    group = p.add_mutually_exclusive_group(required=True)
    group.add_argument("--dataset", help="dataset name from the config")
    group.add_argument("--index", action="store_true", help="write reports/index.html")
    p.set_defaults(func=_run_report)

    p = stage("plan", "Plan a study before the data: assurance of candidate designs.",
              dataset=False)
    p.add_argument("--plan", required=True, help="plan name from the config's plans:")
    mode = p.add_mutually_exclusive_group()
    mode.add_argument("--chunk", metavar="k/K",
                      help="simulate chunk k of K only (write its chunk file)")
    mode.add_argument("--combine", action="store_true",
                      help="combine the plan's chunk files (its `chunks` of them, or --chunks)")
    p.add_argument("--chunks", type=int, default=None, help="K for --combine")
    p.set_defaults(func=_run_plan)

    p = sub.add_parser("demo-data", help="Write the invented demo datasets (seeded).",
                       description="Write the invented demo datasets (seeded).")
    p.add_argument("--out", default="data/demo", help="output folder (default data/demo)")
    p.add_argument("--seed", type=int, default=None, help="seed (default: the demo's own)")
    p.set_defaults(func=_run_demo)
    return parser


def _config(args: argparse.Namespace) -> dict:
    from allolaw.config import dataset_config, load_config

    config = load_config(args.configs or ["config/config.yaml"], args.overrides)
    if getattr(args, "dataset", None):
        dataset_config(config, args.dataset)  # an unknown name stops here, listing the known
    return config


def _run_prepare(args: argparse.Namespace) -> None:
    config = _config(args)
    from allolaw.intake import prepare_dataset

    summary = prepare_dataset(config, args.dataset)
    print(summary)


def _run_fit(args: argparse.Namespace) -> None:
    from allolaw.runtime import configure_job, import_arviz_without_numba

    config = _config(args)
    configure_job(args.threads)
    import_arviz_without_numba()
    from allolaw.model.fitting import fit_dataset_model

    fit_dataset_model(config, args.dataset, args.model, threads=args.threads)
    if args.check:
        from allolaw.checks.dataset import check_dataset_model

        result = check_dataset_model(config, args.dataset, args.model, threads=args.threads)
        print(f"{args.dataset}/{args.model}: {result}")


def _run_check(args: argparse.Namespace) -> None:
    from allolaw.runtime import configure_job, import_arviz_without_numba

    config = _config(args)
    configure_job(args.threads)
    import_arviz_without_numba()
    from allolaw.checks.dataset import check_dataset_model

    result = check_dataset_model(config, args.dataset, args.model, threads=args.threads)
    print(f"{args.dataset}/{args.model}: {result}")


def _run_compare(args: argparse.Namespace) -> None:
    from allolaw.runtime import configure_job, import_arviz_without_numba

    config = _config(args)
    configure_job(1)
    import_arviz_without_numba()
    from allolaw.answers.dataset import compare_dataset

    compare_dataset(config, args.dataset)
    if args.report:
        from allolaw.report.rendering import render_dataset_report

        print(render_dataset_report(config, args.dataset))


def _run_report(args: argparse.Namespace) -> None:
    from allolaw.runtime import import_arviz_without_numba

    config = _config(args)
    import_arviz_without_numba()
    from allolaw.report.rendering import render_dataset_report, render_index

    path = render_index(config) if args.index else render_dataset_report(config, args.dataset)
    print(path)


def _run_plan(args: argparse.Namespace) -> None:
    from allolaw.runtime import configure_job

    configure_job(1)  # one thread per job (chunks run side by side) and the compile caches
    config = _config(args)
    from allolaw.planning.stage import combine_plan, run_plan_chunk

    if args.chunk:
        k, n_chunks = _chunk_arg(args.chunk)
        print(run_plan_chunk(config, args.plan, k, n_chunks))
        return
    if not args.combine:  # the whole plan in one process: one chunk, then combine it
        run_plan_chunk(config, args.plan, 1, 1)
        print(combine_plan(config, args.plan, 1))
        return
    print(combine_plan(config, args.plan, args.chunks))


def _chunk_arg(text: str) -> tuple[int, int]:
    try:
        k, n_chunks = (int(v) for v in text.split("/"))
    except ValueError:
        msg = f"--chunk: value {text!r} is not of the form k/K (e.g. 2/4)"
        raise UserError(msg) from None
    if not 1 <= k <= n_chunks:
        msg = f"--chunk: value {text!r}: k must lie between 1 and K"
        raise UserError(msg)
    return k, n_chunks


def _run_demo(args: argparse.Namespace) -> None:
    from allolaw.demo import write_demo_data

    for path in write_demo_data(args.out, seed=args.seed):
        print(path)


if __name__ == "__main__":
    run()
