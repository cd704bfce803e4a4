"""Scatter that varies by taxon: one partially pooled residual SD per taxon of a level."""

import numpy as np
import pytest

from allolaw.errors import UserError
from allolaw.model.builder import build_model
from allolaw.model.spec import parse_spec
from test_model_builder import _nested_data


def test_each_species_gets_the_residual_sd_of_its_taxon():
    # the trait's log density must be the normal density with the SD of each species' family:
    # checked against scipy.stats.norm with hand-set per-family SDs
    from scipy import stats

    sim = _nested_data()
    spec = parse_spec({"taxa": {"levels": "none"}, "scatter_by_taxon": "family"}, name="s")
    model = build_model(sim.data, spec, levels=sim.levels, log_reference_size=0.0)
    assert model.named_vars_to_dims["taxon_sigma__family"] == ("family",)
    logp = model.compile_logp(vars=[model["trait"]], sum=True)
    point = model.initial_point()
    rng = np.random.default_rng(4)
    z = rng.normal(size=point["log_sigma_z__family"].shape)
    point["log_sigma_z__family"] = z
    point["log_sigma_sd__family_log__"] = np.log(0.4)
    point["sigma_log__"] = np.log(0.2)
    point["intercept"], point["exponent"] = np.array(0.9), np.array(0.7)
    labels = list(model.coords["family"])
    sd_family = dict(zip(labels, 0.2 * np.exp(0.4 * z), strict=True))
    sd = np.array([sd_family[f] for f in sim.data["family"].astype(str)])
    x, y = sim.data["log_size"].to_numpy(), sim.data["log_trait"].to_numpy()
    expected = stats.norm(0.9 + 0.7 * x, sd).logpdf(y).sum()
    assert float(logp(point)) == pytest.approx(expected, abs=1e-8)


def test_scatter_by_taxon_names_an_existing_level_and_refuses_ratio_mode():
    sim = _nested_data()
    spec = parse_spec({"scatter_by_taxon": "genus"}, name="g", source="models/g.yaml")
    with pytest.raises(UserError, match=r"models/g.yaml: key 'scatter_by_taxon'.*'genus'"):
        build_model(sim.data, spec, levels=sim.levels, log_reference_size=0.0)
    with pytest.raises(UserError, match="ratio mode"):
        parse_spec({"scatter_by_taxon": "family", "size_error": "ratio",
                    "trait_error": "ratio"}, name="r")
    inner = parse_spec({"scatter_by_taxon": "innermost"}, name="i")
    names = set(build_model(sim.data, inner, levels=sim.levels, log_reference_size=0.0)
                .named_vars)
    assert {"taxon_sigma__family", "log_sigma_sd__family"} <= names
    assert inner.cost_rank == parse_spec({}, name="d").cost_rank + 1
