"""Cost shares from concrete shapes: calibration data or --input-shape, else unknown (never 0%).

Expected sizes come from the ONNX operator spec's output-shape rules (Conv:
floor((H + pads − kernel)/stride) + 1; NonZero: [rank, number of non-zeros]),
computed here by hand.
"""
from __future__ import annotations

import json

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper, numpy_helper
from typer.testing import CliRunner

from swapper import api
from swapper.cli.app import app
from swapper.errors import UsageError
from swapper.functions.costs import relative_cost
from swapper.scan.shapes import parse_input_shapes

nd = helper.make_node


def conv_model(path):
    """X [N, 3, H, W] -> Conv 4x3x3x3 stride 2, no padding -> Sigmoid -> Conv 1x1 -> GlobalAveragePool -> Tanh."""
    rng = np.random.default_rng(0)
    graph = helper.make_graph(
        [nd("Conv", ["X", "W1"], ["C1"], strides=[2, 2]), nd("Sigmoid", ["C1"], ["S"]),
         nd("Conv", ["S", "W2"], ["C2"]), nd("GlobalAveragePool", ["C2"], ["G"]), nd("Tanh", ["G"], ["T"]),
         nd("Flatten", ["T"], ["F"]), nd("MatMul", ["F", "W3"], ["Y"])],
        "g", [helper.make_tensor_value_info("X", TensorProto.FLOAT, ["N", 3, "H", "W"])],
        [helper.make_tensor_value_info("Y", TensorProto.FLOAT, ["N", 2])],
        [numpy_helper.from_array(rng.standard_normal((4, 3, 3, 3)).astype(np.float32), "W1"),
         numpy_helper.from_array(rng.standard_normal((5, 4, 1, 1)).astype(np.float32), "W2"),
         numpy_helper.from_array(rng.standard_normal((5, 2)).astype(np.float32), "W3")])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    onnx.save(model, path)
    return path


def expected_costs(h, w):
    # Conv output (ONNX operator spec): floor((h - 3)/2) + 1 rows, the same for columns
    oh, ow = (h - 3) // 2 + 1, (w - 3) // 2 + 1
    sig = 4 * oh * ow * relative_cost("sigmoid", "op")
    tanh = 5 * relative_cost("tanh", "op")
    return sig, tanh


def test_symbolic_sizes_give_unknown_shares(tmp_path):
    sites = api.scan(conv_model(tmp_path / "m.onnx")).sites
    sig, tanh = sites
    assert sig.cost is None and sig.cost_share is None and sig.elements is None
    assert tanh.elements == 5 and tanh.cost_share is None  # the total is unknown


def test_input_shape_gives_shares(tmp_path):
    sig, tanh = api.scan(conv_model(tmp_path / "m.onnx"), input_shapes={"X": (1, 3, 17, 33)}).sites
    want_sig, want_tanh = expected_costs(17, 33)
    assert sig.elements == 4 * 8 * 16
    assert sig.cost == pytest.approx(want_sig) and tanh.cost == pytest.approx(want_tanh)
    assert sig.cost_share == pytest.approx(want_sig / (want_sig + want_tanh))
    assert sig.shape[:2] == ("N", 4) and all(isinstance(d, str) for d in sig.shape[2:])  # the model's own shape


def test_calibration_data_gives_shares(tmp_path):
    np.savez(tmp_path / "c.npz", X=np.zeros((3, 3, 9, 11), np.float32))
    sig, tanh = api.scan(conv_model(tmp_path / "m.onnx"), calib=tmp_path / "c.npz").sites
    want_sig, want_tanh = expected_costs(9, 11)
    assert sig.cost_share == pytest.approx(want_sig / (want_sig + want_tanh))


def test_shapes_only_known_at_run_time_are_measured(tmp_path):
    # NonZero's output length depends on the values (ONNX operator spec, NonZero: [rank, count])
    graph = helper.make_graph(
        [nd("GreaterOrEqual", ["X", "zero"], ["B"]), nd("NonZero", ["B"], ["I"]),
         nd("Cast", ["I"], ["F"], to=TensorProto.FLOAT), nd("Sigmoid", ["F"], ["S"]),
         nd("ReduceSum", ["S"], ["Y"], keepdims=0)],
        "g", [helper.make_tensor_value_info("X", TensorProto.FLOAT, ["N", 4])],
        [helper.make_tensor_value_info("Y", TensorProto.FLOAT, [])],
        [numpy_helper.from_array(np.array(0.0, np.float32), "zero")])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    onnx.save(model, tmp_path / "m.onnx")
    (site,) = api.scan(tmp_path / "m.onnx", input_shapes={"X": (2, 4)}).sites
    # zeros >= 0 everywhere: 8 non-zeros, F is [2, 8]; elements per sample = dims after the first
    assert site.elements == 8 and site.cost_share == pytest.approx(1.0)


@pytest.mark.parametrize("values,needle", [(["X=1x3xAx4"], "expected NAME=DIMS"), (["X1x3"], "expected NAME=DIMS"),
                                           (["X=0x3"], "positive")])
def test_bad_input_shape_options(values, needle):
    with pytest.raises(UsageError, match=needle):
        parse_input_shapes(values)


@pytest.mark.parametrize("shapes,needle", [({"Z": (1, 3, 8, 8)}, "no input 'Z'"),
                                           ({"X": (1, 4, 8, 8)}, "input 'X' has shape (?, 3, ?, ?)")])
def test_input_shapes_checked_against_the_model(tmp_path, shapes, needle):
    with pytest.raises(UsageError) as e:
        api.scan(conv_model(tmp_path / "m.onnx"), input_shapes=shapes)
    assert needle in str(e.value)


def test_cli_table_and_json_show_unknown_then_known(tmp_path):
    path = str(conv_model(tmp_path / "m.onnx"))
    runner = CliRunner()
    plain = runner.invoke(app, ["scan", path])
    assert plain.exit_code == 0 and "0.0%" not in plain.output and "?" in plain.output
    assert "give --calib DATA or --input-shape NAME=DIMS" in plain.output
    doc = json.loads(runner.invoke(app, ["scan", path, "--json"]).output)
    assert doc["total_cost"] is None and [s["cost_share"] for s in doc["sites"]] == [None, None]
    doc = json.loads(runner.invoke(app, ["scan", path, "--json", "--input-shape", "X=1x3x17x33"]).output)
    assert sum(s["cost_share"] for s in doc["sites"]) == pytest.approx(1.0)
    both = runner.invoke(app, ["scan", path, "--calib", path, "--input-shape", "X=1x3x17x33"])
    assert both.exit_code == 2 and "exclude each other" in both.output
