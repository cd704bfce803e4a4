"""The whitened tree map as one PyTensor operation (JAX inside), with its gradient as another.

:mod:`allolaw.model.treemsg` writes the data-whitened map of the taxon terms (and of the
nested size population) as PyTensor operations, k × k blocks entry by entry: one scatter per
entry and layer for the messages, one gather per entry for the parent values, and PyTensor's
own gradient of each of them. Compiled with JAX, a log density + gradient of problem B was a
program of ~370 fused kernels and 26 scatters, and PyTensor's rewrites of the graph took
6–27 s per model (benchmarks/README.md).

Here the same map is :class:`WhitenedTree`, one operation whose value is one JAX function: the
leaf layer's information summed from the data (:func:`leaf_rows`, one scatter), then
:func:`tree_map`, the same entry-by-entry algebra on arrays over a layer's nodes, with each
layer's message entries in one stacked scatter and the parent values in one stacked gather.
Its gradient is a second operation, :class:`WhitenedTreeVJP`, ``jax.vjp`` of
:func:`tree_map` from the leaf information up, followed by PyTensor's own gradient of
:func:`leaf_rows` (a gather and element-wise steps over the data). Written here because
PyTensor has no operation for batched small-matrix Gaussian messages. Outside JAX (PyTensor's
C or Python modes: PyMC's own sampler, the tests) :meth:`perform` calls the same functions
jitted.

The PyTensor form in :mod:`allolaw.model.treemsg` stays the reference: the tests compare the
value and gradient of both on trees of one to three layers with diagonal and full steps, and
the exact-marginal tests of the taxon terms run with both. Which form a model gets:
:func:`use_operation`.
"""

from __future__ import annotations

import os
from functools import cache
from typing import Any

import numpy as np
import pytensor.tensor as pt
from pytensor.gradient import DisconnectedType
from pytensor.graph.basic import Apply
from pytensor.graph.op import Op

from allolaw.model.treemsg import (
    LayeredTree,
    back_solve,
    cho_solve,
    leaf_information,
    pass_down,
    pass_up,
    step_matrix,
)

__all__ = ["WhitenedTree", "WhitenedTreeVJP", "leaf_rows", "tree_map", "use_operation",
           "whitened_map"]


#: With ``ALLOLAW_WHITENED_TREE=auto`` (the default) models of fewer data rows than this write
#: the whitened map as :class:`WhitenedTree`, larger ones as the PyTensor form. Measured by
#: benchmarks/tree_kernels.py (2026-12-05, idle machine, µs per log density + gradient,
#: PyTensor form → operation): island demo fits (172 species) 154 → 120, 252 → 130,
#: 267 → 166, 481 → 359; B (600) 175 → 185; C (3,000) 434 → 699; D (10,000) 1,423 → 1,786.
#: The operation's PyTensor rewrites take 1–4 s instead of 6–27 s at every size; why the
#: large programs run slower with it is not found yet (the operation's own parts, timed
#: alone on C, sum to about 250 µs).
OPERATION_BELOW_ROWS = 1000


def use_operation(n_rows: int) -> bool:
    """Whether a model of ``n_rows`` data rows writes the whitened map as
    :class:`WhitenedTree` or as the PyTensor graph of :mod:`allolaw.model.treemsg`.

    ``ALLOLAW_WHITENED_TREE``: ``auto`` (default; :data:`OPERATION_BELOW_ROWS`),
    ``operation`` or ``graph`` (for before/after measurements and tests). With nutpie's
    numba compiler forced for every fit (``ALLOLAW_NUTPIE_BACKEND=numba``) always the graph
    form: the operation has no numba implementation, and numba would call it through Python
    at every gradient.
    """
    choice = os.environ.get("ALLOLAW_WHITENED_TREE", "auto")
    if choice not in ("auto", "operation", "graph"):
        msg = f"ALLOLAW_WHITENED_TREE must be 'auto', 'operation' or 'graph', not {choice!r}"
        raise ValueError(msg)
    if os.environ.get("ALLOLAW_NUTPIE_BACKEND") == "numba" or choice == "graph":
        return False
    return choice == "operation" or n_rows < OPERATION_BELOW_ROWS


