"""Parameters carried through residual Adds (swapper.plan.add_folds, swapper.rewrite.transport).

Reference: the ONNX operator spec as executed by onnxruntime. A zero-node rewrite must compute what the same
plan computes with every parameter as an explicit Mul/Add node (fold "off"), within float32 tolerance, and
add no node; where the rules stop (zero padding, non-linear readers, graph outputs, a surrogate that is not
positively homogeneous) the placement says so and the rewrite is still exact. The algebra being checked:
Add is elementwise (u + v + t = (u + t) + v; s·(u + v) = s·u + s·v), Conv is linear and reads zeros in its
padding, Relu(s·z) = s·Relu(z) for s > 0 (ONNX operator spec, Relu).
"""
from __future__ import annotations

import numpy as np
import onnx
import onnx.parser
import pytest
from onnx import numpy_helper
from testkit import as_loaded, in_memory, run

from swapper import api
from swapper.errors import UsageError
from swapper.functions.params import PARAMS
from swapper.plan.plan import Plan, make_plan
from swapper.rewrite.apply import rewrite
from swapper.rewrite.folding import border_error
from swapper.scan.sites import find_sites

C = 4

# Two residual blocks: stem -> SiLU (s1) -> [Conv -> SiLU (s2) -> Conv] + skip -> SiLU (s3) -> [Conv -> SiLU (s4)
# -> Conv] + skip -> SiLU (s5) -> Conv head. Add A1 is reached from both sides: s1's d enters it from its
# operand side, s3's b, c from its output side; every block Conv has kernel K and pads P.
CHAIN = """
<ir_version: 8, opset_import: ["" : 17]>
chain (float[N, 3, 5, 5] X) => (float[N, 2, 5, 5] Y) {{
    h0 = Conv <kernel_shape = [1, 1]> (X, W0, B0)
    sg_y1 = Sigmoid(h0)
    y1 = Mul(h0, sg_y1)
    h1 = Conv <kernel_shape = [{k}, {k}], pads = [{p}, {p}, {p}, {p}]> (y1, W1, B1)
    sg_y2 = Sigmoid(h1)
    y2 = Mul(h1, sg_y2)
    u2 = Conv <kernel_shape = [{k}, {k}], pads = [{p}, {p}, {p}, {p}]> (y2, W2, B2)
    a1 = Add(u2, y1)
    sg_y3 = Sigmoid(a1)
    y3 = Mul(a1, sg_y3)
    h3 = Conv <kernel_shape = [{k}, {k}], pads = [{p}, {p}, {p}, {p}]> (y3, W3, B3)
    sg_y4 = Sigmoid(h3)
    y4 = Mul(h3, sg_y4)
    u4 = Conv <kernel_shape = [{k}, {k}], pads = [{p}, {p}, {p}, {p}]> (y4, W4, B4)
    a2 = Add(y3, u4)
    sg_y5 = Sigmoid(a2)
    y5 = Mul(a2, sg_y5)
    Y = Conv <kernel_shape = [1, 1]> (y5, W5, B5)
}}
"""

# Two sites add up directly: no operand has a linear producer, so d goes onward into the Conv reading the sum.
# Both stems share one weight initializer: each fold must get a copy of its own.
SUM = """
<ir_version: 8, opset_import: ["" : 17]>
twin (float[N, 3, 5, 5] X) => (float[N, 4, 5, 5] Y) {{
    h1 = Conv <kernel_shape = [1, 1]> (X, W0, B0)
    sg_y1 = Sigmoid(h1)
    y1 = Mul(h1, sg_y1)
    h2 = Conv <kernel_shape = [1, 1]> (X, W0, B0)
    sg_y2 = Sigmoid(h2)
    y2 = Mul(h2, sg_y2)
    z = Add(y1, y2)
    Y = Conv <kernel_shape = [{k}, {k}], pads = [{p}, {p}, {p}, {p}]> (z, W3, B3)
}}
"""


