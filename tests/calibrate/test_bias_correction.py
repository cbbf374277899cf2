"""Tests of swapper.calibrate.bias_correction: the mean shift a swapped site leaves at its linear consumers.

References: bias correction as in Nagel et al. 2019 (Data-Free Quantization,
section on bias correction): after it, E[candidate layer output] = E[original
layer output] on the calibration data; both sides are measured here with
onnxruntime executing the ONNX operator spec. The mean of a Conv over its
output positions is checked against ``onnx.reference.ReferenceEvaluator``
running the Conv in float64. The consumers may sit behind pools and reshapes
(the pass-through rules are the operator definitions, see
tests/rewrite/test_fold_through.py); a gate's other operand is not recorded, so
the correction stops there.
"""
from __future__ import annotations

import numpy as np
import onnx
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from onnx import TensorProto, helper, numpy_helper
from onnx.reference import ReferenceEvaluator
from testkit import OPSET, conv_tanh, float_model, in_memory, init, run

import swapper.calibrate.bias_correction as bias_correction
import swapper.calibrate.loop as cal
from swapper.core.graph import GraphIndex
from swapper.core.slices import SliceRunner, row_spans
from swapper.core.tensor_cache import TensorCache
from swapper.plan.plan import make_plan
from swapper.rewrite.apply import rewrite
from swapper.scan.sites import Site, find_sites

C = 4  # channels of the Tanh site of testkit.conv_tanh


# ------------------------------------------------------------------ models
def _gemm_tanh_gemm(beta: float = 1.0, shared: bool = False, seed: int = 0) -> onnx.ModelProto:
    """x -> Gemm(W1, b1) -> Tanh -> Gemm(W2, b2, beta) -> y; with ``shared``, b2 also biases z = Gemm(x, W3, b2)."""
    rng = np.random.default_rng(seed)
    inits = [init("W1", rng.normal(size=(4, 6))), init("b1", rng.normal(size=6)),
             init("W2", rng.normal(size=(6, 3))), init("b2", rng.normal(size=3))]
    nodes = [helper.make_node("Gemm", ["x", "W1", "b1"], ["h"], name="g1"),
             helper.make_node("Tanh", ["h"], ["t"], name="tanh"),
             helper.make_node("Gemm", ["t", "W2", "b2"], ["y"], name="g2", beta=beta)]
    outputs = [("y", ["N", 3])]
    if shared:
        inits.append(init("W3", rng.normal(size=(4, 3))))
        nodes.append(helper.make_node("Gemm", ["x", "W3", "b2"], ["z"], name="g3"))
        outputs.append(("z", ["N", 3]))
    return float_model(nodes, [("x", ["N", 4])], outputs, inits, ir_version=None)


def _conv_pool_conv(pool: str, seed: int = 0) -> onnx.ModelProto:
    """x[N,2,8,8] -> Conv(W1, b1) -> Tanh -> {Average,Max}Pool 2x2 -> Conv(W2, b2, pads 1) -> y."""
    rng = np.random.default_rng(seed)
    inits = [init("W1", rng.normal(size=(4, 2, 3, 3))), init("b1", rng.normal(size=4)),
             init("W2", rng.normal(size=(3, 4, 3, 3))), init("b2", rng.normal(size=3))]
    nodes = [helper.make_node("Conv", ["x", "W1", "b1"], ["h"], name="c1", kernel_shape=[3, 3], pads=[1, 1, 1, 1]),
             helper.make_node("Tanh", ["h"], ["t"], name="tanh"),
             helper.make_node(pool, ["t"], ["p"], name="pool", kernel_shape=[2, 2], strides=[2, 2]),
             helper.make_node("Conv", ["p", "W2", "b2"], ["y"], name="c2", kernel_shape=[3, 3], pads=[1, 1, 1, 1])]
    return float_model(nodes, [("x", ["N", 2, 8, 8])], [("y", ["N", 3, 4, 4])], inits, ir_version=None)


def _conv2(src, pads=0):
    """``src`` -> Conv "c2" (3x3, 3 output channels, weights W2/B2) -> Y: a consumer that reads the site through
    whatever ``src`` comes from."""
    rng = np.random.default_rng(1)
    return ([helper.make_node("Conv", [src, "W2", "B2"], ["Y"], name="c2", pads=[pads] * 4)],
            [init("W2", rng.normal(size=(3, C, 3, 3)) * 0.4), init("B2", rng.normal(size=3) * 0.1)])


def _gap_flatten_gemm():
    """y -> GlobalAveragePool -> Flatten -> Gemm "fc" -> Y."""
    rng = np.random.default_rng(2)
    nodes = [helper.make_node("GlobalAveragePool", ["y"], ["g"], name="gap"),
             helper.make_node("Flatten", ["g"], ["f"], name="flat", axis=1),
             helper.make_node("Gemm", ["f", "Wg", "Bg"], ["Y"], name="fc", transB=1)]
    return nodes, [init("Wg", rng.normal(size=(5, C))), init("Bg", rng.normal(size=5))], ["Y"], ()