# ---------------------------------------------------------------------------------------------
# The map on arrays (xp = jax.numpy; leaf_rows also takes pytensor.tensor)


def leaf_rows(feats: Any, target: Any, noise_var: Any, xp: Any) -> Any:
    """Per datum, its terms of the leaf information: the entries ``P_ij`` (``j ≤ i``, row by
    row) and ``h_i`` of ``x xᵀ / v`` and ``x y / v``, ``(k(k+1)/2 + k, n)``; ``feats`` is a
    sequence of k arrays (``xp`` is ``pytensor.tensor``, ``numpy`` or ``jax.numpy``)."""
    k = len(feats)
    weight = 1.0 / noise_var
    xw = [f * weight for f in feats]
    rows = [feats[i] * xw[j] for i in range(k) for j in range(i + 1)]
    return xp.stack(rows + [xw[i] * target for i in range(k)])


def tree_map(w: Any, D: Any, leaf: Any, *, layer_sizes: tuple, parent_positions: tuple,
             root_mean: tuple, xp: Any, **_: Any) -> Any:
    """Node values ``(k, n_nodes)`` and the change-of-variables density of the whitened map.

    Same algebra as ``pass_up`` + ``pass_down`` of :mod:`allolaw.model.treemsg` (see there):
    ``w`` one standard normal per term and node (nodes numbered root first, layer by layer),
    ``D`` the step of each layer ``(layers, k, k)``, ``leaf`` the deepest layer's information
    (:func:`leaf_information`); ``parent_positions[d]`` each node's parent's position in
    layer ``d − 1``.
    """
    k = D.shape[-1]
    n_layers = len(layer_sizes)
    tri = [(i, j) for i in range(k) for j in range(i + 1)]
    P, h = _unpack(leaf, tri, k)

    info: list[Any] = [None] * n_layers
    chol: list[Any] = [None] * n_layers
    for d in range(n_layers - 1, -1, -1):
        info[d] = (P, h)
        Dd = _per_node(D[d], layer_sizes[d], xp)
        PD = [[_sum(P[i][m] * Dd[m, j] for m in range(k)) for j in range(k)] for i in range(k)]
        B = [[_sum(Dd[m, i] * PD[m][j] for m in range(k)) + (1.0 if i == j else 0.0)
              for j in range(k)] for i in range(k)]
        L = _cholesky(B, xp)
        chol[d] = L
        if d == 0:
            break
        # message to the parent: Q = P − PD B⁻¹ PDᵀ, g = h − PD B⁻¹ Dᵀ h (treemsg.pass_up)
        Y = [cho_solve(L, PD[c]) for c in range(k)]
        z = cho_solve(L, [_sum(Dd[m, i] * h[m] for m in range(k)) for i in range(k)])
        Q = {(i, j): P[i][j] - _sum(PD[i][m] * Y[j][m] for m in range(k)) for i, j in tri}
        g = [h[i] - _sum(PD[i][m] * z[m] for m in range(k)) for i in range(k)]
        rows = [Q[i, j] for i, j in tri] + g
        sums = _segment_sum(xp.stack(rows), parent_positions[d], layer_sizes[d - 1], xp)
        P, h = _unpack(sums, tri, k)

    values: list[Any] = []
    density = 0.0
    start = 0
    for d in range(n_layers):
        Dd = _per_node(D[d], layer_sizes[d], xp)
        stop = start + layer_sizes[d]
        if d == 0:
            parent = [xp.full((1,), float(root_mean[i])) for i in range(k)]
        else:
            gathered = values[d - 1][:, parent_positions[d]]  # one gather per layer
            parent = [gathered[i] for i in range(k)]
        wd = [w[i, start:stop] for i in range(k)]
        P, h = info[d]
        L = chol[d]
        resid = [h[i] - _sum(P[i][j] * parent[j] for j in range(k)) for i in range(k)]
        a = cho_solve(L, [_sum(Dd[m, i] * resid[m] for m in range(k)) for i in range(k)])
        e = back_solve(L, wd)
        u = [a[i] + e[i] for i in range(k)]
        values.append(xp.stack([parent[i] + _sum(Dd[i, j] * u[j] for j in range(k))
                                for i in range(k)]))
        density = density + _sum(
            xp.sum(-xp.log(L[i][i]) - 0.5 * u[i] ** 2 + 0.5 * wd[i] ** 2) for i in range(k))
        start = stop
    return xp.concatenate(values, axis=1), density


