"""Bodies run one at a time as their If/Loop/Scan nodes run them, checked against onnxruntime running the node.

Source for every check here: the ONNX operator spec of If, Loop and Scan as executed by onnxruntime. Each model
exposes, as a Loop/Scan scan output or an If output, the very body tensor the runner hands out per run, so
onnxruntime's stacked values are the reference for the runner's per-run values.
"""
from __future__ import annotations

import numpy as np
import onnx
import pytest
from onnx import parser
from testkit import as_loaded, run

from swapper.core import body_runs
from swapper.core.body_runs import BodyRunner
from swapper.core.graph import GraphIndex

LOOP = """
<ir_version: 8, opset_import: ["" : 17]>
g (float[N,3] x, int64 M) => (float[N,3] y, float[K,N,3] ts) <float[3,3] W = {1,0,0, 0,1,0, 0.5,0,1}> {
   go = Constant<value = bool {1}>()
   y, ts = Loop(M, go, x) <body = body (int64 i, bool c, float[N,3] v) => (bool co, float[N,3] vo, float[N,3] to) {
        h = MatMul(v, W)
        t = Tanh(h)
        s = ReduceSum<keepdims=0>(t)
        lim = Constant<value = float {1.9}>()
        co = Less(s, lim)
        vo = Identity(t)
        to = Identity(t)
   }>
}
"""


def body_path(model, op: str, attribute: str = "body"):
    node = next(n for n in model.graph.node if n.op_type == op)
    return ((node.name, attribute),)


def runs_of(model, path, names, feeds):
    runner = BodyRunner(model, {path: names})
    index = GraphIndex.of(model)
    main = {n: feeds[n] for n in runner.main_needs() if n in feeds}
    extra = [n for n in runner.main_needs() if n not in feeds and n not in index.graph_inputs]
    if extra:
        main.update(zip(extra, run(model, feeds, extra)))
    return runner, [(p, v) for p, v in runner.runs(main)]


@pytest.mark.parametrize("scale", [0.1, 0.3, 3.0])
def test_loop_runs_stop_where_the_body_condition_stops_onnxruntime(scale):
    # a data-dependent trip count: the body's own condition ends the loop before M or not
    model = as_loaded(parser.parse_model(LOOP))
    x = (np.random.default_rng(0).normal(size=(2, 3)) * scale).astype(np.float32)
    feeds = {"x": x, "M": np.array(10, np.int64)}
    _, ts = run(model, feeds)
    _, got = runs_of(model, body_path(model, "Loop"), ["t"], feeds)
    assert len(got) == ts.shape[0]
    np.testing.assert_array_equal(np.stack([v["t"] for _, v in got]), ts)
    assert [int(v["i"]) for _, v in got] == list(range(ts.shape[0]))  # iteration_num counts from 0


def test_loop_without_cond_input_still_ends_on_a_false_body_condition():
    # onnxruntime ends the loop on the body's false condition even when no cond input is given
    text = LOOP.replace("y, ts = Loop(M, go, x)", 'y, ts = Loop(M, "", x)').replace("{1.9}", "{-100.0}")
    model = as_loaded(parser.parse_model(text))
    feeds = {"x": np.ones((2, 3), np.float32), "M": np.array(5, np.int64)}
    _, ts = run(model, feeds)
    _, got = runs_of(model, body_path(model, "Loop"), ["t"], feeds)
    assert len(got) == ts.shape[0] == 1


def test_loop_runs_are_cut_at_the_run_bound(monkeypatch):
    monkeypatch.setattr(body_runs, "MAX_RUNS", 3)
    model = as_loaded(parser.parse_model(LOOP.replace("{1.9}", "{100.0}")))
    feeds = {"x": np.ones((2, 3), np.float32) * 0.1, "M": np.array(5, np.int64)}
    runner, got = runs_of(model, body_path(model, "Loop"), ["t"], feeds)
    _, ts = run(model, feeds)
    assert ts.shape[0] == 5 and len(got) == 3
    np.testing.assert_array_equal(np.stack([v["t"] for _, v in got]), ts[:3])
    assert runner.stopped[body_path(model, "Loop")] == 1


SCAN = """
<ir_version: 8, opset_import: ["" : 17]>
g (float[2] s0, float[2,5,4] xs) => (float[2] s, float[5,2,4] ys) {
   s, ys = Scan<num_scan_inputs = 1, scan_input_axes = [1], scan_input_directions = [1],
                body = body (float[2] acc, float[2,4] row) => (float[2] acc_out, float[2,4] y) {
            m = ReduceMean<keepdims=0, axes=[1]>(row)
            acc_out = Add(acc, m)
            one = Constant<value_ints = [2, 1]>()
            a2 = Reshape(acc_out, one)
            z = Add(row, a2)
            y = Sigmoid(z)
       }>(s0, xs)
}
"""


