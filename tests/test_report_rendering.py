"""Tests of the audit report (allolaw.report).

Every input is a hand-built results folder that follows the data contracts of DEVELOPERS.md
(clean.csv, ledger.csv, prepared.json, posterior.nc, checks/<m>.json, hypotheses.csv,
comparison.csv, curvature_audit.json, breakpoint.json), with known posterior draws; nothing
here runs MCMC. The numbers on the page are compared with those files, parsed independently.
"""

from __future__ import annotations

import json
import math
import os
import re
from html import unescape
from html.parser import HTMLParser
from pathlib import Path

import arviz as az
import numpy as np
import pandas as pd
import pytest
from scipy import stats

from allolaw.checks.reading import read_posterior
from allolaw.config import config_sha256
from allolaw.report import charts, figures, rendering, summary
from allolaw.report.benchmarks import read_benchmarks
from allolaw.report.svg import Series
from report_results import (
    BREAK,
    CURVED,
    HOSTILE_IMAGE,
    HOSTILE_SPECIES,
    HOSTILE_TAXON,
    PRIMARY,
    build_results,
)


@pytest.fixture(scope="module")
def rendered(tmp_path_factory):
    root = tmp_path_factory.mktemp("report")
    config = build_results(root)
    path = rendering.render_dataset_report(config, "demo")
    return config, path, path.read_text(encoding="utf-8")


class _Tables(HTMLParser):
    """Cells of each <table id=...> as text, row by row (stdlib parser, not our code)."""

    def __init__(self) -> None:
        super().__init__()
        self.tables: dict[str, list[list[str]]] = {}
        self._id: str | None = None
        self._cell: list[str] | None = None

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "table" and a.get("id"):
            self._id = a["id"]
            self.tables[self._id] = []
        elif tag == "tr" and self._id:
            self.tables[self._id].append([])
        elif tag in ("td", "th") and self._id:
            self._cell = []

    def handle_endtag(self, tag):
        if tag in ("td", "th") and self._id and self._cell is not None:
            self.tables[self._id][-1].append("".join(self._cell).strip())
            self._cell = None
        elif tag == "table":
            self._id = None

    def handle_data(self, data):
        if self._cell is not None:
            self._cell.append(data)


def _tables(html: str) -> dict[str, list[list[str]]]:
    parser = _Tables()
    parser.feed(html)
    return parser.tables


def _close(cell: str, value: float) -> bool:
    """The shown number equals ``value`` to the precision it is shown with."""
    decimals = len(cell.split(".")[1]) if "." in cell else 0
    return abs(float(cell) - value) <= 0.5 * 10**-decimals + 1e-12


# --- tests ----------------------------------------------------------------------------------
def test_answer_comes_first_with_primary_exponent_and_its_90_percent_interval(rendered):
    config, _, html = rendered
    idata = az.from_netcdf(Path(config["results_dir"]) / "demo" / PRIMARY / "posterior.nc")
    draws = idata.posterior["exponent"].values.ravel()
    # 5%, 50%, 95% quantiles by numpy (linear interpolation, Hyndman & Fan 1996 type 7).
    q05, q50, q95 = np.quantile(draws, [0.05, 0.5, 0.95])
    answer = html[html.index('id="answer"'):html.index('id="data"')]
    assert f"{q50:.3f}" in answer
    assert f"90% interval {q05:.3f} to {q95:.3f}" in answer
    assert "reference size 100 g" in answer
    assert html.index('id="answer"') < html.index('id="data"') < html.index('id="checks"')


