"""The page's shared-ancestry part: λ against its prior, the exponent with and without the
tree, and the residuals in tree order.

For each fitted model whose spec has ``shared_ancestry`` (``model/phylo_terms.py``),
:func:`ancestry_section` gives

* Pagel's λ (``ancestry_signal``): posterior median, 90% interval and mean beside the same
  numbers of its prior (the spec's beta prior, in closed form by scipy), and a small figure of
  both densities; ``full`` shows λ fixed at 1;
* the population exponent of the model beside that of the dataset's primary model without
  shared ancestry (or, when the primary has it, the last listed model without), with the ratio
  of their posterior SDs;
* a strip of the species' departures from the population law (posterior mean of log trait
  minus the law at the species' size, taxon terms and covariates of the model included), the
  species ordered as the tips of the tree and averaged in at most :data:`MAX_BINS` bins, so it
  stays readable at 10,000 tips; neighbours' departures alike (runs of one colour) mean
  shared ancestry in the residuals. Beside it the correlation of neighbours in tree order
  (about 0 without signal).

References
----------
Pagel, M. (1999). Inferring the historical patterns of biological evolution. Nature 401,
877–884.
"""

from __future__ import annotations

import itertools
import json
import logging
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from markupsafe import Markup

from allolaw.report import charts
from allolaw.report.svg import INK, MUTED, Axes, Band

__all__ = ["MAX_BINS", "ancestry_section", "residual_strip_svg", "tree_order_residuals"]

log = logging.getLogger(__name__)

#: Largest number of cells of the residual strip (species are averaged into bins beyond).
MAX_BINS = 240
_SIGNAL = "ancestry_signal"


def ancestry_section(
    fits: dict[str, Any], primary: str, model_order: list[str], clean: pd.DataFrame | None,
    levels: list[str], tree_file: Path,
) -> list[dict[str, Any]]:
    """One entry per fitted model with shared ancestry (empty list when there is none).

    Parameters
    ----------
    fits
        Model name → InferenceData (``posterior``, ``constant_data``, attribute ``spec``).
    primary, model_order
        The dataset's primary model and its models as listed in the config.
    clean
        ``clean.csv`` (species, log trait, taxon levels), or ``None``.
    levels
        Taxon levels, outer first (the outermost colours the taxon strip).
    tree_file
        The dataset's pruned tree (``results/<d>/tree.nwk``).
    """
    phylo_models = [m for m in model_order if m in fits and _ancestry(fits[m]) != "none"]
    if not phylo_models:
        return []
    plain = [m for m in model_order if m in fits and _ancestry(fits[m]) == "none"]
    baseline = primary if primary in plain else (plain[-1] if plain else None)
    out = []
    for name in phylo_models:
        idata = fits[name]
        entry: dict[str, Any] = {"model": name, "notes": []}
        entry["signal"] = _signal(idata)
        entry["exponents"] = _exponents(fits, name, baseline)
        entry["strip"] = None
        if clean is None or not tree_file.is_file():
            entry["notes"].append("No residual strip: clean.csv or the pruned tree "
                                  f"({tree_file}) is missing.")
        else:
            try:
                entry["strip"] = _strip(idata, clean, levels, tree_file)
            except (KeyError, ValueError) as err:
                entry["notes"].append(f"No residual strip: {err}")
        out.append(entry)
    return out


def tree_order_residuals(idata: Any, log_trait: pd.Series, tree_file: Path,
                         levels: list[str] = ()) -> pd.Series:
    """Posterior mean departure of each species from the law, species in tree tip order.

    ``log_trait`` is indexed by species. The departure is log trait minus intercept, exponent
    · (size − reference), curvature, covariates and the taxon terms of the innermost level
    that has them (``levels`` outer first), per draw, at the species' true size where the
    model has one.
    """
    post = idata.posterior
    species = [str(s) for s in post["species"].values] if "species" in post.coords else [
        str(s) for s in idata.constant_data["species"].values]
    mu = _law_per_species(idata, list(levels))  # (draws, species)
    resid = log_trait.loc[species].to_numpy(float)[None, :] - mu
    order = np.argsort(_tip_positions(tree_file, species), kind="stable")
    return pd.Series(resid.mean(axis=0)[order], index=[species[i] for i in order])


