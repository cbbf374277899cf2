"""Sites inside If/Loop bodies, rewritten with explicit nodes and with folded parameters.

Reference for every numeric check: the surrogate y = a·g(b·x + c) + d written in numpy from the published
definitions (tests/testkit.py), inside the branch or loop computed in numpy by the ONNX operator spec of If
(the taken branch's outputs), Loop (the carried value after M trips), Gemm (x·B + C), Flatten and a 1x1 Conv (a matrix
product over channels); the rewritten model runs in onnxruntime. onnx.checker.check_model(full_check=True)
refuses a body that defines a name an enclosing graph uses (ONNX IR spec, "Names Within a Graph").
"""
from __future__ import annotations

import json

import numpy as np
import onnx
import pytest
from onnx import parser
from testkit import as_loaded, hard_sigmoid, hard_swish, hard_tanh, in_memory, run

from swapper.calibrate.loop import calibrate
from swapper.core.bodies import find_body
from swapper.plan.plan import make_plan
from swapper.rewrite.apply import PLAN_KEY, rewrite, rewrite_identity_floor
from swapper.scan.sites import find_sites

RNG = np.random.default_rng(7)
W1, B1 = RNG.normal(size=(4, 3)).astype(np.float32), RNG.normal(size=3).astype(np.float32)
W2, B2 = RNG.normal(size=(3, 2)).astype(np.float32), RNG.normal(size=2).astype(np.float32)
K1 = RNG.normal(size=(3, 4, 1, 1)).astype(np.float32)
W3, B3 = RNG.normal(size=(3, 2)).astype(np.float32), RNG.normal(size=2).astype(np.float32)
NEUTRAL = {"a": 1.0, "b": 1.0, "c": 0.0, "d": 0.0}


def text(a: np.ndarray) -> str:
    return "{" + ", ".join(repr(float(v)) for v in a.ravel()) + "}"


# then: Gemm -> Tanh -> Gemm, weights in the main graph; else: 1x1 Conv -> Sigmoid -> Flatten -> Gemm, weights in
# the branch (a Constant node and an initializer of the branch)
IF_MODEL = f"""
<ir_version: 8, opset_import: ["" : 17]>
g (float[N,4] x, float[N,4,1,1] img, bool c) => (float[N,2] y)
  <float[4,3] W1 = {text(W1)}, float[3] B1 = {text(B1)}, float[3,2] W2 = {text(W2)}, float[2] B2 = {text(B2)}> {{
  y = If(c) <then_branch = th () => (float[N,2] yt) {{
          h = Gemm(x, W1, B1)
          t = Tanh(h)
          yt = Gemm(t, W2, B2)
       }}, else_branch = el () => (float[N,2] ye) <float[3,2] W3 = {text(W3)}> {{
          K1 = Constant<value = float[3,4,1,1] {text(K1)}>()
          B3 = Constant<value = float[2] {text(B3)}>()
          u = Conv(img, K1)
          s = Sigmoid(u)
          f = Flatten(s)
          ye = Gemm(f, W3, B3)
       }}>
}}
"""


def if_model(text_model: str = IF_MODEL):
    return as_loaded(parser.parse_model(text_model))


def with_values(plan, seed=0):
    """Non-neutral per-channel a, b, c, d where the placement lets them move (a > 0 as a max pool would ask)."""
    rng = np.random.default_rng(seed)
    for swap in plan.swaps:
        n = swap.channels
        values = {"a": rng.uniform(0.6, 1.4, n), "b": rng.uniform(0.6, 1.4, n), "c": rng.normal(0, 0.2, n),
                  "d": rng.normal(0, 0.2, n)}
        swap.set_params(**{p: (np.full(n, NEUTRAL[p]) if swap.placement[p] == "fixed" else v)
                           for p, v in values.items()})
    return plan


def surrogate(swap, x, g):
    axis = [1] * x.ndim
    axis[1] = swap.channels
    a, b, c, d = (np.asarray(getattr(swap, p), dtype=np.float64).reshape(axis) for p in "abcd")
    return a * g(b * x + c) + d