def test_headline_named_exponent_and_tables_equal_hypotheses_and_comparison_csv(rendered):
    config, _, html = rendered
    res = Path(config["results_dir"]) / "demo"
    hyp = pd.read_csv(res / "hypotheses.csv", keep_default_na=False)
    comp = pd.read_csv(res / "comparison.csv")
    pop = hyp[(hyp["model"] == PRIMARY) & (hyp["taxon"] == "") & (hyp["kind"] == "point")]
    best = pop.loc[pop["posterior_prob"].idxmax()]
    named = unescape(re.search(r'id="headline-named">(.*?)</li>', html, re.S).group(1))
    assert f"Most probable named exponent: <strong>{best['hypothesis']}</strong>" in named
    shown = re.search(rf"{best['hypothesis']} ([0-9.]+) \(([0-9.]+)\)", named)
    assert _close(shown.group(1), best["posterior_prob"])
    # the prior probability beside it: equal weights over 3 named values + another value
    assert _close(shown.group(2), 1 / 4)
    assert "depends on that prior" in named
    # the interval probability leads, before the point-hypothesis probabilities
    answer = html[html.index('id="answer"'):html.index('id="data"')]
    assert answer.index('id="headline-interval"') < answer.index('id="headline-named"')
    interval = unescape(re.search(r'id="headline-interval">(.*?)</li>', html, re.S).group(1))
    top = pop.loc[pop["interval_prob"].idxmax()]
    assert f"<strong>{top['hypothesis']}</strong>" in interval
    assert f"<strong>{top['interval_prob']:.3f}</strong>" in interval

    tables = _tables(html)
    head, *body = tables["table-hypotheses"]
    assert len(body) == len(hyp)
    for row, (_, expected) in zip(body, hyp.iterrows(), strict=True):
        cells = dict(zip(head, row, strict=True))
        assert unescape(cells["taxon"]) in (expected["taxon"], "–")
        for col in ("posterior_prob", "interval_prob", "posterior_prob_prior_half",
                    "posterior_prob_prior_double"):
            assert _close(cells[col], float(expected[col])), (col, cells[col], expected[col])
    head, *body = tables["table-comparison"]
    assert [r[head.index("model")] for r in body] == comp["model"].tolist()
    for row, (_, expected) in zip(body, comp.iterrows(), strict=True):
        cells = dict(zip(head, row, strict=True))
        for col in ("elpd_loo", "elpd_loo_se", "elpd_gap_to_best", "elpd_gap_se", "p_loo",
                    "stacking_weight"):
            assert _close(cells[col], float(expected[col])), (col, cells[col], expected[col])
    assert "not</strong> model probabilities" in html


def test_hostile_species_and_taxon_names_are_escaped(rendered):
    _, _, html = rendered
    assert HOSTILE_SPECIES not in html
    assert "<script" not in html.lower()
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in html
    assert HOSTILE_IMAGE not in html
    assert "<img" not in html.lower()
    assert HOSTILE_TAXON not in html
    assert "Rock &amp; &#34;Roll&#34; &#39;n&#39;" in html or (
        "Rock &amp; &quot;Roll&quot; &#x27;n&#x27;" in html)
    assert "<b>bold</b>" not in html  # the dataset title is text, not markup


def test_failed_check_is_shown_red_and_explicit_in_the_answer(rendered):
    _, _, html = rendered
    answer = html[html.index('id="answer"'):html.index('id="data"')]
    assert f'class="alert fail" id="failed-{CURVED}"' in answer
    assert f"Failed check: model {CURVED}" in answer
    assert f"Not checked</strong> (no check file): {BREAK}" in answer
    checks = html[html.index('id="checks"'):html.index('id="pictures"')]
    assert re.search(r'<tr class="row-fail"><td>r_hat</td><td class="num">1.083</td>', checks)
    assert "R-hat of exponent is 1.083" in checks


def test_ledger_counts_and_dropped_rows_match_ledger_csv(rendered):
    config, _, html = rendered
    ledger = pd.read_csv(Path(config["results_dir"]) / "demo" / "ledger.csv")
    tables = _tables(html)
    counts = tables["table-ledger-counts"][1]
    fates = ledger["fate"].value_counts()
    assert counts == [str(len(ledger)), str(fates["kept"]), str(fates["merged"]),
                      str(fates["dropped"])]
    dropped = ledger[ledger["fate"] == "dropped"]
    body = tables["table-dropped"][1:]
    assert [int(r[1]) for r in body] == dropped["line"].tolist()
    assert [unescape(r[3]) for r in body] == dropped["reason"].tolist()
    assert "0.001" in html  # the unit conversion factor mW → W


def test_species_and_taxa_counts_match_clean_csv(rendered):
    config, _, html = rendered
    clean = pd.read_csv(Path(config["results_dir"]) / "demo" / "clean.csv")
    text = unescape(re.sub(r"<[^>]+>", "", html))
    assert f"{len(clean)} species, {clean['order'].nunique()} taxa at level order, " \
           f"{clean['family'].nunique()} taxa at level family" in text
    # one hover title per species in the scatter plot
    scatter = html[html.index('id="fig-scatter"'):]
    scatter = scatter[:scatter.index("</figure>")]
    assert scatter.count('<circle class="pt"') == len(clean)


