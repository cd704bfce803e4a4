"""The plan stage as the command line runs it: chunk files, the combined tables and the page.

Layout (under ``results_dir`` and ``reports_dir`` of the config)::

    results/plans/<plan>/chunk_<k>_of_<K>.csv   one row per simulated table of chunk k
    results/plans/<plan>/tables.csv              all rows, sorted by design and table
    results/plans/<plan>/designs.csv             one row per design, with Monte Carlo SEs
    results/plans/<plan>/smallest.csv            least demanding design along each axis
    results/plans/<plan>/mcmc_check.csv          fast analysis vs MCMC (check_with_mcmc > 0)
    results/plans/<plan>/plan.json               the plan as run and a summary
    reports/plan_<plan>.html                     the page
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pandas as pd

from allolaw.errors import UserError
from allolaw.io import atomic_path, write_json
from allolaw.planning.design import read_plan
from allolaw.planning.prior import read_design_prior
from allolaw.planning.run import combine_chunks, run_chunk, smallest_designs, summarise_tables

__all__ = ["chunk_path", "combine_plan", "plan_dir", "plan_page_path", "run_plan_chunk"]


def plan_dir(config: dict[str, Any], name: str) -> Path:
    """``<results_dir>/plans/<name>``."""
    return Path(config.get("results_dir", "results")) / "plans" / name


def chunk_path(config: dict[str, Any], name: str, k: int, n_chunks: int) -> Path:
    """The file of chunk ``k`` of ``n_chunks``."""
    return plan_dir(config, name) / f"chunk_{k}_of_{n_chunks}.csv"


def plan_page_path(config: dict[str, Any], name: str) -> Path:
    """``<reports_dir>/plan_<name>.html``."""
    return Path(config.get("reports_dir", "reports")) / f"plan_{name}.html"


def run_plan_chunk(config: dict[str, Any], name: str, k: int = 1, n_chunks: int = 1, *,
                   root: str | Path = ".") -> Path:
    """Simulate and analyse chunk ``k`` of ``n_chunks`` of plan ``name``; return its file."""
    plan = read_plan(config, name)
    prior = read_design_prior(plan.truth, root=root)
    rows = run_chunk(plan, prior, k, n_chunks)
    out = chunk_path(config, name, k, n_chunks)
    out.parent.mkdir(parents=True, exist_ok=True)
    with atomic_path(out) as tmp:
        rows.to_csv(tmp, index=False)
    return out


def combine_plan(config: dict[str, Any], name: str, n_chunks: int | None = None, *,
                 root: str | Path = ".") -> Path:
    """Combine the chunk files, write the tables, the MCMC check if asked, and the page.

    Raises
    ------
    UserError
        If a chunk file is missing or the chunks do not cover every table exactly once.
    """
    from allolaw.planning.page import render_plan_page

    plan = read_plan(config, name)
    n_chunks = n_chunks or plan.chunks
    paths = [chunk_path(config, name, k, n_chunks) for k in range(1, n_chunks + 1)]
    missing = [str(p) for p in paths if not p.is_file()]
    if missing:
        msg = f"plan {name}: chunk file(s) missing: {', '.join(missing)} (run --chunk k/{n_chunks})"
        raise UserError(msg)
    prior = read_design_prior(plan.truth, root=root)
    rows = combine_chunks(paths, plan)
    summary = summarise_tables(rows, plan)
    smallest = smallest_designs(summary, plan)
    folder = plan_dir(config, name)
    for label, frame in (("tables", rows), ("designs", summary), ("smallest", smallest)):
        with atomic_path(folder / f"{label}.csv") as tmp:
            frame.to_csv(tmp, index=False)
    mcmc = None
    if plan.check_with_mcmc > 0:
        from allolaw.planning.mcmc_check import check_against_mcmc, pick_tables

        mcmc = check_against_mcmc(plan, prior, pick_tables(plan, plan.check_with_mcmc),
                                  models_dir=config.get("models_dir", "models"))
        with atomic_path(folder / "mcmc_check.csv") as tmp:
            mcmc.to_csv(tmp, index=False)
    write_json(folder / "plan.json", {"plan": plan.to_dict(), "prior": prior.source,
                                      "chunks": n_chunks, "designs": _records(summary)})
    return render_plan_page(plan, prior, summary, smallest, plan_page_path(config, name),
                            mcmc=mcmc)


def _records(frame: pd.DataFrame) -> list[dict[str, Any]]:
    return frame.to_dict(orient="records")
