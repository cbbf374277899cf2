"""Tests for swapper.check.int8: the int8 QDQ model is valid, runs, fuses, and stays close to fp32."""
from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import numpy as np
import onnx
import onnx.version_converter
import onnxruntime as ort
import pytest
from onnx import TensorProto, helper, numpy_helper
from onnx.reference import ReferenceEvaluator
from testkit import CALIB, DEMO, VAL, conv_classifier, float_model, init, run

from swapper.check.int8 import (
    LOSSY_WEIGHT,
    quantize_int8,
    quantize_int8_with_losses,
    weight_losses,
)
from swapper.errors import BadDataError


def _cnn(opset: int = 17) -> onnx.ModelProto:
    """Conv -> Relu -> Conv -> GlobalAveragePool -> Flatten -> Gemm with fixed random weights."""
    rng = np.random.default_rng(11)
    weights = {
        "w1": rng.normal(0, 0.3, (8, 3, 3, 3)).astype(np.float32),
        "b1": rng.normal(0, 0.1, (8,)).astype(np.float32),
        "w2": rng.normal(0, 0.2, (16, 8, 3, 3)).astype(np.float32),
        "b2": rng.normal(0, 0.1, (16,)).astype(np.float32),
        "wf": rng.normal(0, 0.3, (5, 16)).astype(np.float32),
        "bf": rng.normal(0, 0.1, (5,)).astype(np.float32),
    }
    return conv_classifier(weights, size=16, activations=("Relu", None), opset=opset, ir_version=7)


def _calib(n_batches: int = 8, batch: int = 8, seed: int = 3) -> list[dict[str, np.ndarray]]:
    rng = np.random.default_rng(seed)
    return [{"x": rng.normal(size=(batch, 3, 16, 16)).astype(np.float32)} for _ in range(n_batches)]


@pytest.fixture(scope="module")
def fp32():
    return _cnn()


@pytest.fixture(scope="module")
def int8(fp32):
    return quantize_int8(fp32, _calib())


@pytest.fixture(scope="module")
def test_x():
    # Same distribution as the calibration data, different draws.
    return np.random.default_rng(99).normal(size=(64, 3, 16, 16)).astype(np.float32)


def test_quantized_model_is_valid_qdq(int8):
    onnx.checker.check_model(int8, full_check=True)
    ops = [n.op_type for n in int8.graph.node]
    assert "QuantizeLinear" in ops and "DequantizeLinear" in ops
    # The float ops stay, wrapped in Q/DQ (tensor-oriented format, not QLinearConv).
    assert ops.count("Conv") == 2 and ops.count("Gemm") == 1


def test_weights_are_int8_per_channel(int8):
    inits = {t.name: numpy_helper.to_array(t) for t in int8.graph.initializer}
    by_output = {o: n for n in int8.graph.node for o in n.output}
    conv2 = next(n for n in int8.graph.node if n.op_type == "Conv" and "w2" in by_output[n.input[1]].input[0])
    dq = by_output[conv2.input[1]]
    q_weight, scale = inits[dq.input[0]], inits[dq.input[1]]
    zero = inits[dq.input[2]] if len(dq.input) > 2 else np.zeros_like(scale, dtype=q_weight.dtype)
    assert q_weight.dtype == np.int8  # S8 weights
    assert scale.shape == (16,)  # one scale per output channel of w2
    # source: ONNX operator spec, DequantizeLinear: y = (x - zero_point) * scale along `axis` (default 1;
    # the quantizer sets axis=0 for Conv weights). Rounding to nearest (QuantizeLinear) bounds the
    # error by half a step.
    axis = next((helper.get_attribute_value(a) for a in dq.attribute if a.name == "axis"), 1)
    assert axis == 0
    w2 = numpy_helper.to_array(next(t for t in _cnn().graph.initializer if t.name == "w2"))
    deq = (q_weight.astype(np.float32) - zero.reshape(-1, 1, 1, 1)) * scale.reshape(-1, 1, 1, 1)
    step = scale.reshape(-1, 1, 1, 1)
    assert np.all(np.abs(deq - w2) <= step / 2 + 1e-7)


