"""The figures of a dataset's page, built from the results and drawn by our own SVG layer.

:func:`build_figures` draws the scatter of species means with the population and taxon laws,
one forest plot of taxon exponents per level, the local exponent of each curved model and the
break posterior of each breakpoint model; :func:`ppc_figures` the predictive-check figures.
Each figure is an inline ``<svg>`` string (:mod:`allolaw.report.charts`, on
:mod:`allolaw.report.svg`), marked safe for the template.

Why our SVG layer and not matplotlib's SVG backend: the scatter of the island demo dataset
(172 species, 2 taxon levels) was drawn both ways by ``benchmarks/svg_choice.py`` (species names
as hover ``<title>`` elements; matplotlib with ``svg.fonttype: 'none'`` so text stays text, one
artist per point so each can carry a ``gid``, the ``<title>`` elements inserted afterwards,
because matplotlib writes none itself). Printed on the project machine (shared with a running
batch): ours 26,684 bytes, 172 titles, 12 text elements, 7.0 ms a figure; matplotlib 68,582
bytes (2.6 times the size), 172 titles, 12 text elements, 7,098.5 ms a figure (one artist per
point is what makes it slow; one collection per taxon would leave no element to title). Both
keep text as text and show the names on hover; ours is plain SVG (175 ``<circle>``, one clip
path) where matplotlib's is 245 ``<use>`` references to marker paths with 172 ``clip-path``
attributes (counted in the same outputs). So the hand-built layer stays and the pages do not change.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pandas as pd
from markupsafe import Markup

from allolaw.config import dataset_config
from allolaw.model.law import TAXON_TERMS, expected_log_trait
from allolaw.report import charts
from allolaw.report import forest as forest_notes
from allolaw.report.formatting import fmt, truthy, unit_text
from allolaw.report.svg import Band, Series
from allolaw.report.within import within_lines


def ppc_figures(ppc: dict[str, Any], trait_unit: str) -> dict[str, Markup]:
    figs: dict[str, Markup] = {}
    dens = ppc.get("density_overlay")
    if dens and dens.get("grid"):
        figs["overlay"] = _svg(charts.density_overlay_svg(
            dens["grid"], dens["observed"], dens["predictive_q05"], dens["predictive_q50"],
            dens["predictive_q95"], x_label=f"natural log of the trait in {unit_text(trait_unit)}",
            title="posterior predictive density",
        ))
    pit = ppc.get("loo_pit")
    if pit and pit.get("histogram"):
        hist = pit["histogram"]
        n = sum(hist["counts"])
        figs["loo_pit"] = _svg(charts.histogram_svg(
            hist["edges"], hist["counts"], x_label="LOO-PIT value", y_label="species",
            expected=n / max(len(hist["counts"]), 1), title="LOO-PIT (uniform if calibrated)",
        ))
    return figs


# --- figures --------------------------------------------------------------------------------
def build_figures(
    ds: dict[str, Any],
    fits: dict[str, Any],
    primary: str,
    clean: pd.DataFrame | None,
    levels: list[str],
    units: dict[str, Any],
    config: dict[str, Any],
    dataset: str,
) -> dict[str, Any]:
    """The figures of one dataset's page: scatter with laws, forest plots, local exponents,
    break posteriors (SVG strings marked safe), with notes on what could not be drawn."""
    # every key the template reads, so a page without clean.csv still renders (and says why)
    figs: dict[str, Any] = {"notes": [], "scatter": None, "scatter_notes": "", "forest": [],
                            "local": [], "breaks": []}
    idata = fits.get(primary)
    named = _named_exponents(config, dataset)
    if clean is None or "log_size" not in clean.columns:
        figs["notes"].append("No scatter plot: clean.csv is missing.")
        return figs
    log_x = clean["log_size"].astype(float).to_numpy()
    log_y = clean["log_trait"].astype(float).to_numpy()
    colour_level = levels[0] if levels else None
    taxa = clean[colour_level].astype(str).tolist() if colour_level else ["all species"] * len(
        clean)
    colours = charts.taxon_colours(taxa)
    series = _species_series(clean, levels, units, taxa, colours, log_x, log_y)
    grid = np.linspace(log_x.min() - 0.05 * np.ptp(log_x), log_x.max() + 0.05 * np.ptp(log_x), 80)
    bands, refs = [], []
    if idata is None:
        figs["notes"].append(f"No law drawn: the fit of the primary model '{primary}' is missing.")
    else:
        bands, refs = _law_lines(idata, grid, named, taxa, colours, colour_level, log_x,
                                 figs["notes"])
        within = within_lines(idata, clean, levels, colours, taxa)  # report/within.py
        if within:
            bands[0].label = "between-species law (90% band)"
            bands += within
            figs["notes"].append(
                "Short coloured lines: within each species, the within-species exponent "
                "(posterior median) through the species' mean log size and mean log trait; the "
                "black line is the between-species law, the law of species means.")
    figs["scatter"] = _svg(charts.scatter_law_svg(
        series, bands, x_label=units["x_axis"], y_label=units["y_axis"], reference_lines=refs,
        title="", width=940, height=540,
    ))
    figs["scatter_notes"] = (
        "Points: " + ("individuals" if ds.get("rows_are") == "individuals" else "species means")
        + ", coloured by " + (colour_level or "species")
        + " (Okabe–Ito palette); a dark ring marks a flagged outlier. Dashed grey lines: the "
        "named exponents, drawn through the population law at the reference size. Hover a "
        "point for the species name."
    )
    figs["forest"] = []
    if idata is not None:
        figs["forest"] = _forest_figures(idata, clean, levels, named, colours, colour_level)
    figs["local"] = []
    figs["breaks"] = []
    for name, fit in fits.items():
        if "curvature" in fit.posterior:
            figs["local"].append(_local_figure(name, fit, log_x, units, named))
        if "break_log_size" in fit.posterior:
            figs["breaks"].append(_break_figure(name, fit, units))
    return figs


def _species_series(clean: pd.DataFrame, levels: list[str], units: dict[str, Any],
                    taxa: list[str], colours: dict[str, str], log_x: np.ndarray,
                    log_y: np.ndarray) -> list[Series]:
    # one series of points per taxon of the outermost level, with hover titles
    series = []
    for taxon in sorted(colours):
        idx = [i for i, t in enumerate(taxa) if t == taxon]
        titles = []
        for i in idx:
            row = clean.iloc[i]
            path = " / ".join(str(row[lv]) for lv in levels if lv in clean.columns)
            titles.append(
                f"{row['species']} ({path}): {fmt(math.exp(log_x[i]))} {units['size']}, "
                f"{fmt(math.exp(log_y[i]))} {units['trait']}"
            )
        flagged = [truthy(clean.iloc[i].get("flag_outlier")) for i in idx]
        series.append(Series(np.exp(log_x[idx]), np.exp(log_y[idx]), titles,
                                   label=taxon, colour=colours[taxon], flagged=flagged))
    return series


def _law_lines(idata: Any, grid: np.ndarray, named: list[tuple[str, float]], taxa: list[str],
               colours: dict[str, str], colour_level: str | None, log_x: np.ndarray,
               notes: list[str]) -> tuple[list[Band], list[Band]]:
    # the population law, each outer taxon's law, and the named exponents' reference lines
    bands, refs = [], []
    law = _law(idata, grid)
    q = np.quantile(law, [0.05, 0.5, 0.95], axis=0)
    bands.append(Band(np.exp(grid), np.exp(q[1]), np.exp(q[0]), np.exp(q[2]),
                            label="population law (90% band)", colour="#111111", width=2.4))
    if colour_level and _has_taxon_terms(idata, colour_level):
        for taxon in sorted(colours):
            idx = [i for i, t in enumerate(taxa) if t == taxon]
            tgrid = np.linspace(log_x[idx].min(), log_x[idx].max(), 30)
            if np.ptp(tgrid) == 0:
                continue
            try:
                tl = _law(idata, tgrid, level=colour_level, taxon=taxon)
            except Exception as err:  # shown, not fatal
                notes.append(f"No law for taxon {taxon}: {err}")
                continue
            tq = np.quantile(tl, [0.05, 0.5, 0.95], axis=0)
            many = len(colours) > 7
            bands.append(Band(
                np.exp(tgrid), np.exp(tq[1]), None if many else np.exp(tq[0]),
                None if many else np.exp(tq[2]), label="", colour=colours[taxon], width=1.6,
            ))
        notes.append(
            f"Coloured lines: the law of each {colour_level} (posterior median"
            + ("" if len(colours) > 7 else " and 90% band") + "), over its species' sizes."
        )
    ref_log = float(idata.constant_data["log_size_ref"].values) if (
        hasattr(idata, "constant_data") and "log_size_ref" in idata.constant_data
    ) else float(np.mean(log_x))
    a_med = float(np.median(_law(idata, np.array([ref_log]))[:, 0]))
    for i, (name, value) in enumerate(named):
        y = a_med + value * (grid - ref_log)
        refs.append(Band(np.exp(grid), np.exp(y), label=f"{name} ({value:g})",
                               colour="#6b7280", width=1.1, dash=["6 4", "2 3", "10 3 2 3",
                                                                  "1 2"][i % 4]))
    return bands, refs


def _forest_figures(idata: Any, clean: pd.DataFrame, levels: list[str],
                    named: list[tuple[str, float]], colours: dict[str, str],
                    colour_level: str | None) -> list[dict[str, Any]]:
    # one forest plot of taxon exponents per level
    forest = []
    pop = np.quantile(np.asarray(idata.posterior["exponent"].values).reshape(-1),
                      [0.05, 0.5, 0.95])
    for level in levels:
        var = f"taxon_exponent__{level}"
        if var not in idata.posterior:
            continue
        arr = idata.posterior[var]
        labels = [str(v) for v in arr[level].values]
        draws = np.asarray(arr.values, dtype=float).reshape(-1, len(labels))
        qs = np.quantile(draws, [0.05, 0.5, 0.95], axis=0)
        rows = [(labels[j], qs[0, j], qs[1, j], qs[2, j]) for j in range(len(labels))]
        row_colours = colours if level == colour_level else None
        if colour_level and level != colour_level and level in clean.columns:
            # inner taxa: grouped and coloured by their outermost taxon
            parent = dict(zip(clean[level].astype(str), clean[colour_level].astype(str),
                              strict=False))
            rows.sort(key=lambda r: (parent.get(r[0], ""), r[0]))
            row_colours = {r[0]: colours.get(parent.get(r[0], ""), "#1d2430")
                           for r in rows}
        forest.append({
            "level": level,
            "taxa": forest_notes.taxon_rows(clean, level, labels, qs),
            "warning": forest_notes.few_taxa_warning(idata, level, len(labels)),
            "svg": _svg(charts.forest_svg(
                rows, x_label=f"exponent of each {level} (median, 90% interval)",
                marks=named, population=tuple(pop),
                colours=row_colours,
            )),
        })
    return forest


def _local_figure(name: str, fit: Any, log_x: np.ndarray, units: dict[str, Any],
                  named: list[tuple[str, float]]) -> dict[str, Any]:
    # the local exponent of a curved model over the observed sizes
    lgrid = np.linspace(log_x.min(), log_x.max(), 60)
    q = np.quantile(_local_exponent(fit, lgrid), [0.05, 0.5, 0.95], axis=0)
    marks_x = []
    if units.get("reference_size"):
        marks_x.append(("reference size", float(units["reference_size"])))
    return {"model": name, "svg": _svg(
        charts.line_band_svg(
            [Band(np.exp(lgrid), q[1], q[0], q[2], label="local exponent (90%)",
                        colour=charts.OKABE_ITO[3])],
            x_label=units["x_axis"], y_label="local exponent d log y / d log x",
            log_x=True, marks_y=named, marks_x=marks_x,
        ))}


def _break_figure(name: str, fit: Any, units: dict[str, Any]) -> dict[str, Any]:
    # the posterior density of the break size
    draws = np.asarray(fit.posterior["break_log_size"].values, dtype=float).reshape(-1)
    centres = np.linspace(draws.min(), draws.max(), 120)
    counts = _density(draws, centres)
    q = np.quantile(draws, [0.05, 0.5, 0.95])
    return {
        "model": name,
        "q": [float(math.exp(v)) for v in q],
        "svg": _svg(charts.line_band_svg(
            [Band(np.exp(centres), counts, np.zeros_like(counts), counts,
                        label="posterior of the break", colour=charts.OKABE_ITO[4])],
            x_label=units["x_axis"],
            y_label="density (per natural-log unit)", log_x=True,
            marks_x=[("median", float(math.exp(q[1])))],
        )),
    }


def _density(draws: np.ndarray, grid: np.ndarray) -> np.ndarray:
    """Gaussian kernel density of ``draws`` on ``grid`` (Scott's bandwidth, scipy)."""
    from scipy import stats

    if np.ptp(draws) == 0:
        return np.zeros_like(grid)
    return stats.gaussian_kde(draws)(grid)


def _named_exponents(config: dict[str, Any], dataset: str) -> list[tuple[str, float]]:
    hconf = dict(config.get("hypotheses", {}))
    hconf.update(dataset_config(config, dataset).get("hypotheses", {}))
    return [(str(e["name"]), float(e["value"])) for e in hconf.get("exponents", [])]


def _has_taxon_terms(idata: Any, level: str) -> bool:
    return any(f"taxon_{t}__{level}" in idata.posterior for t in TAXON_TERMS)


def _law(idata: Any, log_size: np.ndarray, *, level: str | None = None,
         taxon: str | None = None) -> np.ndarray:
    """Posterior draws of the expected log trait on a grid, at most 1000 draws."""
    out = expected_log_trait(idata, log_size, level=level, taxon=taxon)
    if out.shape[0] > 1000:
        out = out[np.linspace(0, out.shape[0] - 1, 1000).astype(int)]
    return out


def _local_exponent(idata: Any, log_size: np.ndarray) -> np.ndarray:
    """Draws of d log trait / d log size along ``log_size`` (central differences inside,
    second-order one-sided at the ends, so exact for a quadratic law)."""
    return np.gradient(_law(idata, log_size), log_size, axis=1, edge_order=2)


def _svg(text: str) -> Markup:
    # Figures from allolaw.report.charts escape every text they contain; only they are marked safe.
    return Markup(text)
