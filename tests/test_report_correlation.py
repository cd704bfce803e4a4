"""The correlation of taxon deviations, stated in words beside the taxon SDs."""

import arviz as az
import numpy as np

from allolaw.report.correlation import correlation_sentences
from allolaw.report.sections import _parameter_summary


def _idata(draws_by_name, centre=4.605170185988092):  # log 100
    post = {name: np.asarray(d).reshape(2, -1) for name, d in draws_by_name.items()}
    return az.from_dict(posterior=post, constant_data={"log_size_centre": np.array(centre)})


def test_correlation_sentence_states_median_interval_and_a_sign_only_when_clear():
    rng = np.random.default_rng(1)
    idata = _idata({
        "correlation_intercept_exponent__genus": rng.uniform(0.3, 0.9, 400),
        "correlation_intercept_exponent__family": rng.uniform(-0.6, 0.6, 400),
        "correlation_partial__genus": rng.uniform(0, 1, 400),
        "exponent_sd__genus": rng.uniform(0.1, 0.2, 400),
    })
    family, genus = correlation_sentences(idata, size_unit="g")
    assert genus.startswith("At level genus, the correlation of taxon intercepts and exponents")
    assert "100 g" in genus  # the centre size, exp(mean log size)
    assert "tend to have higher exponents" in genus
    q05, q50 = np.quantile(idata.posterior["correlation_intercept_exponent__genus"], [0.05, 0.5])
    assert f"{q50:.2f} (90% interval {q05:.2f}" in genus
    assert "do not tell its sign" in family
    names = [row["name"] for row in _parameter_summary(idata)]
    assert "correlation_intercept_exponent__genus" in names
    assert "correlation_partial__genus" not in names


def test_no_correlation_sentences_without_correlated_terms():
    idata = _idata({"exponent_sd__genus": np.full(400, 0.1)})
    assert correlation_sentences(idata) == []