def test_missing_inputs_are_listed_on_the_page(tmp_path):
    config = build_results(tmp_path)
    res = Path(config["results_dir"]) / "demo"
    (res / "hypotheses.csv").unlink()
    (res / "breakpoint.json").unlink()
    (res / CURVED / "posterior.nc").unlink()
    (res / "clean.csv").unlink()
    html = rendering.render_dataset_report(config, "demo").read_text(encoding="utf-8")
    missing = html[html.index('id="missing-inputs"'):]
    missing = missing[:missing.index("</div>")]
    assert "hypotheses.csv is missing" in missing
    assert "breakpoint.json is missing" in missing
    assert f"The fit of model &#39;{CURVED}&#39; is missing" in missing
    assert "No named-exponent probabilities" in html
    assert "clean.csv is missing" in missing
    assert "No scatter plot: clean.csv is missing." in html


def test_page_is_self_contained_and_small(rendered):
    _, path, html = rendered
    lowered = html.lower()
    assert "<script" not in lowered
    assert not re.search(r"""(src|href)\s*=\s*["']?(https?:)?//""", lowered)
    assert "url(http" not in lowered
    assert "@import" not in lowered
    assert "@media print" in html
    assert path.stat().st_size < 5_000_000
    umask = os.umask(0)
    os.umask(umask)
    assert path.stat().st_mode & 0o777 == 0o666 & ~umask  # as a new file, not 0600 temp


def test_catch_all_hypothesis_has_one_wording_and_no_library_column_names(rendered):
    _, _, html = rendered
    text = unescape(html)
    assert "“another value”" in text
    assert "some other value" not in text
    # ArviZ's comparison column names stay out of the page (Vehtari et al. 2017 terms kept)
    for name in ("elpd_diff", "dse", "n_bad_k", ">rank<", ">se<", ">warning<"):
        assert name not in html, name


def test_page_of_a_fit_recorded_with_the_old_sampler_keys_still_renders(tmp_path):
    config = build_results(tmp_path)
    res = Path(config["results_dir"]) / "demo"
    for model in (PRIMARY, CURVED, BREAK):
        post = res / model / "posterior.nc"
        idata = read_posterior(post)  # fully read and closed, so it can be rewritten
        idata.attrs["sampler"] = json.dumps({"chains": 2, "draws": 200, "tune": 200,
                                             "target_accept": 0.9})
        idata.to_netcdf(str(post))
    html = rendering.render_dataset_report(config, "demo").read_text(encoding="utf-8")
    assert "this fit predates the sampler keys" in html


def test_methods_paragraph_and_reproducibility_footer(rendered):
    config, _, html = rendered
    methods = html[html.index('id="methods"'):html.index('id="reproducibility"')]
    for ref in ("Dickey, J. M. (1971)", "Wagenmakers", "Vehtari, A., Gelman, A., Gabry, J. "
                "(2017)", "improved R-hat", "Yao, Y.", "Okabe"):
        assert ref in methods, ref
    assert "2 chains of 200 draws after 200 warm-up draws" in methods
    footer = html[html.index('id="reproducibility"'):]
    assert config_sha256(config) in footer
    assert "ab" * 32 in footer  # source file hash from prepared.json
    assert "snakemake --cores 2 reports/demo.html" in footer
    assert "dose" in footer
    assert "regulatory guidance" in footer
    assert re.search(r"this page \d+\.\d s", footer)


