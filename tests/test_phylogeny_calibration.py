"""Slow calibration studies of the phylogenetic law on small invented trees (known truth).

The full studies are run by benchmarks/phylo_calibration.py (numbers in benchmarks/README.md);
these are their small versions.
"""

from __future__ import annotations

import pytest
from scipy import stats

from allolaw.testing.phylo_calibration import PARAMETERS, phylo_sbc, tree_misspecification


@pytest.mark.slow
@pytest.mark.mcmc
def test_sbc_of_the_phylogenetic_law_gives_uniform_ranks_and_nominal_coverage():
    n = 16
    result = phylo_sbc(n, n_species=30, seed=11, draws=300, tune=300)
    # 90% intervals: hits ~ Binomial(n, 0.9) for a calibrated model and sampler (Talts et al.
    # 2018); fail below the count with lower-tail probability < 0.005 (common practice, no
    # source)
    floor = int(stats.binom.ppf(0.005, n, 0.9))
    coverage = result.coverage()
    for name in PARAMETERS:
        assert round(coverage[name] * n) >= floor, (name, coverage)
    # ranks uniform on 0..99: chi-square test on 4 bins (scipy), alpha 0.001 per parameter
    for name, hist in result.rank_histograms(bins=4).items():
        assert stats.chisquare(hist).pvalue > 0.001, (name, hist)
    assert sum(result.divergences) <= 0.01 * n * 600


@pytest.mark.slow
@pytest.mark.mcmc
def test_with_the_tree_exponent_intervals_hold_on_data_with_strong_shared_ancestry():
    n = 12
    out = tree_misspecification(n, n_species=30, seed=12, draws=300, tune=300)
    with_tree = out["with_tree"]
    floor = int(stats.binom.ppf(0.005, n, 0.9))  # as above
    assert round(with_tree.coverage()["exponent"] * n) >= floor
    # The contrast with the tree left out (independent residuals overstate the information
    # in the species, Felsenstein 1985) needs the full study: benchmarks/phylo_calibration.py,
    # 60 replicates, exponent coverage 0.717 without vs 0.867 with the tree. On these 12
    # replicates it is not detectable (measured 2026-12-04: coverage 0.917 both ways, mean
    # width ratio without/with 1.013; the truth's mean rank distance from the middle came out
    # in opposite orders in two environments), so this small version runs both fits and
    # checks only the model with the tree.
    without = out["without_tree"]
    assert len(without.truth) == n
    assert sum(without.divergences) <= 0.01 * n * 600
