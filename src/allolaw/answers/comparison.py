"""PSIS-LOO comparison of a dataset's models: the rows of ``comparison.csv``.

Stacking weights are weights of the best predictive mixture, *not* posterior model
probabilities.

References
----------
.. [1] Vehtari, A., Gelman, A., Gabry, J. (2017). Practical Bayesian model evaluation using
   leave-one-out cross-validation and WAIC. Statistics and Computing 27:1413–1432.
"""

from __future__ import annotations

import warnings
from typing import Any

import arviz as az
import numpy as np
import pandas as pd

from allolaw.checks.convergence import pareto_k_threshold

__all__ = ["COMPARISON_COLUMNS", "STACKING_NOTE", "compare_models"]

#: Columns of ``comparison.csv`` (DEVELOPERS.md contract, then our additions).
COMPARISON_COLUMNS = [
    "dataset", "model", "place", "elpd_loo", "elpd_loo_se", "elpd_gap_to_best", "elpd_gap_se",
    "p_loo", "stacking_weight", "n_high_pareto_k", "loo_caution", "check_verdict", "note",
]
#: Written beside every stacking weight.
STACKING_NOTE = (
    "stacking weights are the weights of the best predictive mixture of the models (Yao et "
    "al. 2018); they are not posterior model probabilities"
)
#: The groups of a fit this stage reads (not the predictive draws, prior or sampler stats).
COMPARE_GROUPS = ("posterior", "log_likelihood", "constant_data", "observed_data")


def compare_models(
    fits: dict[str, az.InferenceData], *, verdicts: dict[str, str] | None = None
) -> pd.DataFrame:
    """PSIS-LOO comparison of fits on the ``trait`` likelihood, with stacking weights.

    Parameters
    ----------
    fits
        Model name → InferenceData with a ``log_likelihood.trait`` group.
    verdicts
        Model name → check verdict, copied into the table.

    Returns
    -------
    pandas.DataFrame
        Columns :data:`COMPARISON_COLUMNS` (``dataset`` empty), best model first.

    References
    ----------
    Vehtari, A., Gelman, A., Gabry, J. (2017). Practical Bayesian model evaluation using
    leave-one-out cross-validation and WAIC. Statistics and Computing 27:1413–1432.

    Yao, Y., Vehtari, A., Simpson, D., Gelman, A. (2018). Using stacking to average Bayesian
    predictive distributions. Bayesian Analysis 13:917–1007.
    """
    verdicts = verdicts or {}
    if not fits:
        return pd.DataFrame(columns=COMPARISON_COLUMNS)
    loos = {name: trait_loo(idata) for name, idata in fits.items()}
    if len(loos) == 1:
        (name, loo), = loos.items()
        comp = pd.DataFrame({"rank": [0], "elpd_loo": [loo.elpd_loo], "se": [loo.se],
                             "elpd_diff": [0.0], "dse": [0.0], "p_loo": [loo.p_loo],
                             "weight": [1.0]}, index=[name])
    else:
        with warnings.catch_warnings():
            # high Pareto k: counted per model below and written in the table
            warnings.simplefilter("ignore", UserWarning)
            # ArviZ 0.23 sorts with inplace=True, which pandas 3.1 deprecates; not our call
            warnings.filterwarnings("ignore", message="The inplace keyword")
            comp = az.compare(loos, ic="loo", method="stacking", var_name="trait")
    rows = []
    for name, rec in comp.iterrows():
        loo = loos[str(name)]
        n_draws = int(fits[str(name)].posterior.sizes["chain"]
                      * fits[str(name)].posterior.sizes["draw"])
        k = np.asarray(loo.pareto_k.values, dtype=float)
        thr = pareto_k_threshold(n_draws)
        n_high = int(np.sum(~(k <= thr)))
        caution = (f"{n_high} observation(s) with Pareto k > {thr:.2f}: this model's LOO "
                   "estimate is unreliable" if n_high else "")
        rows.append({
            # ArviZ's column names (rank from 0, se, elpd_diff, dse) read here only
            "dataset": "", "model": str(name), "place": int(rec["rank"]) + 1,
            "elpd_loo": float(rec["elpd_loo"]), "elpd_loo_se": float(rec["se"]),
            "elpd_gap_to_best": float(rec["elpd_diff"]), "elpd_gap_se": float(rec["dse"]),
            "p_loo": float(rec["p_loo"]), "stacking_weight": float(rec["weight"]),
            "n_high_pareto_k": n_high, "loo_caution": caution,
            "check_verdict": verdicts.get(str(name), "not checked"), "note": STACKING_NOTE,
        })
    return pd.DataFrame(rows, columns=COMPARISON_COLUMNS)


# --- helpers ---------------------------------------------------------------------------


def trait_loo(idata: az.InferenceData) -> Any:
    with warnings.catch_warnings(), np.errstate(all="ignore"):
        # high Pareto k is counted and written by the callers
        warnings.simplefilter("ignore", UserWarning)
        return az.loo(idata, pointwise=True, var_name="trait")