def test_curvature_and_breakpoint_answers_follow_the_compare_outputs(rendered):
    _, _, html = rendered
    curv = unescape(re.search(r'id="headline-curvature">(.*?)</li>', html, re.S).group(1))
    assert "<strong>no between-taxon differences to explain.</strong>" in curv
    paragraph = unescape(re.search(r'id="curvature-paragraph">(.*?)</p>', html, re.S).group(1))
    assert "P(SD of taxon exponents > 0.05) = 0.31 (prior 0.84" in paragraph
    tables = _tables(html)
    numbers = dict(tables["table-curvature"])
    assert numbers["P(SD of taxon exponents > 0.05), taxa without curvature: posterior "
                   "(prior)"] == "0.310 (0.840)"
    assert numbers["share of the spread removed by curvature, median (90% interval)"] == (
        "0.050 (-0.800 to 0.700)")
    assert numbers["2c, the trend one curved law predicts"] == "0.042 (0.024 to 0.058)"
    assert numbers["share of the variance of log size within taxa"] == "0.880"
    assert tables["table-crossings"][1][0] == CURVED

    brk = unescape(re.search(r'id="headline-breakpoint">(.*?)</li>', html, re.S).group(1))
    assert "not supported — model breakpoint against its matched model without the break " \
           "(breakpoint__no_break)" in brk
    assert "Bayes factor 2.4" in brk
    # every posterior probability beside its prior probability
    assert "P(|difference| > 0.030) = 0.993 against 0.983 before any data" in brk
    head, row = tables["table-breakpoint"]
    cells = dict(zip(head, row, strict=True))
    assert cells["P(change): posterior (prior)"] == "0.706 (0.500)"
    assert cells["P(|difference| > δ): posterior (prior)"] == "0.993 (0.983)"
    assert cells["P(exponent increases): posterior (prior)"] == "0.990 (0.500)"
    assert cells["LOO gain over the matched model ± standard error"] == "1.200 ± 1.500"
    assert cells["verdict"] == "not supported"


def test_breakpoint_supported_only_as_the_compare_stage_says(tmp_path):
    config = build_results(tmp_path)
    res = Path(config["results_dir"]) / "demo"
    brk = json.loads((res / "breakpoint.json").read_text())
    brk["models"][BREAK].update(verdict="supported", sentence="Both favour it.")
    (res / "breakpoint.json").write_text(json.dumps(brk))
    html = rendering.render_dataset_report(config, "demo").read_text(encoding="utf-8")
    answer = unescape(re.search(r'id="headline-breakpoint">(.*?)</li>', html, re.S).group(1))
    assert "<strong>supported — model breakpoint" in answer
    del brk["models"][BREAK]["verdict"]
    (res / "breakpoint.json").write_text(json.dumps(brk))
    html = rendering.render_dataset_report(config, "demo").read_text(encoding="utf-8")
    answer = unescape(re.search(r'id="headline-breakpoint">(.*?)</li>', html, re.S).group(1))
    assert "no verdict in this file" in answer


def test_model_average_and_sensitivity_are_shown_with_their_numbers(rendered):
    _, _, html = rendered
    avg = unescape(re.search(r'id="headline-average">(.*?)</li>', html, re.S).group(1))
    assert "exponent <strong>0.740</strong> (90% interval 0.700 to 0.780) beside 0.744" in avg
    assert "disagree: the most probable value differs" in avg
    sens = unescape(re.search(r'id="headline-sensitivity">(.*?)</ul></li>', html,
                              re.S).group(1))
    assert "the answer changes." in sens
    assert "metabolic law 0.610 (0.350 to 0.660)" in sens
    # only the primary model in full; the others by name when their answer changes
    assert "power-scaling failed" not in sens
    assert "no other model's answer changes under power-scaling" in sens


def test_break_and_local_exponent_figures_appear_for_the_models_that_have_them(rendered):
    _, _, html = rendered
    assert f'id="fig-break-{BREAK}"' in html
    assert f'id="fig-local-{CURVED}"' in html
    assert f'id="fig-local-{PRIMARY}"' not in html
    assert 'id="fig-forest-order"' in html
    assert 'id="fig-forest-family"' in html


def test_local_exponent_of_a_quadratic_law_is_its_derivative(rendered):
    # d/dx (a + b·dx + c·dx²) = b + 2c·dx (closed form); the figure differentiates numerically.
    config, _, _ = rendered
    idata = summary._squeeze_constants(
        az.from_netcdf(Path(config["results_dir"]) / "demo" / CURVED / "posterior.nc"))
    grid = np.linspace(0.0, 9.0, 60)
    slope = figures._local_exponent(idata, grid)
    law = slope
    b = idata.posterior["exponent"].values.ravel()
    c = idata.posterior["curvature"].values.ravel()
    step = np.linspace(0, b.size - 1, law.shape[0]).astype(int) if b.size > law.shape[0] else (
        slice(None))
    expected = b[step, None] + 2 * c[step, None] * (grid[None, :] - math.log(100.0))
    np.testing.assert_allclose(slope, expected, atol=1e-9)


