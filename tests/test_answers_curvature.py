"""Local exponent and the curvature audit (small real fits on simulated data with known truth)."""

import math

import arviz as az
import numpy as np
import pandas as pd
import pytest

from allolaw.answers.curvature import audit_curvature, local_exponent


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


# --- curvature audit on simulated data with known truth (small real fits) ---------------------
# Four small hierarchical fits take 2–5 minutes on this shared machine, so they are marked slow
# (run with `pytest -m slow tests/test_answers_curvature.py`).


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

    from allolaw.model.builder import build_model
    from allolaw.model.spec import parse_spec

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
