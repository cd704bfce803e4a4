"""Model comparison, local exponent, breakpoint summary and the curvature audit."""

import json
import math

import arviz as az
import numpy as np
import pandas as pd
import pytest
from scipy import stats

from allolaw import paths
from allolaw.comparison import (
    STACKING_NOTE,
    audit_curvature,
    compare_dataset,
    compare_models,
    local_exponent,
    summarise_breakpoint,
)
from allolaw.config import validate_config
from allolaw.testing.posteriors import line_posterior


def test_loo_ranks_the_calibrated_model_above_a_too_narrow_one():
    fits = {"right": line_posterior(seed=1), "narrow": line_posterior(seed=1, spread_factor=0.4)}
    table = compare_models(fits, verdicts={"right": "pass"})
    assert table["model"].tolist() == ["right", "narrow"]
    assert table["elpd_diff"].iloc[1] > 0
    # stacking weights are a probability vector over models (Yao et al. 2018, BA 13:917)
    assert table["stacking_weight"].sum() == pytest.approx(1.0)
    assert (table["note"] == STACKING_NOTE).all()
    assert "not posterior model probabilities" in STACKING_NOTE
    assert table["check_verdict"].tolist() == ["pass", "not checked"]


def test_elpd_equals_the_sum_of_pointwise_psis_values_from_arviz():
    # reference library: ArviZ's own PSIS-LOO (Vehtari et al. 2017, Stat. Comput. 27:1413)
    idata = line_posterior(seed=2)
    table = compare_models({"m": idata})
    assert table["elpd_loo"].iloc[0] == pytest.approx(float(az.loo(idata).elpd_loo))


def test_high_pareto_k_is_counted_and_warned():
    table = compare_models({"clean": line_posterior(seed=3),
                            "outlier": line_posterior(seed=3, outlier_sd=12)})
    row = table.set_index("model").loc["outlier"]
    assert row["n_bad_k"] >= 1
    assert "Pareto k" in row["warning"]
    assert table.set_index("model").loc["clean", "n_bad_k"] == 0


