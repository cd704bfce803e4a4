"""Hand-built inline SVG charts for the audit report: scatter with laws, forest, bands, histograms.

Every figure is a self-contained ``<svg>`` string (no scripts, no external fonts or images),
so the report opens offline. Points carry an SVG ``<title>`` so a browser shows the species
name on hover. Text is escaped here; the template marks these strings safe.

Colours follow the Okabe–Ito palette, chosen to stay distinguishable under the common forms of
colour blindness.

References
----------
Okabe, M., Ito, K. (2008). Color Universal Design (CUD): how to make figures and
presentations that are friendly to colorblind people. J*FLY, https://jfly.uni-koeln.de/color/.

The drawing primitives (axes, ticks, bands, points, legend) are in :mod:`allolaw.report.svg`.
"""

from __future__ import annotations

from collections.abc import Sequence
from html import escape

from allolaw.report.svg import (
    DASHES,
    INK,
    MUTED,
    POP,
    Axes,
    Band,
    Series,
    band_edges,
    lin_range,
    log_range,
    truncate,
)

__all__ = [
    "OKABE_ITO",
    "density_overlay_svg",
    "forest_svg",
    "histogram_svg",
    "line_band_svg",
    "scatter_law_svg",
    "taxon_colours",
]

# Okabe & Ito (2008): orange, sky blue, bluish green, yellow, blue, vermillion, reddish purple.
# Black is kept for the population law; yellow last because it is faint on white.
OKABE_ITO = ["#E69F00", "#56B4E9", "#009E73", "#0072B2", "#D55E00", "#CC79A7", "#F0E442"]


def taxon_colours(taxa: Sequence[str]) -> dict[str, str]:
    """Map taxon labels (sorted) to Okabe–Ito colours, cycling when there are more than 7."""
    return {t: OKABE_ITO[i % len(OKABE_ITO)] for i, t in enumerate(sorted(set(taxa)))}


def scatter_law_svg(
    series: Sequence[Series],
    bands: Sequence[Band],
    *,
    x_label: str,
    y_label: str,
    reference_lines: Sequence[Band] = (),
    title: str = "",
    width: int = 760,
    height: int = 470,
) -> str:
    """Log-log scatter (original units) with posterior law lines and bands.

    Parameters
    ----------
    series
        Points per taxon, values in the original (canonical) unit, all positive.
    bands
        Posterior median laws and their bands, same units; drawn under the points.
    x_label, y_label
        Axis labels including the unit.
    reference_lines
        Lines for named exponents (drawn dashed, labelled at the right end).
    """
    xs = [v for s in series for v in s.x] + [v for b in bands for v in b.x]
    ys = [v for s in series for v in s.y] + [v for b in bands for v in b.mid]
    ys += band_edges(bands)
    ax = Axes(width, height, log_range(xs), log_range(ys), log_x=True, log_y=True,
               right=215)
    parts = [ax.frame(x_label, y_label, title)]
    parts.append(f'<g clip-path="url(#{ax.clip_id})">')
    for band in bands:
        parts.append(ax.band(band))
    for ref in reference_lines:
        parts.append(ax.line(ref))
    for band in bands:
        parts.append(ax.line(band))
    for s in series:
        parts.append(ax.points(s))
    parts.append("</g>")
    legend = [(s.label, s.colour, "point") for s in series]
    legend += [(b.label, b.colour, b.dash or "solid") for b in bands if b.label]
    legend += [(r.label, r.colour, r.dash or "solid") for r in reference_lines if r.label]
    parts.append(ax.legend(legend))
    return ax.wrap("".join(parts), title or f"{y_label} against {x_label}")


def forest_svg(
    rows: Sequence[tuple[str, float, float, float]],
    *,
    x_label: str,
    marks: Sequence[tuple[str, float]] = (),
    population: tuple[float, float, float] | None = None,
    colours: dict[str, str] | None = None,
    title: str = "",
    width: int = 760,
) -> str:
    """Forest plot: one row per taxon with the median and the 90% interval.

    Parameters
    ----------
    rows
        ``(label, q05, q50, q95)`` per taxon.
    marks
        Named values drawn as labelled vertical dashed lines.
    population
        ``(q05, q50, q95)`` of the population value, drawn as a shaded band.
    """
    height = 90 + 26 * max(len(rows), 1)
    values = [v for r in rows for v in r[1:]] + [m[1] for m in marks]
    if population:
        values += list(population)
    lo, hi = lin_range(values)
    ax = Axes(width, height, (lo, hi), (0.0, len(rows) + 0.0), log_x=False, log_y=False,
               left=190, bottom=50, top=36 if marks else 18)
    parts = [ax.frame(x_label, "", title, y_ticks=False)]
    if population:
        x0, x1 = ax.px(population[0]), ax.px(population[2])
        parts.append(
            f'<rect x="{x0:.1f}" y="{ax.top}" width="{max(x1 - x0, 1):.1f}" '
            f'height="{ax.plot_h}" fill="{POP}" opacity="0.08"><title>population 90% '
            f"interval {population[0]:.3f} to {population[2]:.3f}</title></rect>"
        )
        parts.append(ax.vline(population[1], POP, None, ""))
    for i, (name, value) in enumerate(marks):
        parts.append(ax.vline(value, MUTED, DASHES[i % len(DASHES)], f"{name} ({value:g})",
                              stagger=i))
    for i, (label, q05, q50, q95) in enumerate(rows):
        y = ax.py(len(rows) - i - 0.5)
        colour = (colours or {}).get(label, INK)
        tip = escape(f"{label}: median {q50:.3f}, 90% interval {q05:.3f} to {q95:.3f}")
        parts.append(
            f'<g><title>{tip}</title>'
            f'<line x1="{ax.px(q05):.1f}" x2="{ax.px(q95):.1f}" y1="{y:.1f}" y2="{y:.1f}" '
            f'stroke="{colour}" stroke-width="3"/>'
            f'<circle cx="{ax.px(q50):.1f}" cy="{y:.1f}" r="5" fill="{colour}" '
            f'stroke="{INK}" stroke-width="0.8"/></g>'
            f'<text x="{ax.left - 8}" y="{y + 4:.1f}" text-anchor="end" font-size="12" '
            f'fill="{INK}">{escape(truncate(label, 28))}</text>'
        )
    return ax.wrap("".join(parts), title or x_label)