def test_activations_are_unsigned_int8(int8):
    inits = {t.name: numpy_helper.to_array(t) for t in int8.graph.initializer}
    q_input = next(n for n in int8.graph.node if n.op_type == "QuantizeLinear" and n.input[0] == "x")
    # source: ONNX operator spec, QuantizeLinear: the zero point's type is the output type.
    assert inits[q_input.input[2]].dtype == np.uint8


def test_outputs_close_to_fp32(fp32, int8, test_x):
    ref = run(fp32, {"x": test_x})[0]
    got = run(int8, {"x": test_x})[0]
    rel = np.linalg.norm(got - ref) / np.linalg.norm(ref)
    # Measured 0.0167 relative L2 error on this model (onnxruntime 1.32, x86-64 with VNNI);
    # 8-bit steps through 3 quantized layers. Assert with 3x headroom (other CPUs take
    # other integer kernels).
    assert rel < 0.05
    # Random weights give 5 near-tied logits, so argmax is fragile: measured 57/64 agree.
    assert np.mean(got.argmax(1) == ref.argmax(1)) >= 0.75


def test_onnxruntime_int8_kernels_match_reference_qdq_semantics(int8, test_x):
    # onnxruntime fuses DQ->Conv->Q into integer kernels; onnx.reference evaluates the
    # same graph literally (dequantize, float op, quantize), per the ONNX operator spec.
    # The two may differ by requantization rounding only, so they must be much closer
    # to each other than int8 is to fp32.
    got = run(int8, {"x": test_x})[0]
    # This onnx's reference implements DequantizeLinear from opset 19 on; 13 -> 19 keeps
    # the same int8 semantics (ONNX operator spec changelog: 19 added float8 types).
    as_19 = onnx.version_converter.convert_version(int8, 19)
    ref = ReferenceEvaluator(as_19).run(None, {"x": test_x})[0]
    rel = np.linalg.norm(got - ref) / np.linalg.norm(ref)
    # Measured exactly 0.0 here (identical on all 64 samples); allow a few rounding
    # flips on other CPUs, but stay far below the int8-vs-fp32 gap of ~0.017.
    assert rel < 0.005


def _optimized_ops(model: onnx.ModelProto, folder: Path) -> list[str]:
    """Op types after onnxruntime's CPU graph optimisation (extended level, where QDQ fusion runs)."""
    options = ort.SessionOptions()
    options.graph_optimization_level = ort.GraphOptimizationLevel.ORT_ENABLE_EXTENDED
    options.optimized_model_filepath = str(folder / "optimized.onnx")
    ort.InferenceSession(model.SerializeToString(), options, providers=["CPUExecutionProvider"])
    return [n.op_type for n in onnx.load(options.optimized_model_filepath).graph.node]


def test_cpu_provider_fuses_into_integer_kernels(int8, tmp_path):
    # The point of QDQ with U8 activations: onnxruntime's CPU graph optimiser turns the
    # Q/DQ groups into QLinearConv / QGemm (Relu absorbed into the quantization range).
    ops = _optimized_ops(int8, tmp_path)
    assert ops.count("QLinearConv") == 2 and ops.count("QGemm") == 1
    assert "Conv" not in ops and "Relu" not in ops and "Gemm" not in ops


def _silu_block() -> onnx.ModelProto:
    """Conv -> x*Sigmoid(x) (SiLU as exporters decompose it) -> MaxPool -> Conv."""
    rng = np.random.default_rng(5)
    inits = [init("w1", rng.normal(0, 0.3, (8, 3, 3, 3))), init("w2", rng.normal(0, 0.3, (4, 8, 1, 1)))]
    nodes = [
        helper.make_node("Conv", ["x", "w1"], ["c"], pads=[1, 1, 1, 1]),
        helper.make_node("Sigmoid", ["c"], ["s"]),
        helper.make_node("Mul", ["c", "s"], ["m"]),
        helper.make_node("MaxPool", ["m"], ["p"], kernel_shape=[2, 2], strides=[2, 2]),
        helper.make_node("Conv", ["p", "w2"], ["y"]),
    ]
    return float_model(nodes, [("x", ["N", 3, 16, 16])], [("y", ["N", 4, 8, 8])], inits, name="silu")


