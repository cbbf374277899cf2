"""Calibrating sites inside If/Loop bodies: what each site is shown, and what the fit does with it.

References: the ONNX operator spec of If (the branch the condition picks runs, for the whole batch it is given)
and Loop (M trips, the carried value fed back), computed here in numpy; the observed moments against numpy's
mean / var / min / max of those values.
"""
from __future__ import annotations

import numpy as np
import onnx
import pytest
from onnx import parser
from testkit import as_loaded, in_memory, run

from swapper.calibrate.bodies import observe_bodies
from swapper.calibrate.loop import calibrate
from swapper.plan.plan import make_plan
from swapper.rewrite.apply import rewrite
from swapper.scan.sites import find_sites

RNG = np.random.default_rng(11)
W = RNG.normal(size=(4, 4)).astype(np.float32)
V = (RNG.normal(size=(4, 4)) * 0.5).astype(np.float32)


def text(a: np.ndarray) -> str:
    return "{" + ", ".join(repr(float(v)) for v in a.ravel()) + "}"


# the condition is computed from each batch: a branch sees exactly the batches whose sum is positive
IF_MODEL = f"""
<ir_version: 8, opset_import: ["" : 17]>
g (float[N,4] x) => (float[N,4] y) <float[4,4] W = {text(W)}, float[4,4] V = {text(V)}> {{
   s = ReduceSum<keepdims=0>(x)
   zero = Constant<value = float {{0.0}}>()
   c = Greater(s, zero)
   y = If(c) <then_branch = th () => (float[N,4] yt) {{ h = MatMul(x, W)  t = Tanh(h)  yt = MatMul(t, V) }},
              else_branch = el () => (float[N,4] ye) {{ he = MatMul(x, V)  ye = Sigmoid(he) }}>
}}
"""

LOOP_MODEL = f"""
<ir_version: 8, opset_import: ["" : 17]>
g (float[N,4] x) => (float[N,4] y) <float[4,4] W = {text(W)}, float[4,4] V = {text(V)}, int64 M = {{3}}> {{
   go = Constant<value = bool {{1}}>()
   y = Loop(M, go, x) <body = body (int64 i, bool c, float[N,4] v) => (bool co, float[N,4] vo) {{
        h = MatMul(v, W)
        t = Tanh(h)
        vo = MatMul(t, V)
        co = Identity(c)
   }}>
}}
"""


def batches_with_both_signs(n=96, batch=16):
    """Samples whose batches of ``batch`` alternate between a positive and a negative sum."""
    x = RNG.normal(size=(n, 4)).astype(np.float32)
    for k, start in enumerate(range(0, n, batch)):
        rows = x[start:start + batch]
        rows[:] = np.abs(rows) * (1 if k % 2 == 0 else -1)
    return x


def assert_moments(stats, x, axis=1):
    # moments of the per-channel stream: numpy over every value the site saw, channels along ``axis``
    flat = np.moveaxis(x, axis, 0).reshape(x.shape[axis], -1).astype(np.float64)
    np.testing.assert_array_equal(stats.count, flat.shape[1])
    # onnxruntime computes in float32: agreement to float32 rounding
    np.testing.assert_allclose(stats.mean_x, flat.mean(axis=1), rtol=1e-5, atol=1e-6)
    np.testing.assert_allclose(stats.var_x, flat.var(axis=1), rtol=1e-5, atol=1e-6)
    np.testing.assert_allclose(stats.min_x, flat.min(axis=1), rtol=1e-5, atol=1e-6)
    np.testing.assert_allclose(stats.max_x, flat.max(axis=1), rtol=1e-5, atol=1e-6)


def test_an_if_branch_site_sees_only_the_batches_that_take_its_branch():
    model = as_loaded(parser.parse_model(IF_MODEL))
    sites = find_sites(model)
    plan = make_plan(model, sites, site_ids=[s.id for s in sites])
    x = batches_with_both_signs()
    seen = observe_bodies(model, sites, plan.by_site(), in_memory({"x": x}), batch_size=16)
    by_fn = {s.function: s.id for s in sites}
    positive = np.concatenate([x[k:k + 16] for k in range(0, 96, 16) if x[k:k + 16].sum() > 0])
    negative = np.concatenate([x[k:k + 16] for k in range(0, 96, 16) if x[k:k + 16].sum() <= 0])
    assert len(positive) == len(negative) == 48
    assert_moments(seen.observers[by_fn["tanh"]].compute(), positive.astype(np.float64) @ W)
    assert_moments(seen.observers[by_fn["sigmoid"]].compute(), negative.astype(np.float64) @ V)
    assert seen.runs == {by_fn["sigmoid"]: 3, by_fn["tanh"]: 3}  # one run per batch that took the branch


def test_a_loop_body_site_sees_every_iteration_with_the_carried_value():
    model = as_loaded(parser.parse_model(LOOP_MODEL))
    sites = find_sites(model)
    plan = make_plan(model, sites)
    x = RNG.normal(size=(40, 4)).astype(np.float32)
    seen = observe_bodies(model, sites, plan.by_site(), in_memory({"x": x}), batch_size=16)
    hs, v = [], x.astype(np.float64)
    for _ in range(3):  # M = 3
        hs.append(v @ W)
        v = np.tanh(hs[-1]) @ V
    assert seen.runs == {"s1": 9}  # 3 batches (16, 16, 8 samples) x 3 iterations
    assert_moments(seen.observers["s1"].compute(), np.concatenate(hs))


