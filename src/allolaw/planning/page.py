"""The plan page: assurance curves, the designs table with Monte Carlo SEs, the assumptions.

One self-contained HTML file (template ``templates/plan.html.j2``, the reports' own
``style.css`` inlined; figures are inline SVG drawn here, no scripts).
"""

from __future__ import annotations

import datetime as dt
import html
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from jinja2 import Environment, PackageLoader, StrictUndefined
from markupsafe import Markup

from allolaw import __version__
from allolaw.io import write_text
from allolaw.planning.design import Plan
from allolaw.planning.simulate import DesignPrior

__all__ = ["assurance_svg", "render_plan_page"]

_COLOURS = ("#1f5f8b", "#b5521b", "#2e7d32", "#6a3d9a", "#8c6d1f", "#c2185b", "#00838f",
            "#555555")
# reliability of measured size below which the fast analysis was seen to undercover
# (90 % intervals covered 0.76 at reliability 0.5, 0.90-0.91 at 0.8; tests/test_planning_approx)
_RELIABILITY_WARN = 0.7


def render_plan_page(plan: Plan, prior: DesignPrior, summary: pd.DataFrame,
                     smallest: pd.DataFrame, out: str | Path, *,
                     mcmc: pd.DataFrame | None = None) -> Path:
    """Write the plan page to ``out`` and return its path."""
    env = Environment(loader=PackageLoader("allolaw.report", "templates"), autoescape=True,
                      undefined=StrictUndefined, trim_blocks=True, lstrip_blocks=True)
    q = plan.question
    table = summary.copy()
    table["reliability"] = [_reliability(r) for r in table.itertuples()]
    panels = []
    for (taxa, reps), grp in table.groupby(["taxa", "replicates"], sort=True):
        panels.append({"title": f"{taxa} taxa, {reps} measurement(s) per species",
                       "svg": Markup(assurance_svg(grp, goal=q.goal))})
    context: dict[str, Any] = {
        "version": __version__,
        "generated": dt.datetime.now(dt.UTC).strftime("%Y-%m-%d %H:%M UTC"),
        "plan": plan, "prior_source": prior.source, "panels": panels,
        "rows": table.to_dict(orient="records"), "smallest": smallest.to_dict(orient="records"),
        "named": ", ".join(f"{n} ({v:g}, weight {w:g})" for n, v, w in q.exponents),
        "low_reliability": bool((table["reliability"] < _RELIABILITY_WARN).any()),
        "reliability_warn": _RELIABILITY_WARN,
        "mcmc": None if mcmc is None else _mcmc_summary(mcmc),
    }
    text = env.get_template("plan.html.j2").render(**context)
    write_text(out, text)
    return Path(out)


def assurance_svg(rows: pd.DataFrame, *, goal: float, width: int = 560, height: int = 320
                  ) -> str:
    """Assurance against species count, one line per size range and size error SD.

    Points carry ±2 Monte Carlo SE bars; the dashed line is the goal.
    """
    left, right, top, bottom = 56, 170, 16, 44
    pw, ph = width - left - right, height - top - bottom
    xs = np.log(rows["species"].to_numpy(dtype=float))
    x_lo, x_hi = float(xs.min()), float(xs.max())
    x_hi = x_hi if x_hi > x_lo else x_lo + 1.0

    def px(v: float) -> float:
        return left + (np.log(v) - x_lo) / (x_hi - x_lo) * pw

    def py(p: float) -> float:
        return top + (1.0 - p) * ph

    parts = [f'<rect x="{left}" y="{top}" width="{pw}" height="{ph}" fill="none" '
             'stroke="#999"/>']
    for p in (0.0, 0.25, 0.5, 0.75, 1.0):
        parts.append(f'<text x="{left - 6}" y="{py(p) + 4:.1f}" text-anchor="end" '
                     f'font-size="11">{p:g}</text>')
    for n in sorted(set(rows["species"])):
        parts.append(f'<text x="{px(n):.1f}" y="{top + ph + 16}" text-anchor="middle" '
                     f'font-size="11">{n}</text>')
    parts.append(f'<line x1="{left}" x2="{left + pw}" y1="{py(goal):.1f}" y2="{py(goal):.1f}" '
                 'stroke="#444" stroke-dasharray="5,4"><title>goal</title></line>')
    parts.append(f'<text x="{left + pw / 2}" y="{height - 6}" text-anchor="middle" '
                 'font-size="12">species (log scale)</text>')
    parts.append(f'<text x="14" y="{top + ph / 2}" font-size="12" text-anchor="middle" '
                 f'transform="rotate(-90 14 {top + ph / 2})">assurance</text>')
    groups = rows.groupby(["size_range", "size_error_sd"], sort=True)
    for i, ((rng, err), grp) in enumerate(groups):
        colour = _COLOURS[i % len(_COLOURS)]
        grp = grp.sort_values("species")
        pts = " ".join(f"{px(n):.1f},{py(a):.1f}" for n, a in zip(grp["species"],
                                                                  grp["assurance"], strict=True))
        label = html.escape(f"range {rng:g}, size error {err:g}")
        parts.append(f'<polyline points="{pts}" fill="none" stroke="{colour}" '
                     f'stroke-width="2"><title>{label}</title></polyline>')
        for n, a, se in zip(grp["species"], grp["assurance"], grp["assurance_se"], strict=True):
            lo, hi = max(a - 2 * se, 0.0), min(a + 2 * se, 1.0)
            parts.append(f'<line x1="{px(n):.1f}" x2="{px(n):.1f}" y1="{py(lo):.1f}" '
                         f'y2="{py(hi):.1f}" stroke="{colour}"/>'
                         f'<circle cx="{px(n):.1f}" cy="{py(a):.1f}" r="3" fill="{colour}">'
                         f'<title>{label}: {n} species, {a:.3f} ± {se:.3f}</title></circle>')
        y_leg = top + 14 + 18 * i
        parts.append(f'<line x1="{left + pw + 12}" x2="{left + pw + 30}" y1="{y_leg - 4}" '
                     f'y2="{y_leg - 4}" stroke="{colour}" stroke-width="2"/>'
                     f'<text x="{left + pw + 34}" y="{y_leg}" font-size="11">{label}</text>')
    return (f'<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 {width} {height}" '
            f'role="img" aria-label="assurance against species count">{"".join(parts)}</svg>')


def _reliability(row: Any) -> float:
    """Share of the variance of measured log size that is true variance."""
    tau2 = (row.size_range / 4.0) ** 2
    e2 = row.size_error_sd**2 / row.replicates
    return tau2 / (tau2 + e2)


def _mcmc_summary(mcmc: pd.DataFrame) -> dict[str, Any]:
    converged = (mcmc["rhat_max"] <= 1.01) & (mcmc["divergences"] == 0)
    within = mcmc["abs_difference"] <= 0.05
    return {"tables": len(mcmc), "within": int(within.sum()),
            "converged": int(converged.sum()), "within_converged": int(within[converged].sum()),
            "max_diff": float(mcmc["abs_difference"].max()),
            "rows": mcmc.to_dict(orient="records")}
