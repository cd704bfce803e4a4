"""Within- versus between-species exponents of a fit with a within/between split.

Reads the posterior of a model built with ``within_species: separate`` (or
``separate_by_species``): ``within_exponent`` (the slope of log size around its species mean)
and ``exponent`` (the slope of species-mean log size). NumPy only.

The verdict on the difference ``within_exponent − exponent`` has three outcomes
(:func:`judge_within_between`): "steeper" when its central interval lies above 0, "shallower"
when it lies below 0, otherwise "no difference shown" (the data do not show the two exponents
to differ; this does not show that they are equal).

References
----------
van de Pol, M. & Wright, J. (2009). A simple method for distinguishing within- versus
between-subject effects using mixed models. Animal Behaviour 77, 753-758.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np
import pandas as pd

from allolaw.answers.draws import flat
from allolaw.answers.hypotheses import COLUMNS, draws_hypotheses
from allolaw.answers.node_tree import spec_dict

__all__ = ["NO_DIFFERENCE", "SHALLOWER", "STEEPER", "compare_within_between",
           "judge_within_between", "within_between_block", "within_hypotheses"]

#: The ``parameter`` of the within-species rows of ``hypotheses.csv``.
WITHIN = "within_exponent"

#: Verdicts on the difference within − between (the ``verdict`` of the comparison).
STEEPER = "steeper"
SHALLOWER = "shallower"
NO_DIFFERENCE = "no difference shown"


def compare_within_between(idata: Any, *, interval: float = 0.9) -> dict[str, Any] | None:
    """Posterior summary of ``within_exponent − exponent``, or ``None`` without a split.

    Parameters
    ----------
    idata
        InferenceData with ``posterior`` variables ``exponent`` and ``within_exponent``.
    interval
        Probability of the central interval reported (default 90%).

    Returns
    -------
    dict or None
        ``within``, ``between`` and ``difference`` (each ``median``, ``low``, ``high``) and
        ``p_within_steeper`` = P(within exponent > between exponent), the share of draws, and
        ``verdict``, :func:`judge_within_between` of the difference's central interval.
    """
    posterior = idata.posterior
    if "within_exponent" not in posterior or "exponent" not in posterior:
        return None
    within = np.asarray(posterior["within_exponent"]).ravel()
    between = np.asarray(posterior["exponent"]).ravel()
    difference = within - between
    tail = (1.0 - interval) / 2.0

    def summary(draws: np.ndarray) -> dict[str, float]:
        low, median, high = np.quantile(draws, [tail, 0.5, 1.0 - tail])
        return {"median": float(median), "low": float(low), "high": float(high)}

    diff = summary(difference)
    return {
        "interval": interval,
        "within": summary(within),
        "between": summary(between),
        "difference": diff,
        "p_within_steeper": float(np.mean(difference > 0)),
        "verdict": judge_within_between(diff["low"], diff["high"]),
    }


def judge_within_between(low: float, high: float) -> str:
    """Verdict on within − between from the ends of its central posterior interval.

    Parameters
    ----------
    low, high
        Lower and upper end of the central interval of the difference within − between.

    Returns
    -------
    str
        :data:`STEEPER` when the interval lies above 0 (``low > 0``), :data:`SHALLOWER` when it
        lies below 0 (``high < 0``), else :data:`NO_DIFFERENCE`. With a calibrated 90% interval
        and equal exponents, "steeper" or "shallower" is said with probability about 0.10.
    """
    if low > 0:
        return STEEPER
    if high < 0:
        return SHALLOWER
    return NO_DIFFERENCE


def within_hypotheses(idata: Any, spec: Any, settings: dict[str, Any]) -> pd.DataFrame:
    """Rows of ``hypotheses.csv`` for the within-species exponent (empty without a split).

    The same named values, bounds and prior weights as the dataset's exponent
    (:func:`allolaw.answers.hypotheses.draws_hypotheses`), against the spec's normal prior
    of ``within_exponent``; ``parameter`` is ``within_exponent``, ``level`` and ``taxon`` empty.
    """
    if WITHIN not in idata.posterior:
        return pd.DataFrame(columns=COLUMNS)
    spec_d = spec_dict(spec)
    prior = spec_d["priors"][WITHIN]
    rows = draws_hypotheses(flat(idata.posterior[WITHIN]), float(prior["mean"]),
                            float(prior["sd"]), settings)
    table = pd.DataFrame(rows)
    table["model"] = str(spec_d.get("name", idata.attrs.get("model", "")))
    table["parameter"] = WITHIN
    table["level"] = ""
    table["taxon"] = ""
    table["dataset"] = str(idata.attrs.get("dataset", ""))
    for column in COLUMNS:
        if column not in table:
            table[column] = np.nan
    return table[COLUMNS + [c for c in table.columns if c not in COLUMNS]]


def within_between_block(fits: Mapping[str, Any], hyp: pd.DataFrame,
                         verdicts: Mapping[str, str], *, interval: float = 0.9
                         ) -> dict[str, Any]:
    """The ``within_between`` block of ``headline.json``: one entry per model with a split.

    Each entry is :func:`compare_within_between` plus ``within_probs`` and
    ``between_probs`` (posterior probability of each named value and "another value", from
    ``hyp``, the rows of ``hypotheses.csv``) and the model's ``check_verdict``.
    ``{"applicable": false, "reason": ...}`` when no fit has a split.
    """
    models: dict[str, Any] = {}
    for model, idata in fits.items():
        summary = compare_within_between(idata, interval=interval)
        if summary is None:
            continue
        summary["within_probs"] = _named_probs(hyp, model, WITHIN)
        summary["between_probs"] = _named_probs(hyp, model, "exponent")
        summary["check_verdict"] = verdicts.get(model, "not checked")
        models[model] = summary
    if not models:
        return {"applicable": False,
                "reason": "no model of this dataset separates within- and between-species "
                          "exponents (within_species: together)"}
    return {"applicable": True, "models": models}


def _named_probs(hyp: pd.DataFrame, model: str, parameter: str) -> dict[str, float]:
    if hyp is None or hyp.empty:
        return {}
    taxon = hyp["taxon"].fillna("").astype(str)
    rows = hyp[(hyp["model"] == model) & (hyp["parameter"] == parameter) & (taxon == "")
               & hyp["kind"].isin(["point", "other"])]
    return {str(r.hypothesis): float(r.posterior_prob) for r in rows.itertuples()}