def _weights(rng, k: int) -> dict[str, np.ndarray]:
    w = {"W0": rng.normal(size=(C, 3, 1, 1)), "W1": rng.normal(size=(C, C, k, k)) / k,
         "W2": rng.normal(size=(C, C, k, k)) / k, "W3": rng.normal(size=(C, C, k, k)) / k,
         "W4": rng.normal(size=(C, C, k, k)) / k, "W5": rng.normal(size=(2, C, 1, 1))}
    w.update({f"B{i}": rng.normal(scale=0.3, size=w[f"W{i}"].shape[0]) for i in range(6)})
    return w


def _model(text: str, k: int = 1, pads: int = 0, seed: int = 0) -> onnx.ModelProto:
    model = onnx.parser.parse_model(text.format(k=k, p=pads))
    used = {i for n in model.graph.node for i in n.input}
    model.graph.initializer.extend(numpy_helper.from_array(v.astype(np.float32), name)
                                   for name, v in _weights(np.random.default_rng(seed), k).items() if name in used)
    return as_loaded(model)


def _plans(model, to: str, fold: str, seed: int = 1, only: str | None = None) -> tuple[Plan, Plan, list]:
    """The ``fold`` plan with random values where it lets parameters move (b > 0, a > 0), and the same values
    as explicit nodes."""
    sites = find_sites(model)
    plan = make_plan(model, sites, to=to, fold=fold, only=only)
    explicit = make_plan(model, sites, to=to, fold="off", only=only)
    rng = np.random.default_rng(seed)
    for swap, twin in zip(plan.swaps, explicit.swaps):
        n = swap.channels
        values = {"a": rng.uniform(0.5, 1.5, n), "b": rng.uniform(0.5, 1.5, n),
                  "c": rng.normal(0, 0.3, n), "d": rng.normal(0, 0.3, n)}
        swap.set_params(**{p: values[p] for p in PARAMS if swap.placement[p] != "fixed"})
        twin.set_params(**swap.params())
    return plan, explicit, sites


def _feeds(n: int = 6) -> dict[str, np.ndarray]:
    return {"X": np.random.default_rng(7).normal(size=(n, 3, 5, 5)).astype(np.float32)}


def _op_counts(model) -> dict[str, int]:
    counts: dict[str, int] = {}
    for node in model.graph.node:
        counts[node.op_type] = counts.get(node.op_type, 0) + 1
    return counts


def _assert_exact_and_no_nodes(model, plan, explicit, sites):
    result = rewrite(model, sites, plan)
    onnx.checker.check_model(result.model, full_check=True)
    # every SiLU (Sigmoid + Mul) became one Relu; nothing else was added
    counts = _op_counts(result.model)
    assert counts.get("Mul", 0) == 0 and counts.get("Sigmoid", 0) == 0
    assert counts["Relu"] == len(sites) and counts["Add"] == _op_counts(model)["Add"]
    # source: ONNX operator spec as executed by onnxruntime, the explicit-node form of the same plan
    want = run(rewrite(model, sites, explicit).model, _feeds())[0]
    np.testing.assert_allclose(run(result.model, _feeds())[0], want, rtol=1e-4, atol=1e-4 * np.abs(want).max())
    return result


def test_chain_without_padding_moves_every_parameter_exactly_and_adds_no_node():
    model = _model(CHAIN, k=1, pads=0)
    plan, explicit, sites = _plans(model, "relu", "exact")
    place = {s.site_id: s.placement for s in plan.swaps}
    # s3 and s5 read residual Adds: b, c pass through them; s1 and s3 feed Adds: d passes through them
    for sid in ("s3", "s5"):
        assert place[sid]["b"] == place[sid]["c"] == "through-add" and place[sid]["a"] == "in-surrogate"
    for sid in ("s1", "s3"):
        assert place[sid]["d"] == "through-add"
    assert all(p != "fixed" for s in plan.swaps for p in s.placement.values())
    result = _assert_exact_and_no_nodes(model, plan, explicit, sites)
    folded = {r.site_id: set(r.folded_into) for r in result.records}
    u2 = next(n.name for n in model.graph.node if n.output[0] == "u2")
    h0 = next(n.name for n in model.graph.node if n.output[0] == "h0")
    h1 = next(n.name for n in model.graph.node if n.output[0] == "h1")
    # A1 from both sides: s1's d lands in u2's bias (operand side), s3's b, c in u2 and, through s1, in h0
    # (s1's pre-activation) and h1 (s1's other reader, through 1/b)
    assert u2 in folded["s1"] and {u2, h0, h1} <= folded["s3"]


