"""The page's verdict sections: curvature audit, breakpoint, model average and sensitivity.

Each reads what the compare stage wrote (``curvature_audit.json``, ``breakpoint.json``,
``headline.json``) and returns the words and numbers the page shows. A file written before
the verdicts existed is shown as it is, with a sentence saying that the verdict is missing.
"""

from __future__ import annotations

from typing import Any

from allolaw.report.formatting import fmt, unit_text

__all__ = ["average_section", "breakpoint_section", "curvature_section"]

_EVIDENCE_KEYS = ("bf_break", "posterior_prob_break", "prior_prob_break", "delta",
                  "p_abs_difference_above_delta", "prior_p_abs_difference_above_delta")
_ROW_KEYS = ("matched_model", "matched_check_verdict", "check_verdict", "verdict",
             "sentence", "prior_p_exponent_increases", "p_exponent_increases",
             "p_abs_difference_above_delta")
_STALE = "no verdict in this file (written by an older compare stage; rerun 'allolaw compare')"


def curvature_section(obj: Any) -> dict[str, Any] | None:
    """The four-way curvature verdict in plain words, with the numbers it rests on.

    Reads ``curvature_audit.json``: ``four_way_verdict``, ``verdict`` (the sentence),
    ``evidence`` (see :class:`allolaw.answers.curvature_verdict.AuditEvidence`),
    ``loo_differences``, ``local_exponent``, ``check_verdicts``.
    """
    if obj is None:
        return None
    crossings = _crossings(obj)
    if not obj.get("applicable", True):
        reason = str(obj.get("reason", "no reason given"))
        return {"answer": f"not audited ({reason})", "text": [], "numbers": [], "loo": [],
                "crossings": crossings}
    ev = obj.get("evidence") or {}
    four = obj.get("four_way_verdict")
    sentence = str(obj.get("verdict") or "")
    if not four:
        return {"answer": _STALE, "text": [sentence] if sentence else [], "numbers": [],
                "loo": list(obj.get("loo_differences") or []), "crossings": crossings}
    small = f"{ev['sd_small']:g}" if isinstance(ev.get("sd_small"), int | float) else "–"
    numbers: list[tuple[str, Any]] = [
        ("taxon level judged", f"{ev.get('level')} ({ev.get('n_taxa')} taxa)"),
        (f"P(SD of taxon exponents > {small}), taxa without curvature: posterior (prior)",
         f"{fmt(ev.get('p_spread'))} ({fmt(ev.get('prior_p_spread'))})"),
        ("posterior SD of that SD / its prior SD", ev.get("sd_contraction")),
        (f"P(SD of taxon exponents > {small}) with a shared curvature",
         ev.get("p_spread_after_curve")),
        ("share of the spread removed by curvature, median (90% interval)",
         _interval(ev.get("share"))),
        ("trend of taxon exponents with taxon mean log size", _interval(ev.get("trend"))),
        ("2c, the trend one curved law predicts", _interval(ev.get("twice_curvature"))),
        ("trend − 2c", _interval(ev.get("trend_minus_2c"))),
        ("share of the variance of log size within taxa", ev.get("within_size_share")),
    ]
    loo = ev.get("loo_taxa_over_curve")
    if isinstance(loo, dict):
        numbers.append(("elpd_loo of taxon exponents beyond one curved law",
                        f"{fmt(loo.get('elpd_difference'))} ± "
                        f"{fmt(loo.get('elpd_difference_se'))}"))
    for key, value in (obj.get("check_verdicts") or {}).items():
        numbers.append((f"check verdict of the {key} model", value))
    return {"answer": f"{four}.", "text": [sentence], "numbers": numbers,
            "loo": list(obj.get("loo_differences") or []), "crossings": crossings}


