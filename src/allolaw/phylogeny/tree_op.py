"""The tree density as one PyTensor operation: a loop over nodes, with its own gradient.

:func:`allolaw.phylogeny.density.log_density` used to build the messages from the tips to the
root as PyTensor operations, a fixed set per level of the tree (gathers, scatters and
element-wise steps). Compiled with numba that cost 1.1–1.25 ms per density + gradient at
10,000 tips and 136–209 s of compiling (peak 7 GB); with JAX 2.95 ms (session 13 probes,
benchmarks/README.md). Here the same messages are one operation, :class:`TreeDensity`, whose
value and gradient come from two plain loops over the nodes (numba-compiled): up the tree for
the value, down it for the gradient (reverse-mode differentiation written out by hand,
because no library differentiates a loop over a tree's nodes into another loop; PyTensor's
autodiff of the level form is what this replaces).

The operation takes the standardised residuals ``z``, Pagel's λ and the tree as four arrays
(parent, branch length, tip height per node; node of each species) and returns the log
density of ``z ~ N(0, λC + (1 − λ)D)`` together with its gradient in ``z`` and λ, so a
density and its gradient cost one pass up and one pass down. Backends:

* Python (C and Python modes, tests): :meth:`TreeDensity.perform` calls the numba kernels.
* numba (nutpie's numba compiler, PyTensor's NUMBA mode): the same kernels inlined.
* JAX (nutpie's default compiler, numpyro): the level form in ``jax.numpy`` and ``jax.grad``;
  the tree's arrays must be constants of the graph (they are: the model's tree is fixed).

Forward pass, per internal node ``p`` in post-order (children have smaller indices): each
child ``c`` sends ``N(μ_c; x, v_c)`` with ``v_c = var_c + t_c`` (``t`` the λ-scaled branch);
the product is ``prec_p = Σ w_c`` (``w = 1/v``), ``μ_p = Σ w_c μ_c / prec_p``, and the log of
its constant ``−½(Σ log v_c + log prec_p + Σ w_c (μ_c − μ_p)² + (n_c − 1) log 2π)``
(Felsenstein 1973; Ho & Ané 2014). The root's message is evaluated at 0.

Backward pass (derivation in the comments of :func:`_value_and_gradient`): each node's
adjoints come from its parent's, so one loop from the root down gives the gradient.

References
----------
Felsenstein, J. (1973). Maximum-likelihood estimation of evolutionary trees from continuous
characters. Am. J. Hum. Genet. 25, 471–492.
Ho, L. S. T. & Ané, C. (2014). A linear-time algorithm for Gaussian and non-Gaussian trait
evolution models. Syst. Biol. 63, 397–408.
"""

from __future__ import annotations

from functools import cache
from typing import Any

import numpy as np
import pytensor.tensor as pt
from pytensor.gradient import DisconnectedType, grad_not_implemented
from pytensor.graph.basic import Apply, Constant
from pytensor.graph.op import Op

from allolaw.phylogeny.tree import Phylogeny

__all__ = ["TreeDensity", "level_form", "tree_density", "value_and_gradient"]

_LOG_2PI = float(np.log(2.0 * np.pi))


@cache
def _kernel() -> Any:
    # compiled on first use (numba's import and compile stay out of stages that only read a
    # tree); cached on disk by numba between processes
    import numba

    return numba.njit(cache=True)(_value_and_gradient)