def test_chain_with_zero_padding_holds_d_and_stays_exact():
    model = _model(CHAIN, k=3, pads=1)
    plan, explicit, sites = _plans(model, "relu", "exact")
    place = {s.site_id: s.placement for s in plan.swaps}
    assert place["s3"]["b"] == place["s3"]["c"] == "through-add"
    # y1 feeds a zero-padded Conv besides the Add: d would be wrong at the borders, so it is held
    assert place["s1"]["d"] == "fixed"
    assert any("no exact bias fold" in n for n in plan.by_site()["s1"].notes)
    _assert_exact_and_no_nodes(model, plan, explicit, sites)


def test_approximate_folds_d_through_the_add_and_reports_the_border_error():
    model = _model(CHAIN, k=3, pads=1)
    plan, explicit, sites = _plans(model, "relu", "approximate")
    assert plan.by_site()["s1"].placement["d"] == "approx"
    result = rewrite(model, sites, plan)
    notes = [n for r in result.records if r.site_id == "s1" for n in r.notes if "border error" in n]
    assert len(notes) == 1 and "of 25 output positions" in notes[0]  # 5x5 output, 3x3 kernel, pads 1
    # d enters the padded Conv approximately and the Add exactly: with d = 0 on s1 alone the two agree again
    for s, t in zip(plan.swaps, explicit.swaps):
        s.set_params(d=np.zeros(s.channels))
        t.set_params(d=np.zeros(t.channels))
    _assert_exact_and_no_nodes(model, plan, explicit, sites)


@pytest.mark.parametrize("pads", [0, 1])
def test_offset_goes_onward_when_no_operand_has_a_producer(pads):
    model = _model(SUM, k=1 + 2 * pads, pads=pads)
    plan, explicit, sites = _plans(model, "relu", "exact")
    want = "fixed" if pads else "through-add"  # onward into the Conv reading the sum: exact without padding only
    assert [s.placement["d"] for s in plan.swaps] == [want, want]
    _assert_exact_and_no_nodes(model, plan, explicit, sites)


def test_non_homogeneous_surrogate_stops_the_scale_not_the_shift():
    model = _model(CHAIN, k=1, pads=0)
    plan, explicit, sites = _plans(model, "hard_swish", "exact")
    s3 = plan.by_site()["s3"]
    # hard_swish(s·z) != s·hard_swish(z): the scale cannot pass through s1's output, the shift needs no such thing
    assert s3.placement["b"] == "fixed" and s3.placement["c"] == "through-add"
    assert any("not positively homogeneous" in n for n in s3.notes)
    result = rewrite(model, sites, plan)
    want = run(rewrite(model, sites, explicit).model, _feeds())[0]
    np.testing.assert_allclose(run(result.model, _feeds())[0], want, rtol=1e-4, atol=1e-4 * np.abs(want).max())
    assert _op_counts(result.model).get("Mul", 0) == _op_counts(rewrite(model, sites, make_plan(
        model, sites, to="hard_swish", fold="exact")).model).get("Mul", 0)  # the surrogate's own nodes only


def test_graph_output_on_the_way_stops_the_add_route():
    text = CHAIN.replace("(float[N, 2, 5, 5] Y)", "(float[N, 2, 5, 5] Y, float[N, 4, 5, 5] a1)")
    model = _model(text, k=1, pads=0)
    plan, explicit, sites = _plans(model, "relu", "exact")
    s3 = plan.by_site()["s3"]
    assert s3.placement["b"] == s3.placement["c"] == "fixed"
    assert any("graph output" in n for n in s3.notes)
    result = _assert_exact_and_no_nodes(model, plan, explicit, sites)
    # the Add's value, a graph output, is what the explicit form computes
    np.testing.assert_allclose(run(result.model, _feeds(), ["a1"])[0],
                               run(rewrite(model, sites, explicit).model, _feeds(), ["a1"])[0], rtol=1e-4, atol=1e-4)


