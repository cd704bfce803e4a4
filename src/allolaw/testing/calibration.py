"""Simulation-based calibration (SBC) and interval coverage of a model spec.

Each replicate draws every parameter from the prior, simulates a dataset from the model with
those values (same species, taxa and measurement-error SDs as a template table), fits the
model to it and records the rank of the true value among thinned posterior draws. For a
correct sampler and model code the ranks are uniform (Talts et al. 2018); the same fits give
the coverage of central 90% intervals of the taxon exponents (90% in expectation).
"""

from __future__ import annotations

import logging
from collections.abc import Iterable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats

from allolaw.model.builder import TRAIT, build_model
from allolaw.model.spec import ModelSpec
from allolaw.model.terms import SIZE_MEASUREMENT

__all__ = [
    "CalibrationResult",
    "calibration_records",
    "rank_uniformity",
    "run_calibration",
    "summarise_calibration",
]

log = logging.getLogger(__name__)


@dataclass
class CalibrationResult:
    """Ranks per parameter, uniformity tests and interval coverage of one SBC study."""

    ranks: dict[str, list[int]]
    n_draws: int
    bins: int
    uniformity: dict[str, dict[str, float]]
    coverage: dict[str, float]
    divergences: list[int] = field(default_factory=list)
    max_rhat: list[float] = field(default_factory=list)

    def to_dict(self) -> dict[str, Any]:
        """Plain data for JSON."""
        return {
            "ranks": self.ranks,
            "n_draws": self.n_draws,
            "bins": self.bins,
            "uniformity": self.uniformity,
            "coverage": self.coverage,
            "divergences": self.divergences,
            "max_rhat": self.max_rhat,
            "histograms": {
                name: np.histogram(r, bins=self.bins, range=(0, self.n_draws + 1))[0].tolist()
                for name, r in self.ranks.items()
            },
        }


def run_calibration(
    template: pd.DataFrame,
    spec: ModelSpec,
    *,
    levels: list[str],
    log_reference_size: float,
    parameters: list[str],
    coverage_of: str | None = None,
    replicates: int = 50,
    n_draws: int = 99,
    bins: int = 10,
    seed: int = 0,
    sampler: dict[str, Any] | None = None,
) -> CalibrationResult:
    """Run SBC of ``spec`` on datasets shaped like ``template``.

    Parameters
    ----------
    template
        A clean table giving the species, taxa and measurement-error SDs of every replicate
        (its size and trait values are replaced by simulated ones).
    spec
        The model; its priors must not depend on the data (give ``priors.intercept.mean``
        and ``priors.size_population``), or the ranks are not uniform even for correct code.
    parameters
        Scalar parameters whose ranks are recorded (e.g. ``exponent``, ``curvature``).
    coverage_of
        A vector parameter (e.g. ``taxon_exponent__genus``) whose central 90% intervals'
        coverage is recorded.
    n_draws
        Posterior draws kept per fit (thinned evenly); ranks run from 0 to ``n_draws``.
    bins
        Bins of the rank histogram and of the chi-square uniformity test.
    sampler
        Keyword arguments of :func:`allolaw.testing.quick_sample`.

    Notes
    -----
    The same as :func:`calibration_records` for every replicate followed by
    :func:`summarise_calibration`; a long study can run the records in separate processes
    (``benchmarks/calibration.py`` does) and summarise them together.

    References
    ----------
    .. [1] Talts, S., Betancourt, M., Simpson, D., Vehtari, A. & Gelman, A. (2018).
       Validating Bayesian inference algorithms with simulation-based calibration.
       arXiv:1804.06788.
    """
    records = calibration_records(
        template, spec, levels=levels, log_reference_size=log_reference_size,
        parameters=parameters, coverage_of=coverage_of, replicates=replicates,
        indices=range(replicates), n_draws=n_draws, seed=seed, sampler=sampler,
    )
    return summarise_calibration(records, parameters=parameters, coverage_of=coverage_of,
                                 n_draws=n_draws, bins=bins)