def line_band_svg(
    bands: Sequence[Band],
    *,
    x_label: str,
    y_label: str,
    log_x: bool = False,
    marks_y: Sequence[tuple[str, float]] = (),
    marks_x: Sequence[tuple[str, float]] = (),
    title: str = "",
    width: int = 760,
    height: int = 360,
) -> str:
    """Lines with optional bands (local exponent curve, posterior densities).

    ``marks_y`` draws labelled horizontal dashed lines (named exponents); ``marks_x`` vertical
    ones (e.g. the reference size).
    """
    xs = [v for b in bands for v in b.x] + [m[1] for m in marks_x]
    ys = [v for b in bands for v in b.mid] + [m[1] for m in marks_y]
    ys += band_edges(bands)
    x_range = log_range(xs) if log_x else lin_range(xs, pad=0.0)
    ax = Axes(width, height, x_range, lin_range(ys), log_x=log_x, log_y=False, right=215,
               top=30 if marks_x else 18)
    parts = [ax.frame(x_label, y_label, title)]
    parts.append(f'<g clip-path="url(#{ax.clip_id})">')
    for band in bands:
        parts.append(ax.band(band))
    for i, (name, value) in enumerate(marks_y):
        parts.append(ax.hline(value, MUTED, DASHES[i % len(DASHES)], f"{name} ({value:g})"))
    for name, value in marks_x:
        parts.append(ax.vline(value, MUTED, "3 3", name))
    for band in bands:
        parts.append(ax.line(band))
    parts.append("</g>")
    legend = [(b.label, b.colour, b.dash or "solid") for b in bands if b.label]
    parts.append(ax.legend(legend))
    return ax.wrap("".join(parts), title or y_label)


def histogram_svg(
    edges: Sequence[float],
    counts: Sequence[float],
    *,
    x_label: str,
    y_label: str,
    expected: float | None = None,
    title: str = "",
    width: int = 380,
    height: int = 260,
) -> str:
    """Histogram (e.g. LOO-PIT values) with an optional expected-count line (uniform)."""
    top = max([*counts, expected or 0, 1]) * 1.15
    ax = Axes(width, height, (float(edges[0]), float(edges[-1])), (0.0, top), log_x=False,
               log_y=False, right=16, left=62)
    parts = [ax.frame(x_label, y_label, title)]
    for i, count in enumerate(counts):
        x0, x1 = ax.px(edges[i]), ax.px(edges[i + 1])
        y = ax.py(count)
        parts.append(
            f'<rect x="{x0 + 1:.1f}" y="{y:.1f}" width="{max(x1 - x0 - 2, 1):.1f}" '
            f'height="{ax.py(0) - y:.1f}" fill="{OKABE_ITO[1]}"><title>{edges[i]:.2f}–'
            f"{edges[i + 1]:.2f}: {count:g}</title></rect>"
        )
    if expected is not None:
        parts.append(ax.hline(expected, INK, "5 3", ""))
    return ax.wrap("".join(parts), title or x_label)


def density_overlay_svg(
    grid: Sequence[float],
    observed: Sequence[float],
    q05: Sequence[float],
    q50: Sequence[float],
    q95: Sequence[float],
    *,
    x_label: str,
    title: str = "",
    width: int = 380,
    height: int = 260,
) -> str:
    """Posterior predictive density band (5–95%) and median, with the observed density."""
    bands = [
        Band(grid, q50, q05, q95, label="predictive (90% band)", colour=OKABE_ITO[3], width=1.5),
        Band(grid, observed, label="observed", colour=OKABE_ITO[4], width=2.5),
    ]
    ys = [*q95, *observed, 0.0]
    ax = Axes(width, height, lin_range(grid, pad=0.0), (0.0, max(ys) * 1.1 or 1.0),
               log_x=False, log_y=False, right=16, left=62)
    parts = [ax.frame(x_label, "density", title)]
    for band in bands:
        parts.append(ax.band(band))
    for band in bands:
        parts.append(ax.line(band))
    parts.append(ax.legend([(b.label, b.colour, "solid") for b in bands], inside=True))
    return ax.wrap("".join(parts), title or "posterior predictive density")
