"""Folding *through* pools, reshapes and gates (swapper.rewrite.apply with the placements of swapper.plan).

References: onnxruntime and ``onnx.reference.ReferenceEvaluator`` execute the
ONNX operator spec; a folded graph must give the same outputs as the same
parameters emitted as explicit Mul/Add nodes (fold "off"). The commuting rules
are the operator definitions: MaxPool takes a max over the window (pads count
as -inf), so max(a·x) = a·max(x) needs a >= 0 and max(x + d) = max(x) + d;
AveragePool is linear, and divides by the window size including pads when
count_include_pad = 1 (so + d does not pass then); Flatten/Reshape are
row-major (numpy semantics). Bias correction through the same tails is tested
in tests/calibrate/test_bias_correction.py, the channel mapping through
reshapes in tests/plan/test_layers.py.
"""
from __future__ import annotations

import copy
import dataclasses

import numpy as np
import pytest
from onnx import helper
from onnx.reference import ReferenceEvaluator
from testkit import DEMO, OPSET, VAL, conv_tanh, init

from swapper import functions
from swapper.core.emit import Emitter
from swapper.core.model_io import load_model
from swapper.core.session import open_session
from swapper.errors import UsageError
from swapper.functions.params import PARAMS
from swapper.plan.plan import make_plan
from swapper.rewrite.apply import rewrite
from swapper.scan.sites import find_sites

C = 4  # channels of the Tanh site in front of every tail (testkit.conv_tanh)


# ------------------------------------------------------------------ helpers
def _conv2(src, pads=0, name="c2", out="Y"):
    rng = np.random.default_rng(1)
    return ([helper.make_node("Conv", [src, "W2", "B2"], [out], name=name, pads=[pads] * 4)],
            [init("W2", rng.normal(size=(3, C, 3, 3)) * 0.4), init("B2", rng.normal(size=3) * 0.1)])


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
    return nodes, [init("Wg", rng.normal(size=(5, C))), init("Bg", rng.normal(size=5))], ["Y"], ()


def _gap_reshape_matmul():
    rng = np.random.default_rng(3)
    nodes = [helper.make_node("GlobalMaxPool", ["y"], ["g"], name="gmp"),
             helper.make_node("Reshape", ["g", "shape"], ["r"], name="reshape"),
             helper.make_node("MatMul", ["r", "Wm"], ["mm"], name="mm"),
             helper.make_node("Add", ["mm", "Bm"], ["Y"], name="bias")]
    inits = [init("shape", [-1, C], np.int64), init("Wm", rng.normal(size=(C, 5))),
             init("Bm", rng.normal(size=5))]
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
    return nodes, [init("Wg", rng.normal(size=(5, C * 36))), init("Bg", rng.normal(size=5))], ["Y"], ()


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
        swap.set_params(**{p: values[p] for p in PARAMS if swap.placement[p] != "fixed"})
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
    "maxpool": (_maxpool, "consumers-via-max", "consumers"),
    "maxpool_padded": (lambda: _maxpool(pads=1, kernel=3, stride=1), "consumers-via-max", "consumers"),
    "avgpool": (_avgpool, "consumers", "consumers"),
    "avgpool_pads_excluded": (lambda: _avgpool(pads=1, include=0), "consumers", "consumers"),
    "avgpool_pads_counted": (lambda: _avgpool(pads=1, include=1), "consumers", "fixed"),
    "gap_flatten_gemm": (_gap_flatten_gemm, "consumers", "consumers"),
    "gmp_reshape_matmul": (_gap_reshape_matmul, "consumers-via-max", "consumers"),
    "gate": (_gate, "consumers", "fixed"),
}


@pytest.mark.parametrize("case", sorted(THROUGH))
def test_fold_through_equals_explicit_nodes(case, through_loader):
    build, a_where, d_where = THROUGH[case]
    nodes, inits, outs, extra = build()
    model = through_loader(conv_tanh(nodes, inits, outs, extra_inputs=extra))
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
    if d_where == "fixed":  # the note names what stopped d
        assert any(n.startswith("d fixed") and ("gate" in n or "padding" in n) for n in swap.notes)


@pytest.mark.parametrize("case", ["avgpool_pads_counted", "gate"])
def test_d_blocked_goes_to_a_node_under_nodes_policy(case, through_loader):
    nodes, inits, outs, extra = THROUGH[case][0]()
    model = through_loader(conv_tanh(nodes, inits, outs, extra_inputs=extra))
    sites = find_sites(model)
    plan, explicit = _plans(model, sites, "exact+nodes", np.random.default_rng(10))
    assert plan.swaps[0].placement["a"] == "consumers" and plan.swaps[0].placement["d"] == "nodes"
    folded = rewrite(model, sites, plan)
    _agree(folded.model, rewrite(model, sites, explicit).model, _feeds(model))
    # the d Add is the only parameter node (a is in the consumers; d/a is emitted)
    assert folded.records[0].nodes_added == _surrogate_nodes("hard_tanh") + 1


