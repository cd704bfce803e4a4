"""The compare stage: every output written, what does not apply said, the page in one process."""

import json

import pandas as pd

from allolaw import paths
from allolaw.answers.dataset import compare_dataset
from allolaw.config import validate_config
from allolaw.testing.posteriors import line_posterior


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
    assert comp.set_index("model").loc["never_fitted", "loo_caution"] == "no fit"
    assert comp["place"].iloc[1] == 2  # written as an integer, not 2.0
    assert ",2,"  in paths.comparison_path(results, "toy").read_text().splitlines()[2]
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