def test_scatter_draws_population_band_and_each_named_exponent(rendered):
    config, _, html = rendered
    scatter = html[html.index('id="fig-scatter"'):]
    scatter = scatter[:scatter.index("</figure>")]
    assert "<title>population law (90% band)</title>" in scatter
    for e in config["hypotheses"]["exponents"]:
        assert re.search(rf'<path d="M[^"]+"[^>]*stroke-dasharray="[^"]+"><title>'
                         rf'{re.escape(e["name"])} \({e["value"]:g}\)</title>', scatter), e


def test_log_axes_place_points_linearly_in_log10(rendered):
    xs = np.array([0.3, 2.0, 50.0, 1e3, 7e4])
    ys = xs**0.75
    svg = charts.scatter_law_svg(
        [Series(xs, ys, [f"p{i}" for i in range(5)], label="t", colour="#000")], [],
        x_label="x (g)", y_label="y (W)")
    pts = re.findall(r'<circle class="pt" cx="([0-9.]+)" cy="([0-9.]+)"', svg)
    cx, cy = (np.array([float(p[i]) for p in pts]) for i in (0, 1))
    # pixels are affine in log10: a straight-line fit leaves under 0.1 px (rounding to 0.1 px)
    for pix, val in ((cx, xs), (cy, ys)):
        fit = np.polyfit(np.log10(val), pix, 1)
        assert np.max(np.abs(np.polyval(fit, np.log10(val)) - pix)) < 0.1
    # a power law with exponent 0.75 is a straight line of slope 0.75 on equal-decade axes
    slope_px = np.polyfit(np.log10(xs), cy, 1)[0] / np.polyfit(np.log10(xs), cx, 1)[0]
    assert slope_px < 0


def test_index_shows_each_dataset_worst_verdict_and_benchmark_totals(rendered, tmp_path):
    config, _, _ = rendered
    logs = tmp_path / "logs"
    bench = logs / "benchmarks" / "demo"
    bench.mkdir(parents=True)
    # Snakemake benchmark layout (tab-separated: s, h:m:s, max_rss, ... , mean_load, cpu_time)
    header = "s\th:m:s\tmax_rss\tmax_vms\tmax_uss\tmax_pss\tio_in\tio_out\tmean_load\tcpu_time\n"
    (bench / "fit_taxa_errors.tsv").write_text(
        header + "12.5\t0:00:12\t512.3\t900\t500\t505\t1\t2\t95.0\t11.9\n")
    (bench / "prepare.tsv").write_text(header + "0.75\t0:00:00\t80.1\t100\t70\t75\t0\t0\t50\t0.4\n")
    path = rendering.render_index(config, logs_dir=logs)
    html = path.read_text(encoding="utf-8")
    tables = _tables(html)
    _, row = tables["table-index"]
    assert "fail" in row[2]  # worst of pass / fail / missing check verdicts
    assert "demo.html" in html
    body = tables["table-benchmarks"][1:]
    assert sorted(r[0] for r in body) == ["demo/fit_taxa_errors", "demo/prepare"]
    assert "2 jobs, 13.2 s of wall time" in html  # 12.5 + 0.75 = 13.25 → 13.2 (round half even)
    assert "largest peak memory 512.3 MB" in html
    assert tables["table-benchmarks-datasets"][1] == ["demo", "2", "13.2", "512.3"]
    frame = read_benchmarks(logs)
    assert frame["s"].sum() == pytest.approx(13.25)


def test_index_warns_when_no_benchmark_files_exist(rendered, tmp_path):
    config, _, _ = rendered
    html = rendering.render_index(config, logs_dir=tmp_path / "nothing").read_text(encoding="utf-8")
    assert 'id="no-benchmarks"' in html


