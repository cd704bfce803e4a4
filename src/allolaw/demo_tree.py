"""An invented tree for the demo's island survey, and residuals that evolve along it.

Nothing here is real. The tree follows the survey's taxonomy: the root splits into the three
orders, each order's crown into its families, each family's into its two genera (the first
word of a species name), each genus's into its species; inside every group the members are
joined by random binary splits. Node ages are in invented millions of years, the root at
:data:`ROOT_AGE`, every tip at 0 (the tree is ultrametric). Ages are rounded to four decimals
before the branch lengths are taken, so the Newick file holds exactly the tree that the
residuals were simulated on.

The residual of each species is Brownian motion from 0 at the root down this tree, scaled so
that its variance at a tip is ``sd²`` (the tree at unit height, as the model scales it:
``model.phylo_terms.scale_to_unit_height``). Added to the survey's independent species
deviations (SD σ₀), the residuals beyond the taxon shifts have covariance
``(sd² + σ₀²)(λC + (1 − λ)I)`` with ``λ = sd² / (sd² + σ₀²)`` (Pagel 1999), the values
written to ``truth.json``.

References
----------
Felsenstein, J. (1985). Phylogenies and the comparative method. Am. Nat. 125, 1–15.
Pagel, M. (1999). Inferring the historical patterns of biological evolution. Nature 401,
877–884.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

__all__ = ["ROOT_AGE", "AncestrySignal", "island_tree"]

#: Age of the root (invented millions of years).
ROOT_AGE = 90.0


@dataclass
class _Node:
    age: float
    children: list[_Node] = field(default_factory=list)
    name: str = ""


@dataclass(frozen=True)
class AncestrySignal:
    """The invented tree as Newick text, each species' residual along it, and the truth."""

    newick: str
    residual: dict[str, float]
    truth: dict[str, Any]


def island_tree(
    species: list[dict[str, Any]], *, rng: np.random.Generator, sd: float,
    independent_sd: float, file: str,
) -> AncestrySignal:
    """Grow the tree of the island survey's species and simulate residuals along it.

    Parameters
    ----------
    species
        One dict per species with keys ``species`` (``"Genus epithet"``), ``order`` and
        ``family``, in the generator's order (which fixes the random draws).
    rng
        The generator of the tree and the residuals (its own stream, so the survey's other
        draws stay as they were).
    sd
        SD of the tree residual at a tip (tree scaled to unit height).
    independent_sd
        SD of the survey's independent species deviations, for the λ written to the truth.
    file
        Name of the Newick file, for the truth.
    """
    groups: dict[str, dict[str, dict[str, list[str]]]] = {}
    for sp in species:
        genus = sp["species"].split(" ")[0]
        groups.setdefault(sp["order"], {}).setdefault(sp["family"], {}).setdefault(
            genus, []).append(sp["species"])
    orders = []
    for families in groups.values():
        fam_nodes = []
        for genera in families.values():
            gen_nodes = [_group([_Node(0.0, name=n) for n in names], rng, 2.0, 10.0)
                         for names in genera.values()]
            fam_nodes.append(_group(gen_nodes, rng, 2.0, 30.0))
        orders.append(_group(fam_nodes, rng, 5.0, 70.0))
    root = _join(orders, ROOT_AGE, rng)
    residual: dict[str, float] = {}
    _brownian(root, 0.0, sd, rng, residual)
    total = math.sqrt(sd**2 + independent_sd**2)
    truth = {
        "tree_file": file,
        "root_age": ROOT_AGE,
        "tree_sd": sd,
        "independent_sd": independent_sd,
        "residual_sd_beyond_taxon_shifts": total,
        "signal_lambda_beyond_taxon_shifts": sd**2 / total**2,
        "notes": (
            "Residual of each species = its independent deviation N(0, independent_sd) + "
            "Brownian motion along the tree (unit height) with SD tree_sd at a tip. Beyond "
            "the order and family shifts, which follow the tree too, the residuals have "
            "Pagel's lambda = tree_sd² / (tree_sd² + independent_sd²); a model without taxon "
            "terms sees the shifts as more shared ancestry (a larger lambda)."
        ),
    }
    return AncestrySignal(_newick(root) + ";\n", residual, truth)


def _group(members: list[_Node], rng: np.random.Generator, gap: float, top: float) -> _Node:
    # the crown of a taxon: at least `gap` older than its oldest member, below `top` if it can
    if len(members) == 1:
        return members[0]
    oldest = max(m.age for m in members)
    low = oldest + gap
    age = round(float(rng.uniform(low, max(top, low + gap))), 4)
    return _join(members, age, rng)


def _join(members: list[_Node], age: float, rng: np.random.Generator) -> _Node:
    # random binary splits of `members` below one node at `age`
    if len(members) == 1:
        return members[0]
    order = rng.permutation(len(members))
    cut = int(rng.integers(1, len(members)))
    children = []
    for part in (order[:cut], order[cut:]):
        picked = [members[i] for i in part]
        if len(picked) == 1:
            children.append(picked[0])
            continue
        oldest = max(m.age for m in picked)
        sub_age = round(oldest + (age - oldest) * float(rng.uniform(0.2, 0.9)), 4)
        children.append(_join(picked, sub_age, rng))
    return _Node(age, children)


def _brownian(node: _Node, value: float, sd: float, rng: np.random.Generator,
              out: dict[str, float]) -> None:
    if not node.children:
        out[node.name] = value
        return
    for child in node.children:
        step = rng.normal(0.0, sd * math.sqrt((node.age - child.age) / ROOT_AGE))
        _brownian(child, value + step, sd, rng, out)


def _newick(node: _Node, parent_age: float | None = None) -> str:
    label = node.name.replace(" ", "_")
    if node.children:
        label = "(" + ",".join(_newick(c, node.age) for c in node.children) + ")" + label
    if parent_age is None:
        return label
    return f"{label}:{parent_age - node.age:.4f}"
