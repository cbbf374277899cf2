"""Folding and bias correction *through* pools, reshapes and gates.

References: onnxruntime and ``onnx.reference.ReferenceEvaluator`` execute the
ONNX operator spec; a folded graph must give the same outputs as the same
parameters emitted as explicit Mul/Add nodes (fold "off"). The commuting rules
are the operator definitions: MaxPool takes a max over the window (pads count
as -inf), so max(a·x) = a·max(x) needs a >= 0 and max(x + d) = max(x) + d;
AveragePool is linear, and divides by the window size including pads when
count_include_pad = 1 (so + d does not pass then); Flatten/Reshape are
row-major (numpy semantics). Bias correction follows Nagel et al. 2019
(Data-Free Quantization, bias correction: after it E[candidate layer output]
= E[original layer output] on the calibration data).
"""
from __future__ import annotations

import copy
import dataclasses
from pathlib import Path

import numpy as np
import onnx
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from onnx import TensorProto, helper, numpy_helper
from onnx.reference import ReferenceEvaluator

import swapper.calibrate.loop as cal
from swapper import functions
from swapper.core.emit import Emitter
from swapper.core.model_io import load_model
from swapper.core.session import expose, open_session
from swapper.data.dataset import Dataset
from swapper.errors import UsageError
from swapper.functions.params import PARAMS
from swapper.plan.layers import channel_after_reshape
from swapper.plan.plan import make_plan
from swapper.rewrite.apply import rewrite
from swapper.scan.sites import find_sites

OPSET = 17
C = 4
DEMO = Path(__file__).resolve().parents[1] / "demo_models"


# ------------------------------------------------------------------ helpers
def _init(name, value, dtype=np.float32):
    return numpy_helper.from_array(np.asarray(value, dtype=dtype), name)


def _load(nodes, inits, outs, tmp_path, extra_inputs=(), hw=6):
    """X[N, 4, hw, hw] -> Conv(c1) -> Tanh -> ``nodes``; through the project's loader (names, shapes)."""
    rng = np.random.default_rng(0)
    head = [helper.make_node("Conv", ["X", "W1", "B1"], ["h"], name="c1", pads=[1] * 4),
            helper.make_node("Tanh", ["h"], ["y"], name="act")]
    inits = [_init("W1", rng.normal(size=(C, 3, 3, 3)) * 0.5), _init("B1", rng.normal(size=C) * 0.2)] + inits
    inputs = [helper.make_tensor_value_info("X", TensorProto.FLOAT, ["N", 3, hw, hw])]
    inputs += [helper.make_tensor_value_info(n, TensorProto.FLOAT, s) for n, s in extra_inputs]
    graph = helper.make_graph(head + nodes, "g", inputs,
                              [helper.make_tensor_value_info(o, TensorProto.FLOAT, None) for o in outs], inits)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", OPSET)])
    model.ir_version = 8
    onnx.save(onnx.shape_inference.infer_shapes(model), tmp_path / "m.onnx")  # fills the output shapes
    return load_model(tmp_path / "m.onnx").model


def _conv2(src, pads=0, name="c2", out="Y"):
    rng = np.random.default_rng(1)
    return ([helper.make_node("Conv", [src, "W2", "B2"], [out], name=name, pads=[pads] * 4)],
            [_init("W2", rng.normal(size=(3, C, 3, 3)) * 0.4), _init("B2", rng.normal(size=3) * 0.1)])


def _maxpool(pads=0, kernel=2, stride=2):
    nodes, inits = _conv2("p")
    pool = helper.make_node("MaxPool", ["y"], ["p"], name="pool", kernel_shape=[kernel] * 2,
                            strides=[stride] * 2, pads=[pads] * 4)
    return [pool] + nodes, inits, ["Y"], ()


def _avgpool(pads=0, include=0):
    nodes, inits = _conv2("p")
    pool = helper.make_node("AveragePool", ["y"], ["p"], name="pool", kernel_shape=[3, 3], strides=[1, 1],
                            pads=[pads] * 4, count_include_pad=include)
    return [pool] + nodes, inits, ["Y"], ()


def _gap_flatten_gemm():
    rng = np.random.default_rng(2)
    nodes = [helper.make_node("GlobalAveragePool", ["y"], ["g"], name="gap"),
             helper.make_node("Flatten", ["g"], ["f"], name="flat", axis=1),
             helper.make_node("Gemm", ["f", "Wg", "Bg"], ["Y"], name="fc", transB=1)]
    return nodes, [_init("Wg", rng.normal(size=(5, C))), _init("Bg", rng.normal(size=5))], ["Y"], ()


