"""A rooted tree with branch lengths, stored as integer arrays, and its message plan.

Nodes are numbered in post-order: every child has a smaller index than its parent and the
root is the last node. Each node keeps the length of the branch above it (the root's is 0:
shared ancestry is measured from the root, so a root branch written in a file is ignored).
Species are the tips, in the order of the data table (``tip_node[j]`` is the node of species
``j``). The message plan groups the nodes so that every pass up or down the tree is a short
loop over levels, each level one vectorised step over all of its nodes.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property

import numpy as np

__all__ = ["Level", "Phylogeny", "prune_tree", "tree_covariance"]


@dataclass(frozen=True)
class Level:
    """One step of the pass from the tips to the root.

    ``parents`` are the nodes finished at this step (all of their children are finished at
    earlier steps), ``children`` every child of those nodes, ``slot[e]`` the position in
    ``parents`` of the parent of ``children[e]``.
    """

    parents: np.ndarray
    children: np.ndarray
    slot: np.ndarray


@dataclass(frozen=True, eq=False)
class Phylogeny:
    """A rooted tree whose tips are the species of a data table.

    Attributes
    ----------
    parent
        Parent index of each node (post-order: ``parent[i] > i``; the root, last, has −1).
    length
        Branch length above each node (root: 0).
    tip_node
        Node index of each species, in species order.
    species
        Species names, in species order (as given in the data table).
    """

    parent: np.ndarray
    length: np.ndarray
    tip_node: np.ndarray
    species: tuple[str, ...] = field(default=())

    def __post_init__(self) -> None:
        m = len(self.parent)
        parent = np.asarray(self.parent)
        problems = []
        if m == 0 or parent[-1] != -1 or np.any(parent[:-1] <= np.arange(m - 1)):
            problems.append("nodes are not in post-order with the root last")
        if len(self.length) != m or np.any(~np.isfinite(self.length)) or np.any(
                np.asarray(self.length) < 0):
            problems.append("branch lengths must be finite and non-negative, one per node")
        is_leaf = np.ones(m, bool)
        is_leaf[parent[:-1]] = False
        tips = np.asarray(self.tip_node)
        if len(np.unique(tips)) != len(tips) or set(tips.tolist()) != set(
                np.flatnonzero(is_leaf).tolist()):
            problems.append("every leaf must be the tip of exactly one species")
        if problems:
            message = "invalid Phylogeny: " + "; ".join(problems)
            raise ValueError(message)

    @property
    def n_nodes(self) -> int:
        return len(self.parent)

    @property
    def n_species(self) -> int:
        return len(self.tip_node)

    @cached_property
    def is_tip(self) -> np.ndarray:
        """Boolean per node: a tip (leaf)."""
        out = np.zeros(self.n_nodes, bool)
        out[self.tip_node] = True
        return out

    @cached_property
    def height(self) -> np.ndarray:
        """Distance of each node from the root (sum of branch lengths on its path)."""
        h = np.zeros(self.n_nodes)
        for depth_nodes in self.depth_groups[1:]:
            h[depth_nodes] = h[self.parent[depth_nodes]] + self.length[depth_nodes]
        return h

    @cached_property
    def depth_groups(self) -> list[np.ndarray]:
        """Nodes grouped by the number of branches between them and the root (root first)."""
        m = self.n_nodes
        depth = np.zeros(m, np.int64)
        parent = self.parent
        for i in range(m - 2, -1, -1):  # parents come after children: reverse is pre-order
            depth[i] = depth[parent[i]] + 1
        order = np.argsort(depth, kind="stable")
        bounds = np.searchsorted(depth[order], np.arange(depth.max() + 2))
        return [order[bounds[d]:bounds[d + 1]] for d in range(depth.max() + 1)]

    @cached_property
    def levels(self) -> list[Level]:
        """Message plan from the tips up: internal nodes grouped by their height in branches.

        A node's level is one more than the highest level among its children (tips: 0), so
        each level needs only the messages of earlier ones.
        """
        m = self.n_nodes
        parent = self.parent
        level = np.zeros(m, np.int64)
        for i in range(m - 1):
            p = parent[i]
            level[p] = max(level[p], level[i] + 1)
        out = []
        child_level = level[parent[:-1]]
        children_all = np.arange(m - 1)
        for lv in range(1, level[-1] + 1):
            parents = np.flatnonzero(level == lv)
            children = children_all[child_level == lv]
            slot = np.searchsorted(parents, parent[children])
            out.append(Level(parents=parents, children=children, slot=slot))
        return out

    @property
    def tip_height(self) -> np.ndarray:
        """Per node: its height for tips, 0 for internal nodes (used by Pagel's λ)."""
        return np.where(self.is_tip, self.height, 0.0)

    def scaled_lengths(self, lam: float) -> np.ndarray:
        """Branch lengths of the λ-transformed tree (Pagel 1999), NumPy.

        Internal branches are multiplied by λ and tip branches extended so that each tip
        keeps its height: the tree's covariance becomes ``λC + (1 − λ)diag(C)``.

        References
        ----------
        Pagel, M. (1999). Inferring the historical patterns of biological evolution.
        Nature 401, 877–884.
        """
        return lam * self.length + (1.0 - lam) * self.tip_height


def tree_covariance(phylogeny: Phylogeny) -> np.ndarray:
    """Dense tree covariance ``C`` of the species (shared branch length from the root).

    O(n²) memory: for tests and small trees only; the densities never build it.

    References
    ----------
    Felsenstein, J. (1985). Phylogenies and the comparative method. Am. Nat. 125, 1–15.
    """
    n = phylogeny.n_species
    m = phylogeny.n_nodes
    # ancestor indicator per species (n × m), then C = A diag(length) Aᵀ
    anc = np.zeros((n, m))
    node = phylogeny.tip_node.copy()
    rows = np.arange(n)
    while True:
        live = node >= 0
        if not live.any():
            break
        anc[rows[live], node[live]] = 1.0
        node[live] = phylogeny.parent[node[live]]
    return (anc * phylogeny.length) @ anc.T


def prune_tree(
    parent: np.ndarray, length: np.ndarray, keep: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Drop the leaves not in ``keep`` and every node left without a kept leaf below it.

    Parameters
    ----------
    parent, length
        A tree in post-order (root last, parent −1).
    keep
        Boolean per node; only leaves' entries are read.

    Returns
    -------
    parent, length, old_index
        The smaller tree, again in post-order, and the old index of each kept node. Nodes
        left with one child are merged into it (their branch lengths add up), which leaves
        every shared branch length, so the covariance, unchanged; the root stays the root
        of the given tree, so the pruned tree's covariance is exactly the rows and columns
        of the full one (a root left with one child keeps that child's branch as a stem
        shared by all species).
    """
    m = len(parent)
    n_child = np.zeros(m, np.int64)
    np.add.at(n_child, parent[:-1], 1)
    leaf = n_child == 0
    alive = keep & leaf
    for i in range(m - 1):  # post-order: children first
        if alive[i]:
            alive[parent[i]] = True
    kids = np.zeros(m, np.int64)
    np.add.at(kids, parent[:-1][alive[:-1]], 1)
    # merge alive unary non-root nodes into their only child
    merged = alive & (kids == 1)
    merged[m - 1] = False
    new_len = np.asarray(length, float).copy()
    target = np.arange(m)
    for i in range(m - 2, -1, -1):  # top down: a child takes the nearest kept ancestor
        p = parent[i]
        if not alive[i]:
            continue
        if merged[p]:
            new_len[i] += new_len[p]
            target[i] = target[p]
        else:
            target[i] = p
    kept = np.flatnonzero(alive & ~merged)
    new_index = np.full(m, -1)
    new_index[kept] = np.arange(len(kept))
    new_parent = np.where(kept == m - 1, -1, new_index[target[kept]])
    new_parent[-1] = -1
    return new_parent, new_len[kept], kept