def test_silu_block_fuses_completely(tmp_path):
    # With S8 activations onnxruntime 1.32 on x86-64 left Conv, Sigmoid, Mul and MaxPool
    # as float ops between Q/DQ pairs (measured); U8 activations must fuse them all.
    quantized = quantize_int8(_silu_block(), _calib(n_batches=4))
    ops = _optimized_ops(quantized, tmp_path)
    assert ops.count("QLinearConv") == 2
    assert "QLinearSigmoid" in ops and "QLinearMul" in ops
    assert not {"Conv", "Sigmoid", "Mul"} & set(ops)
    # One Q at the input, one DQ at the output: everything between (MaxPool included,
    # which onnxruntime runs directly on uint8) stays in the integer domain.
    assert ops.count("QuantizeLinear") == 1 and ops.count("DequantizeLinear") == 1


def test_package_never_imports_torch():
    # House rule: swapper never imports torch. onnxruntime's symbolic shape inference
    # would pull it in (measured), so run a quantization in a fresh interpreter.
    code = (
        "import sys, numpy as np\n"
        "sys.path[:0] = %r\n"
        "from test_quantize import _silu_block, _calib\n"
        "from swapper.check.int8 import quantize_int8\n"
        "quantize_int8(_silu_block(), _calib(n_batches=1))\n"
        "assert 'torch' not in sys.modules, 'torch was imported'\n"
    ) % [str(Path(__file__).resolve().parent), str(Path(__file__).resolve().parents[1])]  # the file, its helpers
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr[-2000:]


def test_input_model_unchanged(fp32):
    before = fp32.SerializeToString(deterministic=True)
    quantize_int8(fp32, _calib(n_batches=2))
    assert fp32.SerializeToString(deterministic=True) == before


def test_old_opset_is_upgraded_for_per_channel():
    old = _cnn(opset=11)
    before = old.SerializeToString(deterministic=True)
    quantized = quantize_int8(old, _calib(n_batches=2))
    # source: ONNX operator spec, DequantizeLinear gained `axis` (per-axis scales) in opset 13.
    onnx.checker.check_model(quantized, full_check=True)
    assert next(o.version for o in quantized.opset_import if o.domain == "") >= 13
    assert old.SerializeToString(deterministic=True) == before


def test_per_tensor_option(fp32):
    quantized = quantize_int8(fp32, _calib(n_batches=2), per_channel=False)
    inits = {t.name: numpy_helper.to_array(t) for t in quantized.graph.initializer}
    weight_dqs = [n for n in quantized.graph.node if n.op_type == "DequantizeLinear" and inits.get(n.input[0]) is not None
                  and inits[n.input[0]].ndim == 4]
    assert len(weight_dqs) == 2
    assert all(inits[n.input[1]].size == 1 for n in weight_dqs)


def test_calibration_from_generator_with_extra_keys(fp32, test_x):
    def batches():
        for b in _calib(n_batches=3):
            yield dict(b, labels=np.zeros(len(b["x"]), np.int64))

    quantized = quantize_int8(fp32, batches())
    assert run(quantized, {"x": test_x[:4]})[0].shape == (4, 5)


def test_bad_calibration_data(fp32):
    with pytest.raises(BadDataError, match="no calibration batches"):
        quantize_int8(fp32, [])
    with pytest.raises(BadDataError, match="lacks model input"):
        quantize_int8(fp32, [{"image": np.zeros((1, 3, 16, 16), np.float32)}])