def residual_strip_svg(
    residuals: np.ndarray, groups: list[str] | None, *, names: list[str] | None = None,
    max_bins: int = MAX_BINS, width: int = 760, title: str = "",
) -> str:
    """A heat line of residuals in tree order (binned means) above a strip of taxon colours.

    Each cell is the mean of the species in one bin, coloured from blue (below the law) to
    vermillion (above), symmetric around 0, full colour at the 95th percentile of the absolute
    bin means (so one outlier does not pale the rest; larger values are clipped); ``groups``
    (one label per species, same order) gives a second strip coloured by the most common label
    of each bin; ``names`` (species names) label the cells that hold one species.
    """
    n = len(residuals)
    k = max(1, min(max_bins, n))
    edges = np.linspace(0, n, k + 1).round().astype(int)
    means = np.array([residuals[a:b].mean() for a, b in itertools.pairwise(edges)])
    scale = float(np.quantile(np.abs(means), 0.95)) or 1.0
    height = 124 if groups else 96
    ax = Axes(width, height, (0.0, float(n)), (0.0, 1.0), log_x=False, log_y=False, left=92,
              right=20, top=22, bottom=height - 58)
    parts = [f'<text x="{ax.left}" y="14" font-size="11" fill="{MUTED}">species in tree order '
             f"({n}; {k} cells, each the mean of {n / k:.3g} species)</text>",
             f'<text x="{ax.left - 6}" y="44" text-anchor="end" font-size="11" '
             f'fill="{INK}">departure</text>']
    for (a, b), value in zip(itertools.pairwise(edges), means, strict=True):
        x0, x1 = ax.px(a), ax.px(b)
        what = (_esc(names[a]) if names is not None and b - a == 1
                else f"species {a + 1}–{b}: mean")
        parts.append(f'<rect x="{x0:.2f}" y="26" width="{max(x1 - x0, 0.5):.2f}" height="30" '
                     f'fill="{_diverging(value / scale)}"><title>{what} departure '
                     f"{value:+.3f}</title></rect>")
    if groups:
        colours = charts.taxon_colours(groups)
        parts.append(f'<text x="{ax.left - 6}" y="74" text-anchor="end" font-size="11" '
                     f'fill="{INK}">taxon</text>')
        for a, b in itertools.pairwise(edges):
            label = pd.Series(groups[a:b]).mode().iloc[0]
            x0, x1 = ax.px(a), ax.px(b)
            parts.append(f'<rect x="{x0:.2f}" y="62" width="{max(x1 - x0, 0.5):.2f}" '
                         f'height="14" fill="{colours[label]}"><title>{_esc(label)}</title>'
                         "</rect>")
    y_key = height - 18
    parts.append(f'<text x="{ax.left}" y="{y_key}" font-size="11" fill="{MUTED}">colour: '
                 f"blue below the law, vermillion above; full colour at ±{scale:.3g} "
                 "(natural-log units; beyond it clipped)</text>")
    return ax.wrap("".join(parts), title or "residuals in tree order")


# --- pieces ---------------------------------------------------------------------------------
def _ancestry(idata: Any) -> str:
    try:
        return str(json.loads(idata.attrs.get("spec", "{}")).get("shared_ancestry", "none"))
    except (TypeError, json.JSONDecodeError):
        return "none"


def _signal(idata: Any) -> dict[str, Any]:
    from scipy import stats

    spec = json.loads(idata.attrs["spec"])
    prior = (spec.get("priors") or {}).get(_SIGNAL) or {}
    if spec["shared_ancestry"] == "full" or _SIGNAL not in idata.posterior:
        fixed = 1.0 if spec["shared_ancestry"] == "full" else prior.get("fixed")
        return {"fixed": fixed, "rows": [], "svg": None}
    draws = np.asarray(idata.posterior[_SIGNAL].values, float).reshape(-1)
    a, b = float(prior["alpha"]), float(prior["beta"])
    dist = stats.beta(a, b)
    rows = [
        {"what": "posterior", **_quantiles(draws), "mean": float(draws.mean())},
        {"what": f"prior beta({a:g}, {b:g})", "q05": float(dist.ppf(0.05)),
         "q50": float(dist.ppf(0.5)), "q95": float(dist.ppf(0.95)), "mean": float(dist.mean())},
    ]
    edges = np.linspace(0.0, 1.0, 26)
    dens, _ = np.histogram(draws, bins=edges, density=True)
    centres = (edges[:-1] + edges[1:]) / 2
    grid = np.linspace(0.005, 0.995, 100)
    svg = charts.line_band_svg(
        [Band(centres, dens, np.zeros_like(dens), dens, label="posterior (histogram)",
              colour=charts.OKABE_ITO[3]),
         Band(grid, dist.pdf(grid), label="prior", colour=MUTED, dash="6 4")],
        x_label="Pagel's λ (ancestry_signal)", y_label="density", width=520, height=240,
    )
    return {"fixed": None, "rows": rows, "svg": Markup(svg)}


