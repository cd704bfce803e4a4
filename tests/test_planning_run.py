"""Running a plan: chunking, design priors, the designs table and its Monte Carlo SEs."""

from __future__ import annotations

import math
from dataclasses import replace
from pathlib import Path

import arviz as az
import numpy as np
import pandas as pd
import pytest

from allolaw.errors import UserError
from allolaw.planning import (
    DesignPrior,
    combine_chunks,
    read_design_prior,
    read_plan,
    run_chunk,
    smallest_designs,
    summarise_tables,
)

HYPOTHESES = {"exponents": [{"name": "surface law", "value": 0.6667, "weight": 1},
                            {"name": "metabolic law", "value": 0.75, "weight": 1},
                            {"name": "isometry", "value": 1.0, "weight": 1}],
              "other_weight": 1, "interval_halfwidth": 0.03}


def _config(**plan) -> dict:
    base = {"truth": {"exponent": 0.75, "intercept_sd": 0.3, "exponent_sd": 0.05,
                      "scatter_sd": 0.2},
            "designs": {"species": [16, 32], "taxa": [4], "size_range": [4.0],
                        "size_error_sd": [0.2]},
            "simulations": 30, "seed": 99}
    base.update(plan)
    return {"hypotheses": HYPOTHESES, "plans": {"p": base}}


def test_chunked_and_unchunked_runs_give_identical_tables(tmp_path: Path) -> None:
    plan = read_plan(_config(), "p")
    prior = DesignPrior.point(plan.truth)
    whole = tmp_path / "whole.csv"
    run_chunk(plan, prior).to_csv(whole, index=False)
    parts = []
    for k in (1, 2, 3):  # 3 chunks of 60 (design, table) pairs: one cuts a design in two
        path = tmp_path / f"chunk_{k}.csv"
        run_chunk(plan, prior, k, 3).to_csv(path, index=False)
        parts.append(path)
    one = combine_chunks([whole], plan)
    three = combine_chunks(parts[::-1], plan)
    pd.testing.assert_frame_equal(one, three, check_exact=True)
    pd.testing.assert_frame_equal(summarise_tables(one, plan), summarise_tables(three, plan),
                                  check_exact=True)
    assert len(one) == 60


def test_combine_refuses_missing_or_repeated_tables(tmp_path: Path) -> None:
    plan = read_plan(_config(), "p")
    prior = DesignPrior.point(plan.truth)
    a, b = tmp_path / "a.csv", tmp_path / "b.csv"
    run_chunk(plan, prior, 1, 2).to_csv(a, index=False)
    run_chunk(plan, prior, 1, 2).to_csv(b, index=False)
    with pytest.raises(UserError, match="expected 60"):
        combine_chunks([a], plan)
    with pytest.raises(UserError, match="repeated"):
        combine_chunks([a, b], plan)


def test_assurance_under_a_point_mass_design_prior_equals_the_power_there(tmp_path: Path
                                                                          ) -> None:
    # Assurance is power averaged over the design prior (O'Hagan & Stevens 2001, Med. Decis.
    # Making 21:219-230); for a prior that is a point mass it is the power at that point.
    # The point mass is a posterior.nc whose draws all equal the explicit truth.
    values = {"exponent": 0.75, "sigma": 0.2, "intercept_sd__taxon": 0.3,
              "exponent_sd__taxon": 0.05}
    idata = az.from_dict(posterior={k: np.full((2, 25), v) for k, v in values.items()})
    idata.to_netcdf(str(tmp_path / "posterior.nc"))
    explicit = read_plan(_config(), "p")
    from_fit = read_plan(_config(truth={"from_fit": "posterior.nc"}), "p")
    prior = read_design_prior(from_fit.truth, root=tmp_path)
    assert prior.size == 50
    power = summarise_tables(run_chunk(explicit, DesignPrior.point(explicit.truth)), explicit)
    assurance = summarise_tables(run_chunk(from_fit, prior), from_fit)
    pd.testing.assert_frame_equal(power, assurance, check_exact=True)


