"""The fast plan analysis against allolaw's own MCMC fit (slow: six fits)."""

from __future__ import annotations

import pytest

from allolaw.planning import DesignPrior, read_plan
from allolaw.planning.mcmc_check import (
    CHECK_CONFIG,
    check_against_mcmc,
    converged_references,
    pick_tables,
)


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
    plan = read_plan(CHECK_CONFIG, "check")
    rows = check_against_mcmc(plan, DesignPrior.point(plan.truth), pick_tables(plan, 6),
                              models_dir="models")
    # at 2 chains x 1000 draws two of these six taxa_errors fits once missed the reference
    # bar (R-hat 1.015; 7 divergences), so at least half must pass
    converged = converged_references(rows)
    assert converged.sum() >= 3, rows.to_string()
    assert (rows.loc[converged, "abs_difference"] <= 0.05).all(), rows.to_string()
