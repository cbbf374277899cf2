"""Timing on a measured target (with a stand-in clock), ops a declared target lacks, random timing feeds.

No timing is asserted: measure_latency is replaced by testkit.fixed_timer, and
the checks are on what reaches it (models, settings from the profile file read
with plain json, QDQ quantization per the ONNX QuantizeLinear/DequantizeLinear
ops) and on the arithmetic of the ratio.
"""
from __future__ import annotations

import json
import time
from importlib import resources

import numpy as np
import onnx
import pytest
from onnx import helper
from testkit import DEMO, fixed_timer

from swapper import api
from swapper.check.on_target import lacking_ops, random_feeds, time_on_target
from swapper.core.model_io import load_model
from swapper.errors import UsageError
from swapper.targets import load_target

BUILTIN = resources.files("swapper.targets") / "builtin"


def raw(name: str) -> dict:
    return json.loads((BUILTIN / f"{name}.json").read_text(encoding="utf-8"))


@pytest.fixture(scope="module")
def pair():
    """meter_mlp_tanh_sigmoid and its uncalibrated swap on ort-cpu, plus one batch of its validation data."""
    loaded = load_model(DEMO / "meter_mlp_tanh_sigmoid.onnx")
    result = api.swap(loaded, target="ort-cpu")
    with np.load(DEMO / "val.npz") as val:
        feeds = {"pixels": val["pixels"][:64]}
    return loaded.model, result.candidate, feeds


@pytest.mark.parametrize("ratio", [0.8, 1.03])
def test_fp32_target_times_both_models_at_the_profile_settings(pair, monkeypatch, ratio):
    timer = fixed_timer(ratio)
    monkeypatch.setattr("swapper.check.on_target.measure_latency", timer)
    original, candidate, feeds = pair
    timing = time_on_target(original, candidate, load_target("ort-cpu"), feeds, feeds_from="val")
    m = raw("ort-cpu")["measurement"]
    (call,) = timer.calls
    assert call["threads"] == m["threads"] and call["graph_optimization"] == m["graph_optimization_level"] == "all"
    assert call["models"] == {"original": original, "candidate": candidate}  # timed as given, not quantized
    # one thread: CPU time of the calling thread (Python docs, time.thread_time_ns), as the profile was measured
    assert call["clock"] is time.thread_time_ns and timing.clock == "thread CPU time"
    assert timing.ratio == pytest.approx(ratio) and timing.is_faster == (ratio < 1.0)
    assert timing.batch == 64 and not timing.quantized
    assert f"candidate {ratio:.3f}× the original" in timing.line()


def test_int8_target_quantizes_both_models_first(pair, monkeypatch):
    timer = fixed_timer(0.7)
    monkeypatch.setattr("swapper.check.on_target.measure_latency", timer)
    original, candidate, feeds = pair
    timing = time_on_target(original, candidate, load_target("ort-cpu-int8"), feeds, calib_batches=[feeds])
    (call,) = timer.calls
    for model in call["models"].values():
        ops = {n.op_type for n in model.graph.node}
        # source: ONNX operator spec, QuantizeLinear/DequantizeLinear: the QDQ format the profile names
        assert {"QuantizeLinear", "DequantizeLinear"} <= ops
    assert raw("ort-cpu-int8")["measurement"]["quantization"]["format"] == "QDQ"
    assert timing.quantized and timing.ratio == pytest.approx(0.7)


def test_declared_targets_are_not_timed(pair):
    original, candidate, feeds = pair
    for name in ("mcu-int8", "npu-int8", "tosa-int8"):
        with pytest.raises(UsageError, match=f"{name} is a declared target"):
            time_on_target(original, candidate, load_target(name), feeds)


def test_lacking_ops_are_the_ones_the_profile_marks_none():
    graph = helper.make_graph(
        [helper.make_node("Erf", ["x"], ["e"]), helper.make_node("Div", ["e", "x"], ["d"]),
         helper.make_node("Relu", ["d"], ["r"]), helper.make_node("Conv", ["r", "w"], ["y"])], "g",
        [helper.make_tensor_value_info("x", onnx.TensorProto.FLOAT, [1, 1, 2, 2])],
        [helper.make_tensor_value_info("y", onnx.TensorProto.FLOAT, None)],
        [helper.make_tensor("w", onnx.TensorProto.FLOAT, [1, 1, 1, 1], [1.0])])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 13)])
    mcu, npu = raw("mcu-int8"), raw("npu-int8")
    assert mcu["ops"]["Erf"]["support"] == "none" and mcu["ops"]["Div"]["support"] == "native"
    assert lacking_ops(model, load_target("mcu-int8")) == {"Erf": 1}
    assert npu["ops"]["Div"]["support"] == "none"
    assert lacking_ops(model, load_target("npu-int8")) == {"Div": 1, "Erf": 1}  # Conv is not listed: not counted


def test_random_feeds_follow_the_declared_inputs():
    for name in ("meter_cnn_silu.onnx", "status_encoder_gelu.onnx"):
        model = load_model(DEMO / name).model
        feeds = random_feeds(model, batch=5)
        for vi in model.graph.input:
            t = vi.type.tensor_type
            arr = feeds[vi.name]
            assert arr.dtype == helper.tensor_dtype_to_np_dtype(t.elem_type) and arr.shape[0] == 5
            fixed = [d.dim_value for d in t.shape.dim[1:]]
            assert list(arr.shape[1:]) == [d if d > 0 else 1 for d in fixed]
