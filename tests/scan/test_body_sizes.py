"""Cost shares of sites inside If/Loop bodies: known by running the bodies on a sample, unknown without one.

References: the ONNX operator spec of Loop (M trips of the body) and If (only the chosen branch runs); the
elements are counted from the shapes those semantics give, by hand.
"""
from __future__ import annotations

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper, parser
from testkit import as_loaded, in_memory

from swapper import api
from swapper.data.layout import ConstantFeed
from swapper.functions.costs import relative_cost
from swapper.plan.plan import make_plan
from swapper.scan.sites import find_sites

MODEL = """
<ir_version: 8, opset_import: ["" : 17]>
g (float[N,4] x, bool c) => (float[N,4] y, float[N,4] z) <int64 M = {3}> {
   x1 = Tanh(x)
   go = Constant<value = bool {1}>()
   y = Loop(M, go, x1) <body = body (int64 i, bool k, float[N,4] v) => (bool ko, float[N,4] vo) {
        ko = Identity(k)
        vo = Sigmoid(v)
   }>
   z = If(c) <then_branch = th () => (float[N,4] a) { a = Softplus(x) },
              else_branch = el () => (float[N,4] b) { b = Neg(x) }>
}
"""


def saved(tmp_path, model, name="m.onnx"):
    path = tmp_path / name
    onnx.save(model, path)
    return path


def test_body_costs_are_unknown_until_the_bodies_run(tmp_path):
    sites = api.scan(saved(tmp_path, as_loaded(parser.parse_model(MODEL)))).sites
    assert [(s.function, s.elements) for s in sites] == [("tanh", 4), ("sigmoid", None), ("softplus", None)]
    assert all(s.cost_share is None for s in sites)  # a share of an unknown total is unknown


@pytest.mark.parametrize("take_then", [True, False])
def test_body_costs_count_every_iteration_and_only_the_branch_taken(tmp_path, take_then):
    path = saved(tmp_path, as_loaded(parser.parse_model(MODEL)))
    data = in_memory({"x": np.ones((4, 4), np.float32)})
    data.constants["c"] = ConstantFeed(np.array(take_then))  # the condition, fed unchanged in every batch
    sites = {s.function: s for s in api.scan(path, calib=data).sites}
    # per sample: the Tanh's 4 values once, the Sigmoid's 4 values on each of M = 3 trips, the Softplus's 4
    # values when its branch runs and none when it does not
    want = {"tanh": 4, "sigmoid": 12, "softplus": 4 if take_then else 0}
    assert {f: s.elements for f, s in sites.items()} == want
    costs = {f: n * relative_cost(f, "op", "") for f, n in want.items()}
    for f, s in sites.items():
        assert s.cost_share == pytest.approx(costs[f] / sum(costs.values()))


def test_a_body_that_cannot_run_alone_is_skipped_with_its_reason():
    # a Loop carrying a sequence (ONNX operator spec, Loop: loop-carried values may be any type)
    body = helper.make_graph(
        [helper.make_node("Identity", ["k"], ["ko"]), helper.make_node("Identity", ["q"], ["qo"]),
         helper.make_node("Sigmoid", ["x"], ["s"]), helper.make_node("SequenceInsert", ["q", "s"], ["q2"])],
        "body",
        [helper.make_tensor_value_info("i", TensorProto.INT64, []),
         helper.make_tensor_value_info("k", TensorProto.BOOL, []),
         helper.make_tensor_sequence_value_info("q", TensorProto.FLOAT, None)],
        [helper.make_tensor_value_info("ko", TensorProto.BOOL, []),
         helper.make_tensor_sequence_value_info("q2", TensorProto.FLOAT, None)])
    graph = helper.make_graph(
        [helper.make_node("SequenceEmpty", [], ["q0"], dtype=TensorProto.FLOAT),
         helper.make_node("Loop", ["M", "", "q0"], ["qN"], body=body),
         helper.make_node("ConcatFromSequence", ["qN"], ["y"], axis=0)],
        "g", [helper.make_tensor_value_info("x", TensorProto.FLOAT, [2, 4])],
        [helper.make_tensor_value_info("y", TensorProto.FLOAT, [None, 4])],
        [onnx.numpy_helper.from_array(np.array(2, np.int64), "M")])
    model = as_loaded(helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)], ir_version=8))
    (site,) = find_sites(model)
    assert not site.supported
    assert site.reason == ("inside the body of Loop 'Loop_1'; the body passes 'q', a sequence and not a tensor, "
                           "which the calibration cannot feed")
    plan = make_plan(model, [site], site_ids=["s1"])
    assert [(k.site_id, k.reason) for k in plan.skipped] == [("s1", site.reason)]