def _gmp_reshape_matmul():
    """y -> GlobalMaxPool -> Reshape [-1, C] -> MatMul "mm" + Add -> Y."""
    rng = np.random.default_rng(3)
    nodes = [helper.make_node("GlobalMaxPool", ["y"], ["g"], name="gmp"),
             helper.make_node("Reshape", ["g", "shape"], ["r"], name="reshape"),
             helper.make_node("MatMul", ["r", "Wm"], ["mm"], name="mm"),
             helper.make_node("Add", ["mm", "Bm"], ["Y"], name="bias")]
    inits = [init("shape", [-1, C], np.int64), init("Wm", rng.normal(size=(C, 5))),
             init("Bm", rng.normal(size=5))]
    return nodes, inits, ["Y"], ()


def _gate():
    """y -> Mul(y, S) "gate" (S a graph input [N, C, 1, 1]) -> Conv "c2" (pads 0) -> Y."""
    nodes, inits = _conv2("m")
    return ([helper.make_node("Mul", ["y", "S"], ["m"], name="gate")] + nodes, inits, ["Y"],
            (("S", ["N", C, 1, 1]),))


POOLS = {"maxpool": dict(op_type="MaxPool", kernel_shape=[2, 2], strides=[2, 2]),
         "avgpool": dict(op_type="AveragePool", kernel_shape=[3, 3], pads=[1] * 4, count_include_pad=1)}


# ------------------------------------------------------------------ the shift restores the mean
@pytest.mark.parametrize("beta", [1.0, 0.5])
def test_bias_correction_restores_consumer_mean(beta, through_loader):
    model = through_loader(_gemm_tanh_gemm(beta=beta))
    sites = find_sites(model)
    x = (2 * np.random.default_rng(1).normal(size=(512, 4))).astype(np.float32)
    ds = in_memory({"x": x})
    means = {}
    for corrected in (False, True):
        # a small reservoir fits on a subsample, so the surrogate leaves a real mean shift behind
        plan = make_plan(model, sites, fold="off", to="relu")
        result = cal.calibrate(model, sites, plan, ds, bias_correction=corrected, reservoir=16)
        assert result.sites[0].bias_corrected == (["g2"] if corrected else [])
        candidate = rewrite(result.model, sites, result.plan).model
        means[corrected] = run(candidate, ds.arrays, ["y"])[0].astype(np.float64).mean(axis=0)
    target = run(model, ds.arrays, ["y"])[0].astype(np.float64).mean(axis=0)
    # source: Nagel et al. 2019, bias correction: after it, E[candidate output] = E[original output]
    # (here exactly, on the calibration set itself; float32 tolerance)
    assert np.max(np.abs(means[False] - target)) > 0.05  # the shift was there
    np.testing.assert_allclose(means[True], target, rtol=0, atol=1e-4)


def test_bias_correction_leaves_shared_bias_alone(through_loader):
    model = through_loader(_gemm_tanh_gemm(shared=True))
    pristine = model.SerializeToString()
    sites = find_sites(model)
    assert [s.function for s in sites] == ["tanh"]
    ds = in_memory({"x": (2 * np.random.default_rng(2).normal(size=(256, 4))).astype(np.float32)})
    plan = make_plan(model, sites, fold="off", to="relu")
    result = cal.calibrate(model, sites, plan, ds, reservoir=16)
    assert result.sites[0].bias_corrected == ["g2"]
    assert model.SerializeToString() == pristine  # calibrate never mutates its input
    index = GraphIndex.of(result.model)
    g2, g3 = index.nodes_by_name["g2"], index.nodes_by_name["g3"]
    b2 = numpy_helper.to_array(GraphIndex.of(model).initializers["b2"])
    assert g3.input[2] == "b2" and g2.input[2] != "b2"  # g2 got its own copy
    np.testing.assert_array_equal(numpy_helper.to_array(index.initializers["b2"]), b2)
    assert not np.allclose(numpy_helper.to_array(index.initializers[g2.input[2]]), b2)
    # the other user's output is bit-identical (onnxruntime, same graph path)
    np.testing.assert_array_equal(run(result.model, ds.arrays, ["z"])[0], run(model, ds.arrays, ["z"])[0])
    candidate = rewrite(result.model, sites, result.plan).model
    np.testing.assert_allclose(run(candidate, ds.arrays, ["y"])[0].mean(axis=0),
                               run(model, ds.arrays, ["y"])[0].mean(axis=0), rtol=0, atol=1e-4)


