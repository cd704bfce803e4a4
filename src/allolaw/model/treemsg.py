"""Gaussian messages on a layered tree: the machinery of the whitened taxon terms.

A layered tree has a root (layer 0) and layers of nodes below it; each node's parent is in the
layer above. Each node carries k values (k ≤ 3 here) that are normal given the parent's values,
``value = parent + D·step`` with ``D`` one step SD per term and layer (or, for correlated
terms, a full k × k matrix per layer). Data enter as information
(precision ``P`` and vector ``h``, one k × k block per node) at the deepest layer.
:func:`pass_up` sends the information up the tree (each node's data, then each parent's
children) and :func:`pass_down` maps standard normals to the node values through the exact
conditional of each value given its parent and the information below it (Gaussian belief
propagation, Bishop 2006, ch. 8.4; the prior step and the data message combined as in the Kalman
smoother). Every step is element-wise over the nodes of a layer with k × k blocks written out
entry by entry (lists of tensors), so any backend (C, numba, JAX) compiles it to plain loops.

Nothing here knows about taxa or the law: :func:`allolaw.model.terms.taxon_terms` builds the
taxon tree with :func:`layered_tree`, and a second tree-shaped term (a phylogeny layered by depth,
with the species as its deepest layer) can reuse the same passes.

References
----------
.. [1] Bishop, C. M. (2006). Pattern Recognition and Machine Learning. Springer, ch. 8.4.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pytensor.tensor as pt

__all__ = [
    "LayeredTree",
    "back_solve",
    "cho_solve",
    "cholesky",
    "forward_solve",
    "layered_tree",
    "leaf_information",
    "pass_down",
    "pass_up",
    "segment_sum",
    "step_matrix",
]


@dataclass
class LayeredTree:
    """Parents and layers of a tree whose nodes are numbered root first, layer by layer."""

    parent: np.ndarray  # per node (root 0, then each layer's nodes), its parent; −1 for the root
    depths: list[np.ndarray]  # node indices by layer: [0], then each layer top to bottom

    @property
    def n_nodes(self) -> int:
        return len(self.parent)


def layered_tree(parent_positions: list[np.ndarray | None]) -> LayeredTree:
    """The tree from, per layer below the root, each node's parent's position in the layer above.

    ``parent_positions[0]`` may be ``None`` or any array of the first layer's length: the first
    layer's parent is the root.
    """
    parent = [-1]
    depths = [np.array([0])]
    for k, positions in enumerate(parent_positions):
        start = len(parent)
        if k == 0:
            parent += [0] * len(positions)
        else:
            parent += [int(depths[-1][0]) + int(p) for p in positions]
        depths.append(np.arange(start, len(parent)))
    return LayeredTree(parent=np.asarray(parent), depths=depths)


def leaf_information(features: list[Any], target: Any, noise_var: Any, index: np.ndarray,
                     n_nodes: int) -> tuple[list[list[Any]], list[Any]]:
    """Information (precision blocks ``P``, vector ``h``) of the deepest layer from the data.

    The data follow ``target_i = Σ_j value_j,node(i) · features_j,i + noise`` with noise
    variance ``noise_var_i``; ``index`` maps each datum to its node's position in the layer.
    """
    k = len(features)
    weight = 1.0 / noise_var
    x = features
    P: list[list[Any]] = [[None] * k for _ in range(k)]
    for i in range(k):
        for j in range(i + 1):
            P[i][j] = P[j][i] = segment_sum(x[i] * x[j] * weight, index, n_nodes)
    h = [segment_sum(x[i] * target * weight, index, n_nodes) for i in range(k)]
    return P, h


def pass_up(tree: LayeredTree, step: list[list[Any]], P: Any, h: Any
            ) -> tuple[list[Any], list[Any]]:
    """Information of each layer from the data below it, and the Cholesky factors used.

    ``step[d]`` is the step of layer ``d`` (layer 0: the root's prior): k step SDs (a
    diagonal ``D``) or any invertible k × k ``D`` given row by row, structural zeros as the
    float 0.0 (correlated terms; :func:`step_matrix`). With ``P = h = None``
    (no data message) every layer's information is ``(None, None)``.
    Returns ``info[d] = (P, h)`` and ``chol[d]``, the factor of ``B = Dᵀ P D + I``.
    """
    depths = tree.depths
    k = len(step[0])
    info: list[Any] = [None] * len(depths)
    chol: list[Any] = [None] * len(depths)
    for d in range(len(depths) - 1, -1, -1):
        info[d] = (P, h)
        if P is None:
            continue
        D = step_matrix(step[d])
        # PD = P·D; B = Dᵀ P D + I
        PD = [[_dot((P[i][m], D[m][j]) for m in range(k)) for j in range(k)] for i in range(k)]
        B = [[_dot((D[m][i], PD[m][j]) for m in range(k)) + (1.0 if i == j else 0.0)
              for j in range(k)] for i in range(k)]
        L = cholesky(B)
        chol[d] = L
        if d == 0:
            break
        # the message a node sends its parent: N(parent; ·) with precision
        # Q = (P⁻¹ + D Dᵀ)⁻¹ = P − PD B⁻¹ (PD)ᵀ and vector g = h − PD B⁻¹ Dᵀ h
        Y = [cho_solve(L, PD[c]) for c in range(k)]  # B⁻¹ (row c of PD)
        z = cho_solve(L, [_dot((D[m][i], h[m]) for m in range(k)) for i in range(k)])
        Q = [[P[i][j] - sum(PD[i][m] * Y[j][m] for m in range(k)) for j in range(k)]
             for i in range(k)]
        g = [h[i] - sum(PD[i][m] * z[m] for m in range(k)) for i in range(k)]
        parents = tree.parent[depths[d]] - depths[d - 1][0]
        n_par = len(depths[d - 1])
        P = [[segment_sum(Q[i][j], parents, n_par) for j in range(k)] for i in range(k)]
        h = [segment_sum(g[i], parents, n_par) for i in range(k)]
    return info, chol


def pass_down(tree: LayeredTree, step: list[list[Any]], root_mean: list[float], w: list[Any],
              info: list[Any], chol: list[Any]) -> tuple[list[list[Any]], Any]:
    """Node values from standard normals ``w``, root first; and the change-of-variables term.

    Each node's value is drawn given its parent's value and its own information (from
    :func:`pass_up`); without information it is the plain non-centred form
    ``parent + D·w`` (``D`` diagonal or full, see :func:`pass_up`). Returns the
    values per layer (k tensors each) and the log density to add as a potential: the prior
    density of the values plus the log-Jacobian minus the N(0, 1) density of ``w`` (zero
    without information).
    """
    depths = tree.depths
    k = len(step[0])
    values: list[list[Any]] = []
    density = pt.as_tensor_variable(0.0)
    for d, nodes in enumerate(depths):
        D = step_matrix(step[d])
        if d == 0:
            parent = [pt.as_tensor_variable(np.full(1, v)) for v in root_mean]
        else:
            at = tree.parent[nodes] - depths[d - 1][0]
            parent = [values[d - 1][i][at] for i in range(k)]
        wd = [w[i][nodes] for i in range(k)]
        P, h = info[d]
        if P is None:
            values.append([parent[i] + _dot((D[i][j], wd[j]) for j in range(k))
                           for i in range(k)])
            continue
        L = chol[d]
        # value = parent + D u with u = B⁻¹ Dᵀ (h − P·parent) + L⁻ᵀ w; the potential is the
        # prior density of the value plus the log-Jacobian minus the N(0, 1) density of w:
        # −Σ log diag L − |u|²/2 + |w|²/2 (log|det D| cancels: finite as any SD → 0)
        resid = [h[i] - sum(P[i][j] * parent[j] for j in range(k)) for i in range(k)]
        a = cho_solve(L, [_dot((D[m][i], resid[m]) for m in range(k)) for i in range(k)])
        e = back_solve(L, wd)
        u = [a[i] + e[i] for i in range(k)]
        values.append([parent[i] + _dot((D[i][j], u[j]) for j in range(k)) for i in range(k)])
        density = density + sum(
            pt.sum(-pt.log(L[i][i]) - 0.5 * u[i] ** 2 + 0.5 * wd[i] ** 2) for i in range(k))
    return values, density


def step_matrix(step: list[Any]) -> list[list[Any]]:
    """A layer's step as a k × k matrix: k SDs become a diagonal (off-diagonal float 0.0)."""
    if isinstance(step[0], list):
        return step
    k = len(step)
    return [[step[i] if i == j else 0.0 for j in range(k)] for i in range(k)]


