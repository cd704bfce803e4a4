"""Run a plan: simulate and analyse tables chunk by chunk, then combine and summarise.

The plan's (design, table) pairs are listed design by design and cut into K contiguous chunks;
chunk k (1-based) writes one row per simulated table. Each table's numbers depend only on the
plan seed and its table number (:func:`allolaw.planning.simulate.table_rng`) and the analysis
treats each table on its own (row-wise array operations, a fixed number of Newton steps), so
any chunking gives the same rows. :func:`summarise_tables` turns the rows into the designs
table with Monte Carlo standard errors; :func:`smallest_designs` finds, along each axis, the
smallest design that reaches the assurance goal.
"""

from __future__ import annotations

from dataclasses import asdict
from pathlib import Path

import numpy as np
import pandas as pd

from allolaw.errors import UserError
from allolaw.planning.approx import analyse_tables
from allolaw.planning.decide import curvature_outcomes, outcomes
from allolaw.planning.design import AXES, Plan
from allolaw.planning.simulate import DesignPrior, simulate_tables

__all__ = ["chunk_pairs", "combine_chunks", "run_chunk", "simulate_design", "smallest_designs",
           "summarise_tables"]

TABLE_COLUMNS = ["design", "table", *AXES, "draw", "true_exponent", "true_curvature",
                 "truth_index",
                 "top_index", "top_prob", "prob_true", "interval_prob_true", "success",
                 "wrong", "width90", "mean"]


def chunk_pairs(plan: Plan, k: int, n_chunks: int) -> list[tuple[int, np.ndarray]]:
    """The (design index, table numbers) of chunk ``k`` of ``n_chunks`` (1-based)."""
    if not 1 <= k <= n_chunks:
        msg = f"--chunk {k}/{n_chunks}: k must lie between 1 and {n_chunks}"
        raise UserError(msg)
    total = len(plan.designs) * plan.simulations
    start, stop = (k - 1) * total // n_chunks, k * total // n_chunks
    flat = np.arange(start, stop)
    out = []
    for d in np.unique(flat // plan.simulations):
        out.append((int(d), flat[flat // plan.simulations == d] % plan.simulations))
    return out


def simulate_design(plan: Plan, prior: DesignPrior, design_index: int,
                    tables: np.ndarray) -> pd.DataFrame:
    """Simulate and analyse the given tables of one design; one row per table."""
    design = plan.designs[design_index]
    sims = simulate_tables(design, prior, tables, seed=plan.seed,
                           trait_error_sd=plan.truth.trait_error_sd)
    if plan.question.about == "curvature":
        post = analyse_tables(sims, plan.analysis, parameter="curvature")
        res = curvature_outcomes(post, sims.truth["curvature"], plan.question)
    else:
        post = analyse_tables(sims, plan.analysis)
        res = outcomes(post, sims.truth["exponent"], plan.question, plan.analysis)
    frame = pd.DataFrame({"design": design_index, "table": sims.table_ids,
                          **{a: getattr(design, a) for a in AXES},
                          "draw": sims.truth["draw"], "true_exponent": sims.truth["exponent"],
                          "true_curvature": sims.truth["curvature"],
                          **res})
    return frame[TABLE_COLUMNS]


def run_chunk(plan: Plan, prior: DesignPrior, k: int = 1, n_chunks: int = 1) -> pd.DataFrame:
    """Rows of chunk ``k`` of ``n_chunks`` (all rows with the default 1 of 1)."""
    parts = [simulate_design(plan, prior, d, tables)
             for d, tables in chunk_pairs(plan, k, n_chunks)]
    if not parts:
        return pd.DataFrame(columns=TABLE_COLUMNS)
    return pd.concat(parts, ignore_index=True)


def combine_chunks(paths: list[Path], plan: Plan) -> pd.DataFrame:
    """Read chunk files and check that every (design, table) is there exactly once."""
    if not paths:
        msg = f"plan {plan.name}: no chunk files to combine"
        raise UserError(msg)
    rows = pd.concat([pd.read_csv(p) for p in paths], ignore_index=True)
    rows = rows.sort_values(["design", "table"], kind="stable").reset_index(drop=True)
    expected = len(plan.designs) * plan.simulations
    dup = rows.duplicated(["design", "table"])
    if dup.any() or len(rows) != expected:
        msg = (f"plan {plan.name}: chunk files {', '.join(str(p) for p in paths)} hold "
               f"{len(rows)} rows ({int(dup.sum())} repeated); expected {expected} "
               f"({len(plan.designs)} designs × {plan.simulations} tables): mixed chunkings?")
        raise UserError(msg)
    return rows


def summarise_tables(rows: pd.DataFrame, plan: Plan) -> pd.DataFrame:
    """One row per design: assurance, confident-wrong rate, interval width, with MC SEs.

    Probabilities carry the binomial standard error sqrt(p(1 − p)/R); mean widths and mean
    probabilities the standard error of the mean, SD/sqrt(R).
    """
    out = []
    for d, grp in rows.groupby("design", sort=True):
        n = len(grp)
        rec = {"design": int(d), **asdict(plan.designs[int(d)]), "simulations": n}
        for key, col in (("assurance", "success"), ("confident_wrong", "wrong")):
            p = float(grp[col].astype(bool).mean())
            rec[key], rec[f"{key}_se"] = p, float(np.sqrt(p * (1 - p) / n))
        for key, col in (("width90", "width90"), ("prob_true", "prob_true")):
            vals = grp[col].to_numpy(dtype=float)
            vals = vals[np.isfinite(vals)]  # P(true sign) is NaN for a straight truth
            m = vals.size
            rec[key] = float(vals.mean()) if m else np.nan
            rec[f"{key}_se"] = float(vals.std(ddof=1) / np.sqrt(m)) if m > 1 else np.nan
        rec["meets_goal"] = rec["assurance"] >= plan.question.goal
        out.append(rec)
    return pd.DataFrame(out)


def smallest_designs(summary: pd.DataFrame, plan: Plan) -> pd.DataFrame:
    """Along each axis with several values, the least demanding value that meets the goal.

    For every combination of the other axes: the smallest species count, number of taxa,
    size range or replicates, or the largest size error SD, whose assurance reaches the goal
    (``value`` empty when none in the grid does). ``clear_of_mc_error`` says whether
    assurance − 2 SE also reaches it.
    """
    rows = []
    for axis in AXES:
        if summary[axis].nunique() < 2:
            continue
        others = [a for a in AXES if a != axis and len(set(summary[a])) > 1]
        groups = summary.groupby(others, sort=True) if others else [((), summary)]
        for key, grp in groups:
            key = key if isinstance(key, tuple) else (key,)
            ok = grp[grp["meets_goal"]]
            rec = {"axis": axis, "held": ", ".join(f"{a} = {v:g}" for a, v in zip(others, key,
                                                                               strict=True))}
            if ok.empty:
                rec.update(value=np.nan, assurance=np.nan, assurance_se=np.nan,
                           clear_of_mc_error=False)
            else:
                best = ok.loc[ok[axis].idxmax() if axis == "size_error_sd" else ok[axis].idxmin()]
                rec.update(value=best[axis], assurance=best["assurance"],
                           assurance_se=best["assurance_se"],
                           clear_of_mc_error=bool(best["assurance"] - 2 * best["assurance_se"]
                                                  >= plan.question.goal))
            rows.append(rec)
    return pd.DataFrame(rows, columns=["axis", "held", "value", "assurance", "assurance_se",
                                       "clear_of_mc_error"])
