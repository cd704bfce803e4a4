"""Model comparison by PSIS-LOO: ranks, elpd against ArviZ, Pareto k counts."""

import arviz as az
import pytest

from allolaw.answers.comparison import STACKING_NOTE, compare_models
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
