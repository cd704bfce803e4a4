"""Calibration of the phylogenetic law on small invented trees: SBC and the tree left out.

Runs :mod:`allolaw.testing.phylo_calibration` (see its docstring for the model and the
simulation; invented data with known truth) and writes one JSON file:

* ``sbc``: simulation-based calibration (Talts et al. 2018) of intercept, exponent, σ and
  Pagel's λ on one random ultrametric tree of 30 tips: per parameter the 90% interval coverage
  with its binomial standard error, the rank histogram (5 bins of 100 ranks) and a chi-square
  test of its uniformity (scipy), divergences;
* ``misspecification``: data with λ = 1 and log sizes along the tree, fitted without and with
  the tree: the 90% interval coverage of the exponent in both and the median interval widths.

Run: PYTHONPATH=src python benchmarks/phylo_calibration.py [sbc_replicates]
[misspecification_replicates] [--out benchmarks/phylo_calibration.json]
The numbers measured are in benchmarks/README.md.

References
----------
Talts, S., Betancourt, M., Simpson, D., Vehtari, A. & Gelman, A. (2018). Validating Bayesian
inference algorithms with simulation-based calibration. arXiv:1804.06788.
"""

from __future__ import annotations

import json
import platform
import sys
import time
from pathlib import Path

import numpy as np
from scipy import stats

from allolaw.testing.phylo_calibration import phylo_sbc, tree_misspecification


def _summary(result) -> dict:
    n = len(result.truth)
    hist = result.rank_histograms()
    widths = np.asarray(result.upper) - np.asarray(result.lower)
    return {
        "replicates": n,
        "coverage_90": result.coverage(),
        "coverage_binomial_se": float(np.sqrt(0.9 * 0.1 / n)),
        "rank_histogram_5_bins": hist,
        "rank_uniformity_chi2_p": {p: float(stats.chisquare(h).pvalue) for p, h in hist.items()},
        "median_interval_width": {p: float(np.median(widths[:, k]))
                                  for k, p in enumerate(result.parameters)},
        "divergences_total": int(sum(result.divergences)),
    }


def main() -> None:
    args = [a for a in sys.argv[1:] if not a.startswith("--")]
    out = Path("benchmarks/phylo_calibration.json")
    if "--out" in sys.argv:
        out = Path(sys.argv[sys.argv.index("--out") + 1])
        args = [a for a in args if a != str(out)]
    n_sbc = int(args[0]) if args else 100
    n_mis = int(args[1]) if len(args) > 1 else 60
    t0 = time.perf_counter()
    sbc = _summary(phylo_sbc(n_sbc))
    t1 = time.perf_counter()
    mis = {k: _summary(v) for k, v in tree_misspecification(n_mis).items()}
    t2 = time.perf_counter()
    record = {"sbc": {**sbc, "seconds": t1 - t0, "n_species": 30, "seed": 1},
              "misspecification": {**mis, "seconds": t2 - t1, "n_species": 30, "seed": 2},
              "machine": platform.platform()}
    out.write_text(json.dumps(record, indent=2, sort_keys=True) + "\n", encoding="utf-8")
    print(f"SBC, {n_sbc} replicates, {t1 - t0:.0f} s")
    for p, c in sbc["coverage_90"].items():
        print(f"  {p:16s} coverage {c:.3f} (SE {sbc['coverage_binomial_se']:.3f}) ranks "
              f"{sbc['rank_histogram_5_bins'][p]} chi2 p {sbc['rank_uniformity_chi2_p'][p]:.3f}")
    print(f"  divergences {sbc['divergences_total']}")
    print(f"tree left out, {n_mis} replicates, {t2 - t1:.0f} s")
    for k, s in mis.items():
        print(f"  {k:13s} exponent coverage {s['coverage_90']['exponent']:.3f} "
              f"(SE {s['coverage_binomial_se']:.3f}), median 90% width "
              f"{s['median_interval_width']['exponent']:.3f}, divergences "
              f"{s['divergences_total']}")
    print(f"wrote {out}")


if __name__ == "__main__":
    main()
