"""The whitened tree map as one operation (model/whitened_op.py) against its PyTensor form.

The PyTensor form (model/treemsg.py) is checked against the dense nested normal model with
scipy in test_model_treemsg.py and test_model_correlated.py (those tests run with both forms).
Here the operation must give the same values, density and gradient in every input, under
PyTensor's own evaluation (perform, used by PyMC's sampler) and compiled with JAX (nutpie's
default), and its gradient must match central finite differences.
"""

import numpy as np
import pytensor
import pytensor.tensor as pt
import pytest

from allolaw.model.builder import build_model
from allolaw.model.spec import parse_spec
from allolaw.model.treemsg import layered_tree, leaf_information, pass_down, pass_up
from allolaw.model.whitened_op import (
    OPERATION_BELOW_ROWS,
    WhitenedTree,
    use_operation,
    whitened_map,
)
from test_model_builder import _nested_data


def _case(k: int, layers: int, full: bool, seed: int):
    # a random layered tree, data on its deepest layer, and a symbolic function of the map
    # whose value and gradient mix every output (values and density)
    rng = np.random.default_rng(seed)
    sizes = [int(rng.integers(2, 5)) * (lv + 1) for lv in range(layers)]
    positions = [np.arange(sizes[0])] + [rng.integers(0, sizes[lv - 1], size=sizes[lv])
                                         for lv in range(1, layers)]
    for lv in range(1, layers):  # every parent keeps at least one child
        positions[lv][: sizes[lv - 1]] = np.arange(sizes[lv - 1])
    tree = layered_tree(positions)
    n = 6 * sizes[-1]
    index = rng.integers(0, sizes[-1], size=n)
    index[: sizes[-1]] = np.arange(sizes[-1])
    n_nodes = tree.n_nodes
    w = pt.tensor("w", shape=(k, n_nodes), dtype="float64")
    sd = pt.tensor("sd", shape=(layers, k), dtype="float64")
    corr = pt.tensor("corr", shape=(layers,), dtype="float64")
    x = pt.tensor("x", shape=(n,), dtype="float64")
    y = pt.tensor("y", shape=(n,), dtype="float64")
    noise = pt.tensor("noise", shape=(n,), dtype="float64")
    feats = [pt.ones_like(x), x, x**2][:k]
    step = [[pt.as_tensor_variable(v) for v in (1.5, 0.6, 0.3)[:k]]]
    for lv in range(layers):
        if full and k > 1:
            rows = [[sd[lv, i] if i == j else (corr[lv] * sd[lv, i] if j == i - 1 else 0.0)
                     for j in range(k)] for i in range(k)]
            step.append(rows)
        else:
            step.append([sd[lv, i] for i in range(k)])
    root = [0.2, 0.7, -0.1][:k]
    ws = [w[i] for i in range(k)]
    P, h = leaf_information(feats, y, noise, index, sizes[-1])
    info, chol = pass_up(tree, step, P, h)
    reference = pass_down(tree, step, root, ws, info, chol)
    operation = whitened_map(tree, step, root, ws, feats, y, noise, index)
    weights = rng.normal(size=n_nodes * k)

    def scalar(result):
        values, density = result
        flat = pt.concatenate([v for layer in values for v in layer])
        return pt.sum(flat * weights) + 0.1 * pt.sum(flat**2) + density

    inputs = [w, sd, corr, x, y, noise]
    point = [rng.normal(0.0, 1.5, size=(k, n_nodes)), rng.uniform(0.05, 1.2, size=(layers, k)),
             rng.uniform(-0.6, 0.6, size=layers), rng.normal(size=n), rng.normal(size=n),
             rng.uniform(0.05, 0.5, size=n)]
    return inputs, point, scalar(reference), scalar(operation)


def _grad(out, inputs):
    return pt.grad(out, inputs, disconnected_inputs="ignore")


CASES = [(1, 3, False), (2, 2, True), (3, 2, True)]


@pytest.mark.parametrize(("k", "layers", "full"), CASES)
@pytest.mark.parametrize("mode", ["FAST_COMPILE", "JAX"])
def test_operation_matches_the_pytensor_form_in_value_and_gradient(k, layers, full, mode):
    # FAST_COMPILE: the operation's perform (PyMC's own sampler calls it so) against the
    # graph evaluated by NumPy; JAX: both compiled as nutpie's default compiler does
    seed = 10 * k + layers + int(full)
    inputs, point, ref, op = _case(k, layers, full, seed)
    f_ref = pytensor.function(inputs, [ref, *_grad(ref, inputs)], mode=mode)
    f_op = pytensor.function(inputs, [op, *_grad(op, inputs)], mode=mode)
    for a, b in zip(f_ref(*point), f_op(*point), strict=True):
        np.testing.assert_allclose(b, a, rtol=1e-9, atol=1e-9)