def test_scan_runs_take_slices_along_the_axis_backwards_with_the_carried_state():
    model = as_loaded(parser.parse_model(SCAN))
    feeds = {"s0": np.array([0.5, -1.0], np.float32),
             "xs": np.random.default_rng(1).normal(size=(2, 5, 4)).astype(np.float32)}
    s, ys = run(model, feeds)
    _, got = runs_of(model, body_path(model, "Scan"), ["z", "y"], feeds)
    assert len(got) == 5
    # scan outputs stack in iteration order; iteration t reads slice 4 - t of axis 1
    np.testing.assert_array_equal(np.stack([v["y"] for _, v in got]), ys)
    np.testing.assert_array_equal(got[0][1]["row"], feeds["xs"][:, 4, :])
    np.testing.assert_allclose(got[-1][1]["acc_out"], s, rtol=1e-6)


IF = """
<ir_version: 8, opset_import: ["" : 17]>
g (float[N,4] x) => (float[N,4] y) <float[4,4] W = {1,2,0,0, 0,1,0,0, 0,0,1,0, 0,0,0,1}> {
   s = ReduceSum<keepdims=0>(x)
   zero = Constant<value = float {0.0}>()
   c = Greater(s, zero)
   y = If(c) <then_branch = th () => (float[N,4] yt) { h = MatMul(x, W)  yt = Tanh(h) },
              else_branch = el () => (float[N,4] ye) { he = Neg(x)  ye = Sigmoid(he) }>
}
"""


@pytest.mark.parametrize("sign", [1.0, -1.0])
def test_if_runs_only_the_branch_its_condition_takes(sign):
    model = as_loaded(parser.parse_model(IF))
    x = (np.abs(np.random.default_rng(2).normal(size=(3, 4))) * sign).astype(np.float32)
    (y,) = run(model, {"x": x})
    then, other = body_path(model, "If", "then_branch"), body_path(model, "If", "else_branch")
    runner = BodyRunner(model, {then: ["yt"], other: ["ye"]})
    assert runner.main_needs() == ["c", "x"]
    main = dict(zip(["c"], run(model, {"x": x}, ["c"])), x=x)
    got = list(runner.runs(main))
    assert [p for p, _ in got] == [then if sign > 0 else other]
    np.testing.assert_array_equal(got[0][1]["yt" if sign > 0 else "ye"], y)


NESTED = """
<ir_version: 8, opset_import: ["" : 17]>
g (float[N,3] x) => (float[N,3] y, float[K,N,3] hs) <float[3,3] W = {0.5,0,0, 0,0.5,0, 0,0,0.5}, int64 M = {4}> {
   go = Constant<value = bool {1}>()
   y, hs = Loop(M, go, x) <body = body (int64 i, bool c, float[N,3] v) => (bool co, float[N,3] vo, float[N,3] ho) {
        two = Constant<value = int64 {2}>()
        r = Mod(i, two)
        zero = Constant<value = int64 {0}>()
        even = Equal(r, zero)
        vo = If(even) <then_branch = th () => (float[N,3] a) { m = MatMul(v, W)  a = Tanh(m) },
                       else_branch = el () => (float[N,3] b) { b = Sigmoid(v) }>
        co = Identity(c)
        ho = Identity(vo)
   }>
}
"""


def test_an_if_inside_a_loop_runs_once_per_iteration_on_that_iteration_s_values():
    model = as_loaded(parser.parse_model(NESTED))
    x = np.random.default_rng(3).normal(size=(2, 3)).astype(np.float32)
    _, hs = run(model, {"x": x})
    loop = body_path(model, "Loop")
    inner = next(n for n in model.graph.node[-1].attribute[0].g.node if n.op_type == "If").name
    then, other = loop + ((inner, "then_branch"),), loop + ((inner, "else_branch"),)
    runner = BodyRunner(model, {then: ["a"], other: ["b"]})
    assert runner.main_needs() == ["x"]  # M and the weights are constants, read from the model
    got = [(p, v) for p, v in runner.runs({"x": x}) if p != loop]
    # iterations 0 and 2 take the then branch, 1 and 3 the else branch
    assert [p for p, _ in got] == [then, other, then, other]
    np.testing.assert_array_equal(np.stack([v["a" if p == then else "b"] for p, v in got]), hs)


def test_a_tensor_read_by_a_body_counts_the_body_s_node_among_its_readers():
    # ONNX IR spec, outer-scope values: the If's branch reads x by name; so does the node carrying it
    model = as_loaded(parser.parse_model(IF))
    index = GraphIndex.of(model)
    assert [u.op_type for u in index.users("x")] == ["ReduceSum", "If"]
    assert [u.op_type for u in index.users("W")] == ["If"]
    assert onnx.checker.check_model(model, full_check=True) is None