def test_assurance_under_a_two_point_prior_is_the_mean_of_the_two_powers() -> None:
    plan = read_plan(_config(simulations=400, designs={"species": [24], "taxa": [1],
                                                       "size_range": [4.0]}), "p")
    plan = replace(plan, truth=replace(plan.truth, intercept_sd=0.0, exponent_sd=0.0))
    powers = []
    for b in (0.75, 1.0):
        point = DesignPrior(*(np.array([v]) for v in (b, 0.0, 0.0, 0.2, 0.0)))
        powers.append(summarise_tables(run_chunk(plan, point), plan)["assurance"].iloc[0])
    both = DesignPrior(np.array([0.75, 1.0]), np.zeros(2), np.zeros(2), np.full(2, 0.2),
                       np.zeros(2))
    assurance = summarise_tables(run_chunk(plan, both), plan)
    se = math.sqrt(2 * 0.25 / 400)  # bound on the SE of the difference (p(1−p) ≤ 1/4)
    assert abs(assurance["assurance"].iloc[0] - np.mean(powers)) < 3 * se


def test_designs_table_carries_binomial_and_mean_standard_errors() -> None:
    plan = read_plan(_config(), "p")
    rows = run_chunk(plan, DesignPrior.point(plan.truth))
    table = summarise_tables(rows, plan)
    for _, rec in table.iterrows():
        p, n = rec["assurance"], rec["simulations"]
        assert rec["assurance_se"] == pytest.approx(math.sqrt(p * (1 - p) / n))
        widths = rows.loc[rows["design"] == rec["design"], "width90"]
        assert rec["width90_se"] == pytest.approx(widths.std(ddof=1) / math.sqrt(n))


def test_smallest_design_is_the_least_species_meeting_the_goal() -> None:
    plan = read_plan(_config(question={"goal": 0.5}), "p")
    summary = pd.DataFrame({"design": [0, 1, 2], "species": [10, 20, 40], "taxa": 4,
                            "size_range": 4.0, "size_error_sd": 0.2, "replicates": 1,
                            "assurance": [0.3, 0.6, 0.9], "assurance_se": [0.05, 0.06, 0.02]})
    summary["meets_goal"] = summary["assurance"] >= 0.5
    best = smallest_designs(summary, plan)
    assert list(best["value"]) == [20]
    assert not best["clear_of_mc_error"].iloc[0]  # 0.6 − 2·0.06 is below the goal


def test_a_plan_with_an_unknown_key_names_the_key() -> None:
    config = _config(designs={"species_count": [10]})
    with pytest.raises(UserError, match=r"plans\.p\.designs: unknown key 'species_count'"):
        read_plan(config, "p")


def test_curvature_plan_on_a_straight_truth_detects_a_sign_in_about_20_percent() -> None:
    # Under a flat prior the one-sided posterior probability P(c > 0 | y) equals one minus
    # the one-sided p-value (Casella & Berger 1987, JASA 82:106-111), uniform when c = 0; so
    # with target 0.9 a sign is claimed in 2 × 0.1 = 20 % of straight-law studies. The
    # normal(0, 0.25) curvature prior is nearly flat at this precision.
    config = _config(simulations=400, question={"about": "curvature", "target": 0.9},
                     designs={"species": [60], "taxa": [1], "size_range": [4.0]})
    config["plans"]["p"]["truth"] = {"exponent": 0.75, "intercept_sd": 0.0,
                                     "exponent_sd": 0.0, "scatter_sd": 0.2, "curvature": 0.0}
    plan = read_plan(config, "p")
    assert plan.analysis.curvature
    table = summarise_tables(run_chunk(plan, DesignPrior.point(plan.truth)), plan)
    rate = table["confident_wrong"].iloc[0]
    assert table["assurance"].iloc[0] == 0.0
    assert abs(rate - 0.2) < 3 * math.sqrt(0.2 * 0.8 / 400)
