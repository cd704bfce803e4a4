"""The compare stage's verdicts in its outputs: break evidence against the matched model without
the break, the model average, power-scaling ranges and the four-way curvature verdict.

Fits are exact conjugate posteriors or hand-built draws (no MCMC); data are invented.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from allolaw import paths
from allolaw.answers.curvature_verdict import audit_evidence, judge_curvature
from allolaw.answers.dataset import compare_dataset
from allolaw.answers.evidence import break_evidence, judge_break, loo_difference
from allolaw.answers.verdicts import curvature_block
from allolaw.config import validate_config
from allolaw.model.spec import load_spec, matched_no_break, models_to_fit
from allolaw.testing.posteriors import line_posterior
from test_answers_curvature_verdict import _fit as curvature_fit
from test_answers_evidence import PRIORS, SPEC, _conjugate_fit, _simulate

REPO = Path(__file__).resolve().parents[1]
NAMED = [{"name": "three-quarters", "value": 0.75}, {"name": "isometry", "value": 1.0}]


def _config(tmp_path, models, primary):
    ds = {"sources": [{"file": "toy.csv", "columns": {"species": "sp", "size": "m",
                                                      "trait": "r", "levels": ["group"]}}],
          "size": {"quantity": "mass", "unit": "g"}, "trait": {"quantity": "power", "unit": "W"},
          "models": models, "primary_model": primary, "hypotheses": {"exponents": NAMED}}
    return validate_config({"results_dir": str(tmp_path / "results"),
                            "models_dir": str(REPO / "models"), "datasets": {"toy": ds}})


def _write(config, model, idata, spec):
    idata.attrs["spec"] = json.dumps({**spec, "name": model})
    path = paths.posterior_path(config["results_dir"], "toy", model)
    path.parent.mkdir(parents=True, exist_ok=True)
    idata.to_netcdf(str(path))


def test_a_breakpoint_model_brings_its_matched_model_without_the_break():
    assert matched_no_break("breakpoint") == "breakpoint__no_break"
    assert models_to_fit(REPO / "models", ["pooled", "breakpoint"]) == [
        "pooled", "breakpoint", "breakpoint__no_break"]
    derived = load_spec(REPO / "models", "breakpoint__no_break")
    original = load_spec(REPO / "models", "breakpoint")
    assert derived.breakpoint == "none"
    assert derived.taxa == original.taxa  # same taxon terms: only the break differs
    assert derived.priors["exponent"] == original.priors["exponent"]


def test_breakpoint_json_holds_savage_dickey_and_loo_against_the_matched_fit(tmp_path):
    config = _config(tmp_path, ["breakpoint"], "breakpoint")
    x, y, g, brk, ref = _simulate(3, change=0.15, sigma=0.2)
    with_break = _conjugate_fit(x, y, g, brk, ref, sigma=0.2, with_break=True, seed=3)
    without = _conjugate_fit(x, y, g, brk, ref, sigma=0.2, with_break=False, seed=3)
    spec = {**SPEC, "curvature": "none", "breakpoint": "one"}
    _write(config, "breakpoint", with_break, spec)
    _write(config, "breakpoint__no_break", without, {**spec, "breakpoint": "none"})
    compare_dataset(config, "toy")

    out = json.loads(paths.breakpoint_path(config["results_dir"], "toy").read_text())
    m = out["models"]["breakpoint"]
    ev = break_evidence(with_break, SPEC, delta=0.03)
    loo = loo_difference(with_break, without)
    assert m["matched_model"] == "breakpoint__no_break"
    assert m["evidence"]["log_bf_break"] == pytest.approx(ev.log_bf_break)
    assert m["loo_against_matched"]["elpd_diff"] == pytest.approx(loo.elpd_diff)
    assert m["verdict"] == judge_break(ev, loo).verdict
    assert m["sentence"] == judge_break(ev, loo).sentence
    # every posterior probability beside its prior: difference ~ N(0, 2) a priori (closed form)
    assert m["evidence"]["prior_p_abs_difference_above_delta"] == pytest.approx(
        2 * stats.norm.cdf(-0.03 / math.sqrt(2)))
    assert m["evidence"]["prior_prob_break"] == 0.5
    assert m["prior_p_exponent_increases"] == pytest.approx(0.5)
    # the matched model is fitted and compared like any other
    comp = pd.read_csv(paths.comparison_path(config["results_dir"], "toy"))
    assert set(comp["model"]) == {"breakpoint", "breakpoint__no_break"}


def test_breakpoint_without_its_matched_fit_gives_no_verdict_and_says_why(tmp_path):
    config = _config(tmp_path, ["breakpoint"], "breakpoint")
    x, y, g, brk, ref = _simulate(4, change=0.1)
    _write(config, "breakpoint", _conjugate_fit(x, y, g, brk, ref, sigma=0.2, with_break=True,
                                                seed=4),
           {**SPEC, "curvature": "none", "breakpoint": "one"})
    compare_dataset(config, "toy")
    m = json.loads(paths.breakpoint_path(config["results_dir"], "toy").read_text())[
        "models"]["breakpoint"]
    assert m["verdict"] == "unclear"
    assert m["loo_against_matched"] is None
    assert "'breakpoint__no_break') has no fit" in m["sentence"]


def test_headline_json_averages_the_exponent_with_the_weights_of_comparison_csv(tmp_path):
    config = _config(tmp_path, ["pooled", "narrow"], "pooled")
    spec = {"residuals": "normal", "curvature": "none", "breakpoint": "none",
            "priors": {"exponent": {"mean": 1.0, "sd": 1.0}}}
    fits = {"pooled": line_posterior(seed=5), "narrow": line_posterior(seed=6,
                                                                       spread_factor=0.4)}
    for name, idata in fits.items():
        _write(config, name, idata, spec)
    compare_dataset(config, "toy")
    results = config["results_dir"]

    head = json.loads(paths.headline_path(results, "toy").read_text())
    comp = pd.read_csv(paths.comparison_path(results, "toy")).set_index("model")
    assert sum(head["stacking_weights"].values()) == pytest.approx(1.0)
    for model, w in head["stacking_weights"].items():
        assert comp.loc[model, "stacking_weight"] == pytest.approx(w, abs=1e-12)
    draws = fits["pooled"].posterior["exponent"].values.ravel()
    assert head["primary_exponent"]["mean"] == pytest.approx(draws.mean())
    avg = head["averaged_exponent"]
    assert avg["q05"] <= avg["median"] <= avg["q95"]
    assert isinstance(head["disagree"], bool)
    assert head["sentence"].startswith("The headline model")

    # power-scaling ranges in hypotheses.csv: each population probability lies in its range,
    # and the "changes" flag is the one in headline.json
    hyp = pd.read_csv(paths.hypotheses_path(results, "toy"), keep_default_na=False)
    pop = hyp[(hyp["taxon"] == "") & (hyp["kind"].isin(["point", "other"]))]
    assert len(pop) == 2 * 3
    for _, row in pop.iterrows():
        sens = head["sensitivity"][row["model"]]
        low, high = sens["ranges"][row["hypothesis"]]
        assert float(row["power_scaling_low"]) == pytest.approx(low)
        assert float(row["power_scaling_high"]) == pytest.approx(high)
        assert low <= sens["base_probs"][row["hypothesis"]] <= high
        assert str(row["power_scaling_changes"]) == str(sens["changes"])


def test_curvature_block_carries_the_four_way_verdict_and_its_numbers():
    # hand-built draws: taxa at sizes 0..7 whose exponents follow one curved law (c = −0.05)
    centres = np.arange(8.0)
    x = np.repeat(centres, 5) + np.tile(np.linspace(-0.2, 0.2, 5), 8)
    idx = np.repeat(np.arange(8), 5)
    sd = np.abs(np.random.default_rng(1).normal(0.25, 0.02, 2000))
    lin = curvature_fit(0.75 - 0.1 * (centres - 3.5), sd, None, x, idx, 1)
    cur = curvature_fit(np.full(8, 0.75), np.full(2000, 0.01), -0.05, x, idx, 2)
    lin.attrs["spec"] = json.dumps({"priors": {"exponent_sd": {"sd": 0.25}}})
    block = curvature_block(lin, cur)
    expected = judge_curvature(audit_evidence(lin, cur))
    assert block["verdict"] == expected.verdict
    assert block["sentence"] == expected.sentence
    ev = block["evidence"]
    assert ev["trend"]["median"] == pytest.approx(-0.1, abs=0.005)
    assert ev["twice_curvature"]["median"] == pytest.approx(-0.1, abs=0.005)
    assert ev["p_spread"] == 1.0
    assert ev["loo_taxa_over_curve"] is None
    assert set(PRIORS) >= {"exponent", "exponent_above"}