def test_non_linear_reader_of_the_upstream_output_stops_the_scale():
    text = CHAIN.replace("(float[N, 2, 5, 5] Y)", "(float[N, 2, 5, 5] Y, float[N, 4, 5, 5] T)").replace(
        "    h1 = Conv", "    T = Tanh(y1)\n    h1 = Conv")
    model = _model(text, k=1, pads=0)
    plan, explicit, sites = _plans(model, "relu", "exact", only="silu")
    output = {s.id: s.output for s in sites}
    place = {output[s.site_id]: s.placement for s in plan.swaps}
    assert place["y3"]["b"] == "fixed" and place["y3"]["c"] == "through-add"  # y1 also feeds a Tanh
    assert place["y1"]["d"] == "fixed"
    result = rewrite(model, sites, plan)
    ours = run(result.model, _feeds(), ["Y", "T"])
    want = run(rewrite(model, sites, explicit).model, _feeds(), ["Y", "T"])
    for u, v in zip(ours, want):
        np.testing.assert_allclose(u, v, rtol=1e-4, atol=1e-4 * np.abs(v).max())
    assert _op_counts(result.model).get("Mul", 0) == 0 and _op_counts(result.model)["Tanh"] == 1


def test_a_plan_with_b_not_positive_through_an_add_is_refused():
    model = _model(CHAIN, k=1, pads=0)
    plan, _, sites = _plans(model, "relu", "exact")
    s3 = plan.by_site()["s3"]
    s3.set_params(b=-np.abs(s3.b))
    with pytest.raises(UsageError, match="b through an add needs b > 0"):
        rewrite(model, sites, plan)


def test_border_error_matches_onnxruntime():
    """Conv(pad0(y + d)) − Conv(pad0(y)) − W·d, measured by onnxruntime, is what border_error says."""
    rng = np.random.default_rng(3)
    w = rng.normal(size=(3, C, 3, 3)).astype(np.float32)
    d = rng.normal(size=C)
    text = """
    <ir_version: 8, opset_import: ["" : 17]>
    pad (float[1, 4, 5, 6] X) => (float[1, 3, 3, 3] Y) {
        Y = Conv <kernel_shape = [3, 3], pads = [1, 1, 1, 1], strides = [2, 2]> (X, W)
    }
    """
    model = onnx.parser.parse_model(text)
    model.graph.initializer.append(numpy_helper.from_array(w, "W"))
    y = rng.normal(size=(1, C, 5, 6))
    shifted = run(model, {"X": (y + d.reshape(1, C, 1, 1)).astype(np.float32)})[0].astype(np.float64)
    plain = run(model, {"X": y.astype(np.float32)})[0].astype(np.float64)
    wd = (w.astype(np.float64).sum(axis=(2, 3)) @ d).reshape(1, 3, 1, 1)
    np.testing.assert_allclose(border_error(model.graph.node[0], w, d, (5, 6)), (shifted - plain - wd)[0], atol=1e-4)


@pytest.mark.parametrize("pads", [0, 1])
def test_calibrated_plan_is_what_the_graph_holds(pads, tmp_path):
    """plan -> calibrate -> rewrite: the fitted values (b > 0 where it passes an add) fold exactly, no node added."""
    model = _model(CHAIN, k=1 + 2 * pads, pads=pads)
    onnx.save(model, tmp_path / "chain.onnx")
    data = in_memory({"X": np.random.default_rng(11).normal(size=(96, 3, 5, 5)).astype(np.float32)})
    result = api.swap(tmp_path / "chain.onnx", calib=data, to="relu")
    for swap in result.plan.swaps:
        if swap.placement["b"] == "through-add":
            assert np.all(swap.b > 0)
    explicit = Plan("off", [
        type(s)(**{**s.__dict__, "placement": {p: "fixed" if w == "fixed" else "nodes" for p, w in s.placement.items()}})
        for s in result.plan.swaps])
    sites = result.sites
    _assert_exact_and_no_nodes(result.calibration.model, result.plan, explicit, sites)