def _per_node(Dd: Any, n: int, xp: Any) -> Any:
    # the layer's k × k step repeated for each of its n nodes, (k, k, n): every product with a
    # step entry is then element-wise between vectors, so the gradient in the step is one
    # reduction over the nodes per layer instead of one per product
    return xp.broadcast_to(Dd[:, :, None], (*Dd.shape, n))


def _sum(terms: Any) -> Any:
    terms = iter(terms)
    total = next(terms)
    for t in terms:
        total = total + t
    return total


def _unpack(sums: Any, tri: list[tuple[int, int]], k: int) -> tuple[list[list[Any]], list[Any]]:
    P: list[list[Any]] = [[None] * k for _ in range(k)]
    for r, (i, j) in enumerate(tri):
        P[i][j] = P[j][i] = sums[r]
    return P, [sums[len(tri) + i] for i in range(k)]


def _segment_sum(rows: Any, index: Any, n: int, xp: Any) -> Any:
    # sums of each row's values by group (one scatter for all rows)
    return xp.zeros((rows.shape[0], n), rows.dtype).at[:, index].add(rows)


def _cholesky(B: list[list[Any]], xp: Any) -> list[list[Any]]:
    k = len(B)
    L: list[list[Any]] = [[None] * k for _ in range(k)]
    for j in range(k):
        s = B[j][j]
        for m in range(j):
            s = s - L[j][m] ** 2
        L[j][j] = xp.sqrt(s)
        for i in range(j + 1, k):
            s = B[i][j]
            for m in range(j):
                s = s - L[i][m] * L[j][m]
            L[i][j] = s / L[j][j]
    return L


# ---------------------------------------------------------------------------------------------
# The operations


class _TreeOpBase(Op):
    __props__ = ("layer_sizes", "parent_positions", "index", "root_mean", "noise_ndim")

    def __init__(self, layer_sizes: tuple, parent_positions: tuple, index: tuple,
                 root_mean: tuple, noise_ndim: int = 1) -> None:
        self.layer_sizes = tuple(int(s) for s in layer_sizes)
        self.parent_positions = tuple(tuple(int(p) for p in pos) for pos in parent_positions)
        self.index = tuple(int(i) for i in index)
        self.root_mean = tuple(float(m) for m in root_mean)
        self.noise_ndim = int(noise_ndim)

    def arrays(self) -> dict[str, Any]:
        # the static tree as NumPy arrays (constants of the compiled program)
        return {"layer_sizes": self.layer_sizes,
                "parent_positions": tuple(np.asarray(p, np.int64)
                                          for p in self.parent_positions),
                "index": np.asarray(self.index, np.int64), "root_mean": self.root_mean}

    def perform(self, node: Apply, inputs: list[Any], output_storage: list[Any]) -> None:
        for out, value in zip(output_storage, _jitted(self)(*inputs), strict=True):
            out[0] = np.asarray(value, np.float64)