# ------------------------------------------------------------------ declines
def test_negative_a_through_max_pool_is_refused(through_loader):
    nodes, inits, outs, extra = _maxpool()
    model = through_loader(conv_tanh(nodes, inits, outs, extra_inputs=extra))
    sites = find_sites(model)
    plan, _ = _plans(model, sites, "exact", np.random.default_rng(11), a_low=-1.0)
    plan.swaps[0].a[0] = -0.7  # max(-x) = -min(x): the pool does not commute with this channel
    assert plan.swaps[0].placement["a"] == "consumers-via-max"
    with pytest.raises(UsageError, match="max pool needs a > 0; channel 0"):  # not re-placed as a node
        rewrite(model, sites, plan)


@pytest.mark.parametrize("build, why", [
    (_flatten_mixing, "channels"),  # [N, 4, 6, 6] -> [N, 144]: channel mixed with the pixels
    (lambda: _gate("square"), "two paths"),  # y·y is not linear in y
    (_pool_output_too, "graph output"),  # the pooled tensor leaves the graph unchanged-by-fold
])
def test_declined_paths_keep_a_and_d_held(build, why, through_loader):
    nodes, inits, outs, extra = build()
    model = through_loader(conv_tanh(nodes, inits, outs, extra_inputs=extra))
    sites = find_sites(model)
    plan, explicit = _plans(model, sites, "exact", np.random.default_rng(12))
    swap = plan.swaps[0]
    assert swap.placement["a"] == swap.placement["d"] == "fixed"
    assert any(why in n for n in swap.notes), swap.notes
    _agree(rewrite(model, sites, plan).model, rewrite(model, sites, explicit).model, _feeds(model))


def test_one_scalar_parameter_set_passes_a_channel_mixing_flatten(through_loader):
    # a scalar a·y + d commutes with any reshape: only per-channel sets need the channel mapping
    nodes, inits, outs, extra = _flatten_mixing()
    model = through_loader(conv_tanh(nodes, inits, outs, extra_inputs=extra))
    sites = [dataclasses.replace(s, channel_axis=None, channels=None) for s in find_sites(model)]
    plan, explicit = _plans(model, sites, "exact", np.random.default_rng(14))
    assert plan.swaps[0].channels == 1
    assert (plan.swaps[0].placement["a"], plan.swaps[0].placement["d"]) == ("consumers", "consumers")
    folded = rewrite(model, sites, plan)
    assert folded.records[0].nodes_added == _surrogate_nodes("hard_tanh")
    _agree(folded.model, rewrite(model, sites, explicit).model, _feeds(model))


def test_plan_must_say_consumers_via_max_behind_a_max_pool(through_loader):
    nodes, inits, outs, extra = _maxpool()
    model = through_loader(conv_tanh(nodes, inits, outs, extra_inputs=extra))
    sites = find_sites(model)
    plan, _ = _plans(model, sites, "exact", np.random.default_rng(13))
    wrong = copy.deepcopy(plan)
    wrong.swaps[0].placement["a"] = "consumers"
    with pytest.raises(UsageError, match="consumers-via-max"):
        rewrite(model, sites, wrong)
    bad = copy.deepcopy(plan)
    bad.swaps[0].placement["d"] = "consumers-via-max"  # only a can carry the sign condition
    with pytest.raises(UsageError, match="invalid placement"):
        rewrite(model, sites, bad)


# ------------------------------------------------------------ the demo CNN
def test_demo_cnn_hard_swish_folds_a_through_pools_and_gate_without_nodes():
    loaded = load_model(DEMO / "meter_cnn_silu.onnx")
    sites = find_sites(loaded.model)
    plan = make_plan(loaded.model, sites, to="hard_swish")
    place = {s.site_id: s.placement for s in plan.swaps}
    # s2: SiLU -> MaxPool -> Conv; s3: SiLU -> GlobalAveragePool -> Conv and -> gate Mul -> GAP -> Flatten -> Gemm
    assert place["s2"]["a"] == "consumers-via-max" and place["s3"]["a"] == "consumers"
    assert place["s2"]["d"] == "fixed" and place["s3"]["d"] == "fixed"  # padded Conv / gate: d stays exact
    rng = np.random.default_rng(0)
    explicit = copy.deepcopy(plan)
    for swap, twin in zip(plan.swaps, explicit.swaps):
        swap.set_params(a=rng.uniform(0.5, 1.5, swap.channels), b=rng.uniform(0.5, 1.5, swap.channels))
        twin.set_params(**swap.params())
        twin.placement = {p: ("fixed" if v == "fixed" else "nodes") for p, v in twin.placement.items()}
    folded = rewrite(loaded.model, sites, plan)
    removed = sum(len(s.nodes) for s in sites if s.id in place)
    assert folded.nodes_after == folded.nodes_before - removed + len(place) * _surrogate_nodes("hard_swish")
    pixels = np.load(VAL)["pixels"][:32]
    name = loaded.model.graph.input[0].name
    y_fold = open_session(folded.model).run(None, {name: pixels})[0]
    y_nodes = open_session(rewrite(loaded.model, sites, explicit).model).run(None, {name: pixels})[0]
    # source: ONNX operator spec as executed by onnxruntime (folded vs explicit Mul/Add nodes)
    np.testing.assert_allclose(y_fold, y_nodes, rtol=1e-5, atol=1e-5)