def _value_and_gradient(z, lam, parent, length, tip_height, tip_node):  # pragma: no cover
    # (run numba-compiled through _kernel; tests compare it with the dense density)
    m = parent.shape[0]
    n = tip_node.shape[0]
    t = lam * length + (1.0 - lam) * tip_height
    mu = np.zeros(m)
    var = np.zeros(m)
    # per node, running sums over its children: precision, weighted mean, weighted squared
    # deviations (West 1979's weighted update, stable), Σ log v and the number of children
    prec = np.zeros(m)
    mean = np.zeros(m)
    ssq = np.zeros(m)
    logv = np.zeros(m)
    count = np.zeros(m)
    is_tip = np.zeros(m, np.bool_)
    for j in range(n):
        mu[tip_node[j]] = z[j]
        is_tip[tip_node[j]] = True
    total = 0.0
    for i in range(m):
        if not is_tip[i]:
            # all children of i have smaller indices: its product is complete
            mu[i] = mean[i]
            var[i] = 1.0 / prec[i]
            total -= 0.5 * (logv[i] + np.log(prec[i]) + ssq[i] + _LOG_2PI * (count[i] - 1.0))
        p = parent[i]
        if p < 0:
            break
        v = var[i] + t[i]
        w = 1.0 / v
        w_new = prec[p] + w
        delta = mu[i] - mean[p]
        mean[p] += delta * w / w_new
        ssq[p] += w * delta * (mu[i] - mean[p])
        prec[p] = w_new
        logv[p] += np.log(v)
        count[p] += 1.0
    root = m - 1
    total -= 0.5 * (_LOG_2PI + np.log(var[root]) + mu[root] ** 2 / var[root])

    # adjoints of each node's message mean and variance, from the root down. For a parent p
    # with children c (w_c = 1/v_c, dev_c = μ_c − μ_p), its term T_p and outputs μ_p, var_p:
    #   ∂/∂μ_c: w_c (−dev_c + ḡμ_p / prec_p)
    #   ∂/∂w_c: −½(1/prec_p + dev_c²) + ḡμ_p dev_c / prec_p − ḡvar_p / prec_p²
    #   ∂/∂v_c = −½ w_c − w_c² ∂/∂w_c, passed to var_c (internal c) and to t_c (→ λ)
    g_mu = np.zeros(m)
    g_var = np.zeros(m)
    g_mu[root] = -mu[root] / var[root]
    g_var[root] = -0.5 * (1.0 / var[root] - mu[root] ** 2 / var[root] ** 2)
    g_lam = 0.0
    for i in range(m - 2, -1, -1):
        p = parent[i]
        v = var[i] + t[i]
        w = 1.0 / v
        pr = prec[p]
        dev = mu[i] - mu[p]
        g_mu[i] = w * (-dev + g_mu[p] / pr)
        g_w = -0.5 * (1.0 / pr + dev * dev) + g_mu[p] * dev / pr - g_var[p] / (pr * pr)
        g_v = -0.5 * w - w * w * g_w
        if not is_tip[i]:
            g_var[i] = g_v
        g_lam += g_v * (length[i] - tip_height[i])
    g_z = np.empty(n)
    for j in range(n):
        g_z[j] = g_mu[tip_node[j]]
    return total, g_z, g_lam


def value_and_gradient(z: np.ndarray, lam: float, phylogeny: Phylogeny
                       ) -> tuple[float, np.ndarray, float]:
    """Log density of ``z ~ N(0, λC + (1 − λ)D)`` and its gradient in ``z`` and λ (NumPy)."""
    arrays = _tree_arrays(phylogeny)
    return _kernel()(np.asarray(z, np.float64), float(lam), *arrays)


def _tree_arrays(phylogeny: Phylogeny) -> tuple[np.ndarray, ...]:
    return (np.asarray(phylogeny.parent, np.int64), np.asarray(phylogeny.length, np.float64),
            np.asarray(phylogeny.tip_height, np.float64),
            np.asarray(phylogeny.tip_node, np.int64))


class TreeDensity(Op):
    """``(z, λ, parent, length, tip_height, tip_node) → (log density, ∂/∂z, ∂/∂λ)``.

    Outputs 1 and 2 are the gradient, used by :meth:`L_op`; a graph that asks only for the
    density still computes them (one pass down the tree, as cheap as the pass up).
    """

    __props__ = ()

    def make_node(self, z: Any, lam: Any, parent: Any, length: Any, tip_height: Any,
                  tip_node: Any) -> Apply:
        _register_backends()
        z = pt.as_tensor_variable(z).astype("float64")
        lam = pt.as_tensor_variable(lam).astype("float64")
        parent = pt.as_tensor_variable(parent)
        length = pt.as_tensor_variable(length)
        tip_height = pt.as_tensor_variable(tip_height)
        tip_node = pt.as_tensor_variable(tip_node)
        if z.ndim != 1 or lam.ndim != 0:
            msg = "TreeDensity takes a vector of residuals and a scalar λ"
            raise TypeError(msg)
        outputs = [pt.dscalar(), pt.dvector(), pt.dscalar()]
        return Apply(self, [z, lam, parent, length, tip_height, tip_node], outputs)

    def perform(self, node: Apply, inputs: list[Any], output_storage: list[Any]) -> None:
        z, lam, parent, length, tip_height, tip_node = inputs
        total, g_z, g_lam = _kernel()(
            np.asarray(z, np.float64), float(lam), np.asarray(parent, np.int64),
            np.asarray(length, np.float64), np.asarray(tip_height, np.float64),
            np.asarray(tip_node, np.int64))
        output_storage[0][0] = np.asarray(total)
        output_storage[1][0] = g_z
        output_storage[2][0] = np.asarray(g_lam)

    def infer_shape(self, fgraph: Any, node: Apply, shapes: list[Any]) -> list[Any]:
        return [(), shapes[0], ()]

    def connection_pattern(self, node: Apply) -> list[list[bool]]:
        # the value depends on z and λ; the tree's arrays are data
        return [[True, True, True], [True, True, True]] + [[False] * 3] * 4

    def L_op(self, inputs: list[Any], outputs: list[Any],  # noqa: N802 - PyTensor's name
             output_grads: list[Any]) -> list[Any]:
        g_out, g_gz, g_glam = output_grads
        for k, g in ((1, g_gz), (2, g_glam)):
            if not isinstance(g.type, DisconnectedType):
                # second derivatives: not needed by the samplers
                return [grad_not_implemented(self, k, inputs[0]),
                        grad_not_implemented(self, k, inputs[1])] + [
                    DisconnectedType()() for _ in range(4)]
        _, g_z, g_lam = outputs
        return [g_out * g_z, g_out * g_lam] + [DisconnectedType()() for _ in range(4)]