def _gap_reshape_matmul():
    rng = np.random.default_rng(3)
    nodes = [helper.make_node("GlobalMaxPool", ["y"], ["g"], name="gmp"),
             helper.make_node("Reshape", ["g", "shape"], ["r"], name="reshape"),
             helper.make_node("MatMul", ["r", "Wm"], ["mm"], name="mm"),
             helper.make_node("Add", ["mm", "Bm"], ["Y"], name="bias")]
    inits = [_init("shape", [-1, C], np.int64), _init("Wm", rng.normal(size=(C, 5))),
             _init("Bm", rng.normal(size=5))]
    return nodes, inits, ["Y"], ()


def _gate(kind="input"):
    """y -> Mul(y, S) -> Conv(pads 0); S an input [N, C, 1, 1] or y itself (a square, not linear)."""
    nodes, inits = _conv2("m")
    other = "S" if kind == "input" else "y"
    return ([helper.make_node("Mul", ["y", other], ["m"], name="gate")] + nodes, inits, ["Y"],
            ((("S", ["N", C, 1, 1]),) if kind == "input" else ()))


def _flatten_mixing():
    rng = np.random.default_rng(4)
    nodes = [helper.make_node("Flatten", ["y"], ["f"], name="flat", axis=1),
             helper.make_node("Gemm", ["f", "Wg", "Bg"], ["Y"], name="fc", transB=1)]
    return nodes, [_init("Wg", rng.normal(size=(5, C * 36))), _init("Bg", rng.normal(size=5))], ["Y"], ()


def _pool_output_too():
    nodes, inits, outs, extra = _maxpool()
    return nodes, inits, outs + ["p"], extra


def _feeds(model, n=5, seed=5):
    rng = np.random.default_rng(seed)
    feeds = {"X": rng.normal(size=(n, 3, 6, 6)).astype(np.float32)}
    if any(i.name == "S" for i in model.graph.input):
        feeds["S"] = rng.uniform(0.1, 1.0, size=(n, C, 1, 1)).astype(np.float32)
    return feeds


def _plans(model, sites, fold, rng, a_low=0.5):
    """The ``fold`` plan with random non-held parameters, and the same values as explicit nodes (fold off)."""
    plan = make_plan(model, sites, to="hard_tanh", fold=fold)
    explicit = make_plan(model, sites, to="hard_tanh", fold="off")
    for swap, twin in zip(plan.swaps, explicit.swaps):
        n = swap.channels
        values = {"a": rng.uniform(a_low, 1.5, n), "b": rng.uniform(0.5, 1.5, n),
                  "c": rng.normal(0, 0.3, n), "d": rng.normal(0, 0.3, n)}
        swap.set_params(**{p: values[p] for p in PARAMS if swap.placement[p] != "held"})
        twin.set_params(**swap.params())
    return plan, explicit


def _surrogate_nodes(target: str) -> int:
    em = Emitter("count", OPSET)
    functions.get(target).emit(em, "x", "y", {})
    return len(em.nodes)


def _agree(folded, explicit, feeds):
    """Outputs of both graphs, checked by onnxruntime and the reference evaluator."""
    outs = [o.name for o in folded.graph.output]
    y_fold = open_session(folded).run(outs, feeds)
    y_nodes = open_session(explicit).run(outs, feeds)
    y_ref = ReferenceEvaluator(folded).run(outs, feeds)
    y_ref_nodes = ReferenceEvaluator(explicit).run(outs, feeds)
    for f, e, r, rn in zip(y_fold, y_nodes, y_ref, y_ref_nodes):
        # source: ONNX operator spec as executed by onnxruntime and by onnx.reference
        np.testing.assert_allclose(f, e, rtol=1e-5, atol=1e-5)
        np.testing.assert_allclose(r, rn, rtol=1e-5, atol=1e-5)
        np.testing.assert_allclose(f, r, rtol=1e-5, atol=1e-5)


# ------------------------------------------------------ folds that are exact
THROUGH = {
    # name: (builder, expected placement of a and d under "exact")
    "maxpool": (_maxpool, "consumers+", "consumers"),
    "maxpool_padded": (lambda: _maxpool(pads=1, kernel=3, stride=1), "consumers+", "consumers"),
    "avgpool": (_avgpool, "consumers", "consumers"),
    "avgpool_pads_excluded": (lambda: _avgpool(pads=1, include=0), "consumers", "consumers"),
    "avgpool_pads_counted": (lambda: _avgpool(pads=1, include=1), "consumers", "held"),
    "gap_flatten_gemm": (_gap_flatten_gemm, "consumers", "consumers"),
    "gmp_reshape_matmul": (_gap_reshape_matmul, "consumers+", "consumers"),
    "gate": (_gate, "consumers", "held"),
}


