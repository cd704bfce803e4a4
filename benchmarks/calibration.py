"""SBC and coverage study of the taxa + errors + curvature model (prints a table, writes JSON).

    .venv/bin/python benchmarks/calibration.py --replicates 100 --out benchmarks/calibration.json

Each replicate draws all parameters from the prior, simulates a small dataset (4 genera x 8
species, errors in size and trait) and fits it (Talts et al. 2018, arXiv:1804.06788). The ranks
of exponent, curvature, exponent SD and sigma should be uniform (chi-square p-values not small),
and 90% intervals of the taxon exponents should cover the truth 85-95% of the time.
"""

from __future__ import annotations

import argparse
import json
import logging
import time
from pathlib import Path

from allolaw.spec import parse_spec
from allolaw.testing import simulate_law
from allolaw.testing.calibration import run_calibration

# Priors fixed numbers (no data-dependent centring), narrow enough that prior datasets look
# like scaling data; SBC is valid for any proper prior.
SBC_SPEC = {
    "taxa": {"levels": "all", "vary": ["intercept", "exponent"], "parameterisation": "auto"},
    "size_error": "known",
    "trait_error": "known",
    "curvature": "shared",
    "priors": {
        "intercept": {"mean": 0.0, "sd": 1.0},
        "exponent": {"mean": 0.75, "sd": 0.2},
        "curvature": {"mean": 0.0, "sd": 0.1},
        "sigma": {"sd": 0.3},
        "intercept_sd": {"sd": 0.5},
        "exponent_sd": {"sd": 0.1},
        "size_population": {"mean": 0.0, "sd": 0.5, "sd_scale": 1.5},
    },
}
PARAMETERS = ["exponent", "curvature", "exponent_sd__genus", "sigma"]


def template_table(seed: int = 1):
    """The design shared by every replicate: 4 genera x 8 species, error SDs 0.1 (given)."""
    return simulate_law(seed=seed, taxa=(4,), level_names=("genus",), species_per_taxon=8,
                        size_error_sd=0.1, trait_error_sd=0.1)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--replicates", type=int, default=100)
    parser.add_argument("--seed", type=int, default=20261202)
    parser.add_argument("--draws", type=int, default=500)
    parser.add_argument("--tune", type=int, default=700)
    parser.add_argument("--out", default="benchmarks/calibration.json")
    args = parser.parse_args()
    logging.basicConfig(level=logging.INFO, format="%(asctime)s %(message)s")
    sim = template_table()
    spec = parse_spec(SBC_SPEC, name="sbc_taxa_errors_curved")
    start = time.perf_counter()
    result = run_calibration(
        sim.data, spec, levels=sim.levels, log_reference_size=0.0, parameters=PARAMETERS,
        coverage_of="taxon_exponent__genus", replicates=args.replicates, seed=args.seed,
        sampler={"draws": args.draws, "tune": args.tune, "target_accept": 0.95},
    )
    seconds = time.perf_counter() - start
    print(f"SBC: {args.replicates} replicates, {result.n_draws} thinned draws, "
          f"{result.bins} bins, {seconds:.0f} s")
    print(f"{'parameter':<22}{'chi2':>8}{'df':>5}{'p':>8}  histogram")
    for name, test in result.uniformity.items():
        hist = result.to_dict()["histograms"][name]
        print(f"{name:<22}{test['chi2']:>8.2f}{test['df']:>5.0f}{test['p_value']:>8.3f}  {hist}")
    for name, value in result.coverage.items():
        if name != "intervals":
            print(f"coverage of 90% intervals, {name}: {value:.3f} "
                  f"({result.coverage['intervals']:.0f} intervals; target 0.85-0.95)")
    print(f"replicates with divergences: {sum(d > 0 for d in result.divergences)}; "
          f"max R-hat over replicates: {max(result.max_rhat):.3f}")
    out = result.to_dict() | {"replicates": args.replicates, "seed": args.seed,
                              "seconds": seconds, "spec": spec.to_dict()}
    Path(args.out).write_text(json.dumps(out, indent=2, sort_keys=True) + "\n", encoding="utf-8")
    print(f"wrote {args.out}")


if __name__ == "__main__":
    main()
