"""Slow recovery study of Pagel's λ with the phylogenetic density (invented data, known truth)."""

from __future__ import annotations

import pytest
from scipy import stats

from allolaw.testing.phylo_recovery import recover_lambda


@pytest.mark.slow
@pytest.mark.mcmc
def test_lambda_intervals_hold_the_truth_at_their_nominal_rate():
    n = 20
    result = recover_lambda(n, n_species=50, draws=300, tune=300)
    hits = round(result.coverage * n)
    # 90% intervals: hits ~ Binomial(n, 0.9) for a calibrated model (Talts et al. 2018);
    # fail below the count with lower-tail probability < 0.005 (common practice, no source)
    floor = int(stats.binom.ppf(0.005, n, 0.9))
    assert hits >= floor, f"{hits}/{n} 90% intervals hold the true λ"
