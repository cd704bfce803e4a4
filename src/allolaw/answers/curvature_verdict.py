"""Do the taxa differ in exponent, or is it one curved law? A four-way verdict.

When taxa sit at different sizes, one curved law ``a + b·x + c·x²`` gives each taxon the local
slope ``b + 2c·x̄_taxon`` of its size range, so straight-line taxon exponents differ and trend
with the taxa's mean size with slope 2c (Kolokotrones et al. 2010). The verdict reads three
fits:

* ``taxa_linear`` — taxon exponents, no curvature;
* ``one_curve`` — one curved law, no taxon exponents (taxon intercepts may stay);
* ``taxa_curved`` — a shared curvature plus taxon exponents;

and answers one of:

* "no between-taxon differences to explain" — the SD of taxon exponents in ``taxa_linear``
  is not shown to exceed a small value (its posterior did not move above its prior);
* "one curved law explains the taxon differences" — curvature removes most of the spread,
  none is left, and the taxa share enough of the size range for the curve to be seen within
  them;
* "the taxa differ in their own right" — spread is left after the shared curvature and the
  taxon exponents do not trend with size as the curved law predicts;
* "the data cannot tell these apart" — otherwise, typically when taxa occupy nearly disjoint
  size ranges, where one curved law and taxon slopes that trend with size fit alike.

:func:`audit_evidence` computes the numbers from the fits; :func:`judge_curvature` decides.
"""

from __future__ import annotations

import json
import math
import warnings
from dataclasses import dataclass
from typing import Any

import arviz as az
import numpy as np
from scipy import stats

__all__ = ["NO_DIFFERENCES", "ONE_CURVE", "OWN_RIGHT", "UNDECIDABLE", "AuditEvidence",
           "CurvatureVerdict", "audit_evidence", "judge_curvature"]

NO_DIFFERENCES = "no between-taxon differences to explain"
ONE_CURVE = "one curved law explains the taxon differences"
OWN_RIGHT = "the taxa differ in their own right"
UNDECIDABLE = "the data cannot tell these apart"


@dataclass(frozen=True)
class AuditEvidence:
    """The numbers the curvature verdict rests on (intervals are 90%)."""

    level: str
    n_taxa: int
    sd_small: float
    sd_contraction: float  # posterior SD / prior SD of exponent_sd in taxa_linear
    p_spread: float  # P(exponent_sd > sd_small | y), taxa_linear
    prior_p_spread: float  # the same under the half-normal prior
    p_spread_after_curve: float  # P(exponent_sd > sd_small | y), taxa_curved
    share: tuple[float, float, float]  # q05, median, q95 of 1 − Var_taxa(curved)/Var(linear)
    trend: tuple[float, float, float]  # slope of taxon exponents on taxon mean log size
    twice_curvature: tuple[float, float, float]  # 2c, the slope a curved law predicts
    trend_minus_2c: tuple[float, float, float]
    within_size_share: float  # within-taxon share of the variance of log size
    loo_taxa_over_curve: tuple[float, float] | None  # elpd(taxa_curved) − elpd(one_curve), SE


@dataclass(frozen=True)
class CurvatureVerdict:
    """One of the four verdicts, in plain words, with the numbers behind it."""

    verdict: str
    sentence: str
    evidence: AuditEvidence


