"""Check the fast analysis against allolaw's own MCMC fit on some simulated tables.

Each chosen table becomes a ``clean.csv``-shaped table (one taxon level ``taxon``; size SD
given per species) and is fitted with the real model (``models/taxa_errors.yaml`` with size
error, ``models/taxa.yaml`` without; :func:`allolaw.model.builder.build_model`,
:func:`allolaw.model.sampling.fit_model`), and the named-value probabilities come from
:func:`allolaw.answers.hypotheses.compare_hypotheses`. The headline number compared is the posterior
probability of the true hypothesis.
"""

from __future__ import annotations

import json
import time
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from allolaw.errors import UserError
from allolaw.planning.approx import analyse_tables
from allolaw.planning.decide import named_probabilities, true_hypothesis
from allolaw.planning.design import Plan
from allolaw.planning.simulate import DesignPrior, SimulatedTables, simulate_tables

__all__ = ["CHECK_CONFIG", "check_against_mcmc", "clean_table", "converged_references",
           "pick_tables"]

#: The configuration of the check (invented truth near the metabolic law: exponent 0.75, taxon
#: SDs 0.3 and 0.05, scatter 0.2), shared by the slow test and benchmarks/plan_vs_mcmc.py.
CHECK_CONFIG: dict[str, Any] = {
    "hypotheses": {"exponents": [{"name": "surface law", "value": 0.6667, "weight": 1},
                                 {"name": "metabolic law", "value": 0.75, "weight": 1},
                                 {"name": "isometry", "value": 1.0, "weight": 1}],
                   "other_weight": 1, "interval_halfwidth": 0.03},
    "plans": {"check": {
        "truth": {"exponent": 0.75, "intercept_sd": 0.3, "exponent_sd": 0.05,
                  "scatter_sd": 0.2},
        "designs": {"species": [20, 60], "taxa": [4, 10], "size_range": [4.0],
                    "size_error_sd": [0.0, 0.2]},
        "simulations": 100, "seed": 20261204}},
}


def converged_references(rows: pd.DataFrame) -> pd.Series:
    """Which MCMC fits count as references: R-hat <= 1.01 and no divergences.

    A fit above R-hat 1.01 or with divergences is no reference for the approximation (Vehtari
    et al. 2021, Bayesian Analysis 16:667-718); its row is kept and counted apart.
    """
    return (rows["rhat_max"] <= 1.01) & (rows["divergences"] == 0)


