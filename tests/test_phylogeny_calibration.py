"""Slow calibration studies of the phylogenetic law on small invented trees (known truth).

The full studies are run by benchmarks/phylo_calibration.py (numbers in benchmarks/README.md);
these are their small versions.
"""

from __future__ import annotations

import numpy as np
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
def test_leaving_out_the_tree_puts_the_true_exponent_further_in_the_posterior_tails():
    n = 12
    out = tree_misspecification(n, n_species=30, seed=12, draws=300, tune=300)
    with_tree, without = out["with_tree"], out["without_tree"]
    floor = int(stats.binom.ppf(0.005, n, 0.9))  # as above
    assert round(with_tree.coverage()["exponent"] * n) >= floor
    # with λ = 1 and sizes along the tree, independent residuals overstate the information in
    # the species (Felsenstein 1985): the truth's rank sits nearer 0 or 99 without the tree
    tail = {k: float(np.mean(np.abs(np.asarray(v.ranks)[:, 0] - 49.5)))
            for k, v in out.items()}
    assert tail["without_tree"] > tail["with_tree"], tail
    assert without.coverage()["exponent"] <= with_tree.coverage()["exponent"]
