"""The within/between part of a dataset's page (report/within.py), on a hand-built results folder.

The folder of ``report_results.build_results`` gets a primary fit with a within/between split
(known draws), the ``within_between`` block in headline.json and the ``within_exponent`` rows in
hypotheses.csv, laid out as ``allolaw.answers.within`` writes them; nothing runs MCMC.
"""

from __future__ import annotations

import json
import re
from pathlib import Path

import arviz as az
import numpy as np
import pandas as pd
import pytest

from allolaw.report import rendering
from allolaw.report.svg import Band
from allolaw.report.within import within_lines, within_section
from report_results import PRIMARY, build_results

WITHIN_SLOPE = 1.25


def _add_split(config: dict) -> Path:
    res = Path(config["results_dir"]) / "demo"
    path = res / PRIMARY / "posterior.nc"
    idata = az.from_netcdf(str(path)).load()
    rng = np.random.default_rng(5)
    shape = idata.posterior["exponent"].shape
    idata.posterior["within_exponent"] = (("chain", "draw"), rng.normal(WITHIN_SLOPE, 0.01,
                                                                        shape))
    path.unlink()
    idata.to_netcdf(str(path))
    head = json.loads((res / "headline.json").read_text())
    head["within_between"] = {"applicable": True, "models": {PRIMARY: {
        "interval": 0.9,
        "within": {"median": 1.25, "low": 1.234, "high": 1.266},
        "between": {"median": 0.75, "low": 0.70, "high": 0.80},
        "difference": {"median": 0.5, "low": 0.44, "high": 0.56},
        "p_within_steeper": 1.0,
        "verdict": "steeper",
        "within_probs": {"metabolic law": 0.01, "isometry": 0.2, "another value": 0.79},
        "between_probs": {"metabolic law": 0.61, "isometry": 0.001, "another value": 0.389},
        "check_verdict": "pass"}}}
    (res / "headline.json").write_text(json.dumps(head))
    return res


@pytest.fixture(scope="module")
def pages(tmp_path_factory):
    plain_root = tmp_path_factory.mktemp("plain")
    plain = rendering.render_dataset_report(build_results(plain_root), "demo").read_text()
    root = tmp_path_factory.mktemp("split")
    config = build_results(root)
    res = _add_split(config)
    split = rendering.render_dataset_report(config, "demo").read_text()
    return plain, split, pd.read_csv(res / "clean.csv")


def _scatter(html: str) -> str:
    return re.search(r'<figure id="fig-scatter">(.*?)</figure>', html, re.S).group(1)


def test_page_states_both_exponents_their_difference_and_its_probability(pages):
    _, split, _ = pages
    item = re.search(r'<li id="headline-within">(.*?)</li>', split, re.S).group(1)
    assert "exponent 1.250 (90% interval 1.234 to 1.266)" in item
    assert "between species (the law of species means) with exponent 0.750 (0.700 to" in item
    assert "steeper by 0.500" in item
    assert "90% interval 0.440 to 0.560" in item
    assert "steeper than the between-species exponent is 1.000" in item
    assert "within species another value (probability 0.790)" in item
    assert "between species metabolic law (probability 0.610)" in item
    assert '<table id="table-within"' in split
    lead = re.search(r'<p class="big" id="headline-exponent">(.*?)</p>', split, re.S).group(1)
    assert lead.startswith("Between-species exponent (species means)")


def test_within_table_has_the_verdict_of_each_model(pages):
    _, split, _ = pages
    table = re.search(r'<table id="table-within".*?</table>', split, re.S).group(0)
    assert "<th>verdict (within vs between)</th>" in table
    assert '<td class="within-verdict">steeper</td>' in table


def test_page_without_a_split_says_nothing_about_within_species(pages):
    plain, _, _ = pages
    assert "headline-within" not in plain
    assert "table-within" not in plain
    assert "between-species law" not in plain


def test_scatter_draws_one_within_line_per_group_with_the_within_slope(pages):
    plain, split, clean = pages
    extra = _scatter(split).count("<path") - _scatter(plain).count("<path")
    # the innermost level of the hand-built table is the family (4 families, 6 rows each)
    assert extra == clean["family"].nunique() == 4
    assert "between-species law (90% band)" in _scatter(split)
    assert "within-species lines" in _scatter(split)