def audit_evidence(
    taxa_linear: az.InferenceData,
    taxa_curved: az.InferenceData,
    one_curve: az.InferenceData | None = None,
    *,
    level: str | None = None,
    sd_small: float = 0.05,
    sd_prior_scale: float | None = None,
    seed: int = 0,
) -> AuditEvidence:
    """Compute the numbers of :class:`AuditEvidence` from the fits.

    Parameters
    ----------
    taxa_linear, taxa_curved, one_curve
        The three fits (see the module docstring); ``one_curve`` only feeds the LOO
        comparison and may be ``None``. The curvature comes from ``taxa_curved``.
    level
        Taxon level (default: the one with most taxa in ``taxa_linear``).
    sd_small
        An SD of taxon exponents below which the taxa do not differ in practice (0.05: a
        spread of ±0.1 around 3/4 for 95% of taxa; our own reading aid, no source).
    sd_prior_scale
        Half-normal scale of the prior of ``exponent_sd`` (default: from the ``spec``
        attribute of ``taxa_linear``, else 0.25, the schema default).
    seed
        For pairing draws of independent fits.
    """
    post = taxa_linear.posterior
    levels = [str(v).removeprefix("exponent_sd__") for v in post.data_vars
              if str(v).startswith("exponent_sd__")]
    if not levels:
        msg = "audit_evidence: taxa_linear has no taxon exponents (exponent_sd__<level>)"
        raise ValueError(msg)
    level = level or max(levels, key=lambda lvl: post.sizes[lvl])
    scale = sd_prior_scale if sd_prior_scale is not None else _prior_scale(taxa_linear)
    sd_lin = _flat(post[f"exponent_sd__{level}"])
    sd_cur = _flat(taxa_curved.posterior[f"exponent_sd__{level}"])
    prior_sd_of_sd = scale * math.sqrt(1.0 - 2.0 / math.pi)  # half-normal SD

    b_lin = _matrix(post[f"taxon_exponent__{level}"], level)
    b_cur = _matrix(taxa_curved.posterior[f"taxon_exponent__{level}"], level)
    rng = np.random.default_rng(seed)
    n = min(b_lin.shape[0], b_cur.shape[0])
    i_lin = rng.permutation(b_lin.shape[0])[:n]
    i_cur = rng.permutation(b_cur.shape[0])[:n]
    v_lin = b_lin.var(axis=1)[i_lin]
    v_cur = b_cur.var(axis=1)[i_cur]
    share = 1.0 - v_cur / v_lin

    const = taxa_linear.constant_data
    x = np.asarray(const["log_size_obs"].values, dtype=float)
    idx = np.asarray(const[f"taxon_index__{level}"].values, dtype=int)
    n_taxa = b_lin.shape[1]
    means = np.array([x[idx == j].mean() for j in range(n_taxa)])
    centred = means - means.mean()
    trend = (b_lin @ centred) / max(float(centred @ centred), 1e-12)
    two_c = 2.0 * _flat(taxa_curved.posterior["curvature"])
    pick = (rng.permutation(two_c.size)[:n] if two_c.size >= n
            else rng.integers(0, two_c.size, n))
    diff = trend[i_lin] - two_c[pick]
    within = float(np.sum((x - means[idx]) ** 2) / np.sum((x - x.mean()) ** 2))

    loo = None
    if one_curve is not None:
        loo = _loo_difference(taxa_curved, one_curve)
    return AuditEvidence(
        level=level, n_taxa=n_taxa, sd_small=sd_small,
        sd_contraction=float(sd_lin.std() / prior_sd_of_sd),
        p_spread=float(np.mean(sd_lin > sd_small)),
        prior_p_spread=float(2.0 * stats.norm.sf(sd_small / scale)),
        p_spread_after_curve=float(np.mean(sd_cur > sd_small)),
        share=_interval(share), trend=_interval(trend), twice_curvature=_interval(two_c),
        trend_minus_2c=_interval(diff), within_size_share=within,
        loo_taxa_over_curve=loo,
    )


def judge_curvature(
    ev: AuditEvidence,
    *,
    p_high: float = 0.9,
    share_most: float = 0.5,
    within_min: float = 0.5,
    se_factor: float = 2.0,
) -> CurvatureVerdict:
    """Decide among the four verdicts from :class:`AuditEvidence`.

    Parameters
    ----------
    ev
        The numbers.
    p_high
        Posterior probability that an SD exceeds ``ev.sd_small`` above which a spread counts
        as shown; it must also exceed its prior probability.
    share_most
        Median share of the spread that curvature must remove to explain it.
    within_min
        Within-taxon share of the variance of log size below which the taxa are taken to sit
        at different sizes, so a curve within taxa is hardly seen.
    se_factor
        LOO: taxon exponents add to one curved law when ``elpd(taxa_curved) −
        elpd(one_curve)`` exceeds this many SE.

    Notes
    -----
    All four thresholds are our own reading aids (common practice, no source).
    """
    spread = ev.p_spread >= p_high and ev.p_spread > ev.prior_p_spread
    left = ev.p_spread_after_curve >= p_high
    apart = ev.within_size_share < within_min
    mid = ev.share[1]
    trend_seen = ev.trend[0] > 0 or ev.trend[2] < 0
    trend_fits = trend_seen and ev.trend_minus_2c[0] <= 0 <= ev.trend_minus_2c[2]
    loo_taxa = None
    if ev.loo_taxa_over_curve is not None:
        d, se = ev.loo_taxa_over_curve
        loo_taxa = d > se_factor * se
    if not spread:
        verdict = NO_DIFFERENCES
    elif mid >= share_most and not left and loo_taxa is not True:
        verdict = UNDECIDABLE if apart else ONE_CURVE
    elif left and (not trend_fits or not apart) and loo_taxa is not False:
        # spread left after the curve, and either no trend with size as the curve predicts
        # or taxa that share the size range (so a curve would have been seen within them)
        verdict = OWN_RIGHT
    else:
        verdict = UNDECIDABLE
    return CurvatureVerdict(verdict=verdict, sentence=_sentence(verdict, ev), evidence=ev)


