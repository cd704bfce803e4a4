"""A hand-built results folder following the data contracts of DEVELOPERS.md (report tests).

Every file (clean.csv, ledger.csv, prepared.json, posterior.nc, checks/<m>.json, hypotheses.csv,
comparison.csv, curvature_audit.json, breakpoint.json, headline.json) is written with known
posterior draws; nothing here runs MCMC.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import arviz as az
import numpy as np
import pandas as pd
from scipy import stats

from allolaw.config import validate_config

REPO = Path(__file__).resolve().parents[1]
HOSTILE_SPECIES = "<script>alert(1)</script>"
HOSTILE_IMAGE = "<img src=x onerror=window.__allolaw_xss=1>"
HOSTILE_TAXON = "Rock & \"Roll\" 'n'"
PRIMARY = "taxa_errors"
CURVED = "taxa_errors_curved"
BREAK = "breakpoint"
TRUE_EXPONENT = 0.75


# --- fixture: a results folder following the contracts --------------------------------------
def build_results(root: Path, *, seed: int = 3) -> dict:
    """Write a complete results folder for one dataset ``demo`` under ``root``; return config."""
    rng = np.random.default_rng(seed)
    config = validate_config(
        {
            "results_dir": str(root / "results"),
            "reports_dir": str(root / "reports"),
            "models_dir": str(REPO / "models"),
            "sampler": {"chains": 2, "draws": 300, "warmup": 300, "seed": 11},
            "datasets": {
                "demo": {
                    "title": "Invented test dataset & <b>bold</b> title",
                    "size": {"quantity": "mass", "unit": "g", "label": "body mass"},
                    "trait": {"quantity": "power", "unit": "W", "label": "metabolic rate"},
                    "reference_size": 100,
                    "sources": [{
                        "file": "data/test/demo.csv",
                        "columns": {"species": "species", "size": "mass", "trait": "rate",
                                    "levels": ["order", "family"]},
                        "units": {"size": "g", "trait": "W"},
                    }],
                    "models": [PRIMARY, CURVED, BREAK],
                    "primary_model": PRIMARY,
                }
            },
        }
    )
    res = Path(config["results_dir"]) / "demo"
    res.mkdir(parents=True)
    orders = {HOSTILE_TAXON: ["Fam A", "Fam B"], "Plainorder": ["Fam C", "Fam D"]}
    rows = []
    k = 0
    for order, fams in orders.items():
        for fam in fams:
            for _ in range(6):
                name = {0: HOSTILE_SPECIES, 1: HOSTILE_IMAGE}.get(k, f"Species {k:02d}")
                x = rng.uniform(math.log(1.0), math.log(1e4))
                y = -3.0 + TRUE_EXPONENT * (x - math.log(100)) + rng.normal(0, 0.2)
                rows.append({"species": name, "order": order, "family": fam, "log_size": x,
                             "log_trait": y, "n_rows": 1})
                k += 1
    clean = pd.DataFrame(rows)
    for col in ("within_sd_log_size", "within_sd_log_trait"):
        clean[col] = np.nan
    clean["sd_log_size"] = 0.05
    clean["sd_log_trait"] = 0.05
    clean["sd_source_size"] = "pooled"
    clean["sd_source_trait"] = "pooled"
    clean["source"] = "team A"
    clean["flag_outlier"] = False
    clean.loc[3, "flag_outlier"] = True
    clean["flag_singleton_taxon"] = False
    clean.to_csv(res / "clean.csv", index=False)

    ledger = [
        {"file": "data/test/demo.csv", "line": i + 2, "species": r["species"], "fate": "kept",
         "merged_into": "", "reason": ""}
        for i, r in enumerate(rows)
    ]
    ledger.append({"file": "data/test/demo.csv", "line": 26, "species": "Species 02",
                   "fate": "merged", "merged_into": "Species 02",
                   "reason": "replicate merged into the species mean"})
    ledger.append({"file": "data/test/demo.csv", "line": 27, "species": "Ghost sp.",
                   "fate": "dropped", "merged_into": "",
                   "reason": "missing value in column 'mass' (cell 'NA')"})
    ledger.append({"file": "data/test/demo.csv", "line": 28, "species": "Negative sp.",
                   "fate": "dropped", "merged_into": "",
                   "reason": "non-positive value in column 'rate': -1"})
    pd.DataFrame(ledger).to_csv(res / "ledger.csv", index=False)

    prepared = {
        "dataset": "demo",
        "canonical_units": {"size": "g", "trait": "W", "covariates": {}},
        "reference_size": 100.0,
        "log_reference_size": math.log(100.0),
        "reference_size_rule": "config",
        "levels": ["order", "family"],
        "sources": [{"file": "data/test/demo.csv", "label": "team A", "sha256": "ab" * 32,
                     "rows": len(ledger)}],
        "conversions": [{"file": "data/test/demo.csv", "column": "rate", "from": "mW",
                         "to": "W", "factor": 0.001, "rows": 5}],
        "counts": {"input": len(ledger), "kept": len(rows), "merged": 1, "dropped": 2,
                   "species": len(rows)},
        "outliers": {"robust_z": 5.0, "removed": False,
                     "rows": [{"file": "data/test/demo.csv", "line": 5,
                               "species": rows[3]["species"], "note": "robust z 5.3 in trait"}],
                     "species": [rows[3]["species"]]},
        "singleton_taxa": {"order": [], "family": []},
    }
    (res / "prepared.json").write_text(json.dumps(prepared), encoding="utf-8")

    clean_species = clean["species"].tolist()
    for model in (PRIMARY, CURVED, BREAK):
        idata = fake_fit(clean, model, rng)
        out = res / model / "posterior.nc"
        out.parent.mkdir(parents=True)
        idata.to_netcdf(str(out))

    checks = res / "checks"
    checks.mkdir()
    (checks / f"{PRIMARY}.json").write_text(json.dumps(check_payload(PRIMARY, "pass", rng)))
    (checks / f"{CURVED}.json").write_text(json.dumps(check_payload(CURVED, "fail", rng)))
    # no check file for the breakpoint model: the page must say so

    hyp = []
    probs = {"surface law": (0.6667, 0.08), "metabolic law": (0.75, 0.61),
             "isometry": (1.0, 0.001)}
    for name, (value, p) in probs.items():
        hyp.append(_hyp_row(PRIMARY, "", "", name, value, "point", p))
    hyp.append(_hyp_row(PRIMARY, "", "", "other", float("nan"), "other", 0.309))
    hyp.append(_hyp_row(PRIMARY, "", "", "sub-linear", 1.0, "bound", 0.9987))
    hyp.append(_hyp_row(PRIMARY, "order", HOSTILE_TAXON, "metabolic law", 0.75, "point", 0.4))
    hyp.append(_hyp_row(CURVED, "", "", "metabolic law", 0.75, "point", 0.7123))
    pd.DataFrame(hyp).to_csv(res / "hypotheses.csv", index=False)
    comp = pd.DataFrame([
        {"dataset": "demo", "model": PRIMARY, "place": 1, "elpd_loo": -12.345,
         "elpd_loo_se": 3.21, "elpd_gap_to_best": 0.0, "elpd_gap_se": 0.0, "p_loo": 6.78,
         "stacking_weight": 0.83, "n_high_pareto_k": 0, "loo_caution": False},
        {"dataset": "demo", "model": CURVED, "place": 2, "elpd_loo": -13.9,
         "elpd_loo_se": 3.4, "elpd_gap_to_best": 1.555, "elpd_gap_se": 0.91, "p_loo": 7.9,
         "stacking_weight": 0.17, "n_high_pareto_k": 1, "loo_caution": True},
    ])
    comp.to_csv(res / "comparison.csv", index=False)
    # Layouts as allolaw.answers writes them (audit_curvature, summarise_breakpoint).
    (res / "curvature_audit.json").write_text(json.dumps({
        "applicable": True,
        "models": {"linear": PRIMARY, "curved": CURVED},
        "share_explained_by_curvature": {"by_level": {"order": 0.04, "family": 0.02},
                                         "all_levels": 0.031},
        "curvature": {"mean": 0.021, "sd": 0.005, "median": 0.021, "q05": 0.012,
                      "q95": 0.029},
        "p_curvature_positive": 0.999,
        "loo_differences": [{"model_a": CURVED, "model_b": PRIMARY, "elpd_difference": -1.555,
                             "elpd_difference_se": 0.91, "better": PRIMARY}],
        "check_verdicts": {"linear": "pass", "curved": "fail"},
        # as allolaw.answers.verdicts.curvature_block writes it (numbers invented)
        "four_way_verdict": "no between-taxon differences to explain",
        "verdict": "No between-taxon differences to explain: P(SD of taxon exponents > 0.05) "
                   "= 0.31 (prior 0.84; posterior SD of that SD 0.42 of its prior's).",
        "evidence": {"level": "family", "n_taxa": 4, "sd_small": 0.05, "sd_contraction": 0.42,
                     "p_spread": 0.31, "prior_p_spread": 0.84, "p_spread_after_curve": 0.29,
                     "share": {"q05": -0.8, "median": 0.05, "q95": 0.7},
                     "trend": {"q05": -0.02, "median": 0.004, "q95": 0.03},
                     "twice_curvature": {"q05": 0.024, "median": 0.042, "q95": 0.058},
                     "trend_minus_2c": {"q05": -0.07, "median": -0.038, "q95": 0.0},
                     "within_size_share": 0.88, "loo_taxa_over_curve": None},
        "local_exponent": {CURVED: {"size_unit": "g", "grid": [{"size": 1.0, "median": 0.55}],
                                    "crossings": [{"name": "metabolic law", "value": 0.75,
                                                   "median_curve_crossing_size": 101.2,
                                                   "crossing_size_median": 99.0,
                                                   "crossing_size_q05": 40.0,
                                                   "crossing_size_q95": 260.0,
                                                   "p_crossing_within_observed_range": 0.97}]}},
    }))
    summ = {"mean": 0.75, "sd": 0.03, "median": 0.751, "q05": 0.696, "q95": 0.801}
    (res / "breakpoint.json").write_text(json.dumps({
        "applicable": True,
        "models": {BREAK: {
            "applicable": True,
            "break_size": {"unit": "g", "median": 298.4, "q05": 191.7, "q95": 505.2,
                           "mean_log": 5.7},
            "exponent_below": summ,
            "exponent_above": {**summ, "median": 0.901, "q05": 0.813, "q95": 0.981},
            "difference": {**summ, "median": 0.15},
            "delta": 0.03, "p_abs_difference_above_delta": 0.993, "p_exponent_increases": 0.99,
            "check_verdict": "not checked",
            # as allolaw.answers.verdicts.break_block writes it (numbers invented)
            "prior_p_exponent_increases": 0.5, "matched_model": BREAK + "__no_break",
            "matched_check_verdict": "pass",
            "evidence": {"bf_break": 2.4, "log_bf_break": 0.875, "prior_prob_break": 0.5,
                         "posterior_prob_break": 0.706, "delta": 0.03,
                         "prior_p_abs_difference_above_delta": 0.983,
                         "p_abs_difference_above_delta": 0.993},
            "loo_against_matched": {"elpd_diff": 1.2, "se": 1.5, "n_bad_k_with": 0,
                                    "n_bad_k_without": 0},
            "verdict": "not supported", "bayes_says": "undecided", "loo_says": "small gain",
            "sentence": "The break is not supported: the Bayes factor does not favour it and "
                        "LOO shows no clear gain from it. Bayes factor 2.4 for a change of "
                        "exponent at the break (posterior probability 0.71 from a prior "
                        "0.50); LOO gain of the break model 1.2 ± 1.5 elpd.",
        }},
    }))
    # as allolaw.answers.verdicts.headline_block writes it (numbers invented)
    (res / "headline.json").write_text(json.dumps({
        "applicable": True, "stacking_weights": {PRIMARY: 0.83, CURVED: 0.17, BREAK: 0.0},
        "averaged_exponent": {"mean": 0.741, "weighted_mean": 0.742, "q05": 0.70,
                              "median": 0.740, "q95": 0.78},
        "primary_exponent": {"model": PRIMARY, "mean": 0.745, "q05": 0.71, "median": 0.744,
                             "q95": 0.78},
        "disagree": True, "reasons": ["the most probable value differs"],
        "sentence": "The headline model and the average over models disagree: the most "
                    "probable value differs.",
        "sensitivity": {
            PRIMARY: {"top": "metabolic law", "base_probs": {"metabolic law": 0.61},
                      "ranges": {"metabolic law": [0.35, 0.66]}, "changes": True,
                      "reasons": ["likelihood α=0.5: P(metabolic law) moves from 0.61 to "
                                  "0.35"],
                      "unreliable": [], "sentence": "The answer depends on the prior or the "
                      "data weighting: metabolic law is most probable (0.61), but likelihood "
                      "α=0.5: P(metabolic law) moves from 0.61 to 0.35."},
            CURVED: {"applicable": False, "reason": "power-scaling failed: test"},
        },
    }))
    assert len(clean_species) == 24
    return config


def fake_fit(clean: pd.DataFrame, model: str, rng: np.random.Generator) -> az.InferenceData:
    """Known-truth InferenceData with the contract's variable names, dims and attributes."""
    chains, draws = 2, 200
    n = len(clean)
    orders = sorted(clean["order"].unique())
    families = sorted(clean["family"].unique())
    shape = (chains, draws)
    post = {
        "intercept": rng.normal(-3.0, 0.05, shape),
        "exponent": rng.normal(TRUE_EXPONENT, 0.03, shape),
        "sigma": np.abs(rng.normal(0.2, 0.02, shape)),
        "exponent_sd__order": np.abs(rng.normal(0.1, 0.02, shape)),
        "taxon_exponent__order": rng.normal(TRUE_EXPONENT, 0.05, (*shape, len(orders))),
        "taxon_intercept__order": rng.normal(-3.0, 0.1, (*shape, len(orders))),
        "taxon_exponent__family": rng.normal(TRUE_EXPONENT, 0.06, (*shape, len(families))),
        "taxon_intercept__family": rng.normal(-3.0, 0.1, (*shape, len(families))),
    }
    constant = {"log_size_obs": clean["log_size"].to_numpy(),
                "log_size_ref": np.array(math.log(100.0))}
    if model == CURVED:
        post["curvature"] = rng.normal(0.02, 0.005, shape)
    if model == BREAK:
        post["break_log_size"] = rng.normal(math.log(300.0), 0.3, shape)
        post["exponent_above"] = rng.normal(0.9, 0.05, shape)
        constant["hinge_width"] = np.array(0.1)
        for key in list(post):
            if key.startswith("taxon_exponent") or key == "exponent_sd__order":
                del post[key]
    mu = clean["log_trait"].to_numpy()
    dims = {"taxon_exponent__order": ["order"], "taxon_intercept__order": ["order"],
            "taxon_exponent__family": ["family"], "taxon_intercept__family": ["family"],
            "trait": ["species"], "log_size_obs": ["species"]}
    spec = {
        "name": model, "description": "test spec",
        "taxa": {"levels": "all", "vary": ["intercept", "exponent"], "parameterisation": "auto"},
        "size_error": "replicates", "trait_error": "replicates",
        "curvature": "shared" if model == CURVED else "none",
        "breakpoint": "one" if model == BREAK else "none",
    }
    attrs = {
        "allolaw_version": "0.1.0", "dataset": "demo", "model": model,
        "spec": json.dumps(spec), "backend": "pymc", "seed": 1234,
        "sampler": json.dumps({"chains": 2, "draws": 200, "warmup": 200,
                               "target_acceptance": 0.9}),
        "data_sha256": "cd" * 32, "versions": json.dumps({"pymc": "5.28.5"}),
        "log_reference_size": math.log(100.0), "refit": "false", "wall_seconds": 1.5,
    }
    idata = az.from_dict(
        posterior=post,
        posterior_predictive={"trait": rng.normal(mu, 0.2, (*shape, n))},
        log_likelihood={"trait": stats.norm.logpdf(mu, mu, 0.2)[None, None, :]
                        + np.zeros((*shape, n))},
        observed_data={"trait": mu},
        constant_data=constant,
        coords={"species": clean["species"].tolist(), "order": orders, "family": families},
        dims=dims,
        attrs=attrs,
    )
    # Like a real numpyro-backed fit, scalar constants carry a length-1 dim
    # (``log_size_ref_dim_0``); the report must read them either way.
    assert idata.constant_data["log_size_ref"].shape == (1,)
    return idata


