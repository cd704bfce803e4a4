"""Simulation studies of the curvature and break verdicts: invented data with known truth.

Each function simulates one dataset with :func:`allolaw.testing.data.simulate_law`, fits the
models the verdict reads with small NUTS runs and returns the verdict. The slow tests in
``tests/test_answers_curvature_verdict.py`` and ``tests/test_answers_evidence.py`` and the
study script ``benchmarks/verdict_studies.py`` use the same scenarios and seeds.
"""

from __future__ import annotations

import warnings
from typing import Any

from allolaw.answers.curvature_verdict import (
    NO_DIFFERENCES,
    ONE_CURVE,
    OWN_RIGHT,
    UNDECIDABLE,
    audit_evidence,
    judge_curvature,
)
from allolaw.answers.evidence import break_evidence, judge_break, loo_difference

__all__ = ["ALLOWED", "BREAK_SCENARIOS", "CURVATURE_SCENARIOS", "HINGE_WIDTH",
           "break_verdict", "curvature_verdict"]

#: Curvature scenarios (8 genera × 8 species; exponent 0.75).
CURVATURE_SCENARIOS: dict[str, dict[str, float]] = {
    # no taxon spread, no curvature, genera at different sizes
    "null": {"curvature": 0.0, "exponent_sd": 0.0, "taxon_size_spread": 1.5,
             "log_size_sd": 0.8},
    # one curved law, no taxon spread, genera at different sizes
    "curve": {"curvature": -0.08, "exponent_sd": 0.0, "taxon_size_spread": 1.5,
              "log_size_sd": 0.8},
    # straight laws with taxon exponents SD 0.15, every genus over the same size range
    "taxa": {"curvature": 0.0, "exponent_sd": 0.15, "taxon_size_spread": 0.0,
             "log_size_sd": 1.5},
}

#: Verdicts that are not an error in each curvature scenario. Under pure curvature "no
#: differences" is also right when the genera's size ranges overlap enough that the curve
#: leaves no detectable taxon spread; the error to rule out there is "the taxa differ".
ALLOWED: dict[str, set[str]] = {"null": {NO_DIFFERENCES, ONE_CURVE, UNDECIDABLE},
                                "curve": {NO_DIFFERENCES, ONE_CURVE, UNDECIDABLE},
                                "taxa": {OWN_RIGHT}}

#: Break scenarios: the change of the exponent above the break.
BREAK_SCENARIOS: dict[str, float] = {"null": 0.0, "change_0.3": 0.3}

#: Hinge width of the breakpoint model in the break study (log-size units).
HINGE_WIDTH = 0.1


def curvature_verdict(scenario: str, seed: int, *, draws: int = 300, warmup: int = 300
                      ) -> dict[str, Any]:
    """Simulate one curvature scenario, fit the three audit models, return the verdict.

    Returns a dict with ``verdict``, ``allowed`` (whether the scenario permits it) and the
    worst R-hat of the three fits.
    """
    from allolaw.model.spec import parse_spec
    from allolaw.testing.data import simulate_law

    sim = simulate_law(seed=seed, taxa=(8,), level_names=("genus",), species_per_taxon=8,
                       exponent=0.75, intercept_sd=0.3, sigma=0.1,
                       **CURVATURE_SCENARIOS[scenario])
    taxa = {"levels": "all", "vary": ["intercept", "exponent"]}
    specs = {
        "taxa_linear": {"taxa": taxa},
        "one_curve": {"taxa": {"levels": "all", "vary": ["intercept"]}, "curvature": "shared"},
        "taxa_curved": {"taxa": taxa, "curvature": "shared"},
    }
    fits = {name: _fit(sim, parse_spec(raw, name=name), 0.0, seed, draws, warmup)
            for name, raw in specs.items()}
    ev = audit_evidence(fits["taxa_linear"], fits["taxa_curved"], fits["one_curve"])
    verdict = judge_curvature(ev).verdict
    return {"verdict": verdict, "allowed": verdict in ALLOWED[scenario],
            "rhat_max": _worst_rhat(fits.values())}


def break_verdict(scenario: str, seed: int, *, draws: int = 300, warmup: int = 300
                  ) -> dict[str, Any]:
    """Simulate one break scenario, fit the break model and its matched straight model.

    Invented data with known truth: 3 groups × 20 species, log sizes N(4, 2²), break at 4.
    Returns a dict with ``verdict``, the worst R-hat of the two fits, the Bayes factor and the
    LOO gain of the break model with its SE (so that a rule can be studied on the records).
    """
    from allolaw.model.spec import parse_spec
    from allolaw.testing.data import simulate_law

    change = BREAK_SCENARIOS[scenario]
    sim = simulate_law(seed=seed, taxa=(3,), level_names=("group",), species_per_taxon=20,
                       exponent=0.75, exponent_above=0.75 + change, break_log_size=4.0,
                       exponent_sd=0.0, intercept_sd=0.3, sigma=0.2, log_size_mean=4.0,
                       log_size_sd=2.0, log_reference_size=4.0)
    taxa = {"levels": "all", "vary": ["intercept"]}
    specs = {"break": parse_spec({"taxa": taxa, "breakpoint": "one",
                                  "hinge_width": HINGE_WIDTH}, name="break"),
             "straight": parse_spec({"taxa": taxa}, name="straight")}
    fits = {name: _fit(sim, spec, 4.0, seed, draws, warmup) for name, spec in specs.items()}
    evidence = break_evidence(fits["break"], specs["break"])
    loo = loo_difference(fits["break"], fits["straight"])
    verdict = judge_break(evidence, loo).verdict
    return {"verdict": verdict, "rhat_max": _worst_rhat(fits.values()),
            "bf_break": evidence.bf_break, "elpd_gain": loo.elpd_diff, "elpd_gain_se": loo.se}


def _fit(sim: Any, spec: Any, log_reference_size: float, seed: int, draws: int,
         warmup: int) -> Any:
    from allolaw.model.builder import build_model
    from allolaw.model.sampling import fit_model

    model = build_model(sim.data, spec, levels=sim.levels,
                        log_reference_size=log_reference_size)
    prior_model = build_model(sim.data, spec, levels=sim.levels,
                              log_reference_size=log_reference_size, prior_only=True)
    with warnings.catch_warnings():
        # 2 short chains: convergence warnings are expected; the verdict is what is studied
        warnings.simplefilter("ignore")
        return fit_model(model, chains=2, draws=draws, warmup=warmup, seed=seed,
                         prior_draws=20, prior_model=prior_model)


def _worst_rhat(fits: Any) -> float:
    import arviz as az
    import numpy as np

    worst = 0.0
    for idata in fits:
        values = az.rhat(idata.posterior).to_array().values
        finite = values[np.isfinite(values)]
        if finite.size:
            worst = max(worst, float(finite.max()))
    return round(worst, 4)
