"""Tests of allolaw.answers.curvature_verdict.

Hand-built evidence for each branch of the verdict; hand-built InferenceData (invented draws
with known properties) for the evidence; and small seeded MCMC fits of simulated data with
known truth (slow).
"""

from __future__ import annotations

import arviz as az
import numpy as np
import pytest
from scipy import stats

from allolaw.answers.curvature_verdict import (
    NO_DIFFERENCES,
    ONE_CURVE,
    OWN_RIGHT,
    UNDECIDABLE,
    AuditEvidence,
    audit_evidence,
    judge_curvature,
)
from allolaw.testing.verdict_study import ALLOWED, CURVATURE_SCENARIOS


def _ev(**kw):
    base = dict(level="genus", n_taxa=8, sd_small=0.05, sd_contraction=0.3, p_spread=0.99,
                prior_p_spread=0.84, p_spread_after_curve=0.2, share=(0.6, 0.85, 0.95),
                trend=(-0.2, -0.16, -0.12), twice_curvature=(-0.2, -0.16, -0.12),
                trend_minus_2c=(-0.05, 0.0, 0.05), within_size_share=0.8,
                loo_taxa_over_curve=(0.5, 2.0))
    base.update(kw)
    return AuditEvidence(**base)


def test_no_spread_gives_no_differences_to_explain():
    # posterior P(SD > 0.05) below its prior value: the data did not show a spread
    out = judge_curvature(_ev(p_spread=0.4, share=(-3.0, 0.1, 0.9)))
    assert out.verdict == NO_DIFFERENCES
    assert "0.40 (prior 0.84" in out.sentence


def test_prior_like_spread_is_not_a_difference_even_when_high():
    out = judge_curvature(_ev(p_spread=0.95, prior_p_spread=0.96, sd_contraction=1.0))
    assert out.verdict == NO_DIFFERENCES


def test_curvature_removing_the_spread_with_shared_sizes_is_one_curved_law():
    out = judge_curvature(_ev())
    assert out.verdict == ONE_CURVE
    assert "removes 85%" in out.sentence


def test_curvature_removing_the_spread_with_disjoint_sizes_cannot_be_told_apart():
    out = judge_curvature(_ev(within_size_share=0.15))
    assert out.verdict == UNDECIDABLE
    assert "sit at different sizes" in out.sentence


def test_spread_left_without_a_size_trend_is_taxa_differing():
    out = judge_curvature(_ev(p_spread_after_curve=0.98, share=(-0.3, 0.05, 0.3),
                              trend=(-0.3, 0.01, 0.3), twice_curvature=(-0.02, 0.0, 0.02),
                              trend_minus_2c=(-0.3, 0.01, 0.3),
                              loo_taxa_over_curve=(15.0, 4.0)))
    assert out.verdict == OWN_RIGHT
    assert "differ in their own right" in out.sentence


def test_spread_left_trending_as_the_curve_predicts_on_disjoint_sizes_cannot_be_told_apart():
    out = judge_curvature(_ev(p_spread_after_curve=0.95, share=(0.0, 0.3, 0.6),
                              within_size_share=0.2))
    assert out.verdict == UNDECIDABLE


def test_loo_against_taxon_exponents_blocks_taxa_differing():
    out = judge_curvature(_ev(p_spread_after_curve=0.95, share=(-0.3, 0.05, 0.3),
                              trend=(-0.3, 0.0, 0.3), trend_minus_2c=(-0.3, 0.0, 0.3),
                              loo_taxa_over_curve=(-3.0, 2.0)))
    assert out.verdict == UNDECIDABLE


def _fit(b_taxa, sd_draws, curvature, x, idx, seed):
    rng = np.random.default_rng(seed)
    n_draws = sd_draws.size
    post = {"taxon_exponent__genus": b_taxa[None] + 0.01 * rng.standard_normal(
                (1, n_draws, b_taxa.size)),
            "exponent_sd__genus": sd_draws[None]}
    if curvature is not None:
        post["curvature"] = curvature + 0.001 * rng.standard_normal((1, n_draws))
    return az.from_dict(posterior=post,
                        constant_data={"log_size_obs": x, "taxon_index__genus": idx},
                        coords={"genus": [f"g{j}" for j in range(b_taxa.size)]},
                        dims={"taxon_exponent__genus": ["genus"],
                              "log_size_obs": ["species"], "taxon_index__genus": ["species"]})


