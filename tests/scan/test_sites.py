"""Site descriptions: ids, role, channel axis, elements, cost, subgraphs, JSON, demo models."""
from __future__ import annotations

import json
import math

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper, numpy_helper
from testkit import DEMO, as_loaded, float_model

from swapper.core.model_io import load_model
from swapper.functions.costs import relative_cost
from swapper.scan.sites import SCHEMA, find_sites, sites_to_json


def w(shape, seed=0):
    return np.random.default_rng(seed).standard_normal(shape).astype(np.float32) * 0.1


def build(nodes, inputs, outputs, inits=(), opset=17):
    """Checked, shape-inferred model as swapper.core.model_io.load_model prepares it."""
    tensors = [numpy_helper.from_array(v, k) for k, v in inits]  # any dtype (Loop trip counts, If conditions)
    return as_loaded(float_model(nodes, inputs, outputs, tensors, opset=opset, name="t"))


def se_block():
    """Conv -> SiLU -> squeeze-excite (GAP, 1x1 Conv, ReLU, 1x1 Conv, Sigmoid, Mul) -> output."""
    nd = helper.make_node
    nodes = [
        nd("Conv", ["X", "W0"], ["C0"], pads=[1, 1, 1, 1]),
        nd("Sigmoid", ["C0"], ["S0"]), nd("Mul", ["C0", "S0"], ["A0"]),  # SiLU
        nd("GlobalAveragePool", ["A0"], ["G"]),
        nd("Conv", ["G", "W1"], ["C1"]), nd("Relu", ["C1"], ["R"]),
        nd("Conv", ["R", "W2"], ["C2"]), nd("Sigmoid", ["C2"], ["Gate"]),
        nd("Mul", ["A0", "Gate"], ["M"]),
        nd("Mul", ["M", "two"], ["Y"]),
    ]
    inits = [("W0", w((8, 3, 3, 3))), ("W1", w((2, 8, 1, 1), 1)), ("W2", w((8, 2, 1, 1), 2)),
             ("two", np.array(2.0, np.float32))]
    return build(nodes, [("X", ["N", 3, 5, 5])], [("Y", ["N", 8, 5, 5])], inits)


# --------------------------------------------------------------- description
def test_squeeze_excite_roles_axes_and_ids():
    sites = find_sites(se_block())
    assert [(s.id, s.function) for s in sites] == [("s1", "silu"), ("s2", "relu"), ("s3", "sigmoid")]
    silu, relu, gate = sites
    # source: ONNX operator spec, Conv: X is (N x C x H x W), so channels sit on axis 1
    assert (silu.channel_axis, silu.channels, silu.shape) == (1, 8, ("N", 8, 5, 5))
    assert (silu.producer, silu.consumers) == ("Conv", ("GlobalAveragePool", "Mul"))
    # the SiLU output is the feature map the SE gate multiplies: gated, not a gate (gate [N,8,1,1] broadcasts)
    assert silu.role == "hidden"
    assert relu.role == "hidden" and relu.channels == 2
    assert (gate.role, gate.consumers, gate.channels) == ("gate", ("Mul",), 8)
    assert silu.elements == 8 * 5 * 5 and gate.elements == 8  # per sample: dims after the batch


def test_glu_style_gate_and_constant_multiplier():
    # GLU (Dauphin et al. 2017): a·σ(b), both halves the same shape -> the sigmoid is a gate
    nd = helper.make_node
    nodes = [nd("Sigmoid", ["B"], ["S"]), nd("Mul", ["A", "S"], ["G"]),
             nd("Tanh", ["A"], ["T"]), nd("Mul", ["T", "k"], ["Y0"]), nd("Add", ["G", "Y0"], ["Y"])]
    m = build(nodes, [("A", [2, 6]), ("B", [2, 6])], [("Y", [2, 6])], [("k", np.array(3.0, np.float32))])
    roles = {s.function: s.role for s in find_sites(m)}
    assert roles == {"sigmoid": "gate", "tanh": "hidden"}  # Mul by a constant is not a gate


def test_output_role_and_consumers_marker():
    m = build([helper.make_node("Tanh", ["X"], ["Y"]), helper.make_node("Relu", ["Y"], ["Z"])],
              [("X", [1, 4])], [("Y", [1, 4]), ("Z", [1, 4])])
    tanh = find_sites(m)[0]
    assert tanh.role == "output" and tanh.consumers == ("Relu", "<output>") and tanh.producer is None