def _exponents(fits: dict[str, Any], name: str, baseline: str | None) -> list[dict[str, Any]]:
    rows = []
    for model, label in ((baseline, "without the tree"), (name, "with the tree")):
        if model is None or "exponent" not in fits[model].posterior:
            continue
        draws = np.asarray(fits[model].posterior["exponent"].values, float).reshape(-1)
        rows.append({"model": model, "what": label, **_quantiles(draws),
                     "sd": float(draws.std(ddof=1))})
    if len(rows) == 2 and rows[0]["sd"] > 0:
        rows[1]["sd_ratio"] = rows[1]["sd"] / rows[0]["sd"]
    return rows


def _strip(idata: Any, clean: pd.DataFrame, levels: list[str], tree_file: Path) -> dict:
    table = clean.assign(species=clean["species"].astype(str)).set_index("species")
    resid = tree_order_residuals(idata, table["log_trait"].astype(float), tree_file, levels)
    values = resid.to_numpy()
    groups = (table.loc[resid.index, levels[0]].astype(str).tolist() if levels else None)
    neighbours = float(np.corrcoef(values[:-1], values[1:])[0, 1]) if len(values) > 2 else None
    svg = residual_strip_svg(values, groups, names=list(resid.index))
    return {"svg": Markup(svg), "n": len(values),
            "neighbour_correlation": neighbours, "level": levels[0] if levels else None}


def _tip_positions(tree_file: Path, species: list[str]) -> list[int]:
    # position of each species among the tips of the file, left to right (TreeSwift's
    # pre-order), so every clade's species sit side by side
    import treeswift

    from allolaw.phylogeny import normalise_name

    tree = treeswift.read_tree_newick(tree_file.read_text(encoding="utf-8"))
    position = {normalise_name(str(leaf.label)): k
                for k, leaf in enumerate(tree.traverse_leaves())}
    out = []
    for name in species:
        key = normalise_name(name)
        if key not in position:
            msg = f"species {name!r} is not a tip of {tree_file}"
            raise ValueError(msg)
        out.append(position[key])
    return out


def _law_per_species(idata: Any, levels: list[str]) -> np.ndarray:
    # the model's mean of log trait per draw and species (no break models: their hinge needs
    # the model's own code; a phylogenetic break model shows the straight part's departure)
    post, const = idata.posterior, idata.constant_data
    ref = float(np.asarray(const["log_size_ref"].values).reshape(-1)[0])
    if "true_log_size" in post:
        size = _flat(post["true_log_size"])
    else:
        size = np.asarray(const["log_size_obs"].values, float)[None, :]
    dx = size - ref
    terms = {}
    for term in ("intercept", "exponent", "curvature"):
        if term not in post:
            continue
        value = _flat(post[term])[:, None]
        for level in reversed(levels):
            var = f"taxon_{term}__{level}"
            if var in post and f"taxon_index__{level}" in const:
                index = np.asarray(const[f"taxon_index__{level}"].values, int)
                value = _flat(post[var])[:, index]
                break
        terms[term] = value
    mu = terms["intercept"] + terms["exponent"] * dx
    if "curvature" in terms:
        mu = mu + terms["curvature"] * dx**2
    for var in post.data_vars:
        if str(var).startswith("coef__"):
            cov = np.asarray(const[f"covariate__{str(var)[6:]}"].values, float)
            mu = mu + _flat(post[var])[:, None] * cov[None, :]
    return mu


def _flat(var: Any) -> np.ndarray:
    values = np.asarray(var.values, float)
    return values.reshape(values.shape[0] * values.shape[1], *values.shape[2:])


def _quantiles(draws: np.ndarray) -> dict[str, float]:
    q = np.quantile(draws, [0.05, 0.5, 0.95])
    return {"q05": float(q[0]), "q50": float(q[1]), "q95": float(q[2])}


def _diverging(t: float) -> str:
    # white at 0, Okabe–Ito blue (#0072B2) at −1, vermillion (#D55E00) at +1
    t = max(-1.0, min(1.0, float(t)))
    end = (0, 114, 178) if t < 0 else (213, 94, 0)
    rgb = [round(255 + (c - 255) * abs(t)) for c in end]
    return "#{:02x}{:02x}{:02x}".format(*rgb)


def _esc(text: str) -> str:
    from html import escape

    return escape(text)