def breakpoint_section(obj: Any, comp: Any = None) -> dict[str, Any] | None:
    """The break verdict (Savage–Dickey and LOO against the matched model without break).

    Every posterior probability is shown beside its prior probability. ``comp`` (the
    comparison table) is not needed any more and is accepted for the caller's convenience.
    """
    del comp
    if obj is None:
        return None
    if not obj.get("applicable", True) or not obj.get("models"):
        reason = str(obj.get("reason", "no breakpoint model"))
        return {"answer": f"not assessed ({reason})", "supported": None, "rows": [],
                "rule": None}
    rows = []
    for model, m in obj["models"].items():
        ev = {k: None for k in _EVIDENCE_KEYS} | (m.get("evidence") or {})
        row = {k: None for k in _ROW_KEYS} | m
        rows.append({"model": model, **row, "evidence": ev,
                     "loo": m.get("loo_against_matched") or None,
                     "supported": m.get("verdict") == "supported" if m.get("verdict")
                     else None})
    best = rows[0]
    size = best.get("break_size") or {}
    if not best.get("verdict"):
        answer = _STALE
    else:
        ev = best["evidence"]
        answer = (
            f"{best['verdict']} — model {best['model']} against its matched model without "
            f"the break ({best.get('matched_model')}): {best.get('sentence', '')} If there is "
            f"a break, it lies at {fmt(size.get('median'))} {unit_text(size.get('unit', ''))} (90% "
            f"interval {fmt(size.get('q05'))} to {fmt(size.get('q95'))}); P(|difference| > "
            f"{fmt(ev.get('delta'))}) = {fmt(ev.get('p_abs_difference_above_delta'))} against "
            f"{fmt(ev.get('prior_p_abs_difference_above_delta'))} before any data."
        )
        if best.get("check_verdict") == "fail" or best.get("matched_check_verdict") == "fail":
            answer += " Caution: a check of these fits failed."
    return {"answer": answer, "supported": best["supported"], "rows": rows,
            "rule": ("A break is called supported when the Savage–Dickey Bayes factor for a "
                     "change of exponent is at least 10 (strong on Jeffreys' scale) and the "
                     "breakpoint model predicts left-out species at least as well as its "
                     "matched model without the break (LOO gain above 0); unclear when the "
                     "two disagree (a strong Bayes factor with a LOO loss, or a clear LOO gain "
                     "of more than 2 standard errors and 4 elpd without a strong Bayes "
                     "factor); not supported otherwise. The models are nested, so the Bayes "
                     "factor carries the evidence; LOO differences below about 4 elpd have an "
                     "unreliable standard error (Sivula et al. 2022).")}


def average_section(obj: Any, primary: str = "") -> dict[str, Any] | None:
    """Stacking weights, averaged exponent beside the primary one, and sensitivity sentences.

    Reads ``headline.json``. The primary model's sensitivity comes first; ``changed`` names
    the other models whose answer changes under power-scaling.
    """
    if obj is None:
        return None
    out: dict[str, Any] = {"weights": obj.get("stacking_weights") or {},
                           "sentence": None, "averaged": None, "primary": None,
                           "disagree": None, "sensitivity": []}
    if obj.get("applicable", True):
        out.update(sentence=obj.get("sentence"), averaged=obj.get("averaged_exponent"),
                   primary=obj.get("primary_exponent"), disagree=obj.get("disagree"))
    else:
        out["sentence"] = f"No model average: {obj.get('reason', 'no reason given')}."
    for model, sens in (obj.get("sensitivity") or {}).items():
        if not sens.get("ranges"):
            out["sensitivity"].append({"model": model, "changes": None, "sentence":
                                       f"not assessed ({sens.get('reason', 'no reason')})",
                                       "ranges": []})
            continue
        ranges = [(name, lo, hi, (sens.get("base_probs") or {}).get(name))
                  for name, (lo, hi) in sens["ranges"].items()]
        out["sensitivity"].append({"model": model, "changes": sens.get("changes"),
                                   "sentence": sens.get("sentence"), "ranges": ranges})
    out["sensitivity"].sort(key=lambda s: s["model"] != primary)
    out["changed"] = [s["model"] for s in out["sensitivity"]
                      if s["changes"] and s["model"] != primary]
    return out


def _interval(value: Any) -> str:
    if not isinstance(value, dict):
        return fmt(value)
    return f"{fmt(value.get('median'))} ({fmt(value.get('q05'))} to {fmt(value.get('q95'))})"


def _crossings(obj: dict[str, Any]) -> list[dict[str, Any]]:
    rows = []
    for model, local in (obj.get("local_exponent") or {}).items():
        for c in (local or {}).get("crossings", []):
            rows.append({"model": model, "unit": local.get("size_unit", ""), **c})
    return rows