@pytest.mark.parametrize("case,axis,channels", [
    ("conv1d", 1, 6), ("conv3d", 1, 6), ("matmul_tokens", 2, 7), ("gemm", 1, 7), ("input_rank3", None, None),
])
def test_channel_axis_by_producer(case, axis, channels):
    # source: ONNX operator spec, Conv (N x C x D1 ... Dn) and MatMul (numpy matmul: features on the last axis)
    nd = helper.make_node
    if case == "conv1d":
        m = build([nd("Conv", ["X", "W"], ["C"]), nd("Add", ["C", "b"], ["D"]), nd("Sigmoid", ["D"], ["Y"])],
                  [("X", ["N", 3, 10])], [("Y", ["N", 6, 10])], [("W", w((6, 3, 1))), ("b", w((6, 1)))])
    elif case == "conv3d":
        m = build([nd("Conv", ["X", "W"], ["C"]), nd("Tanh", ["C"], ["Y"])],
                  [("X", ["N", 3, 2, 4, 4])], [("Y", ["N", 6, 2, 4, 4])], [("W", w((6, 3, 1, 1, 1)))])
    elif case == "matmul_tokens":
        m = build([nd("MatMul", ["X", "W"], ["C"]), nd("Add", ["C", "b"], ["D"]), nd("Sigmoid", ["D"], ["Y"])],
                  [("X", ["N", 5, 4])], [("Y", ["N", 5, 7])], [("W", w((4, 7))), ("b", w((7,)))])
    elif case == "gemm":
        m = build([nd("Gemm", ["X", "W"], ["C"]), nd("Tanh", ["C"], ["Y"])],
                  [("X", ["N", 4])], [("Y", ["N", 7])], [("W", w((4, 7)))])
    else:
        m = build([nd("Tanh", ["X"], ["Y"])], [("X", ["N", 5, 4])], [("Y", ["N", 5, 4])])
    (s,) = find_sites(m)
    assert (s.channel_axis, s.channels) == (axis, channels)


def test_unknown_dims_give_unknown_cost_and_shares():
    nd = helper.make_node
    m = build([nd("Sigmoid", ["X"], ["S"]), nd("Tanh", ["Z"], ["T"])],
              [("X", ["N", "T", 4]), ("Z", ["N", 4])], [("S", ["N", "T", 4]), ("T", ["N", 4])])
    sig, tanh = find_sites(m)
    assert sig.elements is None and sig.cost is None and sig.cost_share is None
    # the total is unknown, so no share is known either (never a made-up 0% or 100%)
    assert tanh.elements == 4 and tanh.cost is not None and tanh.cost_share is None


def test_ids_follow_first_node_in_graph_order():
    # the SiLU's Sigmoid comes before the Relu, its Mul after: the SiLU is s1
    nd = helper.make_node
    m = build([nd("Sigmoid", ["X"], ["S"]), nd("Relu", ["X"], ["R"]), nd("Mul", ["X", "S"], ["Y"])],
              [("X", [1, 4])], [("Y", [1, 4]), ("R", [1, 4])])
    assert [(s.id, s.function) for s in find_sites(m)] == [("s1", "silu"), ("s2", "relu")]


# ------------------------------------------------------------------ subgraphs
def loop_model():
    """Tanh, then a Loop whose body applies Sigmoid to the carried tensor, then Relu."""
    nd = helper.make_node
    body = helper.make_graph(
        [nd("Identity", ["cond_in"], ["cond_out"]), nd("Sigmoid", ["v_in"], ["v_out"])], "body",
        [helper.make_tensor_value_info("i", TensorProto.INT64, []),
         helper.make_tensor_value_info("cond_in", TensorProto.BOOL, []),
         helper.make_tensor_value_info("v_in", TensorProto.FLOAT, [1, 4])],
        [helper.make_tensor_value_info("cond_out", TensorProto.BOOL, []),
         helper.make_tensor_value_info("v_out", TensorProto.FLOAT, [1, 4])],
    )
    nodes = [nd("Tanh", ["X"], ["T"]), nd("Loop", ["trips", "", "T"], ["L"], body=body), nd("Relu", ["L"], ["Y"])]
    return build(nodes, [("X", [1, 4])], [("Y", [1, 4])], [("trips", np.array(3, np.int64))])