def test_operation_gradient_matches_finite_differences():
    inputs, point, _, op = _case(2, 2, True, 11)
    f = pytensor.function(inputs, op, mode="FAST_COMPILE")
    grads = pytensor.function(inputs, _grad(op, inputs), mode="FAST_COMPILE")(*point)
    rng = np.random.default_rng(3)
    eps = 1e-6
    for i, value in enumerate(point):
        for _ in range(3):
            at = tuple(rng.integers(0, s) for s in np.shape(value))
            up = [np.array(v, float) for v in point]
            down = [np.array(v, float) for v in point]
            up[i][at] += eps
            down[i][at] -= eps
            numeric = (f(*up) - f(*down)) / (2 * eps)
            np.testing.assert_allclose(grads[i][at], numeric, rtol=1e-5, atol=1e-6)


def test_model_logp_graph_holds_one_tree_operation_per_tree_and_the_same_density(monkeypatch):
    # island-like nesting, correlated intercept and exponent with errors in size: the taxon
    # terms and the size population are one WhitenedTree each (and one gradient operation
    # each), and the log density and its gradient equal those of the PyTensor form
    sim = _nested_data()
    spec = parse_spec({"taxa": {"levels": "all", "vary": ["intercept", "exponent"]},
                       "size_error": "replicates", "curvature": "shared"}, name="op")
    results = {}
    for form in ("operation", "graph"):
        monkeypatch.setenv("ALLOLAW_WHITENED_TREE", form)
        model = build_model(sim.data, spec, levels=sim.levels, log_reference_size=0.3)
        fn = model.logp_dlogp_function(ravel_inputs=True, mode="JAX")  # as nutpie compiles
        fn.set_extra_values({})
        point = model.initial_point()
        rng = np.random.default_rng(5)
        flat = np.concatenate([np.ravel(point[v.name]) for v in model.value_vars])
        flat = flat + rng.normal(0.0, 0.3, size=flat.shape)
        results[form] = fn(flat)
        nodes = fn._pytensor_function.maker.fgraph.apply_nodes
        ops = [type(node.op).__name__ for node in nodes]
        trees = ops.count("WhitenedTree") + ops.count("WhitenedTreeVJP")
        assert trees == (4 if form == "operation" else 0)
    np.testing.assert_allclose(results["operation"][0], results["graph"][0], rtol=1e-10)
    np.testing.assert_allclose(results["operation"][1], results["graph"][1], rtol=1e-8,
                               atol=1e-8)


def test_unknown_tree_form_is_refused_naming_the_variable(monkeypatch):
    monkeypatch.setenv("ALLOLAW_WHITENED_TREE", "fast")
    with pytest.raises(ValueError, match="ALLOLAW_WHITENED_TREE"):
        use_operation(10)


def test_default_form_is_the_operation_for_small_tables_only(monkeypatch):
    monkeypatch.delenv("ALLOLAW_WHITENED_TREE", raising=False)
    monkeypatch.delenv("ALLOLAW_NUTPIE_BACKEND", raising=False)
    assert use_operation(OPERATION_BELOW_ROWS - 1)
    assert not use_operation(OPERATION_BELOW_ROWS)
    monkeypatch.setenv("ALLOLAW_WHITENED_TREE", "operation")
    assert use_operation(10 * OPERATION_BELOW_ROWS)
    monkeypatch.setenv("ALLOLAW_WHITENED_TREE", "graph")
    assert not use_operation(10)


def test_operation_refuses_inputs_of_the_wrong_rank():
    op = WhitenedTree((1, 2), ((), (0, 0)), (0, 1), (0.0,))
    with pytest.raises(TypeError, match="WhitenedTree takes"):
        op(pt.dvector(), pt.dtensor3(), pt.dmatrix(), pt.dvector(), pt.dvector())


def test_forced_numba_compiler_builds_the_pytensor_form(monkeypatch):
    # numba has no implementation of the operation; it would call it through Python
    monkeypatch.setenv("ALLOLAW_WHITENED_TREE", "operation")
    monkeypatch.setenv("ALLOLAW_NUTPIE_BACKEND", "numba")
    assert not use_operation(10)
    monkeypatch.setenv("ALLOLAW_NUTPIE_BACKEND", "jax")
    assert use_operation(10)