@pytest.mark.parametrize("case", sorted(THROUGH))
def test_fold_through_equals_explicit_nodes(case, tmp_path):
    build, a_where, d_where = THROUGH[case]
    nodes, inits, outs, extra = build()
    model = _load(nodes, inits, outs, tmp_path, extra)
    sites = find_sites(model)
    assert [s.function for s in sites] == ["tanh"]
    plan, explicit = _plans(model, sites, "exact", np.random.default_rng(9))
    swap = plan.swaps[0]
    assert (swap.placement["a"], swap.placement["d"]) == (a_where, d_where), swap.notes
    folded = rewrite(model, sites, plan)
    _agree(folded.model, rewrite(model, sites, explicit).model, _feeds(model))
    # exact folding adds only the surrogate itself: no Mul/Add for a or d
    assert folded.records[0].nodes_added == _surrogate_nodes("hard_tanh")
    assert folded.nodes_after == folded.nodes_before - 1 + _surrogate_nodes("hard_tanh")
    if d_where == "held":  # the note names what stopped d
        assert any(n.startswith("d held") and ("gate" in n or "padding" in n) for n in swap.notes)


@pytest.mark.parametrize("case", ["avgpool_pads_counted", "gate"])
def test_d_blocked_goes_to_a_node_under_nodes_policy(case, tmp_path):
    nodes, inits, outs, extra = THROUGH[case][0]()
    model = _load(nodes, inits, outs, tmp_path, extra)
    sites = find_sites(model)
    plan, explicit = _plans(model, sites, "nodes", np.random.default_rng(10))
    assert plan.swaps[0].placement["a"] == "consumers" and plan.swaps[0].placement["d"] == "nodes"
    folded = rewrite(model, sites, plan)
    _agree(folded.model, rewrite(model, sites, explicit).model, _feeds(model))
    # the d Add is the only parameter node (a is in the consumers; d/a is emitted)
    assert folded.records[0].nodes_added == _surrogate_nodes("hard_tanh") + 1


# ------------------------------------------------------------------ declines
def test_negative_a_through_max_pool_falls_back_to_a_node(tmp_path):
    nodes, inits, outs, extra = _maxpool()
    model = _load(nodes, inits, outs, tmp_path, extra)
    sites = find_sites(model)
    plan, explicit = _plans(model, sites, "exact", np.random.default_rng(11), a_low=-1.0)
    plan.swaps[0].a[0] = -0.7  # max(-x) = -min(x): the pool does not commute with this channel
    explicit.swaps[0].a[0] = -0.7
    assert plan.swaps[0].placement["a"] == "consumers+"
    folded = rewrite(model, sites, plan)
    rec = folded.records[0]
    assert rec.placement["a"] == "nodes" and any("max pool" in n for n in rec.notes)
    _agree(folded.model, rewrite(model, sites, explicit).model, _feeds(model))


@pytest.mark.parametrize("build, why", [
    (_flatten_mixing, "channels"),  # [N, 4, 6, 6] -> [N, 144]: channel mixed with the pixels
    (lambda: _gate("square"), "two paths"),  # y·y is not linear in y
    (_pool_output_too, "graph output"),  # the pooled tensor leaves the graph unchanged-by-fold
])
def test_declined_paths_keep_a_and_d_held(build, why, tmp_path):
    nodes, inits, outs, extra = build()
    model = _load(nodes, inits, outs, tmp_path, extra)
    sites = find_sites(model)
    plan, explicit = _plans(model, sites, "exact", np.random.default_rng(12))
    swap = plan.swaps[0]
    assert swap.placement["a"] == swap.placement["d"] == "held"
    assert any(why in n for n in swap.notes), swap.notes
    _agree(rewrite(model, sites, plan).model, rewrite(model, sites, explicit).model, _feeds(model))


def test_one_scalar_parameter_set_passes_a_channel_mixing_flatten(tmp_path):
    # a scalar a·y + d commutes with any reshape: only per-channel sets need the channel mapping
    nodes, inits, outs, extra = _flatten_mixing()
    model = _load(nodes, inits, outs, tmp_path, extra)
    sites = [dataclasses.replace(s, channel_axis=None, channels=None) for s in find_sites(model)]
    plan, explicit = _plans(model, sites, "exact", np.random.default_rng(14))
    assert plan.swaps[0].channels == 1
    assert (plan.swaps[0].placement["a"], plan.swaps[0].placement["d"]) == ("consumers", "consumers")
    folded = rewrite(model, sites, plan)
    assert folded.records[0].nodes_added == _surrogate_nodes("hard_tanh")
    _agree(folded.model, rewrite(model, sites, explicit).model, _feeds(model))


