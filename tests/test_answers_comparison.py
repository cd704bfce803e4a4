"""Model comparison by PSIS-LOO: places, elpd against ArviZ, Pareto k counts, column names."""

import arviz as az
import pytest

from allolaw.answers.comparison import STACKING_NOTE, compare_models
from allolaw.testing.posteriors import line_posterior


def test_loo_ranks_the_calibrated_model_above_a_too_narrow_one():
    fits = {"right": line_posterior(seed=1), "narrow": line_posterior(seed=1, spread_factor=0.4)}
    table = compare_models(fits, verdicts={"right": "pass"})
    assert table["model"].tolist() == ["right", "narrow"]
    assert table["elpd_gap_to_best"].iloc[1] > 0
    assert table["place"].tolist() == [1, 2]  # 1 = best
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
    assert row["n_high_pareto_k"] >= 1
    assert "Pareto k" in row["loo_caution"]
    assert table.set_index("model").loc["clean", "n_high_pareto_k"] == 0


def test_comparison_columns_are_named_in_our_words_and_loo_terms():
    # elpd_loo and p_loo: terms of the method (Vehtari, Gelman & Gabry 2017, Stat. Comput.
    # 27:1413); the rest our own names, none of ArviZ's (rank, se, elpd_diff, dse, warning)
    table = compare_models({"a": line_posterior(seed=4), "b": line_posterior(seed=5)})
    assert list(table.columns) == [
        "dataset", "model", "place", "elpd_loo", "elpd_loo_se", "elpd_gap_to_best",
        "elpd_gap_se", "p_loo", "stacking_weight", "n_high_pareto_k", "loo_caution",
        "check_verdict", "note",
    ]
    best = table.set_index("place").loc[1]
    assert best["elpd_gap_to_best"] == 0.0
    assert best["elpd_gap_se"] == 0.0
