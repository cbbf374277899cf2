"""Roles follow the data: output sites through value-passing ops and If/Loop bodies, gates after reshapes.

Each "output" case is also run in onnxruntime: the graph output must hold the
site's own values (sigmoid of the input, scipy's expit), which is what makes
swapping the site change the output.
"""
from __future__ import annotations

import numpy as np
import onnx
import onnxruntime as ort
import pytest
from onnx import TensorProto, helper, numpy_helper
from scipy.special import expit

from swapper import api
from swapper.core.model_io import name_unnamed_nodes
from swapper.scan.sites import find_sites

nd = helper.make_node


def vi(name, shape, elem=TensorProto.FLOAT):
    return helper.make_tensor_value_info(name, elem, shape)


def build(nodes, inputs, outputs, inits=(), opset=17):
    """Checked, shape-inferred model, nodes named as swapper.core.model_io.load_model names them."""
    ins = [vi(n, s, TensorProto.BOOL if n == "c" else TensorProto.FLOAT) for n, s in inputs]  # "c": If's condition
    graph = helper.make_graph(nodes, "t", ins, [vi(n, s) for n, s in outputs],
                              [numpy_helper.from_array(np.asarray(v), k) for k, v in inits])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", opset)])
    model.ir_version = 8
    onnx.checker.check_model(model, full_check=True)
    model = onnx.shape_inference.infer_shapes(model, check_type=True, data_prop=True)
    name_unnamed_nodes(model)
    return model


def run(model, **feeds):
    sess = ort.InferenceSession(model.SerializeToString(), providers=["CPUExecutionProvider"])
    return sess.run(None, feeds)


X = np.linspace(-4, 4, 24, dtype=np.float32).reshape(2, 3, 4)


def test_sigmoid_through_reshape_and_squeeze_is_an_output_site():
    m = build([nd("Sigmoid", ["X"], ["S"]), nd("Reshape", ["S", "shape"], ["R"]),
               nd("Squeeze", ["R", "axes"], ["Y"])],
              [("X", [2, 3, 4])], [("Y", [2, 12])],
              [("shape", np.array([2, 1, 12], np.int64)), ("axes", np.array([1], np.int64))])
    (site,) = find_sites(m)
    assert site.role == "output"
    # source: ONNX operator spec, Reshape/Squeeze change the shape only: the output is σ(x) itself
    np.testing.assert_allclose(run(m, X=X)[0].ravel(), expit(X.astype(np.float64)).ravel(), rtol=1e-5, atol=1e-7)


def branch(nodes, out, name, shape):
    return helper.make_graph(nodes, name, [], [vi(out, shape)])


def test_sigmoid_inside_an_if_branch_reaching_the_output():
    then = branch([nd("Sigmoid", ["X"], ["ts"]), nd("Identity", ["ts"], ["to"])], "to", "then", [2, 3, 4])
    other = branch([nd("Relu", ["X"], ["eo"])], "eo", "else", [2, 3, 4])
    m = build([nd("If", ["c"], ["I"], then_branch=then, else_branch=other), nd("Flatten", ["I"], ["Y"])],
              [("X", [2, 3, 4]), ("c", [])], [("Y", [2, 12])])
    sites = {s.function: s for s in find_sites(m)}
    sig, relu = sites["sigmoid"], sites["relu"]
    assert (sig.role, sig.supported) == ("output", True) and relu.role == "output"
    assert sig.body == (("If_0", "then_branch"),) and sig.reason is None
    # source: ONNX operator spec, If returns the taken branch's outputs; Flatten keeps the values
    got = run(m, X=X, c=np.array(True))[0]
    np.testing.assert_allclose(got.ravel(), expit(X.astype(np.float64)).ravel(), rtol=1e-5, atol=1e-7)


def test_main_graph_sigmoid_read_by_if_branches_then_averaged():
    # the voice-activity shape: branches read the Sigmoid from the enclosing graph, the mean leaves
    then = branch([nd("Squeeze", ["S", "ax"], ["sq"])], "sq", "then", [2, 4])
    other = branch([nd("Reshape", ["S", "shape"], ["id"])], "id", "else", [2, 4])
    m = build([nd("Sigmoid", ["X"], ["S"]), nd("If", ["c"], ["I"], then_branch=then, else_branch=other),
               nd("ReduceMean", ["I"], ["Y"], axes=[-1], keepdims=0)],
              [("X", [2, 1, 4]), ("c", [])], [("Y", [2])],
              [("ax", np.array([1], np.int64)), ("shape", np.array([2, 4], np.int64))])
    (site,) = find_sites(m)
    assert (site.role, site.supported) == ("output", True)
    x = X[:, :1, :]
    # source: ONNX operator spec, ReduceMean: the output is the mean of σ(x) over the last axis
    np.testing.assert_allclose(run(m, X=x, c=np.array(False))[0].ravel(),
                               expit(x.astype(np.float64)).mean(axis=-1).ravel(), rtol=1e-5, atol=1e-7)


def test_loop_carried_sigmoid_leaves_through_the_loop_output():
    body = helper.make_graph(
        [nd("Identity", ["cond_in"], ["cond_out"]), nd("Sigmoid", ["v_in"], ["v_out"])], "body",
        [vi("i", [], TensorProto.INT64), vi("cond_in", [], TensorProto.BOOL), vi("v_in", [2, 3, 4])],
        [vi("cond_out", [], TensorProto.BOOL), vi("v_out", [2, 3, 4])])
    m = build([nd("Loop", ["trips", "", "X"], ["L"], body=body), nd("Transpose", ["L"], ["Y"], perm=[0, 2, 1])],
              [("X", [2, 3, 4])], [("Y", [2, 4, 3])], [("trips", np.array(1, np.int64))])
    (site,) = find_sites(m)
    assert (site.function, site.role, site.supported) == ("sigmoid", "output", True)
    # source: ONNX operator spec, Loop: final loop-carried value = body output 1 after the last trip
    np.testing.assert_allclose(run(m, X=X)[0], expit(X.astype(np.float64)).transpose(0, 2, 1), rtol=1e-5, atol=1e-7)


