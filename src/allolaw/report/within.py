"""Within- versus between-species exponents on the page: the words and the scatter lines.

:func:`within_section` turns the ``within_between`` block of ``headline.json``
(:func:`allolaw.answers.within.within_between_block`) into plain sentences and table rows;
the sentence states the entry's ``verdict`` ("steeper", "shallower" or "no difference shown",
decided in the answers stage from the difference's central interval), never a direction the
interval does not support;
:func:`within_lines` draws, for a fit with a within/between split, one short line per species
through its mean log size and mean log trait with the within-species exponent, beside the
between-species law (the population law of species means, drawn by
:mod:`allolaw.report.figures`).

References
----------
van de Pol, M. & Wright, J. (2009). A simple method for distinguishing within- versus
between-subject effects using mixed models. Animal Behaviour 77, 753-758.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from allolaw.answers.within import NO_DIFFERENCE, SHALLOWER, STEEPER
from allolaw.report.formatting import fmt
from allolaw.report.svg import Band

__all__ = ["within_lines", "within_section"]

_WITHIN = "within_exponent"


def within_section(head: dict[str, Any] | None, primary: str) -> dict[str, Any] | None:
    """Rows and sentences of the within/between comparison, or ``None`` when not applicable.

    Parameters
    ----------
    head
        The content of ``headline.json`` (``None`` when missing).
    primary
        The primary model: its sentence is ``answer``, shown in the headline.

    Returns
    -------
    dict or None
        ``answer`` (the primary model's sentence, else the first model's), ``rows`` (one per
        model with a split: ``model``, ``within``, ``between``, ``difference``,
        ``p_within_steeper``, ``verdict``, ``sentence``, ``check_verdict``), ``primary_split``
        (the primary model has the split: its population exponent is the between-species
        one), ``interval``.
    """
    block = (head or {}).get("within_between") or {}
    if not block.get("applicable") or not block.get("models"):
        return None
    rows = []
    for model, entry in block["models"].items():
        rows.append({"model": model, **entry, "sentence": _sentence(entry)})
    chosen = next((r for r in rows if r["model"] == primary), rows[0])
    answer = chosen["sentence"]
    if chosen["model"] != primary:
        answer = f"Model {chosen['model']}: {answer}"
    return {"answer": answer, "rows": rows, "primary_split": chosen["model"] == primary,
            "interval": float(rows[0].get("interval") or 0.9)}


def _sentence(entry: dict[str, Any]) -> str:
    level = f"{100 * float(entry.get('interval') or 0.9):.0f}%"
    w, b, d = entry["within"], entry["between"], entry["difference"]
    p = float(entry["p_within_steeper"])
    numbers = (f"difference within − between {fmt(d['median'])}, {level} interval "
               f"{fmt(d['low'])} to {fmt(d['high'])}")
    verdict = entry.get("verdict")
    if verdict in (STEEPER, SHALLOWER):
        told = (f"The within-species exponent is {verdict} by {fmt(abs(d['median']))} "
                f"({numbers})")
    elif verdict == NO_DIFFERENCE:
        told = (f"The data do not show the two exponents to differ: the {level} interval of "
                f"the difference includes 0 ({numbers})")
    else:
        told = (f"No verdict on the difference was recorded (headline.json written before "
                f"verdicts; rerun the compare stage) ({numbers})")
    text = (
        f"Within species, the trait scales with size with exponent {fmt(w['median'])} "
        f"({level} interval {fmt(w['low'])} to {fmt(w['high'])}); between species (the law of "
        f"species means) with exponent {fmt(b['median'])} ({fmt(b['low'])} to "
        f"{fmt(b['high'])}). {told}; the probability that the within-species "
        f"exponent is steeper than the between-species exponent is {p:.3f}."
    )
    tops = [(label, _top(entry.get(key) or {}))
            for label, key in (("within species", "within_probs"),
                               ("between species", "between_probs"))]
    named = [f"{label} {name} (probability {prob:.3f})" for label, (name, prob) in tops if name]
    if named:
        text += " Most probable named value: " + "; ".join(named) + "."
    if entry.get("check_verdict") == "fail":
        text += " Caution: the check of this fit failed."
    return text


def _top(probs: dict[str, float]) -> tuple[str | None, float]:
    if not probs:
        return None, float("nan")
    name = max(probs, key=lambda k: probs[k])
    return name, float(probs[name])


def within_lines(idata: Any, clean: pd.DataFrame, levels: list[str], colours: dict[str, str],
                 taxa: list[str]) -> list[Band]:
    """One line per species with the within-species exponent, through the species' means.

    Each line runs over the species' observed log sizes, through (mean log size, mean log
    trait) of its rows, with the posterior median of the within-species exponent (the
    species' own, ``taxon_within_exponent__<level>``, when the fit has one); coloured like
    the species' points. Empty when the fit has no split or the table no species level.
    """
    post = idata.posterior
    if _WITHIN not in post or not levels or levels[-1] not in clean.columns:
        return []
    level = levels[-1]
    slope = float(np.median(np.asarray(post[_WITHIN].values, dtype=float)))
    own = post.get(f"taxon_within_exponent__{level}")
    own_slopes: dict[str, float] = {}
    if own is not None:
        medians = own.median(dim=("chain", "draw"))
        own_slopes = {str(k): float(v) for k, v in zip(medians[level].values, medians.values,
                                                        strict=True)}
    frame = pd.DataFrame({"group": clean[level].astype(str).to_numpy(),
                          "x": clean["log_size"].astype(float).to_numpy(),
                          "y": clean["log_trait"].astype(float).to_numpy(), "taxon": taxa})
    lines = []
    for group, rows in frame.groupby("group", sort=True):
        if len(rows) < 2 or np.ptp(rows["x"].to_numpy()) == 0:
            continue
        b = own_slopes.get(str(group), slope)
        x = np.array([rows["x"].min(), rows["x"].max()])
        y = rows["y"].mean() + b * (x - rows["x"].mean())
        label = "" if lines else "within-species lines"
        lines.append(Band(np.exp(x), np.exp(y), label=label,
                          colour=colours.get(rows["taxon"].iloc[0], "#444444"), width=1.0))
    return lines