@pytest.mark.parametrize("pool", ["AveragePool", "MaxPool"])
def test_bias_correction_through_pooling_restores_conv_mean(pool, through_loader, monkeypatch):
    model = through_loader(_conv_pool_conv(pool))
    sites = find_sites(model)
    assert [s.function for s in sites] == ["tanh"]
    ds = in_memory({"x": np.random.default_rng(3).normal(size=(200, 2, 8, 8)).astype(np.float32)})
    biases = {}
    for path in ("mean", "per_batch"):
        with monkeypatch.context() as m:
            if path == "per_batch":  # no shift sums: every consumer falls back to batch-by-batch runs
                m.setattr(cal, "DeltaSum", lambda: None)
            plan = make_plan(model, sites, fold="off", to="relu")
            result = cal.calibrate(model, sites, plan, ds, reservoir=16, batch_size=48)
        assert result.sites[0].bias_corrected == ["c2"]
        biases[path] = numpy_helper.to_array(GraphIndex.of(result.model).initializers["b2"])
        candidate = rewrite(result.model, sites, result.plan).model
        # source: Nagel et al. 2019, bias correction: E[candidate consumer output] = E[original], here per
        # output channel over samples and positions (float32 tolerance)
        got = run(candidate, ds.arrays, ["y"])[0].astype(np.float64).mean(axis=(0, 2, 3))
        want = run(model, ds.arrays, ["y"])[0].astype(np.float64).mean(axis=(0, 2, 3))
        np.testing.assert_allclose(got, want, rtol=0, atol=1e-4)
    before = numpy_helper.to_array(GraphIndex.of(model).initializers["b2"])
    assert np.max(np.abs(biases["mean"] - before)) > 1e-3  # a real correction happened
    np.testing.assert_allclose(biases["mean"], biases["per_batch"], rtol=0, atol=1e-6)


@pytest.mark.parametrize("case, layer", [("maxpool_padded_conv", "c2"), ("avgpool_padded_conv", "c2"),
                                         ("direct_padded_conv", "c2"), ("gap_flatten_gemm", "fc"),
                                         ("gmp_reshape_matmul", "mm")])
def test_bias_correction_reaches_layers_behind_pools(case, layer, through_loader):
    if case.endswith("padded_conv"):
        pool = case.split("_")[0]
        nodes, inits = _conv2("p" if pool in POOLS else "y", pads=1)  # d cannot fold: a mean shift is left
        if pool in POOLS:
            nodes = [helper.make_node(inputs=["y"], outputs=["p"], name="pool", **POOLS[pool])] + nodes
        built = (nodes, inits, ["Y"], ())
    else:
        built = {"gap_flatten_gemm": _gap_flatten_gemm, "gmp_reshape_matmul": _gmp_reshape_matmul}[case]()
    model = through_loader(conv_tanh(*built[:3], extra_inputs=built[3]))
    sites = find_sites(model)
    x = (1.5 * np.random.default_rng(3).normal(size=(300, 3, 6, 6))).astype(np.float32)
    ds = in_memory({"X": x})
    means = {}
    for corrected in (False, True):
        plan = make_plan(model, sites, to="relu", fold="off")
        result = cal.calibrate(model, sites, plan, ds, bias_correction=corrected, reservoir=16)
        assert result.sites[0].bias_corrected == ([layer] if corrected else [])
        candidate = rewrite(result.model, sites, result.plan).model
        means[corrected] = run(candidate, {"X": x}, ["Y"])[0]
    target = run(model, {"X": x}, ["Y"])[0]
    reduce = tuple(i for i in range(target.ndim) if i != 1)  # per output channel (axis 1 for Conv and Gemm)
    before = means[False].astype(np.float64).mean(axis=reduce)
    after = means[True].astype(np.float64).mean(axis=reduce)
    want = target.astype(np.float64).mean(axis=reduce)
    # source: Nagel et al. 2019, bias correction: E[candidate output] = E[original output] afterwards
    assert np.max(np.abs(before - want)) > 1e-3  # there was a shift to remove
    np.testing.assert_allclose(after, want, rtol=0, atol=2e-4)


def test_bias_correction_stops_at_a_gate_with_a_note(through_loader):
    nodes, inits, outs, extra = _gate()
    model = through_loader(conv_tanh(nodes, inits, outs, extra_inputs=extra))
    sites = find_sites(model)
    rng = np.random.default_rng(4)
    ds = in_memory({"X": rng.normal(size=(64, 3, 6, 6)).astype(np.float32),
                    "S": rng.uniform(size=(64, C, 1, 1)).astype(np.float32)})
    plan = make_plan(model, sites, to="relu", fold="off", site_ids=["s1"])
    result = cal.calibrate(model, sites, plan, ds, reservoir=16)
    assert result.sites[0].bias_corrected == []
    assert any("Mul" in n and "gate" in n for n in result.sites[0].notes)


