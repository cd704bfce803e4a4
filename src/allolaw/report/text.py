"""The page's sentences: headline answer, methods paragraph and footer (versions, run times).
"""

from __future__ import annotations

import math
import platform
from importlib import metadata
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from allolaw import __version__
from allolaw.config import config_sha256, dataset_config
from allolaw.report.benchmarks import read_benchmarks
from allolaw.report.formatting import as_float, fmt

_PACKAGES = ("pymc", "pytensor", "arviz", "numpy", "scipy", "pandas", "xarray", "numpyro",
             "jax", "nutpie", "pint", "jinja2", "matplotlib", "snakemake")
_REFERENCES = {
    "savage_dickey": (
        "Dickey, J. M. (1971). The weighted likelihood ratio, linear hypotheses on normal "
        "location parameters. Annals of Mathematical Statistics 42:204–223."
    ),
    "wagenmakers": (
        "Wagenmakers, E.-J., Lodewyckx, T., Kuriyal, H., Grasman, R. (2010). Bayesian "
        "hypothesis testing for psychologists: a tutorial on the Savage–Dickey method. "
        "Cognitive Psychology 60:158–189."
    ),
    "loo": (
        "Vehtari, A., Gelman, A., Gabry, J. (2017). Practical Bayesian model evaluation using "
        "leave-one-out cross-validation and WAIC. Statistics and Computing 27:1413–1432."
    ),
    "rhat": (
        "Vehtari, A., Gelman, A., Simpson, D., Carpenter, B., Bürkner, P.-C. (2021). "
        "Rank-normalization, folding, and localization: an improved R-hat for assessing "
        "convergence of MCMC. Bayesian Analysis 16:667–718."
    ),
    "stacking": (
        "Yao, Y., Vehtari, A., Simpson, D., Gelman, A. (2018). Using stacking to average "
        "Bayesian predictive distributions. Bayesian Analysis 13:917–1007."
    ),
    "sbc": (
        "Talts, S., Betancourt, M., Simpson, D., Vehtari, A., Gelman, A. (2018). Validating "
        "Bayesian inference algorithms with simulation-based calibration. arXiv:1804.06788."
    ),
    "nuts": (
        "Hoffman, M. D., Gelman, A. (2014). The No-U-Turn sampler. Journal of Machine Learning "
        "Research 15:1593–1623."
    ),
    "pit": (
        "Gabry, J., Simpson, D., Vehtari, A., Betancourt, M., Gelman, A. (2019). "
        "Visualization in Bayesian workflow. JRSS A 182:389–402."
    ),
    "okabe": (
        "Okabe, M., Ito, K. (2008). Color Universal Design (CUD): how to make figures and "
        "presentations that are friendly to colorblind people."
    ),
}


def headline(
    primary: str,
    idata: Any,
    hyp: pd.DataFrame | None,
    curvature: dict[str, Any] | None,
    breakpoint: dict[str, Any] | None,
    models: list[dict[str, Any]],
    units: dict[str, Any],
    *,
    delta: float | None = None,
    average: dict[str, Any] | None = None,
) -> dict[str, Any]:
    out: dict[str, Any] = {"primary": primary}
    sentences = []
    if idata is not None and "exponent" in idata.posterior:
        draws = np.asarray(idata.posterior["exponent"].values, dtype=float).reshape(-1)
        q05, q50, q95 = (float(v) for v in np.quantile(draws, [0.05, 0.5, 0.95]))
        out["exponent"] = {"q05": q05, "q50": q50, "q95": q95, "above": None,
                           "curved": "curvature" in idata.posterior}
        if "exponent_above" in idata.posterior:
            above = np.asarray(idata.posterior["exponent_above"].values, dtype=float).ravel()
            out["exponent"]["above"] = [float(v) for v in np.quantile(above, [0.05, 0.5, 0.95])]
        ref = units.get("reference_size")
        at = f" at {fmt(ref)} {units['size_display']}" if ref else ""
        below = " (below the break)" if out["exponent"]["above"] else ""
        sentences.append(
            f"The population exponent{at}{below} is {q50:.3f} (90% interval {q05:.3f} to "
            f"{q95:.3f})."
        )
    else:
        out["exponent"] = None
        sentences.append(f"No fit of the primary model '{primary}' is available.")
    out["named"] = _named(hyp, primary)
    if out["named"] is not None:
        sentences.append(out["named"]["sentence"])
    out["average"] = average
    if average is not None and average.get("sentence"):
        sentences.append(str(average["sentence"]))
    out["delta"] = delta
    out["curvature"] = curvature
    out["breakpoint"] = breakpoint
    out["failed"] = [m["name"] for m in models if m["verdict"] == "fail"]
    out["warned"] = [m["name"] for m in models if m["verdict"] == "warn"]
    out["unchecked"] = [m["name"] for m in models if m["verdict"] == "missing"]
    if out["failed"]:
        sentences.append("Failed checks: " + ", ".join(out["failed"]) + ".")
    out["sentence"] = " ".join(sentences)
    return out


#: What a point-hypothesis probability means, said once beside those probabilities.
POINT_MEANING = (
    "A point-hypothesis probability is the posterior probability that the exponent is exactly "
    "that value rather than free (\u201canother value\u201d), given the prior weights of the "
    "named values and the prior of the free exponent; it depends on that prior, and says which "
    "value the data favour, not that the exponent equals it."
)