@pytest.mark.parametrize("fold", ["off", "exact+nodes", "exact"])
def test_if_branch_sites_rewritten_equal_the_numpy_surrogate(fold):
    model = if_model()
    sites = find_sites(model)
    assert [(s.function, s.body[0][1]) for s in sites] == [("sigmoid", "else_branch"), ("tanh", "then_branch")]
    plan = with_values(make_plan(model, sites, fold=fold))
    swaps = {s.function: s for s in plan.swaps}
    if fold == "exact":  # b, c into the producing Gemm / Conv, a, d into the reading ones, all inside the branch
        assert all(s.placement == {"a": "consumers", "b": "producer", "c": "producer", "d": "consumers"}
                   for s in plan.swaps)
    before = model.SerializeToString()
    out = rewrite(model, sites, plan).model
    assert model.SerializeToString() == before  # the input model is never mutated
    onnx.checker.check_model(out, full_check=True)
    x = RNG.normal(size=(5, 4)).astype(np.float32)
    img = RNG.normal(size=(5, 4, 1, 1)).astype(np.float32)
    (y,) = run(out, {"x": x, "img": img, "c": np.array(True)})
    t = surrogate(swaps["tanh"], x.astype(np.float64) @ W1 + B1, hard_tanh)
    np.testing.assert_allclose(y, t @ W2 + B2, rtol=1e-5, atol=1e-5)
    (y,) = run(out, {"x": x, "img": img, "c": np.array(False)})
    u = np.einsum("nchw,oc->nohw", img.astype(np.float64), K1[:, :, 0, 0])  # a 1x1 Conv: a product over channels
    s = surrogate(swaps["sigmoid"], u, lambda v: hard_sigmoid(v, 0.2, 0.5))
    np.testing.assert_allclose(y, s.reshape(5, 3) @ W3 + B3, rtol=1e-5, atol=1e-5)
    # the surrogates sit in their branches, under names of their own; nothing is left in the main graph
    then, other = (find_body(out, (("If_0", b),)).body for b in ("then_branch", "else_branch"))
    assert "Tanh" not in {n.op_type for n in then.node} and "Sigmoid" not in {n.op_type for n in other.node}
    added = [t.name for t in then.initializer] + [n.name for n in then.node if n.name.startswith("swapper/")]
    assert added and all(name.startswith("swapper/s2/") for name in added)
    assert [n.op_type for n in out.graph.node] == ["If"]
    stored = json.loads(next(p.value for p in out.metadata_props if p.key == PLAN_KEY))
    assert {s["site_id"] for s in stored["swaps"]} == {"s1", "s2"}  # the plan in the model names both


def test_folding_into_a_branch_layer_leaves_the_outer_weights_alone():
    model = if_model()
    sites = find_sites(model)
    out = rewrite(model, sites, with_values(make_plan(model, sites, fold="exact"))).model
    then = find_body(out, (("If_0", "then_branch"),)).body
    gemms = [n for n in then.node if n.op_type == "Gemm"]
    # both Gemms read folded copies held in the branch; the main graph's W1..B2 are no longer read and go
    assert all(i.startswith("swapper/s2/") for n in gemms for i in n.input[1:])
    assert not {"W1", "B1", "W2", "B2"} & {t.name for t in out.graph.initializer}


LOOP_MODEL = f"""
<ir_version: 8, opset_import: ["" : 17]>
g (float[N,3] x) => (float[N,3] y, float[N,2] side) <float[3,2] W2 = {text(W2)},
   float[2] B2 = {text(B2)}, int64 M = {{3}}> {{
  go = Constant<value = bool {{1}}>()
  side = MatMul(x, W2)
  y = Loop(M, go, x) <body = body (int64 i, bool cond, float[N,3] v) => (bool co, float[N,3] vo) {{
       W1 = Constant<value = float[3,3] {text(W1[:3])}>()
       bias = Constant<value = float[3] {text(B1)}>()
       h = Gemm(v, W1, bias)
       t = Tanh(h)
       back = Constant<value = float[2,3] {text(W1[:2, :3])}>()
       p = Gemm(t, W2, B2)
       vo = Gemm(p, back)
       co = Identity(cond)
  }}>
}}
"""