def check_payload(model: str, verdict: str, rng: np.random.Generator) -> dict:
    rhat = 1.004 if verdict == "pass" else 1.083
    grid = np.linspace(-7, 1, 30)
    dens = stats.norm.pdf(grid, -3, 1.5)
    pit = rng.uniform(size=24)
    counts, edges = np.histogram(pit, bins=10, range=(0, 1))
    return {
        "dataset": "demo", "model": model, "verdict": verdict,
        "diagnostics": [
            {"name": "r_hat", "value": rhat, "threshold": 1.01,
             "status": "pass" if verdict == "pass" else "fail",
             "message": f"worst R-hat {rhat} (exponent)"},
            {"name": "ess_bulk", "value": 812.0, "threshold": 400, "status": "pass",
             "message": "ok"},
            {"name": "divergences", "value": 0, "threshold": 0, "status": "pass",
             "message": "none"},
        ],
        "findings": ([] if verdict == "pass"
                     else ["R-hat of exponent is 1.083: the chains disagree."]),
        "refit": None,
        "ppc": {
            "loo_pit": {"values": pit.tolist(),
                        "histogram": {"edges": edges.tolist(), "counts": counts.tolist()},
                        "ks_distance": 0.12, "ks_pvalue": 0.8, "share_outside_05_95": 0.08},
            "test_statistics": [{"statistic": "sd", "observed": 1.9, "q05": 1.6, "q50": 1.9,
                                 "q95": 2.2, "p_value": 0.48}],
            "density_overlay": {"grid": grid.tolist(), "observed": dens.tolist(),
                                "predictive_q05": (0.8 * dens).tolist(),
                                "predictive_q50": dens.tolist(),
                                "predictive_q95": (1.2 * dens).tolist(), "n_draws": 100},
            "prior_predictive": {"quantiles": {"q05": -9, "q50": -3, "q95": 3},
                                 "observed_min": -6, "observed_max": 0,
                                 "share_within_observed_range": 0.41,
                                 "share_beyond_10_log_units": 0.01},
        },
    }


def _hyp_row(model, level, taxon, hypothesis, value, kind, prob):
    return {"dataset": "demo", "model": model, "parameter": "exponent", "level": level,
            "taxon": taxon, "hypothesis": hypothesis, "value": value, "kind": kind,
            "prior_weight": 1.0, "log_bf": math.log(prob / (1 - prob)) if kind == "point"
            else float("nan"), "posterior_prob": prob, "interval_prob": min(prob + 0.05, 1.0),
            "nearest_prob": prob, "posterior_prob_prior_half": prob * 0.9,
            "posterior_prob_prior_double": prob * 1.05, "conclusion_changes": False,
            "method": "Savage-Dickey (normal prior, KDE posterior density)"}