def _sentence(verdict: str, ev: AuditEvidence) -> str:
    spread = (f"P(SD of taxon exponents > {ev.sd_small:g}) = {ev.p_spread:.2f} (prior "
              f"{ev.prior_p_spread:.2f}; posterior SD of that SD {ev.sd_contraction:.2f} of "
              f"its prior's)")
    after = f"{ev.p_spread_after_curve:.2f} with a shared curvature"
    share = (f"curvature removes {100 * ev.share[1]:.0f}% of the spread (90% interval "
             f"{100 * ev.share[0]:.0f}% to {100 * ev.share[2]:.0f}%)")
    trend = (f"taxon exponents trend with taxon mean log size at {ev.trend[1]:.3f} "
             f"({ev.trend[0]:.3f} to {ev.trend[2]:.3f}) where one curved law predicts "
             f"2c = {ev.twice_curvature[1]:.3f} ({ev.twice_curvature[0]:.3f} to "
             f"{ev.twice_curvature[2]:.3f})")
    overlap = (f"{100 * ev.within_size_share:.0f}% of the variance of log size lies within "
               f"taxa")
    loo = ""
    if ev.loo_taxa_over_curve is not None:
        d, se = ev.loo_taxa_over_curve
        loo = f"; taxon exponents beyond one curved law change elpd_loo by {d:.1f} ± {se:.1f}"
    head = {NO_DIFFERENCES: "No between-taxon differences to explain",
            ONE_CURVE: "One curved law explains the taxon differences",
            OWN_RIGHT: "The taxa differ in their own right",
            UNDECIDABLE: "The data cannot tell a curved law from taxa that differ"}[verdict]
    if verdict == NO_DIFFERENCES:
        return f"{head}: {spread}."
    why = f"{head}: {spread}, {after}; {share}; {trend}; {overlap}{loo}."
    if verdict == UNDECIDABLE and ev.within_size_share < 0.5:
        why += (" The taxa sit at different sizes, so one curved law and taxon exponents "
                "that change with size fit these data alike.")
    return why


def _loo_difference(a: az.InferenceData, b: az.InferenceData) -> tuple[float, float]:
    with warnings.catch_warnings(), np.errstate(all="ignore"):
        # high Pareto k: shown by the comparison table
        warnings.simplefilter("ignore", UserWarning)
        la = az.loo(a, pointwise=True, var_name="trait")
        lb = az.loo(b, pointwise=True, var_name="trait")
    d = np.asarray(la.loo_i.values, dtype=float) - np.asarray(lb.loo_i.values, dtype=float)
    return float(d.sum()), float(math.sqrt(d.size * d.var()))


def _prior_scale(idata: az.InferenceData) -> float:
    raw = idata.attrs.get("spec")
    if raw:
        spec = json.loads(raw) if isinstance(raw, str) else dict(raw)
        return float(spec.get("priors", {}).get("exponent_sd", {}).get("sd", 0.25))
    return 0.25


def _interval(x: np.ndarray) -> tuple[float, float, float]:
    q = np.quantile(x, [0.05, 0.5, 0.95])
    return float(q[0]), float(q[1]), float(q[2])


def _flat(da: Any) -> np.ndarray:
    return np.asarray(da.values, dtype=float).reshape(-1)


def _matrix(da: Any, dim: str) -> np.ndarray:
    arr = np.asarray(da.transpose("chain", "draw", dim).values, dtype=float)
    return arr.reshape(-1, arr.shape[-1])