@pytest.mark.skipif(
    not (DEMO / "meter_cnn_silu.onnx").exists() or not VAL.exists(),
    reason="demo model or validation set not built",
)
def test_demo_cnn_int8_agrees_with_fp32(tmp_path):
    model = onnx.load(str(DEMO / "meter_cnn_silu.onnx"))
    val = np.load(VAL)
    held_out = val["pixels"].astype(np.float32)
    assert "labels" in val.files
    name = next(i.name for i in model.graph.input if i.name not in {t.name for t in model.graph.initializer})
    # Calibrate on the separate calibration set when it is there, else on the first 128 val rows.
    if CALIB.exists():
        calib = np.load(CALIB)["pixels"].astype(np.float32)
    else:
        calib, held_out = held_out[:128], held_out[128:]
    batches = [{name: calib[i : i + 32]} for i in range(0, len(calib), 32)]
    quantized = quantize_int8(model, batches)
    onnx.checker.check_model(quantized)
    ref = run(model, {name: held_out})[0]
    got = run(quantized, {name: held_out})[0]
    agreement = float(np.mean(ref.argmax(1) == got.argmax(1)))
    # Measured 0.998 (449/450) with calib.npz; common practice, no source: static int8
    # PTQ of a small CNN keeps top-1 decisions almost everywhere. Assert with headroom.
    assert agreement >= 0.95
    # Every Conv, the SiLU Sigmoid/Mul pairs and MaxPool run as integer kernels (measured).
    ops = _optimized_ops(quantized, tmp_path)
    assert ops.count("QLinearConv") == 5
    assert not {"Conv", "Sigmoid", "Mul"} & set(ops)
    assert ops.count("QuantizeLinear") == 1 and ops.count("DequantizeLinear") == 1


# --- int8 weight-loss diagnostic -------------------------------------------------------------

def _two_gemms(k: float, column: int = 5) -> onnx.ModelProto:
    """Gemm 16->8 -> Relu -> Gemm 8->6, with hidden channel ``column`` rescaled by k.

    Row ``column`` of the first weight (and its bias) is divided by k and column
    ``column`` of the second weight multiplied by k: the same float function for any
    k > 0, because Relu is positively homogeneous, relu(z/k)·k = relu(z) (the identity
    cross-layer equalization rests on: Nagel et al. 2019, "Data-Free Quantization
    Through Weight Equalization and Bias Correction"). A large k is what folding a
    large per-channel factor into the consumer does to its weights.
    """
    rng = np.random.default_rng(21)
    w1 = rng.normal(0, 0.5, (8, 16))
    b1 = rng.normal(0, 0.1, (8,))
    w2 = rng.normal(0, 0.5, (6, 8))
    w1[column] /= k
    b1[column] /= k
    w2[:, column] *= k
    inits = [init("w1", w1), init("b1", b1), init("w2", w2), init("b2", np.zeros(6))]
    nodes = [
        helper.make_node("Gemm", ["x", "w1", "b1"], ["h"], transB=1, name="fc1"),
        helper.make_node("Relu", ["h"], ["r"], name="relu"),
        helper.make_node("Gemm", ["r", "w2", "b2"], ["y"], transB=1, name="fc2"),
    ]
    return float_model(nodes, [("x", ["N", 16])], [("y", ["N", 6])], inits, name="two_gemms")


def _gemm_calib(n_batches: int = 4, seed: int = 8) -> list[dict[str, np.ndarray]]:
    rng = np.random.default_rng(seed)
    return [{"x": rng.normal(size=(32, 16)).astype(np.float32)} for _ in range(n_batches)]


@pytest.fixture(scope="module")
def inflated():
    model = _two_gemms(300.0)
    return model, quantize_int8(model, _gemm_calib())