def calibration_records(
    template: pd.DataFrame,
    spec: ModelSpec,
    *,
    levels: list[str],
    log_reference_size: float,
    parameters: list[str],
    coverage_of: str | None = None,
    replicates: int = 50,
    indices: Iterable[int] | None = None,
    n_draws: int = 99,
    seed: int = 0,
    sampler: dict[str, Any] | None = None,
) -> list[dict[str, Any]]:
    """Fit the SBC replicates ``indices`` (of ``replicates``) and return one record each.

    The prior draws of all ``replicates`` come from one seeded prior predictive run, so a
    replicate's data and fit are the same whichever subset of indices a call runs: a study
    split over several processes gives the records of the study run in one. Each record holds
    ``replicate``, ``ranks`` (per parameter), ``hits`` and ``intervals`` (of ``coverage_of``),
    ``divergences`` and ``max_rhat``. Arguments as in :func:`run_calibration`.
    """
    import arviz as az
    import pymc as pm

    from allolaw.testing.data import quick_sample

    if spec.priors["intercept"].get("mean", "auto") == "auto":
        log.warning("SBC with a data-dependent intercept prior: ranks need not be uniform")
    prior_model = build_model(template, spec, levels=levels,
                              log_reference_size=log_reference_size, prior_only=True)
    with prior_model:
        prior = pm.sample_prior_predictive(draws=replicates, random_seed=seed)
    records = []
    chosen = list(range(replicates) if indices is None else indices)
    for r in chosen:
        if not 0 <= r < replicates:
            msg = f"replicate index {r} outside 0..{replicates - 1}"
            raise ValueError(msg)
        data = template.copy()
        data.attrs = dict(template.attrs)
        data["log_trait"] = prior.prior_predictive[TRAIT].values[0, r]
        if SIZE_MEASUREMENT in prior.prior_predictive:
            data["log_size"] = prior.prior_predictive[SIZE_MEASUREMENT].values[0, r]
        model = build_model(data, spec, levels=levels, log_reference_size=log_reference_size)
        idata = quick_sample(model, seed=seed + 1 + r, **(sampler or {}))
        rhat = az.rhat(idata, var_names=parameters)
        record: dict[str, Any] = {
            "replicate": r,
            "divergences": int(idata.sample_stats["diverging"].sum()),
            "max_rhat": float(max(float(rhat[p].max()) for p in parameters)),
            "ranks": {},
            "hits": 0,
            "intervals": 0,
        }
        for name in parameters:
            draws = _thin(idata.posterior[name].values.reshape(-1), n_draws)
            truth = float(prior.prior[name].values[0, r])
            record["ranks"][name] = int(np.sum(draws < truth))
        if coverage_of is not None:
            post = idata.posterior[coverage_of].values
            post = post.reshape(-1, post.shape[-1])
            lo, hi = np.quantile(post, [0.05, 0.95], axis=0)
            truth_vec = prior.prior[coverage_of].values[0, r]
            record["hits"] = int(np.sum((lo < truth_vec) & (truth_vec < hi)))
            record["intervals"] = int(truth_vec.size)
        records.append(record)
        _release_jax_programs()
        log.info("SBC replicate %d (%d of %d here): %d divergences", r + 1, len(records),
                 len(chosen), record["divergences"])
    return records


def _release_jax_programs() -> None:
    # each replicate's sampler is a new JAX program; free the compiled ones (a long study in
    # one process ran out of JIT code memory)
    import sys

    jax = sys.modules.get("jax")
    if jax is not None:
        jax.clear_caches()


def summarise_calibration(
    records: list[dict[str, Any]],
    *,
    parameters: list[str],
    coverage_of: str | None = None,
    n_draws: int = 99,
    bins: int = 10,
) -> CalibrationResult:
    """Rank uniformity and interval coverage over the records of :func:`calibration_records`.

    Records are taken in replicate order, whatever order they come in.
    """
    records = sorted(records, key=lambda rec: int(rec["replicate"]))
    ranks = {name: [int(rec["ranks"][name]) for rec in records] for name in parameters}
    uniformity = {name: rank_uniformity(rk, n_draws=n_draws, bins=bins)
                  for name, rk in ranks.items()}
    total = sum(int(rec["intervals"]) for rec in records)
    coverage = {}
    if coverage_of is not None and total:
        hits = sum(int(rec["hits"]) for rec in records)
        coverage = {coverage_of: hits / total, "intervals": float(total)}
    return CalibrationResult(
        ranks=ranks, n_draws=n_draws, bins=bins, uniformity=uniformity, coverage=coverage,
        divergences=[int(rec["divergences"]) for rec in records],
        max_rhat=[float(rec["max_rhat"]) for rec in records],
    )


def rank_uniformity(ranks: list[int] | np.ndarray, *, n_draws: int, bins: int = 10
                    ) -> dict[str, float]:
    """Chi-square test that SBC ranks (0 … ``n_draws``) are uniform over ``bins`` bins.

    ``n_draws + 1`` should be divisible by ``bins`` so every bin holds equally many ranks.

    References
    ----------
    .. [1] Talts, S. et al. (2018). Validating Bayesian inference algorithms with
       simulation-based calibration. arXiv:1804.06788, Sect. 4.
    """
    counts, _ = np.histogram(np.asarray(ranks), bins=bins, range=(0, n_draws + 1))
    result = stats.chisquare(counts)
    return {"chi2": float(result.statistic), "p_value": float(result.pvalue),
            "df": float(bins - 1)}


def _thin(draws: np.ndarray, n: int) -> np.ndarray:
    index = np.linspace(0, draws.size - 1, n).round().astype(int)
    return draws[index]