def test_calibration_fits_body_sites_and_leaves_its_inputs_alone():
    model = as_loaded(parser.parse_model(LOOP_MODEL))
    sites = find_sites(model)
    plan = make_plan(model, sites, to="relu", fold="exact+nodes")
    start = {p: v.copy() for p, v in plan.swaps[0].params().items()}
    x = RNG.normal(size=(64, 4)).astype(np.float32)
    before = model.SerializeToString()
    result = calibrate(model, sites, plan, in_memory({"x": x}), batch_size=16)
    assert model.SerializeToString() == before
    assert all(np.array_equal(plan.swaps[0].params()[p], v) for p, v in start.items())  # the plan handed in
    (fit,) = result.sites
    assert fit.site_id == "s1" and fit.mse_fit < fit.mse_start
    assert any("local mode" in n for n in fit.notes)
    # the fitted surrogate brings the candidate closer to the original than the starting parameters do
    (y0,) = run(model, {"x": x})
    (y_start,) = run(rewrite(model, sites, plan).model, {"x": x})
    (y_fit,) = run(rewrite(result.model, sites, result.plan).model, {"x": x})
    assert np.mean((y_fit - y0) ** 2) < np.mean((y_start - y0) ** 2)


def test_a_branch_no_batch_takes_keeps_its_starting_parameters_with_a_note():
    model = as_loaded(parser.parse_model(IF_MODEL))
    sites = find_sites(model)
    plan = make_plan(model, sites, site_ids=[s.id for s in sites], fold="exact+nodes")
    x = np.abs(RNG.normal(size=(32, 4))).astype(np.float32)  # every batch sums positive: only "then" runs
    result = calibrate(model, sites, plan, in_memory({"x": x}), batch_size=16)
    by_fn = {s.function: s.id for s in sites}
    fits = {f.site_id: f for f in result.sites}
    idle = fits[by_fn["sigmoid"]]
    assert any("did not run on any calibration batch" in n for n in idle.notes) and np.isnan(idle.mse_fit)
    idle_swap = result.plan.by_site()[by_fn["sigmoid"]]
    for p, v in plan.by_site()[by_fn["sigmoid"]].params().items():
        np.testing.assert_array_equal(idle_swap.params()[p], v)
    assert fits[by_fn["tanh"]].mse_fit <= fits[by_fn["tanh"]].mse_start


@pytest.mark.parametrize("mode", ["sequential", "local"])
def test_main_graph_and_body_sites_calibrate_together(mode):
    # a main-graph Tanh before the Loop: the body site is fitted on the original's values in either mode
    text_model = LOOP_MODEL.replace("y = Loop(M, go, x)", "x1 = Tanh(x)\n   y = Loop(M, go, x1)")
    model = as_loaded(parser.parse_model(text_model))
    sites = find_sites(model)
    assert [(s.id, bool(s.body)) for s in sites] == [("s1", False), ("s2", True)]
    plan = make_plan(model, sites, fold="exact+nodes")
    x = RNG.normal(size=(48, 4)).astype(np.float32)
    result = calibrate(model, sites, plan, in_memory({"x": x}), batch_size=16, mode=mode)
    assert [f.site_id for f in result.sites] == ["s1", "s2"]
    assert all(f.mse_fit <= f.mse_start for f in result.sites)
    onnx.checker.check_model(rewrite(result.model, sites, result.plan).model, full_check=True)


def test_a_site_in_an_if_inside_a_loop_sees_the_iterations_that_take_its_branch():
    text_model = LOOP_MODEL.replace(
        "h = MatMul(v, W)\n        t = Tanh(h)\n        vo = MatMul(t, V)",
        "two = Constant<value = int64 {2}>()\n        r = Mod(i, two)\n        zero = Constant<value = int64 {0}>()\n"
        "        even = Equal(r, zero)\n"
        "        vo = If(even) <then_branch = th () => (float[N,4] a) { h = MatMul(v, W)  a = Tanh(h) },\n"
        "                       else_branch = el () => (float[N,4] b) { b = MatMul(v, V) }>")
    model = as_loaded(parser.parse_model(text_model))
    sites = find_sites(model)
    assert [(s.function, len(s.body)) for s in sites] == [("tanh", 2)]
    x = RNG.normal(size=(32, 4)).astype(np.float32)
    assert sites[0].role == "output"  # its values are the loop's carried state, which leaves as the graph output
    plan = make_plan(model, sites, site_ids=["s1"])
    seen = observe_bodies(model, sites, plan.by_site(), in_memory({"x": x}), batch_size=16)
    hs, v = [], x.astype(np.float32)
    for i in range(3):  # M = 3: iterations 0 and 2 take the then branch (ONNX operator spec, Loop, Mod)
        if i % 2 == 0:
            hs.append(v @ W)
            v = np.tanh(hs[-1])
        else:
            v = v @ V
    assert seen.runs == {"s1": 4}  # 2 batches x 2 iterations
    assert_moments(seen.observers["s1"].compute(), np.concatenate(hs))