def test_sigmoid_through_transpose_then_multiplying_another_tensor_is_a_gate():
    m = build([nd("Sigmoid", ["A"], ["S"]), nd("Transpose", ["S"], ["T"], perm=[0, 2, 1]),
               nd("Mul", ["B", "T"], ["M"]), nd("MatMul", ["M", "W"], ["Y"])],
              [("A", [2, 4, 3]), ("B", [2, 3, 4])], [("Y", [2, 3, 5])],
              [("W", np.ones((4, 5), np.float32))])
    (site,) = find_sites(m)
    assert site.role == "gate"


def test_hidden_site_that_also_reaches_the_output_through_concat_is_an_output():
    # the Tanh feeds a layer and a gate, and a Concat that is a graph output: "output" wins
    m = build([nd("Tanh", ["A"], ["T"]), nd("MatMul", ["T", "W"], ["H"]), nd("Mul", ["T", "B"], ["G"]),
               nd("Concat", ["B", "T"], ["C"], axis=1), nd("Add", ["H", "G"], ["Y"])],
              [("A", [2, 4]), ("B", [2, 4])], [("Y", [2, 4]), ("C", [2, 8])],
              [("W", np.eye(4, dtype=np.float32))])
    (site,) = find_sites(m)
    assert site.role == "output"


@pytest.mark.parametrize("tail", ["box_decoder", "abs", "neg", "sum_one", "max_two", "softmax"])
def test_values_handed_on_by_sign_scale_and_sum_ops_make_an_output_site(tail):
    # Cases seen when trying two-headed models: a box head's Sigmoid decoded as σ·2 − 0.5, and single
    # elementwise ops before an output. Each output is checked in onnxruntime against the site's values
    # pushed through the op as the ONNX operator spec defines it (numpy), so swapping the site moves it.
    s = expit(X.astype(np.float64))
    nodes, inits, want = [nd("Sigmoid", ["X"], ["S"])], [], None
    if tail == "box_decoder":
        nodes += [nd("Mul", ["S", "two"], ["M"]), nd("Sub", ["M", "half"], ["Y"])]
        inits, want = [("two", np.float32(2)), ("half", np.float32(0.5))], 2 * s - 0.5
    elif tail in ("abs", "neg"):
        nodes.append(nd(tail.capitalize(), ["S"], ["Y"]))
        want = s if tail == "abs" else -s
    elif tail == "sum_one":
        nodes.append(nd("Sum", ["S"], ["Y"]))
        want = s
    elif tail == "max_two":
        nodes.append(nd("Max", ["S", "X"], ["Y"]))
        want = np.maximum(s, X)
    else:
        nodes.append(nd("Softmax", ["S"], ["Y"], axis=-1))
        want = np.exp(s) / np.exp(s).sum(-1, keepdims=True)
    m = build(nodes, [("X", [2, 3, 4])], [("Y", [2, 3, 4])], inits)
    (site,) = find_sites(m)
    assert site.role == "output"
    np.testing.assert_allclose(run(m, X=X)[0], want, rtol=1e-5, atol=1e-6)


@pytest.mark.parametrize("tail", ["matmul", "indices"])
def test_values_that_are_transformed_before_the_output_stay_hidden(tail):
    if tail == "matmul":  # a layer computes new values from the site's
        nodes = [nd("Sigmoid", ["X"], ["S"]), nd("Reshape", ["S", "shape"], ["R"]), nd("MatMul", ["R", "W"], ["Y"])]
        inits = [("shape", np.array([2, 12], np.int64)), ("W", np.ones((12, 2), np.float32))]
        outs = [("Y", [2, 2])]
    else:  # the site's values only choose which constants leave (Gather's indices are not carried)
        nodes = [nd("Sigmoid", ["X"], ["S"]), nd("Cast", ["S"], ["I"], to=TensorProto.INT64),
                 nd("Gather", ["table", "I"], ["Y"])]
        inits = [("table", np.arange(3, dtype=np.float32))]
        outs = [("Y", [2, 3, 4])]
    m = build(nodes, [("X", [2, 3, 4])], outs, inits)
    (site,) = find_sites(m)
    assert site.role == "hidden"


def test_default_swap_leaves_an_output_site_alone(tmp_path):
    # the promise: graph outputs are swapped only with --include-outputs, also behind a Reshape
    m = build([nd("MatMul", ["X", "W"], ["H"]), nd("Sigmoid", ["H"], ["S"]), nd("Reshape", ["S", "shape"], ["Y"])],
              [("X", [2, 4])], [("Y", [2, 1, 3])],
              [("W", np.ones((4, 3), np.float32)), ("shape", np.array([2, 1, 3], np.int64))])
    path = tmp_path / "m.onnx"
    onnx.save(m, path)
    default = api.swap(path)
    assert default.plan.swaps == [] and [k.site_id for k in default.plan.skipped] == ["s1"]
    assert "--include-outputs" in default.plan.skipped[0].reason
    assert [s.site_id for s in api.swap(path, include_outputs=True).plan.swaps] == ["s1"]