@pytest.mark.parametrize("fold", ["off", "exact"])
def test_loop_body_site_rewritten_equals_the_numpy_loop(fold):
    model = as_loaded(parser.parse_model(LOOP_MODEL))
    sites = find_sites(model)
    (site,) = sites
    assert (site.function, site.body, site.role) == ("tanh", (("Loop_2", "body"),), "hidden")
    plan = with_values(make_plan(model, sites, fold=fold), seed=3)
    (swap,) = plan.swaps
    if fold == "exact":
        assert swap.placement == {"a": "consumers", "b": "producer", "c": "producer", "d": "consumers"}
    out = rewrite(model, sites, plan).model
    onnx.checker.check_model(out, full_check=True)
    x = RNG.normal(size=(4, 3)).astype(np.float32)
    y, side = run(out, {"x": x})
    v = x.astype(np.float64)
    for _ in range(3):  # M = 3 trips, v carried
        v = (surrogate(swap, v @ W1[:3] + B1, hard_tanh) @ W2 + B2) @ W1[:2, :3]
    np.testing.assert_allclose(y, v, rtol=1e-5, atol=1e-5)
    # the main graph's own reader of W2 still reads the original weights
    np.testing.assert_allclose(side, x @ W2, rtol=1e-6)
    assert "W2" in {t.name for t in out.graph.initializer}


def test_new_names_avoid_names_of_the_enclosing_graph():
    # the main graph already uses the name the rewriter would pick first for s1's b
    taken = "swapper/s1/b"
    model = if_model(IF_MODEL.replace("  y = If(c)", f'  "{taken}" = Identity(x)\n  y = If(c)'))
    sites = find_sites(model)
    out = rewrite(model, sites, with_values(make_plan(model, sites, fold="off"))).model
    onnx.checker.check_model(out, full_check=True)  # would refuse a branch defining "swapper/s1/b" again
    other = find_body(out, (("If_1", "else_branch"),)).body
    assert taken not in {t.name for t in other.initializer} and "swapper/s1/b_1" in {t.name for t in other.initializer}


def test_a_site_reading_an_outer_value_folds_nothing_into_the_enclosing_graph():
    # the then branch's Tanh reads h, computed by the main graph: b, c have no producer inside the branch
    text_model = """
    <ir_version: 8, opset_import: ["" : 17]>
    g (float[N,3] x, bool c) => (float[N,3] y) <float[3,3] W = {1,0,0, 0,2,0, 0,0,3}> {
       h = MatMul(x, W)
       y = If(c) <then_branch = th () => (float[N,3] a) { a = Tanh(h) },
                  else_branch = el () => (float[N,3] b) { b = Identity(h) }>
    }"""
    model = as_loaded(parser.parse_model(text_model))
    sites = find_sites(model)
    plan = make_plan(model, sites, fold="exact", site_ids=["s1"])
    (swap,) = plan.swaps
    assert swap.placement["b"] == swap.placement["c"] == "fixed"
    assert "b, c fixed: 'h' is read from an enclosing graph" in swap.notes
    out = rewrite(model, sites, plan).model
    x = np.ones((2, 3), np.float32)
    np.testing.assert_allclose(run(out, {"x": x, "c": np.array(False)})[0], x @ np.diag([1, 2, 3]), rtol=1e-6)


def test_a_main_graph_site_whose_input_a_branch_reads_keeps_that_input():
    # the branch reads h by name: folding b, c into the MatMul would change what the branch sees
    text_model = """
    <ir_version: 8, opset_import: ["" : 17]>
    g (float[N,3] x, bool c) => (float[N,3] y, float[N,3] t) <float[3,3] W = {1,0,0, 0,2,0, 0,0,3}> {
       h = MatMul(x, W)
       t = Tanh(h)
       y = If(c) <then_branch = th () => (float[N,3] a) { a = Identity(h) },
                  else_branch = el () => (float[N,3] b) { b = Neg(h) }>
    }"""
    model = as_loaded(parser.parse_model(text_model))
    sites = find_sites(model)
    plan = with_values(make_plan(model, sites, fold="exact", include_outputs=True))
    (swap,) = plan.swaps
    assert swap.placement["b"] == "fixed"
    assert any("also feeds nodes outside the site" in n for n in swap.notes)
    out = rewrite(model, sites, plan).model
    x = np.linspace(-1, 1, 6, dtype=np.float32).reshape(2, 3)
    y, _ = run(out, {"x": x, "c": np.array(True)})
    np.testing.assert_allclose(y, x @ np.diag([1, 2, 3]), rtol=1e-6)  # the branch still sees the original h


