"""The SVG drawing layer under :mod:`allolaw.report.charts`: axes mapping data to pixels, ticks,
lines, bands, points with hover titles, legends. Text is escaped here.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from html import escape

import numpy as np

__all__ = ["Band", "Series"]
INK = "#1d2430"
MUTED = "#6b7280"
GRID = "#e5e7eb"
POP = "#111111"
DASHES = ["6 4", "2 3", "10 3 2 3", "1 2", "8 2"]
FONT = "font-family=\"system-ui, -apple-system, 'Segoe UI', Roboto, sans-serif\""


@dataclass
class Band:
    """A posterior median line with its lower and upper band, on a shared x grid."""

    x: Sequence[float]
    mid: Sequence[float]
    lo: Sequence[float] | None = None
    hi: Sequence[float] | None = None
    label: str = ""
    colour: str = POP
    width: float = 2.0
    dash: str | None = None


@dataclass
class Series:
    """Scatter points of one group (taxon) with their hover titles."""

    x: Sequence[float]
    y: Sequence[float]
    titles: Sequence[str]
    label: str
    colour: str
    flagged: Sequence[bool] = field(default_factory=list)


# --- private helpers ------------------------------------------------------------------------
_CLIP_COUNTER = [0]


class Axes:
    """Maps data to pixels; draws frame, ticks, lines, bands, points and a legend."""

    def __init__(
        self,
        width: int,
        height: int,
        x_range: tuple[float, float],
        y_range: tuple[float, float],
        *,
        log_x: bool,
        log_y: bool,
        left: int = 72,
        right: int = 20,
        top: int = 18,
        bottom: int = 56,
    ) -> None:
        self.width, self.height = width, height
        self.left, self.right, self.top, self.bottom = left, right, top, bottom
        self.plot_w = width - left - right
        self.plot_h = height - top - bottom
        self.log_x, self.log_y = log_x, log_y
        self.x0, self.x1 = (math.log10(v) for v in x_range) if log_x else x_range
        self.y0, self.y1 = (math.log10(v) for v in y_range) if log_y else y_range
        _CLIP_COUNTER[0] += 1
        self.clip_id = f"plotarea{_CLIP_COUNTER[0]}"

    def px(self, x: float) -> float:
        t = math.log10(x) if self.log_x else x
        return self.left + (t - self.x0) / ((self.x1 - self.x0) or 1.0) * self.plot_w

    def py(self, y: float) -> float:
        t = math.log10(y) if self.log_y else y
        return self.top + self.plot_h - (t - self.y0) / ((self.y1 - self.y0) or 1.0) * self.plot_h

    def wrap(self, body: str, label: str) -> str:
        return (
            f'<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 {self.width} {self.height}" '
            f'width="{self.width}" height="{self.height}" role="img" '
            f'aria-label="{escape(label)}" {FONT} class="figure">'
            f'<defs><clipPath id="{self.clip_id}"><rect x="{self.left}" y="{self.top}" '
            f'width="{self.plot_w}" height="{self.plot_h}"/></clipPath></defs>{body}</svg>'
        )

    def frame(self, x_label: str, y_label: str, title: str, *, y_ticks: bool = True) -> str:
        parts = [
            f'<rect x="{self.left}" y="{self.top}" width="{self.plot_w}" '
            f'height="{self.plot_h}" fill="#ffffff" stroke="{MUTED}" stroke-width="0.8"/>'
        ]
        for value, text in _ticks(self.x0, self.x1, self.log_x):
            x = self.px(value)
            parts.append(
                f'<line x1="{x:.1f}" x2="{x:.1f}" y1="{self.top}" '
                f'y2="{self.top + self.plot_h}" stroke="{GRID}" stroke-width="0.8"/>'
                f'<text x="{x:.1f}" y="{self.top + self.plot_h + 16}" text-anchor="middle" '
                f'font-size="11" fill="{MUTED}">{text}</text>'
            )
        if y_ticks:
            for value, text in _ticks(self.y0, self.y1, self.log_y):
                y = self.py(value)
                parts.append(
                    f'<line x1="{self.left}" x2="{self.left + self.plot_w}" y1="{y:.1f}" '
                    f'y2="{y:.1f}" stroke="{GRID}" stroke-width="0.8"/>'
                    f'<text x="{self.left - 6}" y="{y + 4:.1f}" text-anchor="end" '
                    f'font-size="11" fill="{MUTED}">{text}</text>'
                )
        parts.append(
            f'<text x="{self.left + self.plot_w / 2:.1f}" y="{self.height - 14}" '
            f'text-anchor="middle" font-size="13" fill="{INK}">{escape(x_label)}</text>'
        )
        if y_label:
            cy = self.top + self.plot_h / 2
            parts.append(
                f'<text transform="translate(16 {cy:.1f}) rotate(-90)" text-anchor="middle" '
                f'font-size="13" fill="{INK}">{escape(y_label)}</text>'
            )
        return "".join(parts)

    def _path(self, xs: Sequence[float], ys: Sequence[float]) -> str:
        pts = [
            f"{self.px(x):.1f},{self.py(y):.1f}"
            for x, y in zip(xs, ys, strict=True)
            if _finite(x, self.log_x) and _finite(y, self.log_y)
        ]
        return "M" + " L".join(pts) if pts else ""

    def line(self, band: Band) -> str:
        d = self._path(band.x, band.mid)
        if not d:
            return ""
        dash = f' stroke-dasharray="{band.dash}"' if band.dash else ""
        return (
            f'<path d="{d}" fill="none" stroke="{band.colour}" stroke-width="{band.width}"'
            f'{dash}><title>{escape(band.label)}</title></path>'
        )

    def band(self, band: Band) -> str:
        if band.lo is None or band.hi is None:
            return ""
        upper = self._path(band.x, band.hi)
        lower = self._path(list(band.x)[::-1], list(band.lo)[::-1])
        if not upper or not lower:
            return ""
        return (
            f'<path d="{upper} L{lower[1:]} Z" fill="{band.colour}" opacity="0.16" '
            f'stroke="none"/>'
        )

    def points(self, s: Series) -> str:
        flagged = list(s.flagged) or [False] * len(s.x)
        out = []
        for x, y, tip, flag in zip(s.x, s.y, s.titles, flagged, strict=True):
            if not (_finite(x, self.log_x) and _finite(y, self.log_y)):
                continue
            stroke = f'stroke="{INK}" stroke-width="1.6"' if flag else (
                'stroke="#ffffff" stroke-width="0.8"')
            out.append(
                f'<circle class="pt" cx="{self.px(x):.1f}" cy="{self.py(y):.1f}" r="4.2" '
                f'fill="{s.colour}" {stroke}><title>{escape(tip)}</title></circle>'
            )
        return "".join(out)

    def hline(self, y: float, colour: str, dash: str | None, label: str) -> str:
        py = self.py(y)
        dash_attr = f' stroke-dasharray="{dash}"' if dash else ""
        text = (
            f'<text x="{self.left + self.plot_w - 4}" y="{py - 4:.1f}" text-anchor="end" '
            f'font-size="11" fill="{colour}">{escape(label)}</text>' if label else ""
        )
        return (
            f'<line x1="{self.left}" x2="{self.left + self.plot_w}" y1="{py:.1f}" y2="{py:.1f}" '
            f'stroke="{colour}" stroke-width="1.2"{dash_attr}/>{text}'
        )

    def vline(self, x: float, colour: str, dash: str | None, label: str, *,
              stagger: int = 0) -> str:
        px = self.px(x)
        dash_attr = f' stroke-dasharray="{dash}"' if dash else ""
        # keep the label inside the figure: anchored at its end near the right edge
        room = 3.2 * len(label)
        anchor = ("end" if px + room > self.width - 4 else
                  "start" if px - room < 4 else "middle")
        text = (
            f'<text x="{px:.1f}" y="{self.top - 4 - 12 * (stagger % 2):.1f}" '
            f'text-anchor="{anchor}" font-size="11" fill="{colour}">{escape(label)}</text>'
            if label else ""
        )
        return (
            f'<line x1="{px:.1f}" x2="{px:.1f}" y1="{self.top}" y2="{self.top + self.plot_h}" '
            f'stroke="{colour}" stroke-width="1.2"{dash_attr}/>{text}'
        )

    def legend(self, items: list[tuple[str, str, str]], *, inside: bool = False) -> str:
        if not items:
            return ""
        x = self.left + 10 if inside else self.left + self.plot_w + 12
        y = self.top + 12
        out = []
        for label, colour, kind in items[:18]:
            if kind == "point":
                mark = f'<circle cx="{x + 6}" cy="{y - 4}" r="4.2" fill="{colour}"/>'
            else:
                dash = "" if kind == "solid" else f' stroke-dasharray="{kind}"'
                mark = (f'<line x1="{x}" x2="{x + 14}" y1="{y - 4}" y2="{y - 4}" '
                        f'stroke="{colour}" stroke-width="2"{dash}/>')
            out.append(
                f'{mark}<text x="{x + 20}" y="{y}" font-size="11" fill="{INK}">'
                f"{escape(truncate(label, 34))}</text>"
            )
            y += 16
        if len(items) > 18:
            out.append(f'<text x="{x}" y="{y}" font-size="11" fill="{MUTED}">'
                       f"… {len(items) - 18} more</text>")
        return "".join(out)


def band_edges(bands: Sequence[Band]) -> list[float]:
    out: list[float] = []
    for b in bands:
        for edge in (b.lo, b.hi):
            if edge is not None:
                out += [float(v) for v in edge]
    return out


def _finite(value: float, log: bool) -> bool:
    return math.isfinite(value) and (value > 0 or not log)


def truncate(text: str, n: int) -> str:
    return text if len(text) <= n else text[: n - 1] + "…"


def log_range(values: Sequence[float]) -> tuple[float, float]:
    arr = np.asarray([v for v in values if math.isfinite(v) and v > 0], dtype=float)
    if arr.size == 0:
        return (1.0, 10.0)
    lo, hi = math.log10(arr.min()), math.log10(arr.max())
    pad = max(0.05 * (hi - lo), 0.05)
    return (10 ** (lo - pad), 10 ** (hi + pad))


def lin_range(values: Sequence[float], pad: float = 0.06) -> tuple[float, float]:
    arr = np.asarray([v for v in values if math.isfinite(v)], dtype=float)
    if arr.size == 0:
        return (0.0, 1.0)
    lo, hi = float(arr.min()), float(arr.max())
    if hi == lo:
        return (lo - 0.5, hi + 0.5)
    span = hi - lo
    return (lo - pad * span, hi + pad * span)


def _ticks(t0: float, t1: float, log: bool) -> list[tuple[float, str]]:
    """Tick positions (in data units) and labels; decades (and 2, 5) on log axes."""
    if log:
        ticks = []
        decades = t1 - t0
        steps = (1,) if decades > 3 else (1, 2, 5) if decades > 1 else (1, 2, 3, 5, 7)
        for k in range(math.floor(t0), math.ceil(t1) + 1):
            for m in steps:
                t = k + math.log10(m)
                if t0 <= t <= t1:
                    ticks.append((10**t, _format_tick(m * 10.0**k)))
        if decades > 8:
            ticks = [t for i, t in enumerate(ticks) if i % 2 == 0]
        return ticks
    span = t1 - t0
    raw = span / 6 if span > 0 else 1.0
    mag = 10 ** math.floor(math.log10(raw))
    step = next(m * mag for m in (1, 2, 2.5, 5, 10) if m * mag >= raw)
    start = math.ceil(t0 / step) * step
    n = math.floor((t1 - start) / step + 1e-9) + 1
    return [(start + i * step, _format_tick(start + i * step)) for i in range(max(n, 0))]


def _format_tick(value: float) -> str:
    if value == 0 or abs(value) < 1e-12:
        return "0"
    a = abs(value)
    if a >= 1e5 or a < 1e-3:
        exp = math.floor(math.log10(a))
        mant = value / 10**exp
        sup = str(exp).translate(str.maketrans("-0123456789", "⁻⁰¹²³⁴⁵⁶⁷⁸⁹"))
        return f"10{sup}" if abs(mant - 1) < 1e-9 else f"{mant:g}×10{sup}"
    return f"{value:.6g}"
