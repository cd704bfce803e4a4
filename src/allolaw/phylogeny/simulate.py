"""Seeded random trees for tests and benchmarks (invented trees with known structure).

:func:`random_tree` grows a tree by joining random pairs (or groups, for polytomies) of
subtrees, so its shape is that of a coalescent-like random tree; branch lengths are drawn
independently, some set to zero, so tips end at different heights (non-ultrametric) unless
asked otherwise. :func:`write_newick` writes a :class:`Phylogeny` as Newick text.
"""

from __future__ import annotations

import numpy as np

from allolaw.phylogeny.tree import Phylogeny

__all__ = ["random_tree", "write_newick"]


def random_tree(
    n_species: int,
    *,
    seed: int,
    polytomy_share: float = 0.1,
    zero_share: float = 0.05,
    ultrametric: bool = False,
) -> Phylogeny:
    """A random rooted tree with ``n_species`` tips named ``sp0``, ``sp1``, ...

    Parameters
    ----------
    n_species
        Number of tips (≥ 2).
    seed
        Seed of the NumPy generator.
    polytomy_share
        Chance that a join takes three subtrees instead of two.
    zero_share
        Chance that an internal branch has length 0 (tip branches stay positive, so the
        covariance stays non-singular at λ = 1).
    ultrametric
        If true, tips all end at the same height (tip branches stretched to the maximum).
    """
    rng = np.random.default_rng(seed)
    parent: list[int] = [-1] * n_species
    length: list[float] = list(rng.exponential(1.0, n_species))
    pool = list(range(n_species))
    while len(pool) > 1:
        k = 3 if (len(pool) > 2 and rng.random() < polytomy_share) else 2
        picks = sorted(rng.choice(len(pool), size=k, replace=False), reverse=True)
        node = len(parent)
        parent.append(-1)
        length.append(0.0 if rng.random() < zero_share else float(rng.exponential(1.0)))
        for p in picks:
            parent[pool.pop(p)] = node
        pool.append(node)
    length[-1] = 0.0
    parent_a = np.asarray(parent)
    length_a = np.asarray(length)
    order = rng.permutation(n_species)  # species order differs from node order
    phylo = Phylogeny(parent_a, length_a, order, tuple(f"sp{i}" for i in range(n_species)))
    if ultrametric:
        h = phylo.height
        length_a = length_a + np.where(phylo.is_tip, h.max() - h, 0.0)
        phylo = Phylogeny(parent_a, length_a, order, phylo.species)
    return phylo


def write_newick(phylogeny: Phylogeny, *, digits: int = 17) -> str:
    """Newick text of ``phylogeny`` (tips named by species, lengths with ``digits`` digits)."""
    m = phylogeny.n_nodes
    names = {int(node): name for node, name in zip(phylogeny.tip_node, phylogeny.species,
                                                   strict=True)}
    kids: list[list[int]] = [[] for _ in range(m)]
    for i in range(m - 1):
        kids[phylogeny.parent[i]].append(i)
    text: list[str] = [""] * m
    for i in range(m):  # post-order: children are written first
        label = names.get(i, "")
        inner = "(" + ",".join(text[c] for c in kids[i]) + ")" if kids[i] else ""
        length = "" if i == m - 1 else f":{phylogeny.length[i]:.{digits}g}"
        text[i] = inner + label + length
        for c in kids[i]:
            text[c] = ""
    return text[m - 1] + ";"