def _named(hyp: pd.DataFrame | None, primary: str) -> dict[str, Any] | None:
    """Interval probabilities first, then the point-hypothesis probabilities with priors."""
    if hyp is None or hyp.empty:
        return None
    pop = hyp[(hyp["model"] == primary) & (hyp["parameter"] == "exponent")
              & (hyp["taxon"].fillna("").astype(str) == "")]
    points = pop[pop["kind"] == "point"]
    if points.empty:
        return None
    best = points.loc[points["posterior_prob"].astype(float).idxmax()]
    other = pop[pop["kind"] == "other"]
    weights = pd.concat([points, other])["prior_weight"].astype(float) \
        if "prior_weight" in pop.columns else None
    total = float(weights.sum()) if weights is not None else math.nan
    rows = [{"hypothesis": str(r["hypothesis"]),
             "value": as_float(r["value"]),
             "interval_prob": as_float(r.get("interval_prob")),
             "posterior_prob": float(r["posterior_prob"]),
             "prior_prob": (float(r["prior_weight"]) / total
                            if weights is not None and total > 0 else None)}
            for _, r in pd.concat([points, other]).iterrows()]
    intervals = [r for r in rows if r["interval_prob"] is not None]
    top = max(intervals, key=lambda r: r["interval_prob"]) if intervals else None
    lead = (f"The exponent lies within ±δ of {top['hypothesis']} ({fmt(top['value'])}) with "
            f"probability {top['interval_prob']:.3f}" if top else "")
    sentence = (f"{lead}; the most probable named value is {best['hypothesis']} "
                f"({float(best['value']):g}), point-hypothesis probability "
                f"{float(best['posterior_prob']):.3f}.").lstrip("; ")
    return {"hypothesis": str(best["hypothesis"]), "value": float(best["value"]),
            "posterior_prob": float(best["posterior_prob"]),
            "interval_prob": as_float(best.get("interval_prob")),
            "other_prob": float(other["posterior_prob"].iloc[0]) if not other.empty else None,
            "interval_top": top, "rows": rows, "meaning": POINT_MEANING,
            "sentence": sentence[0].upper() + sentence[1:]}


def methods(
    config: dict[str, Any], dataset: str, models: list[dict[str, Any]], hyp: pd.DataFrame | None
) -> dict[str, Any]:
    sampler = next((m["sampler"] for m in models if m["sampler"]), None) or dict(
        config.get("sampler", {})
    )
    backends = sorted({str(m["backend"]) for m in models if m["backend"]})
    thresholds: dict[str, Any] = {}
    for m in models:
        for d in (m["check"] or {}).get("diagnostics", []):
            if d.get("threshold") is not None:
                thresholds.setdefault(d["name"], d["threshold"])
    methods_used = sorted(set(hyp["method"].dropna().astype(str))) if hyp is not None and (
        "method" in hyp.columns) else []
    hconf = dict(config.get("hypotheses", {}))
    hconf.update(dataset_config(config, dataset).get("hypotheses", {}))
    described = [(m["name"], m["description"]) for m in models if m["description"]]
    others = [
        (m["name"], str((m["spec"] or {}).get("description", "")).strip().rstrip(".")
         or "no description")
        for m in models
        if not m["primary"] and m["fitted"]
    ]
    sbc_run = any("sbc" in str(k).lower() for m in models for k in (m["check"] or {}))
    refs = ["nuts", "rhat", "loo", "pit", "savage_dickey", "wagenmakers", "stacking"]
    if sbc_run:
        refs.append("sbc")
    refs.append("okabe")
    return {
        "sampler": sampler,
        "backends": backends,
        "thresholds": thresholds,
        "hypothesis_methods": methods_used,
        "named": hconf.get("exponents", []),
        "delta": hconf.get("interval_halfwidth"),
        "scale_factors": hconf.get("prior_scale_factors", []),
        "described": described,
        "others": others,
        "sbc_run": sbc_run,
        "references": [_REFERENCES[r] for r in refs],
    }


def footer(
    config: dict[str, Any],
    dataset: str | None,
    models: list[dict[str, Any]],
    *,
    prepared: dict[str, Any] | None = None,
    logs_dir: str | Path = "logs",
) -> dict[str, Any]:
    versions = next((m["versions"] for m in models if m["versions"]), None)
    versions_source = "recorded in the fit" if versions else "installed when this page was made"
    if not versions:
        versions = {}
        for name in _PACKAGES:
            try:
                versions[name] = metadata.version(name)
            except metadata.PackageNotFoundError:
                continue
    seeds = [(m["name"], m["seed"]) for m in models if m["seed"] is not None]
    data_hashes = [(s["file"], s.get("sha256", "")) for s in (prepared or {}).get("sources", [])]
    fit_hashes = sorted({m["data_sha256"] for m in models if m["data_sha256"]})
    fit_seconds = [float(m["wall_seconds"]) for m in models if m["wall_seconds"] is not None]
    jobs = read_benchmarks(logs_dir)
    if dataset is not None and not jobs.empty:
        jobs = jobs[jobs["dataset"] == dataset]
    job_seconds = (len(jobs), float(jobs["s"].sum())) if dataset and not jobs.empty else None
    target = f"reports/{dataset}.html" if dataset else "reports/index.html"
    command = (
        f"snakemake --cores 2 {target}" if dataset else "snakemake --cores 2"
    )
    by_hand = (
        f"allolaw report --config config/config.yaml --dataset {dataset}"
        if dataset else "allolaw report --config config/config.yaml --index"
    )
    return {
        "version": __version__,
        "python": platform.python_version(),
        "versions": sorted(versions.items()),
        "versions_source": versions_source,
        "base_seed": config.get("sampler", {}).get("seed"),
        "seeds": seeds,
        "config_sha256": config_sha256(config),
        "data_hashes": data_hashes,
        "fit_hashes": fit_hashes,
        "fit_seconds": sum(fit_seconds) if fit_seconds else None,
        "job_seconds": job_seconds,
        "command": command,
        "by_hand": by_hand,
    }