def level_form(z: Any, lam: Any, phylogeny: Phylogeny, xp: Any) -> Any:
    """``log N(z; 0, λC + (1 − λ)D)`` a level at a time; ``xp`` is ``numpy`` or ``jax.numpy``.

    Every node whose children are done is finished in one vectorised step (the NumPy twin of
    the density, and the JAX implementation of :class:`TreeDensity` through ``jax.grad``).
    """
    m = phylogeny.n_nodes
    t = lam * phylogeny.length + (1.0 - lam) * phylogeny.tip_height  # Pagel's λ tree
    mu = _set(xp.zeros(m), phylogeny.tip_node, z, xp)
    var = xp.zeros(m)
    total = 0.0
    for level in phylogeny.levels:
        c, slot, k = level.children, level.slot, len(level.parents)
        v = var[c] + t[c]  # message variance at the parent: child's plus its branch
        w = 1.0 / v
        prec = _segment_sum(w, slot, k, xp)
        mean = _segment_sum(mu[c] * w, slot, k, xp) / prec
        dev = mu[c] - mean[slot]
        # log of the constant when the k children's messages multiply into one
        total = total - 0.5 * (
            xp.sum(xp.log(v)) + xp.sum(xp.log(prec)) + xp.sum(dev * dev * w)
            + _LOG_2PI * (len(c) - k)
        )
        mu = _set(mu, level.parents, mean, xp)
        var = _set(var, level.parents, 1.0 / prec, xp)
    # the root's value is 0: evaluate its message there
    return total - 0.5 * (_LOG_2PI + xp.log(var[-1]) + mu[-1] ** 2 / var[-1])


def _segment_sum(values: Any, index: np.ndarray, n: int, xp: Any) -> Any:
    if xp is np:
        return np.bincount(index, weights=values, minlength=n)
    return xp.zeros(n).at[index].add(values)


def _set(target: Any, index: np.ndarray, values: Any, xp: Any) -> Any:
    if xp is np:
        out = np.array(target, float)
        out[index] = values
        return out
    return target.at[index].set(values)


_TREE_DENSITY = TreeDensity()


def tree_density(z: Any, lam: Any, phylogeny: Phylogeny) -> Any:
    """PyTensor log density of ``z ~ N(0, λC + (1 − λ)D)``: one :class:`TreeDensity` node."""
    _register_backends()
    arrays = [pt.constant(a) for a in _tree_arrays(phylogeny)]
    return _TREE_DENSITY(z, lam, *arrays)[0]


@cache
def _register_backends() -> None:
    # once, at the first graph: importing PyTensor's JAX dispatch imports JAX (about 1.5 s),
    # which stages that only read a tree should not pay
    from pytensor.link.jax.dispatch import jax_funcify
    from pytensor.link.numba.dispatch.basic import register_funcify_default_op_cache_key

    @register_funcify_default_op_cache_key(TreeDensity)
    def _numba_tree_density(op: TreeDensity, node: Apply, **kwargs: Any) -> Any:
        import numba

        kernel = _kernel()

        @numba.njit
        def tree_density_numba(z, lam, parent, length, tip_height, tip_node):  # pragma: no cover
            total, g_z, g_lam = kernel(z, lam.item(), parent, length, tip_height, tip_node)
            return np.asarray(total), g_z, np.asarray(g_lam)

        return tree_density_numba, 1

    @jax_funcify.register(TreeDensity)
    def _jax_tree_density(op: TreeDensity, node: Apply, **kwargs: Any) -> Any:
        return _jax_function(node)


def _jax_function(node: Apply) -> Any:
    # JAX needs static shapes: the tree's arrays must be constants, read here once; the level
    # form (one vectorised step per level) is differentiated by jax.grad
    import jax
    import jax.numpy as jnp

    tree = node.inputs[2:]
    if not all(isinstance(v, Constant) for v in tree):
        msg = "TreeDensity under JAX needs the tree's arrays as constants of the graph"
        raise NotImplementedError(msg)
    parent, length, _tip_height, tip_node = (np.asarray(v.data) for v in tree)
    phylogeny = Phylogeny(parent, length, tip_node)

    def value(z: Any, lam: Any) -> Any:
        return level_form(z, lam, phylogeny, jnp)

    both = jax.value_and_grad(value, argnums=(0, 1))

    def tree_density_jax(z: Any, lam: Any, *_tree: Any) -> Any:
        total, (g_z, g_lam) = both(z, lam)
        return total, g_z, g_lam

    return tree_density_jax