def test_plan_must_say_consumers_plus_behind_a_max_pool(tmp_path):
    nodes, inits, outs, extra = _maxpool()
    model = _load(nodes, inits, outs, tmp_path, extra)
    sites = find_sites(model)
    plan, _ = _plans(model, sites, "exact", np.random.default_rng(13))
    wrong = copy.deepcopy(plan)
    wrong.swaps[0].placement["a"] = "consumers"
    with pytest.raises(UsageError, match="consumers\\+"):
        rewrite(model, sites, wrong)
    bad = copy.deepcopy(plan)
    bad.swaps[0].placement["d"] = "consumers+"  # only a can carry the sign condition
    with pytest.raises(UsageError, match="invalid placement"):
        rewrite(model, sites, bad)


# ------------------------------------------------- reshape channel mapping
@st.composite
def _reshapes(draw):
    rank = draw(st.integers(2, 4))
    before = tuple(draw(st.lists(st.integers(1, 4), min_size=rank, max_size=rank)))
    axis = draw(st.integers(0, rank - 1))
    # a random regrouping of the flat size into factors: a plausible reshape target
    total, after = int(np.prod(before)), []
    rest = total
    while rest > 1 and len(after) < 4:
        divisors = [d for d in range(2, rest + 1) if rest % d == 0]
        d = draw(st.sampled_from(divisors + [rest]))
        after.append(d)
        rest //= d
    after += [1] * draw(st.integers(0, 2))
    after = draw(st.permutations(after + [rest] if rest > 1 else after)) or [1]
    return before, axis, tuple(after)


@settings(max_examples=150, deadline=None)
@given(_reshapes())
def test_channel_after_reshape_matches_numpy_row_major(case):
    before, axis, after = case
    channels = before[axis]
    shape = [1] * len(before)
    shape[axis] = channels
    tagged = np.broadcast_to(np.arange(channels).reshape(shape), before).reshape(after)
    # source: ONNX Reshape/Flatten are row-major, as numpy.reshape (operator spec)
    keeps = [k for k, dim in enumerate(after) if dim == channels and np.array_equal(
        tagged, np.broadcast_to(np.arange(channels).reshape([-1 if j == k else 1 for j in range(len(after))]), after))]
    got = channel_after_reshape(before, after, axis, channels)
    if channels == 1:
        return  # one channel: any size-1 axis would do; nothing to map
    assert (got is not None) == bool(keeps)
    if got is not None:
        assert got in keeps


def test_channel_after_reshape_with_a_symbolic_batch():
    # [N, C, 1, 1] -> [N, C] (Flatten after a global pool) keeps the channels on axis 1
    assert channel_after_reshape(("N", 8, 1, 1), (None, 8), 1, 8) == 1
    assert channel_after_reshape(("N", 8, 2, 2), ("N", 32), 1, 8) is None
    assert channel_after_reshape(("N", 8, "H", 1), ("N", 8, "H"), 1, 8) == 1  # same dims before it
    assert channel_after_reshape(("N", 8, "H", 1), (None, 8, None), 1, 8) is None  # nothing to compare


# ----------------------------------------------------------- bias correction
def _dataset(**arrays: np.ndarray) -> Dataset:
    return Dataset(path=Path("<inline>"), arrays=arrays, labels=None, targets=None, n=len(next(iter(arrays.values()))),
                   dtypes={k: np.dtype(np.float32) for k in arrays})


POOLS = {"maxpool": dict(op_type="MaxPool", kernel_shape=[2, 2], strides=[2, 2]),
         "avgpool": dict(op_type="AveragePool", kernel_shape=[3, 3], pads=[1] * 4, count_include_pad=1)}


@pytest.mark.parametrize("case, layer", [("maxpool_padded_conv", "c2"), ("avgpool_padded_conv", "c2"),
                                         ("direct_padded_conv", "c2"), ("gap_flatten_gemm", "fc"),
                                         ("gmp_reshape_matmul", "mm")])