def test_loop_body_site_listed_after_main_graph_sites_with_its_body():
    # main-graph ids do not depend on what bodies hold: s1, s2 there, body sites numbered on
    sites = find_sites(loop_model())
    assert [(s.id, s.function, s.supported, s.body) for s in sites] == [
        ("s1", "tanh", True, ()), ("s2", "relu", True, ()), ("s3", "sigmoid", True, (("Loop_1", "body"),))]


def test_if_branches_are_scanned():
    nd = helper.make_node
    out = [helper.make_tensor_value_info("o", TensorProto.FLOAT, [1, 4])]

    def branch(op, name):
        return helper.make_graph([nd(op, ["X"], ["o"])], name, [], out)

    m = build([nd("If", ["c"], ["Y"], then_branch=branch("Softplus", "then"), else_branch=branch("Elu", "else"))],
              [("X", [1, 4])], [("Y", [1, 4])], [("c", np.array(True))])
    sites = find_sites(m)
    # attributes in name order: else_branch before then_branch
    assert [(s.function, s.supported) for s in sites] == [("elu", True), ("softplus", True)]
    assert [s.body for s in sites] == [(("If_0", "else_branch"),), (("If_0", "then_branch"),)]


# ----------------------------------------------------------------- cost, JSON
def test_cost_is_elements_times_measured_relative_cost():
    sites = find_sites(se_block())
    for s in sites:
        assert s.cost == pytest.approx(s.elements * relative_cost(s.function, s.form, s.domain))
    assert sum(s.cost_share for s in sites) == pytest.approx(1.0)


def test_scan_json_schema(tmp_path):
    path = tmp_path / "se.onnx"
    onnx.save(se_block(), path)
    loaded = load_model(path)
    sites = find_sites(loaded.model)
    doc = json.loads(json.dumps(sites_to_json(sites, path, loaded.opset)))  # JSON-serialisable as is
    assert list(doc) == ["schema", "model", "opset", "sites", "total_cost"]
    assert (doc["schema"], doc["model"], doc["opset"]) == (SCHEMA, str(path), 17)
    assert doc["total_cost"] == pytest.approx(sum(s.cost for s in sites))
    first = doc["sites"][0]
    assert first["id"] == "s1" and first["shape"] == ["N", 8, 5, 5] and isinstance(first["nodes"], list)
    assert set(first) == {"id", "function", "params", "input", "output", "nodes", "form", "shape", "channel_axis",
                          "channels", "producer", "consumers", "role", "elements", "cost", "cost_share",
                          "supported", "reason", "domain", "body"}
    assert first["body"] == []  # a main-graph site


def test_deterministic():
    a, b = find_sites(se_block()), find_sites(se_block())
    assert a == b


# ---------------------------------------------------------------- demo models
def demo(name, expected):
    path = DEMO / name
    return pytest.param(name, expected, id=name,
                        marks=pytest.mark.skipif(not path.exists(), reason=f"{path} not built"))


@pytest.mark.parametrize("name,expected", [
    demo("meter_cnn_silu.onnx", [("silu", "hidden"), ("silu", "hidden"), ("silu", "hidden"),
                                 ("relu", "hidden"), ("sigmoid", "gate")]),
    demo("meter_gelu_mlp.onnx", [("gelu", "hidden")] * 2),
    demo("meter_mlp_tanh_sigmoid.onnx", [("tanh", "hidden"), ("sigmoid", "hidden")]),
    demo("meter_mlp_mish_gelutanh.onnx", [("mish", "hidden"), ("gelu_tanh", "hidden")]),
    demo("meter_resnet_silu.onnx", [("silu", "hidden")] * 13),
    demo("status_encoder_gelu.onnx", [("gelu", "hidden")] * 2),
])
def test_demo_models(name, expected):
    # expected sites: demo_models/README.md ("activations as they appear in the graph")
    declines = []
    sites = find_sites(load_model(DEMO / name).model, declines=declines)
    assert [(s.function, s.role) for s in sites] == expected
    assert declines == [] and all(s.supported for s in sites)
    # channels: axis 1 of the digit models' [batch, C] / [batch, C, H, W] tensors; the status encoder's
    # GELU reads [batch, 16 tokens, 128 features] from MatMul 32->128 (README "The status encoder")
    axis = 2 if name.startswith("status_") else 1
    assert all(s.channel_axis == axis and s.channels == s.shape[axis] for s in sites)
    assert math.isclose(sum(s.cost_share for s in sites), 1.0)