class WhitenedTree(_TreeOpBase):
    """``(w, D, feats, target, noise_var) → (values, density, leaf)`` of :func:`tree_map`.

    ``noise_var`` is a scalar (``noise_ndim=0``) or one value per datum (``noise_ndim=1``).
    ``leaf`` is the leaf layer's information (:func:`leaf_rows` summed by leaf), kept for the
    gradient.

    The gradient: :class:`WhitenedTreeVJP` (``jax.vjp`` of the tree's part, from the leaf
    information up; a few hundred nodes at most) for ``w``, ``D`` and the leaf information,
    then PyTensor's own gradient of :func:`leaf_rows` for the data's part (a gather and
    element-wise steps over the data). Differentiating the data's part with ``jax.vjp``
    inside the operation made problems C and D (3,000 and 10,000 species) slower than the
    PyTensor form (benchmarks/README.md, "The whitened tree as one operation").
    """

    def make_node(self, w: Any, D: Any, feats: Any, target: Any, noise_var: Any) -> Apply:
        _register_backends()
        inputs = [pt.as_tensor_variable(v).astype("float64")
                  for v in (w, D, feats, target, noise_var)]
        if [v.ndim for v in inputs] != [2, 3, 2, 1, self.noise_ndim]:
            msg = ("WhitenedTree takes w (k, nodes), D (layers, k, k), feats (k, n), target (n) "
                   "and the noise variance (scalar or (n))")
            raise TypeError(msg)
        return Apply(self, inputs, [pt.dmatrix(), pt.dscalar(), pt.dmatrix()])

    def infer_shape(self, fgraph: Any, node: Apply, shapes: list[Any]) -> list[Any]:
        k = shapes[0][0]
        return [shapes[0], (), (k * (k + 1) // 2 + k, self.layer_sizes[-1])]

    def L_op(self, inputs: list[Any], outputs: list[Any],  # noqa: N802 - PyTensor's name
             output_grads: list[Any]) -> list[Any]:
        from pytensor.gradient import grad

        g_values, g_density, g_leaf = output_grads
        if not isinstance(g_leaf.type, DisconnectedType):
            msg = "WhitenedTree: the leaf information output is not differentiable"
            raise NotImplementedError(msg)
        if isinstance(g_values.type, DisconnectedType):
            g_values = pt.zeros_like(outputs[0])
        if isinstance(g_density.type, DisconnectedType):
            g_density = pt.zeros_like(outputs[1])
        w, D, feats, target, noise_var = inputs
        vjp = WhitenedTreeVJP(self.layer_sizes, self.parent_positions, self.index,
                              self.root_mean, self.noise_ndim)
        g_w, g_D, g_leaf = vjp(w, D, outputs[2], g_values, g_density)
        k = self.k_of(w)
        rows = leaf_rows([feats[i] for i in range(k)], target, noise_var, pt)
        # the sum by leaf is linear: its transpose gathers each datum's leaf cotangent
        g_rows = g_leaf[:, np.asarray(self.index, np.int64)]
        g_data = grad(None, [feats, target, noise_var], known_grads={rows: g_rows},
                      disconnected_inputs="ignore", return_disconnected="zero")
        return [g_w, g_D, *g_data]

    @staticmethod
    def k_of(w: Any) -> int:
        k = w.type.shape[0]
        if k is None:
            msg = "WhitenedTree needs the number of terms (w's first dimension) known statically"
            raise ValueError(msg)
        return int(k)


class WhitenedTreeVJP(_TreeOpBase):
    """``(w, D, leaf, g_values, g_density) → (g_w, g_D, g_leaf)``: ``jax.vjp`` of
    :func:`tree_map` (the tree's part only)."""

    def make_node(self, *args: Any) -> Apply:
        _register_backends()
        inputs = [pt.as_tensor_variable(v).astype("float64") for v in args]
        return Apply(self, inputs, [v.type() for v in inputs[:3]])

    def infer_shape(self, fgraph: Any, node: Apply, shapes: list[Any]) -> list[Any]:
        return list(shapes[:3])


def _jax_function(op: _TreeOpBase) -> Any:
    import jax
    import jax.numpy as jnp

    arrays = op.arrays()
    index = arrays["index"]
    n_leaves = arrays["layer_sizes"][-1]

    def tree(w: Any, D: Any, leaf: Any) -> Any:
        return tree_map(w, D, leaf, xp=jnp, **arrays)

    if isinstance(op, WhitenedTree):
        def forward(w: Any, D: Any, feats: Any, target: Any, noise_var: Any) -> Any:
            rows = leaf_rows([feats[i] for i in range(feats.shape[0])], target, noise_var, jnp)
            leaf = _segment_sum(rows, index, n_leaves, jnp)
            values, density = tree(w, D, leaf)
            return values, density, leaf

        return forward

    def backward(w: Any, D: Any, leaf: Any, g_values: Any, g_density: Any) -> Any:
        _, pullback = jax.vjp(tree, w, D, leaf)
        return pullback((g_values, g_density))

    return backward


@cache
def _jitted(op: _TreeOpBase) -> Any:
    # perform() outside JAX mode: the same JAX function, compiled once per operation
    import jax

    _register_backends()
    return jax.jit(_jax_function(op))


def _merge_sibling_gradients(fgraph: Any, node: Apply) -> Any:
    # PyMC builds the log density from two copies of the model graph, one for the likelihood
    # and one for the potentials; PyTensor merges the two copies of a WhitenedTree into one,
    # but the gradient was built before, with one WhitenedTreeVJP per copy. The cotangents
    # enter linearly, so two gradient operations at the same point are one with summed
    # cotangents: the first takes the sum, the second's outputs become zeros.
    others = [client for client, _ in fgraph.clients[node.inputs[0]]
              if client is not node and client.op == node.op
              and all(a is b for a, b in zip(client.inputs[:3], node.inputs[:3], strict=True))]
    if not others:
        return None
    other = others[0]
    combined = node.op(*node.inputs[:3], node.inputs[3] + other.inputs[3],
                       node.inputs[4] + other.inputs[4])
    replacements = dict(zip(node.outputs, combined, strict=True))
    # zeros shaped like the primal inputs (zeros_like of the outputs would keep `other`)
    replacements.update({out: pt.zeros_like(x)
                         for out, x in zip(other.outputs, other.inputs[:3], strict=True)})
    return replacements


@cache
def _register_backends() -> None:
    # importing PyTensor's JAX dispatch imports JAX and turns on 64-bit floats in it
    from pytensor.graph.rewriting.basic import node_rewriter
    from pytensor.link.jax.dispatch import jax_funcify
    from pytensor.tensor.rewriting.basic import register_canonicalize

    register_canonicalize(node_rewriter([WhitenedTreeVJP])(_merge_sibling_gradients),
                          name="merge_whitened_tree_gradients")

    @jax_funcify.register(WhitenedTree)
    @jax_funcify.register(WhitenedTreeVJP)
    def _jax_whitened_tree(op: _TreeOpBase, node: Apply, **kwargs: Any) -> Any:
        return _jax_function(op)


# ---------------------------------------------------------------------------------------------
# The graph-building helper used by the model terms


def whitened_map(tree: LayeredTree, step: list[list[Any]], root_mean: list[float],
                 w: list[Any], features: list[Any], target: Any, noise_var: Any,
                 index: np.ndarray) -> tuple[list[list[Any]], Any]:
    """``leaf_information`` + ``pass_up`` + ``pass_down`` of :mod:`~allolaw.model.treemsg`,
    as one :class:`WhitenedTree` or as those passes (:func:`use_operation`); returns the values
    per layer (k tensors each) and the density."""
    index = np.asarray(index)
    if not use_operation(len(index)):
        P, h = leaf_information(features, target, noise_var, index, len(tree.depths[-1]))
        info, chol = pass_up(tree, step, P, h)
        return pass_down(tree, step, root_mean, w, info, chol)
    k = len(w)
    # constant shapes: target.shape would tie every input to the target's graph, which PyMC
    # copies differently for the likelihood and for the potentials, and the two copies of
    # the operation would not merge into one computation
    shape = (len(index),)
    target = pt.as_tensor_variable(target).astype("float64")
    feats = pt.stack([pt.broadcast_to(pt.as_tensor_variable(f).astype("float64"), shape)
                      for f in features])
    # the noise variance as given (a scalar or one per datum), not broadcast here: PyMC
    # rewrites the likelihood's copy of the graph (lifting the broadcast into the power) but
    # not the potentials', and two differently written inputs would keep two operations
    noise = pt.as_tensor_variable(noise_var).astype("float64")
    if noise.ndim > 1:
        msg = "whitened_map: the noise variance must be a scalar or one value per datum"
        raise ValueError(msg)
    D = pt.stack([pt.stack([pt.stack([pt.as_tensor_variable(e).astype("float64") for e in row])
                            for row in step_matrix(s)]) for s in step])
    W = pt.stack([pt.as_tensor_variable(v) for v in w])
    parents = [()] + [tuple(tree.parent[nodes] - tree.depths[d - 1][0])
                      for d, nodes in enumerate(tree.depths) if d > 0]
    op = WhitenedTree(tuple(len(nodes) for nodes in tree.depths), tuple(parents),
                      tuple(index), tuple(root_mean), noise.ndim)
    values, density, _ = op(W, D, feats, target, noise)
    per_layer = [[values[i, nodes[0]:nodes[-1] + 1] for i in range(k)] for nodes in tree.depths]
    return per_layer, density