def test_bias_correction_reaches_layers_behind_pools(case, layer, tmp_path):
    if case.endswith("padded_conv"):
        pool = case.split("_")[0]
        nodes, inits = _conv2("p" if pool in POOLS else "y", pads=1)  # d cannot fold: a mean shift is left
        if pool in POOLS:
            nodes = [helper.make_node(inputs=["y"], outputs=["p"], name="pool", **POOLS[pool])] + nodes
        built = (nodes, inits, ["Y"], ())
    else:
        built = {"gap_flatten_gemm": _gap_flatten_gemm, "gmp_reshape_matmul": _gap_reshape_matmul}[case]()
    model = _load(*built[:3], tmp_path, built[3])
    sites = find_sites(model)
    x = (1.5 * np.random.default_rng(3).normal(size=(300, 3, 6, 6))).astype(np.float32)
    ds = _dataset(X=x)
    means = {}
    for corrected in (False, True):
        plan = make_plan(model, sites, to="relu", fold="off")
        result = cal.calibrate(model, sites, plan, ds, bias_correction=corrected, reservoir=16)
        assert result.sites[0].bias_corrected == ([layer] if corrected else [])
        candidate = rewrite(result.model, sites, result.plan).model
        means[corrected] = open_session(expose(candidate, ["Y"])).run(["Y"], {"X": x})[0]
    target = open_session(model).run(["Y"], {"X": x})[0]
    reduce = tuple(i for i in range(target.ndim) if i != 1)  # per output channel (axis 1 for Conv and Gemm)
    before = means[False].astype(np.float64).mean(axis=reduce)
    after = means[True].astype(np.float64).mean(axis=reduce)
    want = target.astype(np.float64).mean(axis=reduce)
    # source: Nagel et al. 2019, bias correction: E[candidate output] = E[original output] afterwards
    assert np.max(np.abs(before - want)) > 1e-3  # there was a shift to remove
    np.testing.assert_allclose(after, want, rtol=0, atol=2e-4)


def test_bias_correction_stops_at_a_gate_with_a_note(tmp_path):
    nodes, inits, outs, extra = _gate()
    model = _load(nodes, inits, outs, tmp_path, extra)
    sites = find_sites(model)
    rng = np.random.default_rng(4)
    ds = _dataset(X=rng.normal(size=(64, 3, 6, 6)).astype(np.float32),
                  S=rng.uniform(size=(64, C, 1, 1)).astype(np.float32))
    plan = make_plan(model, sites, to="relu", fold="off", site_ids=["s1"])
    result = cal.calibrate(model, sites, plan, ds, reservoir=16)
    assert result.sites[0].bias_corrected == []
    assert any("Mul" in n and "gate" in n for n in result.sites[0].notes)


# ------------------------------------------------------------ the demo CNN
def test_demo_cnn_hard_swish_folds_a_through_pools_and_gate_without_nodes():
    loaded = load_model(DEMO / "meter_cnn_silu.onnx")
    sites = find_sites(loaded.model)
    plan = make_plan(loaded.model, sites, to="hard_swish")
    place = {s.site_id: s.placement for s in plan.swaps}
    # s2: SiLU -> MaxPool -> Conv; s3: SiLU -> GlobalAveragePool -> Conv and -> gate Mul -> GAP -> Flatten -> Gemm
    assert place["s2"]["a"] == "consumers+" and place["s3"]["a"] == "consumers"
    assert place["s2"]["d"] == "held" and place["s3"]["d"] == "held"  # padded Conv / gate: d stays exact
    rng = np.random.default_rng(0)
    explicit = copy.deepcopy(plan)
    for swap, twin in zip(plan.swaps, explicit.swaps):
        swap.set_params(a=rng.uniform(0.5, 1.5, swap.channels), b=rng.uniform(0.5, 1.5, swap.channels))
        twin.set_params(**swap.params())
        twin.placement = {p: ("held" if v == "held" else "nodes") for p, v in twin.placement.items()}
    folded = rewrite(loaded.model, sites, plan)
    removed = sum(len(s.nodes) for s in sites if s.id in place)
    assert folded.nodes_after == folded.nodes_before - removed + len(place) * _surrogate_nodes("hard_swish")
    pixels = np.load(DEMO / "val.npz")["pixels"][:32]
    name = loaded.model.graph.input[0].name
    y_fold = open_session(folded.model).run(None, {name: pixels})[0]
    y_nodes = open_session(rewrite(loaded.model, sites, explicit).model).run(None, {name: pixels})[0]
    # source: ONNX operator spec as executed by onnxruntime (folded vs explicit Mul/Add nodes)
    np.testing.assert_allclose(y_fold, y_nodes, rtol=1e-5, atol=1e-5)