def test_check_file_written_by_the_diagnostics_stage_renders_every_diagnostic(tmp_path):
    # The check JSON comes from allolaw.checks itself on a deliberately broken
    # hand-built posterior (one chain shifted by 5 posterior SDs, 12 divergences).
    from allolaw.checks.convergence import check_fit
    from allolaw.checks.predictive import predictive_checks
    from allolaw.io import write_json
    from allolaw.testing.posteriors import line_posterior

    config = build_results(tmp_path)
    idata = line_posterior(seed=5, chains=2, draws=300, shift_chain=5.0, n_divergent=12)
    result, findings = check_fit(idata)
    payload = {"dataset": "demo", "model": PRIMARY, "verdict": result.verdict,
               "diagnostics": result.to_list(), "findings": findings, "refit": None,
               "ppc": predictive_checks(idata)}
    write_json(Path(config["results_dir"]) / "demo" / "checks" / f"{PRIMARY}.json", payload)
    html = rendering.render_dataset_report(config, "demo").read_text(encoding="utf-8")
    assert result.verdict == "fail"
    assert f'id="failed-{PRIMARY}"' in html
    section = html[html.index(f'id="checks-{PRIMARY}"'):html.index(f'id="checks-{CURVED}"')]
    rows = {r[0]: r for r in _tables_rows(section)}
    for diag in result.diagnostics:
        assert diag.name in rows, diag.name
        assert rows[diag.name][3] == diag.status
    for finding in findings:
        assert finding.split(":")[0] in unescape(section)
    assert "LOO-PIT" in section


def _tables_rows(fragment: str) -> list[list[str]]:
    parser = _Tables()
    parser.feed(fragment.replace('<table class="diagnostics">', '<table id="diag">', 1))
    return [[unescape(c) for c in r] for r in parser.tables.get("diag", [])[1:]]


def test_answer_of_a_breakpoint_primary_model_gives_both_exponents(tmp_path):
    config = build_results(tmp_path)
    config["datasets"]["demo"]["primary_model"] = BREAK
    html = rendering.render_dataset_report(config, "demo").read_text(encoding="utf-8")
    idata = az.from_netcdf(Path(config["results_dir"]) / "demo" / BREAK / "posterior.nc")
    below = np.quantile(idata.posterior["exponent"].values.ravel(), [0.05, 0.5, 0.95])
    above = np.quantile(idata.posterior["exponent_above"].values.ravel(), [0.05, 0.5, 0.95])
    answer = html[html.index('id="answer"'):html.index('id="data"')]
    assert f"Population exponent {below[1]:.3f}" in answer
    assert (f"below the break (above it: {above[1]:.3f}, 90% interval {above[0]:.3f} to "
            f"{above[2]:.3f})") in answer
    # no check file for the primary model: said in the answer, not hidden
    assert f"(no check file): {BREAK}" in answer


def test_forest_table_shows_species_count_size_range_and_unpooled_exponent(rendered):
    config, _, html = rendered
    clean = pd.read_csv(Path(config["results_dir"]) / "demo" / "clean.csv")
    head, *body = _tables(html)["table-forest-family"]
    assert head[0] == "family"
    assert len(body) == clean["family"].nunique()
    for row in body:
        own = clean[clean["family"] == row[0]]
        assert int(row[1]) == len(own)
        # unpooled exponent: least-squares slope over the family's own species
        # (scipy.stats.linregress as the reference)
        slope = stats.linregress(own["log_size"], own["log_trait"]).slope
        assert _close(row[3], slope)
        low, high = row[2].split(" to ")
        assert _close(low, float(np.exp(own["log_size"].min())))
        assert _close(high, float(np.exp(own["log_size"].max())))


def test_level_with_three_taxa_or_fewer_warns_with_the_width_ratio(rendered):
    config, _, html = rendered
    # 2 orders: warned; 4 families: not
    warning = unescape(re.search(r'id="few-taxa-order">(.*?)</div>', html, re.S).group(1))
    assert "Only 2 taxa at level order" in warning
    idata = az.from_netcdf(Path(config["results_dir"]) / "demo" / PRIMARY / "posterior.nc")
    draws = idata.posterior["exponent_sd__order"].values.ravel()
    q05, q95 = np.quantile(draws, [0.05, 0.95])
    # half-normal(0.25) prior: 90% interval from 0.25·Φ⁻¹(0.525) to 0.25·Φ⁻¹(0.975)
    ratio = (q95 - q05) / (0.25 * (stats.norm.ppf(0.975) - stats.norm.ppf(0.525)))
    assert f"{ratio:.2f} times as wide as its prior's" in warning
    assert 'id="few-taxa-family"' not in html
