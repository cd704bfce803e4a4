"""One figure drawn two ways: our hand-built SVG layer against matplotlib's SVG backend.

Usage: ``python benchmarks/svg_choice.py results/<dataset>/clean.csv``. Draws the report's
scatter figure (species means on log axes, coloured by the outermost taxon, a hover title per
point) with :func:`allolaw.report.charts.scatter_law_svg` and with matplotlib (``svg.fonttype:
'none'`` so text stays text; each point a separate artist with a ``gid``, the ``<title>``
inserted afterwards, since matplotlib writes no hover titles itself). Prints, for each, the size
in bytes, the number of ``<title>`` elements, the number of ``<text>`` elements, whether the
output is the same on a second call, and the time per figure (median of 5).
"""

from __future__ import annotations

import io
import re
import statistics
import sys
import time
from html import escape

import numpy as np
import pandas as pd


def ours(clean: pd.DataFrame, level: str) -> str:
    """The scatter as the report draws it (no laws: the same points and axes)."""
    from allolaw.report import charts
    from allolaw.report.svg import Series

    taxa = clean[level].astype(str).tolist()
    colours = charts.taxon_colours(taxa)
    series = []
    for taxon in sorted(colours):
        rows = clean[clean[level].astype(str) == taxon]
        series.append(Series(np.exp(rows["log_size"].to_numpy()),
                             np.exp(rows["log_trait"].to_numpy()),
                             [str(s) for s in rows["species"]], label=taxon,
                             colour=colours[taxon]))
    return charts.scatter_law_svg(series, [], x_label="size", y_label="trait",
                                  reference_lines=[], title="", width=940, height=540)


def with_matplotlib(clean: pd.DataFrame, level: str) -> str:
    """The same points with matplotlib's SVG backend, hover titles added by gid."""
    import matplotlib as mpl

    mpl.use("svg")
    import matplotlib.pyplot as plt

    from allolaw.report import charts

    taxa = clean[level].astype(str).tolist()
    colours = charts.taxon_colours(taxa)
    titles = {}
    with mpl.rc_context({"svg.fonttype": "none", "svg.hashsalt": "allolaw"}):
        fig, ax = plt.subplots(figsize=(9.4, 5.4), dpi=100)
        for k, row in enumerate(clean.itertuples()):
            gid = f"pt{k}"
            ax.scatter([np.exp(row.log_size)], [np.exp(row.log_trait)], s=28,
                       color=colours[str(getattr(row, level))], gid=gid, alpha=0.85)
            titles[gid] = str(row.species)
        ax.set_xscale("log")
        ax.set_yscale("log")
        ax.set_xlabel("size")
        ax.set_ylabel("trait")
        handles = [plt.Line2D([], [], marker="o", ls="", color=c, label=t)
                   for t, c in sorted(colours.items())]
        ax.legend(handles=handles, frameon=False)
        buf = io.StringIO()
        fig.savefig(buf, format="svg", metadata={"Date": None})
        plt.close(fig)
    text = buf.getvalue()
    for gid, title in titles.items():
        text = text.replace(f'<g id="{gid}">', f'<g id="{gid}"><title>{escape(title)}</title>', 1)
    return text


def main(path: str) -> None:
    """Print the comparison for the clean table at ``path``."""
    clean = pd.read_csv(path)
    level = next(c for c in clean.columns if c not in {"species", "log_size", "log_trait"})
    for name, draw in (("ours", ours), ("matplotlib", with_matplotlib)):
        times = []
        for _ in range(5):
            start = time.perf_counter()
            svg = draw(clean, level)
            times.append(time.perf_counter() - start)
        again = draw(clean, level)
        print(f"{name}: {len(svg.encode()):,} bytes, {svg.count('<title>')} <title>, "
              f"{len(re.findall(r'<text', svg))} <text>, {len(clean)} species, "
              f"same on rerun: {svg == again}, {statistics.median(times) * 1000:.1f} ms "
              f"(median of 5)")


if __name__ == "__main__":
    main(*sys.argv[1:])
