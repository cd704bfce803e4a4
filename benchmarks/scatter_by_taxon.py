"""Per-taxon residual-SD predictive checks of fitted models, side by side.

Reads ``results/<dataset>/checks/<model>.json`` (written by ``allolaw fit --check``) and prints
one markdown row per taxon with each model's posterior predictive p-value of that taxon's
residual SD (flagged below 0.01 or above 0.99, as in ``checks/predictive.py``), then each
model's R-hat, bulk ESS and divergences. Fit the models first, e.g.::

    PYTHONPATH=src .venv/bin/python -m allolaw fit --dataset island_metabolism \\
        --model taxa_errors_scatter --set sampler.chains=2 --check

Usage: ``benchmarks/scatter_by_taxon.py DATASET MODEL [MODEL ...] [--results results]``.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("dataset")
    parser.add_argument("models", nargs="+")
    parser.add_argument("--results", default="results")
    args = parser.parse_args(argv)
    checks = {m: json.loads((Path(args.results) / args.dataset / "checks" / f"{m}.json")
                            .read_text(encoding="utf-8")) for m in args.models}
    rows: dict[str, dict[str, float]] = {}
    for model, check in checks.items():
        for row in check["ppc"]["test_statistics"]:
            rows.setdefault(row["statistic"], {})[model] = row["p_value"]
    out = ["| statistic | " + " | ".join(args.models) + " |",
           "|---" * (len(args.models) + 1) + "|"]
    for stat, by_model in rows.items():
        cells = []
        for model in args.models:
            p = by_model.get(model)
            flag = " (flag)" if p is not None and (p < 0.01 or p > 0.99) else ""
            cells.append("–" if p is None else f"{p:.3f}{flag}")
        out.append(f"| {stat} | " + " | ".join(cells) + " |")
    for name in ("rhat", "ess_bulk", "divergences"):
        cells = []
        for model in args.models:
            found = [d for d in checks[model]["diagnostics"] if d["name"] == name]
            cells.append(f"{found[0]['value']:.3g} ({found[0]['status']})" if found else "–")
        out.append(f"| {name} | " + " | ".join(cells) + " |")
    sys.stdout.write("\n".join(out) + "\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