def test_weight_losses_match_reference_dequantize(inflated):
    model, quantized = inflated
    losses = {loss.node: loss for loss in weight_losses(model, quantized)}
    assert sorted(losses) == ["fc1", "fc2"]
    loss = losses["fc2"]
    assert loss.weight == "w2" and loss.shape == (6, 8) and loss.axis == 0
    # Recompute independently: run the model's own DequantizeLinear node through
    # onnx.reference (source: ONNX operator spec, DequantizeLinear y = (x - zero_point) * scale).
    inits = {t.name: numpy_helper.to_array(t) for t in quantized.graph.initializer}
    fc2 = next(n for n in quantized.graph.node if n.name == "fc2")
    dq = next(n for n in quantized.graph.node if n.output[0] == fc2.input[1])
    single = helper.make_model(
        helper.make_graph(
            [dq], "dq", [],
            [helper.make_tensor_value_info(dq.output[0], TensorProto.FLOAT, None)],
            [numpy_helper.from_array(inits[name], name) for name in dq.input if name],
        ),
        opset_imports=[helper.make_opsetid("", 19)],
    )
    deq = ReferenceEvaluator(single).run(None, {})[0].astype(np.float64)
    w2 = numpy_helper.to_array(next(t for t in model.graph.initializer if t.name == "w2")).astype(np.float64)
    assert loss.rel_error == pytest.approx(np.linalg.norm(deq - w2) / np.linalg.norm(w2), rel=1e-6)
    per_input = np.linalg.norm(deq - w2, axis=0) / np.linalg.norm(w2, axis=0)
    assert loss.median_input_error == pytest.approx(np.median(per_input), rel=1e-6)
    assert loss.zeroed == pytest.approx(np.mean(deq[w2 != 0] == 0))
    # Column 5 is 300x larger than the rest, so it holds every row's largest weight.
    assert np.all(np.abs(w2).argmax(axis=1) == 5)
    assert loss.dominant_input == 5 and loss.dominant_share == 1.0


def test_inflated_input_channel_is_flagged_and_costs_int8_accuracy(inflated, caplog):
    model, quantized = inflated
    balanced = _two_gemms(1.0)
    x = np.random.default_rng(13).normal(size=(256, 16)).astype(np.float32)
    # Both are the same float function (Relu homogeneity, see _two_gemms) ...
    ref = run(balanced, {"x": x})[0]
    np.testing.assert_allclose(run(model, {"x": x})[0], ref, rtol=1e-4, atol=1e-4)
    # ... but the int8 copy of the inflated one is far worse: each row's int8 step is set
    # by column 5, leaving the other 7 inputs a handful of levels (the weight-loss cause).
    with caplog.at_level("WARNING", logger="swapper.check.int8"):
        q_balanced = quantize_int8(balanced, _gemm_calib())
    assert not [r for r in caplog.records if "lose" in r.getMessage()]
    err = {name: np.linalg.norm(run(q, {"x": x})[0] - ref) / np.linalg.norm(ref)
           for name, q in (("balanced", q_balanced), ("inflated", quantized))}
    # Measured 0.070 vs 0.72 here (onnxruntime 1.32, x86-64 with VNNI); assert a 5x gap.
    assert err["inflated"] > 5 * err["balanced"]
    losses = {loss.node: loss for loss in weight_losses(balanced, q_balanced)}
    # 8-bit per-channel rounding of well-spread weights: about 2^-8 relative (measured 0.3-0.5% here).
    assert all(loss.median_input_error < 0.02 for loss in losses.values())
    with caplog.at_level("WARNING", logger="swapper.check.int8"):
        quantize_int8(model, _gemm_calib())
    flagged = [r.getMessage() for r in caplog.records if "lose" in r.getMessage()]
    assert len(flagged) == 1 and "'fc2'" in flagged[0] and "input channel 5" in flagged[0]


def test_quantize_hands_back_the_losses_it_measured(fp32, int8):
    result = quantize_int8_with_losses(fp32, _calib())
    assert result.model.SerializeToString(deterministic=True) == int8.SerializeToString(deterministic=True)
    # measured against the pre-processed float model, which keeps this CNN's weights as they are
    assert [(w.node, w.weight) for w in result.weight_losses] == [(w.node, w.weight) for w in weight_losses(fp32, int8)]


def test_demo_like_weights_stay_below_warning_threshold(fp32, int8):
    # The plain CNN: every weight keeps ~2^-8 relative precision per input channel.
    losses = weight_losses(fp32, int8)
    assert {loss.weight for loss in losses} == {"w1", "w2", "wf"}
    assert all(loss.median_input_error < LOSSY_WEIGHT for loss in losses)