def test_evidence_recovers_the_size_trend_share_and_overlap_of_hand_built_draws():
    # taxa at centres 0..7, 5 species each at centre ± 0.2: the taxon exponents follow
    # 0.75 − 0.1·(centre − 3.5) exactly (a curved law with c = −0.05 seen through taxa)
    centres = np.arange(8.0)
    x = np.repeat(centres, 5) + np.tile(np.linspace(-0.2, 0.2, 5), 8)
    idx = np.repeat(np.arange(8), 5)
    b_lin = 0.75 - 0.1 * (centres - 3.5)
    lin = _fit(b_lin, np.abs(np.random.default_rng(1).normal(0.25, 0.02, 2000)), None, x,
               idx, 1)
    cur = _fit(np.full(8, 0.75), np.full(2000, 0.01), -0.05, x, idx, 2)
    ev = audit_evidence(lin, cur, sd_prior_scale=0.25)
    assert ev.trend[1] == pytest.approx(-0.1, abs=0.005)
    assert ev.twice_curvature[1] == pytest.approx(-0.1, abs=0.005)
    assert ev.trend_minus_2c[0] <= 0 <= ev.trend_minus_2c[2]
    # the curved fit's taxon exponents vary only by the draw noise (SD 0.01)
    assert ev.share[1] > 0.99
    # within-taxon share of log-size variance: var(linspace(−.2,.2,5)) / total (closed form)
    within = np.var(np.linspace(-0.2, 0.2, 5))
    assert ev.within_size_share == pytest.approx(within / (within + np.var(centres)))
    # half-normal prior: P(SD > 0.05) = 2·Φ(−0.05/0.25)
    assert ev.prior_p_spread == pytest.approx(2 * stats.norm.cdf(-0.2))
    assert ev.p_spread == 1.0
    assert ev.p_spread_after_curve == 0.0
    assert judge_curvature(ev).verdict == UNDECIDABLE  # the taxa barely overlap in size


# --- small seeded MCMC fits of simulated data with known truth (slow) -------------------

# Scenarios (null; pure curvature; real taxon differences), their allowed verdicts and the fits
# are in allolaw.testing.verdict_study, shared with benchmarks/verdict_studies.py. Under pure
# curvature "no differences" is also right when the taxa's size ranges overlap enough that the
# curve leaves no detectable taxon spread (measured: seed 507, 53% of the log-size variance
# within genera); the error to rule out is "the taxa differ".


def _mcmc_verdict(scenario, seed):
    from allolaw.testing.verdict_study import curvature_verdict

    return curvature_verdict(scenario, seed)


def _counts(scenario, seeds):
    verdicts = [_mcmc_verdict(scenario, s)["verdict"] for s in seeds]
    return {v: verdicts.count(v) for v in set(verdicts)}


@pytest.mark.slow
@pytest.mark.mcmc
@pytest.mark.parametrize("scenario", list(CURVATURE_SCENARIOS))
def test_mcmc_curvature_verdicts_over_20_seeds(scenario):
    counts = _counts(scenario, range(500, 520))
    wrong = sum(n for v, n in counts.items() if v not in ALLOWED[scenario])
    # "taxa differ" never under the null or pure curvature; at least 18/20 with real taxa
    assert wrong <= (2 if scenario == "taxa" else 0), counts


@pytest.mark.slow
@pytest.mark.mcmc
@pytest.mark.parametrize("scenario", list(CURVATURE_SCENARIOS))
def test_mcmc_curvature_verdicts_over_3_seeds(scenario):
    counts = _counts(scenario, range(500, 503))
    wrong = sum(n for v, n in counts.items() if v not in ALLOWED[scenario])
    assert wrong == 0, counts