def test_the_speed_floor_replaces_body_sites_by_identity_inside_their_bodies():
    model = if_model()
    sites = find_sites(model)
    out = rewrite_identity_floor(model, sites)
    onnx.checker.check_model(out, full_check=True)
    x = RNG.normal(size=(3, 4)).astype(np.float32)
    (y,) = run(out, {"x": x, "img": np.zeros((3, 4, 1, 1), np.float32), "c": np.array(True)})
    # source: ONNX operator spec, Identity and Gemm: the branch computes (x·W1 + B1)·W2 + B2
    np.testing.assert_allclose(y, (x.astype(np.float64) @ W1 + B1) @ W2 + B2, rtol=1e-5, atol=1e-5)


NESTED = """
<ir_version: 8, opset_import: ["" : 17]>
g (float[N,3] x) => (float[N,3] y) <float[3,3] W = {0.5,0.1,0, 0,0.5,0.2, 0.3,0,0.5}, int64 M = {4}> {
   go = Constant<value = bool {1}>()
   y = Loop(M, go, x) <body = body (int64 i, bool c, float[N,3] v) => (bool co, float[N,3] vo) {
        two = Constant<value = int64 {2}>()
        r = Mod(i, two)
        zero = Constant<value = int64 {0}>()
        even = Equal(r, zero)
        vo = If(even) <then_branch = th () => (float[N,3] a) { m = MatMul(v, W)  a = Tanh(m) },
                       else_branch = el () => (float[N,3] b) { b = Sigmoid(v) }>
        co = Identity(c)
   }>
}
"""


@pytest.mark.parametrize("fold", ["off", "exact"])
def test_sites_in_an_if_inside_a_loop_are_rewritten_in_place(fold):
    model = as_loaded(parser.parse_model(NESTED))
    sites = find_sites(model)
    assert [(s.function, len(s.body)) for s in sites] == [("sigmoid", 2), ("tanh", 2)]
    plan = with_values(make_plan(model, sites, fold=fold, site_ids=["s1", "s2"]), seed=5)
    swaps = {s.function: s for s in plan.swaps}
    out = rewrite(model, sites, plan).model
    onnx.checker.check_model(out, full_check=True)
    x = RNG.normal(size=(3, 3)).astype(np.float32)
    w = np.array([[0.5, 0.1, 0], [0, 0.5, 0.2], [0.3, 0, 0.5]])
    v = x.astype(np.float64)
    for i in range(4):  # even trips take the then branch (ONNX operator spec, Loop iteration_num from 0; Mod)
        v = surrogate(swaps["tanh"], v @ w, hard_tanh) if i % 2 == 0 else \
            surrogate(swaps["sigmoid"], v, lambda z: hard_sigmoid(z, 0.2, 0.5))
    np.testing.assert_allclose(run(out, {"x": x})[0], v, rtol=1e-5, atol=1e-5)


def test_a_scan_body_site_calibrated_and_rewritten_equals_the_numpy_surrogate_per_row():
    text_model = """
    <ir_version: 8, opset_import: ["" : 17]>
    g (float[N,5,4] xs) => (float[N,5,4] ys) {
       ys = Scan<num_scan_inputs = 1, scan_input_axes = [1], scan_output_axes = [1],
                 body = body (float[N,4] row) => (float[N,4] out) { s = Sigmoid(row)  out = Mul(row, s) }>(xs)
    }"""
    model = as_loaded(parser.parse_model(text_model))
    (site,) = find_sites(model)
    assert (site.function, site.role, site.body) == ("silu", "output", (("Scan_0", "body"),))
    # x is the body's formal input (the scan row): nothing to fold b, c into
    (exact,) = make_plan(model, [site], site_ids=["s1"], to="hard_swish", fold="exact").swaps
    assert exact.placement["b"] == exact.placement["c"] == "fixed"
    plan = make_plan(model, [site], site_ids=["s1"], to="hard_swish", fold="exact+nodes")
    xs = (RNG.normal(size=(24, 5, 4)) * 2).astype(np.float32)
    result = calibrate(model, [site], plan, in_memory({"xs": xs}), batch_size=8)
    (fit,) = result.sites
    assert fit.mse_fit < fit.mse_start
    out = rewrite(result.model, [site], result.plan).model
    onnx.checker.check_model(out, full_check=True)
    (swap,) = result.plan.swaps
    # source: ONNX operator spec, Scan: row t of axis 1 through the body, stacked back along axis 1
    want = np.stack([surrogate(swap, xs[:, t].astype(np.float64), hard_swish) for t in range(5)], axis=1)
    np.testing.assert_allclose(run(out, {"xs": xs})[0], want, rtol=1e-5, atol=1e-5)