def test_scatter_caption_says_points_are_individuals_when_rows_are_individuals(tmp_path):
    config = build_results(tmp_path)
    config["datasets"]["demo"]["rows_are"] = "individuals"
    html = rendering.render_dataset_report(config, "demo").read_text()
    assert "Points: individuals, coloured by order" in html


def test_within_line_has_the_median_within_slope_on_log_axes(pages):
    # the line of the first family runs through its mean log size and log trait with slope
    # WITHIN_SLOPE on log-log axes (the line's points, before they become SVG)
    _, _, clean = pages
    idata = az.from_dict(posterior={"within_exponent": np.full((1, 5), WITHIN_SLOPE)})
    taxa = clean["order"].astype(str).tolist()
    lines = within_lines(idata, clean, ["order", "family"], {t: "#000" for t in taxa}, taxa)
    assert len(lines) == 4
    first = clean[clean["family"] == sorted(clean["family"].unique())[0]]
    line: Band = lines[0]
    lx, ly = np.log(line.x), np.log(line.mid)
    assert (ly[1] - ly[0]) / (lx[1] - lx[0]) == pytest.approx(WITHIN_SLOPE)
    assert lx[0] == pytest.approx(first["log_size"].min())
    # through the mean point: the line at the mean log size is the mean log trait
    at_mean = ly[0] + WITHIN_SLOPE * (first["log_size"].mean() - lx[0])
    assert at_mean == pytest.approx(first["log_trait"].mean())


def _entry(low: float, median: float, high: float, verdict: str | None, p: float) -> dict:
    entry = {"interval": 0.9,
             "within": {"median": 0.77, "low": 0.70, "high": 0.84},
             "between": {"median": 0.75, "low": 0.70, "high": 0.80},
             "difference": {"median": median, "low": low, "high": high},
             "p_within_steeper": p, "within_probs": {"three quarters": 0.6},
             "between_probs": {"three quarters": 0.7}, "check_verdict": "pass"}
    if verdict is not None:
        entry["verdict"] = verdict
    return entry


def _answer(entry: dict) -> str:
    head = {"within_between": {"applicable": True, "models": {"m": entry}}}
    return within_section(head, "m")["answer"]


def test_sentence_says_no_difference_shown_when_the_interval_holds_zero():
    # A positive median with an interval across 0: the old wording said "steeper by 0.020".
    text = _answer(_entry(-0.06, 0.02, 0.10, "no difference shown", 0.64))
    assert "steeper by" not in text
    assert "shallower by" not in text
    assert "do not show the two exponents to differ" in text
    assert "difference within − between 0.020, 90% interval -0.060 to 0.100" in text
    assert "is steeper than the between-species exponent is 0.640" in text
    assert "within species three quarters (probability 0.600)" in text


def test_sentence_says_shallower_when_the_verdict_is_shallower():
    text = _answer(_entry(-0.30, -0.20, -0.10, "shallower", 0.001))
    assert "The within-species exponent is shallower by 0.200" in text
    assert "do not show" not in text


def test_sentence_without_a_recorded_verdict_states_no_direction():
    # headline.json written before the verdict existed: numbers, no direction claimed
    text = _answer(_entry(0.10, 0.20, 0.30, None, 1.0))
    assert "steeper by" not in text
    assert "No verdict on the difference was recorded" in text
    assert "90% interval 0.100 to 0.300" in text


def test_section_is_none_when_headline_says_not_applicable():
    head = {"within_between": {"applicable": False, "reason": "no split"}}
    assert within_section(head, "m") is None
    assert within_section(None, "m") is None


def test_contents_bar_links_the_within_section_only_when_there_is_one(pages):
    plain, split, _ = pages
    for html in (plain, split):
        nav = re.search(r'<nav class="toc">(.*?)</nav>', html, re.S).group(1)
        targets = re.findall(r'href="#([^"]+)"', nav)
        ids = set(re.findall(r'\bid="([^"]+)"', html))
        assert set(targets) <= ids  # every link of the contents bar lands on the page
    assert 'href="#within-paragraph"' in split
    assert 'href="#within-paragraph"' not in plain