def _curved_draws(b, c, ref, *, seed=0, n=4000, sd=0.01):
    rng = np.random.default_rng(seed)
    return az.from_dict(
        posterior={"exponent": rng.normal(b, sd, (2, n // 2)),
                   "curvature": rng.normal(c, sd / 10, (2, n // 2))},
        constant_data={"log_size_ref": np.array(ref), "log_size_obs": np.linspace(-3, 5, 30)},
    )


def test_local_exponent_crosses_named_values_where_the_closed_form_says():
    # b(x) = b + 2c(x − x_ref) crosses v at x = x_ref + (v − b)/(2c) (derivative of the
    # quadratic log–log law; Kolokotrones et al. 2010, Nature 464:753).
    b, c, ref = 0.75, 0.05, 1.0
    out = local_exponent(_curved_draws(b, c, ref), values={"iso": 1.0, "surface": 0.6667})
    by_name = {r["name"]: r for r in out["crossings"]}
    expected = math.exp(ref + (1.0 - b) / (2 * c))
    assert by_name["iso"]["median_curve_crossing_size"] == pytest.approx(expected, rel=0.02)
    assert by_name["iso"]["crossing_size_median"] == pytest.approx(expected, rel=0.02)
    assert by_name["surface"]["median_curve_crossing_size"] == pytest.approx(
        math.exp(ref + (0.6667 - b) / (2 * c)), rel=0.02)
    medians = [row["median"] for row in out["grid"]]
    assert np.all(np.diff(medians) > 0)  # c > 0: the local exponent rises with size


def test_local_exponent_reports_no_crossing_outside_the_size_range():
    out = local_exponent(_curved_draws(0.75, 0.001, 1.0), values={"iso": 1.0})
    row = out["crossings"][0]
    assert row["median_curve_crossing_size"] is None
    assert row["p_crossing_within_observed_range"] < 0.05


def test_breakpoint_summary_is_in_original_units_with_lognormal_quantiles():
    rng = np.random.default_rng(4)
    mu, sd = math.log(50.0), 0.1
    idata = az.from_dict(posterior={
        "break_log_size": rng.normal(mu, sd, (2, 5000)),
        "exponent": rng.normal(0.7, 0.02, (2, 5000)),
        "exponent_above": rng.normal(1.0, 0.02, (2, 5000)),
    })
    out = summarise_breakpoint(idata, delta=0.05, unit="um**3")
    # quantiles of a log-normal: exp(mu ± 1.645 sd) (closed form)
    assert out["break_size"]["median"] == pytest.approx(50.0, rel=0.01)
    assert out["break_size"]["q05"] == pytest.approx(math.exp(mu - 1.645 * sd), rel=0.01)
    assert out["break_size"]["unit"] == "um**3"
    assert out["difference"]["median"] == pytest.approx(0.3, abs=0.01)
    # difference ~ N(0.3, 0.02·√2): P(|d| > 0.05) = 1 to machine precision (closed form)
    assert out["p_abs_difference_above_delta"] == pytest.approx(
        stats.norm.sf(0.05, 0.3, 0.02 * math.sqrt(2)), abs=1e-3)


def _config(tmp_path, **extra):
    ds = {
        "sources": [{"file": "toy.csv", "columns": {"species": "sp", "size": "m", "trait": "r"}}],
        "size": {"quantity": "mass", "unit": "g"},
        "trait": {"quantity": "power", "unit": "W"},
        "models": ["pooled", "narrow", "never_fitted"],
    }
    ds.update(extra)
    return validate_config({"results_dir": str(tmp_path / "results"),
                            "datasets": {"toy": ds}})


def test_compare_dataset_writes_every_output_and_says_what_does_not_apply(tmp_path):
    config = _config(tmp_path)
    results = config["results_dir"]
    spec = {"name": "pooled", "residuals": "normal", "curvature": "none",
            "breakpoint": "none", "priors": {"exponent": {"mean": 1.0, "sd": 1.0}}}
    for name, factor in [("pooled", 1.0), ("narrow", 0.4)]:
        idata = line_posterior(seed=5, spread_factor=factor)
        idata.attrs["spec"] = json.dumps({**spec, "name": name})
        path = paths.posterior_path(results, "toy", name)
        path.parent.mkdir(parents=True, exist_ok=True)
        idata.to_netcdf(str(path))
    check = paths.check_path(results, "toy", "narrow")
    check.parent.mkdir(parents=True, exist_ok=True)
    check.write_text(json.dumps({"verdict": "fail"}))
    compare_dataset(config, "toy")

    comp = pd.read_csv(paths.comparison_path(results, "toy"))
    assert comp["model"].tolist() == ["pooled", "narrow", "never_fitted"]
    assert comp.set_index("model").loc["narrow", "check_verdict"] == "fail"
    assert comp.set_index("model").loc["never_fitted", "warning"] == "no fit"
    assert comp["rank"].iloc[1] == 1  # written as an integer, not 1.0
    assert ",1,"  in paths.comparison_path(results, "toy").read_text().splitlines()[2]
    hyp = pd.read_csv(paths.hypotheses_path(results, "toy"))
    assert set(hyp["model"]) == {"pooled", "narrow"}
    assert (hyp["dataset"] == "toy").all()
    assert set(hyp.loc[hyp["model"] == "narrow", "check_verdict"]) == {"fail"}
    audit = json.loads(paths.curvature_audit_path(results, "toy").read_text())
    assert audit["applicable"] is False
    assert "no taxon levels" in audit["reason"]
    brk = json.loads(paths.breakpoint_path(results, "toy").read_text())
    assert brk["applicable"] is False


def test_compare_with_report_writes_the_outputs_and_the_page_in_one_process(tmp_path,
                                                                          monkeypatch):
    # the workflow's compare job runs `allolaw compare --report`: the compare stage, then the
    # page from the files it just wrote
    import yaml

    from allolaw import runtime
    from allolaw.cli import main

    config = _config(tmp_path)
    results = config["results_dir"]
    for name, factor in [("pooled", 1.0), ("narrow", 0.4)]:
        idata = line_posterior(seed=5, spread_factor=factor)
        idata.attrs["spec"] = json.dumps({"name": name, "residuals": "normal",
                                          "curvature": "none", "breakpoint": "none",
                                          "priors": {"exponent": {"mean": 1.0, "sd": 1.0}}})
        path = paths.posterior_path(results, "toy", name)
        path.parent.mkdir(parents=True, exist_ok=True)
        idata.to_netcdf(str(path))
    config_file = tmp_path / "config.yaml"
    config_file.write_text(yaml.safe_dump({"results_dir": results,
                                           "reports_dir": str(tmp_path / "reports"),
                                           "datasets": config["datasets"]}))
    monkeypatch.setattr(runtime, "configure_job", lambda threads: {})  # keep this process's env
    assert main(["compare", "--config", str(config_file), "--dataset", "toy", "--report"]) == 0

    comp = pd.read_csv(paths.comparison_path(results, "toy"))
    html = (tmp_path / "reports" / "toy.html").read_text(encoding="utf-8")
    # the page's comparison table is the CSV just written, best model first
    table = html[html.index('id="table-comparison"'):]
    table = table[:table.index("</table>")]
    rows = [table.index(f'data-col="model">{m}<') for m in comp["model"]]
    assert len(rows) == 3
    assert rows == sorted(rows)


# --- curvature audit on simulated data with known truth (small real fits) ---------------------
# Four small hierarchical fits take 2–5 minutes on this shared machine, so they are marked slow
# (run with `pytest -m slow tests/test_comparison.py`).


def _simulate(curved: bool, seed: int) -> pd.DataFrame:
    """Taxa in different size ranges; either one curved law or straight laws per taxon."""
    rng = np.random.default_rng(seed)
    n_taxa, per_taxon = 6, 7
    rows = []
    for t in range(n_taxa):
        centre = -3.0 + 6.0 * t / (n_taxa - 1)  # taxa from small to large
        x = centre + rng.uniform(-0.6, 0.6, per_taxon)
        if curved:
            y = 1.0 + 0.75 * x + 0.08 * x**2  # local exponents from 0.27 to 1.23
        else:
            b_t = 0.75 + rng.normal(0.0, 0.2)  # own exponent, unrelated to size range
            y = 1.0 + 0.75 * centre + b_t * (x - centre)
        y = y + rng.normal(0.0, 0.1, per_taxon)
        for i in range(per_taxon):
            rows.append({"species": f"t{t}s{i}", "taxon": f"t{t}", "log_size": x[i],
                         "log_trait": y[i]})
    return pd.DataFrame(rows)


def _fit(data, curvature, seed):
    import warnings

    import pymc as pm

    from allolaw.modeling import build_model
    from allolaw.spec import parse_spec

    spec = parse_spec({"description": "audit test", "curvature": curvature,
                       "taxa": {"levels": "all", "vary": ["intercept", "exponent"]}},
                      name=f"audit_{curvature}")
    model = build_model(data, spec, levels=["taxon"], log_reference_size=0.0)
    with model, warnings.catch_warnings():
        # 2 short chains: PyMC warns that R-hat/ESS need more; these fits only feed a
        # recovery check with wide margins.
        warnings.simplefilter("ignore", UserWarning)
        warnings.simplefilter("ignore", RuntimeWarning)
        return pm.sample(draws=400, tune=400, chains=2, cores=1, random_seed=seed,
                         target_accept=0.95, progressbar=False,
                         idata_kwargs={"log_likelihood": True}, compute_convergence_checks=False)


@pytest.mark.slow
@pytest.mark.mcmc
def test_curvature_audit_attributes_taxon_spread_to_one_curved_law():
    # Known truth: one quadratic law, no taxon exponent differences; taxa see different
    # local slopes only because they sit at different sizes (Kolokotrones et al. 2010).
    data = _simulate(curved=True, seed=11)
    audit = audit_curvature(_fit(data, "none", 1), _fit(data, "shared", 2))
    print(audit["verdict"])
    assert audit["share_explained_by_curvature"]["all_levels"] > 0.5
    assert audit["p_curvature_positive"] > 0.95
    assert audit["verdict"].startswith("Most")


@pytest.mark.slow
@pytest.mark.mcmc
def test_curvature_audit_keeps_real_taxon_differences():
    # Known truth: straight laws with taxon exponents SD 0.2, no curvature.
    data = _simulate(curved=False, seed=12)
    audit = audit_curvature(_fit(data, "none", 3), _fit(data, "shared", 4))
    print(audit["verdict"])
    assert audit["share_explained_by_curvature"]["all_levels"] < 0.5
    assert not audit["verdict"].startswith("Most")