def _dot(pairs: Any) -> Any:
    # Σ a·b over the pairs, leaving out products with a structural zero (the float 0.0), so a
    # diagonal step builds the same graph as before the correlated form existed
    total: Any = 0.0
    for a, b in pairs:
        if _zero(a) or _zero(b):
            continue
        total = a * b if _zero(total) else total + a * b
    return total


def _zero(x: Any) -> bool:
    return isinstance(x, float) and x == 0.0


def segment_sum(values: Any, index: np.ndarray, n: int) -> Any:
    """Sums of ``values`` by group (``index`` per element into ``n`` groups)."""
    return pt.inc_subtensor(pt.zeros(n)[index], values)


def cholesky(B: list[list[Any]]) -> list[list[Any]]:
    """Cholesky factor of a batch of small SPD matrices given entry by entry: ``L[i][j]``, j ≤ i."""
    k = len(B)
    L: list[list[Any]] = [[None] * k for _ in range(k)]
    for j in range(k):
        L[j][j] = pt.sqrt(B[j][j] - sum(L[j][m] ** 2 for m in range(j)))
        for i in range(j + 1, k):
            L[i][j] = (B[i][j] - sum(L[i][m] * L[j][m] for m in range(j))) / L[j][j]
    return L


def forward_solve(L: list[list[Any]], b: list[Any]) -> list[Any]:
    """Solve ``L y = b``."""
    y: list[Any] = []
    for i in range(len(b)):
        y.append((b[i] - sum(L[i][m] * y[m] for m in range(i))) / L[i][i])
    return y


def back_solve(L: list[list[Any]], y: list[Any]) -> list[Any]:
    """Solve ``Lᵀ x = y``."""
    k = len(y)
    x: list[Any] = [None] * k
    for i in range(k - 1, -1, -1):
        x[i] = (y[i] - sum(L[m][i] * x[m] for m in range(i + 1, k))) / L[i][i]
    return x


def cho_solve(L: list[list[Any]], b: list[Any]) -> list[Any]:
    """Solve ``B x = b`` with ``B = L Lᵀ``."""
    return back_solve(L, forward_solve(L, b))
