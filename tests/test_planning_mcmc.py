"""The fast plan analysis against allolaw's own MCMC fit (slow: six fits)."""

from __future__ import annotations

import pytest

from allolaw.planning import DesignPrior, read_plan
from allolaw.planning.mcmc_check import check_against_mcmc, pick_tables

CONFIG = {
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


@pytest.mark.slow
@pytest.mark.mcmc
# the JAX-compiled predictive draws of a model with errors in size skip a shape assertion of
# the graph (JAX tracing cannot run it) and warn; the shapes here come from one table
@pytest.mark.filterwarnings("ignore:Skipping Assert:UserWarning")
def test_fast_probability_of_the_true_value_is_within_005_of_mcmc_on_six_tables() -> None:
    # Six tables over six of the eight designs (with and without size error and taxa), each
    # fitted by the models/taxa(_errors).yaml model with NUTS; the headline number is the
    # posterior probability of the true named value. The full study of 40 tables is
    # benchmarks/plan_vs_mcmc.py (its JSON output is committed).
    plan = read_plan(CONFIG, "check")
    rows = check_against_mcmc(plan, DesignPrior.point(plan.truth), pick_tables(plan, 6),
                              models_dir="models")
    # a reference fit above R-hat 1.01 or with divergences is no reference (Vehtari et al.
    # 2021, Bayesian Analysis 16:667-718); at 2 chains x 1000 draws two of these six
    # taxa_errors fits missed it once (R-hat 1.015; 7 divergences), so at least half must pass
    converged = (rows["rhat_max"] <= 1.01) & (rows["divergences"] == 0)
    assert converged.sum() >= 3, rows.to_string()
    assert (rows.loc[converged, "abs_difference"] <= 0.05).all(), rows.to_string()