# ------------------------------------------------------------------ the mean difference
@settings(max_examples=20, deadline=None)
@given(sizes=st.lists(st.integers(0, 7), min_size=1, max_size=5), seed=st.integers(0, 2**16))
def test_delta_sum_is_the_mean_difference(sizes, seed):
    rng = np.random.default_rng(seed)
    s_parts = [rng.normal(size=(n, 3, 2)).astype(np.float32) for n in sizes]
    t_parts = [(p + 0.01 * rng.normal(size=p.shape)).astype(np.float32) for p in s_parts]
    delta = bias_correction.DeltaSum()
    for s, t in zip(s_parts, t_parts):
        delta.add(s, t)
    assert delta.n == sum(sizes)
    if delta.n:
        # source: numpy reference, float64 mean over samples of the difference
        want = np.mean(np.concatenate(s_parts).astype(np.float64) - np.concatenate(t_parts), axis=0)
        np.testing.assert_allclose(delta.mean()[0], want, rtol=1e-9, atol=1e-12)


@settings(max_examples=30, deadline=None)
@given(
    spatial=st.sampled_from([(7,), (6, 5), (5, 7)]),
    kernel=st.integers(1, 3),
    stride=st.integers(1, 2),
    dilation=st.integers(1, 2),
    pad=st.integers(0, 2),
    auto_pad=st.sampled_from(["NOTSET", "SAME_UPPER", "SAME_LOWER", "VALID"]),
    group=st.sampled_from([1, 2]),
    seed=st.integers(0, 2**16),
)
def test_conv_mean_matches_reference_conv(spatial, kernel, stride, dilation, pad, auto_pad, group, seed):
    rng = np.random.default_rng(seed)
    d = len(spatial)
    c_in, c_out = 2 * group, 3 * group
    attrs = {"kernel_shape": [kernel] * d, "strides": [stride] * d, "dilations": [dilation] * d, "group": group}
    if auto_pad == "NOTSET":
        attrs["pads"] = [pad] * (2 * d)
    else:
        attrs["auto_pad"] = auto_pad
    w = rng.normal(size=(c_out, c_in // group) + (kernel,) * d)
    x = rng.normal(size=(1, c_in) + spatial)
    # the Conv as the linear consumer of a Tanh site, in float64 with a zero bias
    nodes = [helper.make_node("Tanh", ["u"], ["t"], name="tanh"),
             helper.make_node("Conv", ["t", "W", "B"], ["y"], name="conv", **attrs)]
    graph = helper.make_graph(nodes, "conv", [helper.make_tensor_value_info("u", TensorProto.DOUBLE, None)],
                              [helper.make_tensor_value_info("y", TensorProto.DOUBLE, None)],
                              initializer=[init("W", w, np.float64), init("B", np.zeros(c_out), np.float64)])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", OPSET)])
    site = Site(id="s1", function="tanh", params={}, input="u", output="t", nodes=("tanh",), form="op",
                shape=x.shape, channel_axis=1, channels=c_in, producer=None, consumers=("Conv",), role="hidden",
                elements=None, cost=0.0, cost_share=0.0)
    # one recorded sample, student x and teacher 0: the mean change at the site output is x itself, so the
    # corrected bias is 0 − (mean over output positions of the bias-free Conv of x), per output channel
    with TensorCache() as cache:
        cache.append("student", x)
        cache.append("teacher", np.zeros_like(x))
        delta = bias_correction.DeltaSum()
        delta.add(x, np.zeros_like(x))
        cached = SliceRunner(cache, row_spans(1, 1))  # both recorded tensors are read back, nothing runs
        corrected, notes = bias_correction.correct_bias(model, site, cached, "student", "teacher", delta)
    assert corrected == ["conv"], notes
    index = GraphIndex.of(model)
    got = -index.const(index.nodes_by_name["conv"].input[2])
    # source: ONNX operator spec, Conv (pads / strides / dilations / auto_pad / group), as executed in float64
    # by onnx.reference.ReferenceEvaluator; the mean over output positions per output channel
    conv = helper.make_node("Conv", ["x", "W"], ["y"], **attrs)
    ref_model = helper.make_model(
        helper.make_graph([conv], "conv", [helper.make_tensor_value_info("x", TensorProto.DOUBLE, None)],
                          [helper.make_tensor_value_info("y", TensorProto.DOUBLE, None)],
                          initializer=[init("W", w, np.float64)]),
        opset_imports=[helper.make_opsetid("", OPSET)])
    y = ReferenceEvaluator(ref_model).run(None, {"x": x})[0]
    want = y.mean(axis=tuple(i for i in range(y.ndim) if i != 1))
    np.testing.assert_allclose(got, want, rtol=1e-10, atol=1e-12)