def pick_tables(plan: Plan, count: int) -> list[tuple[int, int]]:
    """``count`` (design, table) pairs spread over the designs in turn."""
    n_designs = len(plan.designs)
    return [(i % n_designs, i // n_designs) for i in range(count)]


def clean_table(sims: SimulatedTables, row: int) -> pd.DataFrame:
    """Row ``row`` of simulated tables in the ``clean.csv`` layout (DEVELOPERS.md)."""
    n = sims.log_size.shape[1]
    frame = pd.DataFrame({
        "species": [f"species_{i:03d}" for i in range(n)],
        "taxon": [f"taxon_{t:02d}" for t in sims.taxon],
        "log_size": sims.log_size[row], "log_trait": sims.log_trait[row],
        "sd_log_size": np.full(n, max(sims.size_error_sd, 0.0)),
        "sd_log_trait": np.full(n, sims.trait_error_sd),
        "sd_source_size": "given", "sd_source_trait": "given",
    })
    frame.attrs["source"] = "simulated table"
    return frame


def check_against_mcmc(plan: Plan, prior: DesignPrior, pairs: list[tuple[int, int]], *,
                       models_dir: str | Path = "models", sampler: dict[str, Any] | None = None,
                       cache: str | Path | None = None) -> pd.DataFrame:
    """Fit each (design, table) by MCMC and by the fast analysis; one row per table.

    Columns: design, table, model, true hypothesis, ``prob_fast``, ``prob_mcmc``,
    ``abs_difference``, posterior mean and SD of the exponent both ways, the fit's largest
    R-hat, divergences and wall seconds. With ``cache`` (a folder), each MCMC result is kept
    in ``<cache>/<design>_<table>.json`` and read from there on a rerun (the fast side is
    always recomputed).

    Raises
    ------
    UserError
        For a plan whose question is the curvature (this check covers the exponent only).
    """
    if plan.question.about != "exponent":
        msg = (f"plan {plan.name}: check_with_mcmc covers the exponent question only; set it "
               "to 0 for a curvature plan")
        raise UserError(msg)
    rows = []
    for design_index, table in pairs:
        sims = simulate_tables(plan.designs[design_index], prior, np.array([table]),
                               seed=plan.seed, trait_error_sd=plan.truth.trait_error_sd)
        truth = int(true_hypothesis(sims.truth["exponent"], plan.question)[0])
        path = Path(cache) / f"{design_index}_{table}.json" if cache else None
        if path is not None and path.is_file():
            mcmc = json.loads(path.read_text())
        else:
            mcmc = _fit_mcmc(plan, sims, design_index, table, truth, models_dir,
                             {"chains": 2, "draws": 1000, "warmup": 1000, "target_acceptance": 0.9,
                              "backend": "auto", **(sampler or {})})
            if path is not None:
                path.parent.mkdir(parents=True, exist_ok=True)
                path.write_text(json.dumps(mcmc))
        post = analyse_tables(sims, plan.analysis)
        probs = named_probabilities(post, plan.question, plan.analysis)[0]
        mean = float(post.mean()[0])
        second = float(np.sum(post.weights * (post.sds**2 + post.means**2)))
        row = {"design": design_index, "table": table,
               "label": plan.designs[design_index].label(),
               "true_exponent": float(sims.truth["exponent"][0]),
               "prob_fast": float(probs[truth]), "mean_fast": mean,
               "sd_fast": float(np.sqrt(max(second - mean**2, 0.0))), **mcmc}
        row["abs_difference"] = abs(row["prob_fast"] - row["prob_mcmc"])
        rows.append(row)
    return pd.DataFrame(rows)


def _fit_mcmc(plan: Plan, sims: SimulatedTables, design_index: int, table: int, truth: int,
              models_dir: str | Path, sampler: dict[str, Any]) -> dict[str, Any]:
    import arviz as az

    from allolaw.answers.hypotheses import compare_hypotheses
    from allolaw.model.builder import build_model
    from allolaw.model.sampling import fit_model
    from allolaw.model.spec import load_spec

    design = plan.designs[design_index]
    labels = [h[0] for h in plan.question.exponents] + ["another value"]
    settings = {"exponents": [{"name": n, "value": v, "weight": w}
                              for n, v, w in plan.question.exponents],
                "other_weight": plan.question.other_weight,
                "interval_halfwidth": plan.question.interval_halfwidth,
                "bounds": [], "prior_scale_factors": []}
    name = "taxa_errors" if design.size_error_sd > 0 else "taxa"
    spec = load_spec(models_dir, name)
    data = clean_table(sims, 0)
    levels = ["taxon"] if design.taxa > 1 else []
    start = time.perf_counter()
    model = build_model(data, spec, levels=levels, log_reference_size=0.0)
    prior_model = build_model(data, spec, levels=levels, log_reference_size=0.0,
                              prior_only=True)
    idata = fit_model(model, chains=sampler["chains"], draws=sampler["draws"],
                      warmup=sampler["warmup"], target_acceptance=sampler["target_acceptance"],
                      seed=plan.seed * 1000 + table, backend=sampler["backend"],
                      prior_draws=20, prior_model=prior_model)
    seconds = time.perf_counter() - start
    hyp = compare_hypotheses(idata, spec, settings)
    pop = hyp[(hyp["parameter"] == "exponent") & (hyp["hypothesis"] == labels[truth])]
    b = np.asarray(idata.posterior["exponent"].values).reshape(-1)
    return {
        "model": name, "true_hypothesis": labels[truth],
        "prob_mcmc": float(pop["posterior_prob"].iloc[0]),
        "mean_mcmc": float(b.mean()), "sd_mcmc": float(b.std()),
        "rhat_max": float(az.rhat(idata.posterior).to_array().max()),
        "divergences": int(idata.sample_stats["diverging"].sum()),
        "seconds": round(seconds, 1), "method_mcmc": str(pop["method"].iloc[0]),
    }
