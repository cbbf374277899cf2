"""Static int8 quantization of a float model, to see a swap through the int8 lens.

The transformation: a float32 ONNX model plus a few unlabelled input batches
becomes a QDQ model (QuantizeLinear/DequantizeLinear pairs around Conv, Gemm,
MatMul, activations, pooling...) with scales and zero points calibrated by
MinMax on those batches and weights quantized per output channel. At session
time onnxruntime's CPU provider fuses each DQ -> op -> Q group into an integer
kernel (QLinearConv, QGemm, QLinearSigmoid, ...); Relu/Clip after a Conv are
absorbed into the output quantization range.

Types: activations unsigned (QUInt8), weights signed (QInt8), i.e. U8S8.
Sources: onnxruntime documentation, "Quantize ONNX Models", "Data type
selection" (on x86-64 with AVX2/AVX512 the CPU provider's fast integer GEMM is
the U8S8 VPMADDUBSW path); onnxruntime source,
core/optimizer/qdq_transformer/selectors_actions/qdq_selector_action_transformer.cc
(the QDQ Conv and MatMul selectors accept int8 activations only when
QDQIsInt8Allowed(), which the session option "session.qdqisint8allowed" in
onnxruntime_session_options_config_keys.h documents as meant for ARM: "For
other platforms set to 0"). The same documentation calls S8S8 the default, but
we measured on this project's demo CNN (onnxruntime 1.32, x86-64 with
AVX512-VNNI) that S8 activations leave 3 of 5 Conv, the SiLU Mul/Sigmoid and
MaxPool as float ops between Q/DQ pairs (int8 ~14x slower than fp32), while
U8 activations fuse every one of them into QLinearConv / QLinearSigmoid /
QLinearMul / NhwcMaxPool. ``reduce_range`` stays off: the documentation asks
for it only on non-VNNI AVX2/AVX512 CPUs, where U8S8 can saturate.

After quantizing, every int8 weight is dequantized again (ONNX operator spec,
DequantizeLinear: y = (x - zero_point) * scale) and compared with the float
weight it replaced (:func:`weight_losses`). A per-output-channel scale is set
by the largest weight of that output channel, so one input channel whose
weights are orders of magnitude larger than the rest (e.g. a large folded
per-channel factor) leaves every other input channel only a few int8 steps;
quantize_int8 logs a warning naming the layer and that input channel.

The input model is never mutated: it is serialised into a temporary folder,
pre-processed there (onnxruntime's offline ONNX shape inference + basic graph
optimisation, as the same documentation recommends before quantizing), and the
quantized file is loaded back as a fresh ModelProto.
"""
from __future__ import annotations

import itertools
import logging
import tempfile
from collections import Counter
from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import onnx
import onnx.version_converter
from onnxruntime.quantization import (
    CalibrationDataReader,
    CalibrationMethod,
    QuantFormat,
    QuantType,
    quantize_static,
)
from onnxruntime.quantization.shape_inference import quant_pre_process

from swapper.core.graph import subgraphs
from swapper.core.model_io import PROTOBUF_LIMIT, default_opset
from swapper.errors import BadDataError, BadModelError, first_line

logger = logging.getLogger(__name__)

ACTIVATION_TYPE = QuantType.QUInt8  # U8 activations: what x86 CPU QDQ fusion accepts (module docstring)
WEIGHT_TYPE = QuantType.QInt8  # S8 weights: the U8S8 integer GEMM path
# Per-channel QDQ needs DequantizeLinear's `axis` attribute, added in opset 13
# (ONNX operator spec, DequantizeLinear-13).
MIN_PER_CHANNEL_OPSET = 13
# Warn when the median input channel of a weight loses more than this (relative L2) to int8.
# Per-channel int8 weights of the demo models lose 0.5-0.6% (measured); 5% is a clear outlier
# (common practice, no source).
LOSSY_WEIGHT = 0.05


@dataclass
class WeightLoss:
    """What int8 rounding did to one weight tensor (all errors relative L2)."""

    node: str  # name of the node that reads the weight
    op_type: str
    weight: str  # the float weight's name in the float model
    shape: tuple[int, ...]
    axis: int | None  # quantization axis (None: one scale for the whole tensor)
    rel_error: float  # ||dequantized - w|| / ||w|| over the whole tensor
    median_input_error: float  # median over input channels of the same ratio per input channel
    zeroed: float  # share of the non-zero weights that became exactly 0
    dominant_input: int | None  # input channel holding the largest weight of most output channels
    dominant_share: float  # share of the output channels whose scale that input channel sets


def _input_dtypes(model: onnx.ModelProto) -> dict[str, np.dtype]:
    """numpy dtype of every real graph input (initializers listed as inputs excluded)."""
    inits = {t.name for t in model.graph.initializer}
    dtypes = {}
    for vi in model.graph.input:
        if vi.name in inits:
            continue
        elem = vi.type.tensor_type.elem_type
        dtypes[vi.name] = np.dtype(onnx.helper.tensor_dtype_to_np_dtype(elem)) if elem else np.dtype(np.float32)
    return dtypes


class _BatchReader(CalibrationDataReader):
    """Hands quantize_static one calibration batch at a time, checked against the model inputs."""

    def __init__(self, batches: Iterator[dict[str, np.ndarray]], dtypes: dict[str, np.dtype]):
        self._batches = batches
        self._dtypes = dtypes
        self.count = 0

    def get_next(self) -> dict[str, np.ndarray] | None:
        batch = next(self._batches, None)
        if batch is None:
            return None
        missing = sorted(set(self._dtypes) - set(batch))
        if missing:
            raise BadDataError(f"calibration batch {self.count} lacks model input(s) {missing}")
        self.count += 1
        # Only the model's inputs, in its dtypes: extra keys (labels) would make onnxruntime fail.
        return {name: np.ascontiguousarray(batch[name], dtype=dt) for name, dt in sorted(self._dtypes.items())}


def _preprocess(src: Path, dst: Path) -> Path:
    """Run onnxruntime's offline pre-processing; fall back to the raw model if it cannot.

    Symbolic shape inference is skipped: onnxruntime documents it as meant for
    transformer models (ONNX shape inference covers CNNs and MLPs), and its
    module pulls in torch when torch is installed (measured, onnxruntime 1.32),
    which this package must never import.
    """
    try:
        quant_pre_process(str(src), str(dst), skip_symbolic_shape=True)
        return dst
    except Exception as exc:  # optional step: quantizing the raw model still works
        logger.warning("quantization pre-processing skipped (%s); quantizing the model as given", first_line(exc))
        return src


def _per_channel_ready(model: onnx.ModelProto) -> onnx.ModelProto:
    """The model itself, or a copy converted to opset 13 when it is older.

    onnxruntime's quantizer writes DequantizeLinear with ``axis`` regardless of
    the opset, which is invalid below 13 (measured with onnxruntime 1.32: the
    output fails onnx.checker), so older models are upgraded first.
    """
    opset = default_opset(model) or 0
    if opset >= MIN_PER_CHANNEL_OPSET:
        return model
    logger.info("opset %d < %d: converting a copy to opset %d for per-channel scales",
                opset, MIN_PER_CHANNEL_OPSET, MIN_PER_CHANNEL_OPSET)
    try:
        return onnx.version_converter.convert_version(model, MIN_PER_CHANNEL_OPSET)
    except Exception as exc:
        raise BadModelError(
            f"cannot convert opset {opset} to {MIN_PER_CHANNEL_OPSET} for per-channel int8: {first_line(exc)}"
        ) from None


def _drop_unused_opsets(model: onnx.ModelProto) -> None:
    """Remove opset imports no node uses (pre-processing lists every onnxruntime domain)."""
    used = {""} | {f.domain or "" for f in model.functions}
    # graphs and function bodies, with their If/Loop/Scan bodies (subgraphs only reads ``.node``)
    for body in [model.graph, *model.functions]:
        for graph in [body, *subgraphs(body)]:
            used.update(node.domain or "" for node in graph.node)
    keep = [o for o in model.opset_import if (o.domain or "") in used]
    del model.opset_import[:]
    model.opset_import.extend(keep)


def _float_values(model: onnx.ModelProto) -> dict[str, np.ndarray]:
    """Initializers and Constant-node tensors of ``model`` (top-level graph), by name."""
    values = {t.name: onnx.numpy_helper.to_array(t) for t in model.graph.initializer}
    for node in model.graph.node:
        if node.op_type == "Constant" and node.attribute and node.attribute[0].name == "value":
            values[node.output[0]] = onnx.numpy_helper.to_array(node.attribute[0].t)
    return values


def _input_dim(node: onnx.NodeProto, slot: int, rank: int) -> int | None:
    """Axis of the weight in input slot ``slot`` that runs over the layer's input channels."""
    if rank < 2:
        return None
    attrs = {a.name: onnx.helper.get_attribute_value(a) for a in node.attribute}
    if node.op_type == "Conv" and slot == 1:
        return 1  # ONNX operator spec, Conv: W is (M, C/group, k1, k2, ...)
    if node.op_type == "ConvTranspose" and slot == 1:
        return 0  # ONNX operator spec, ConvTranspose: W is (C, M/group, k1, k2, ...)
    if node.op_type == "Gemm" and slot == 1:
        return 1 if attrs.get("transB", 0) else 0  # B is (K, N), or (N, K) when transposed
    if node.op_type == "MatMul" and slot == 1:
        return rank - 2  # B is (..., K, N)
    return None


def _dequantize(q: np.ndarray, scale: np.ndarray, zero: np.ndarray | None, axis: int) -> np.ndarray:
    """ONNX operator spec, DequantizeLinear: y = (x - zero_point) * scale, per ``axis`` when scale is 1-D."""
    zero = np.zeros_like(scale, dtype=np.float64) if zero is None else zero.astype(np.float64)
    if scale.size > 1:
        shape = [1] * q.ndim
        shape[axis] = -1
        scale, zero = scale.reshape(shape), zero.reshape(shape)
    return (q.astype(np.float64) - zero) * scale.astype(np.float64)


def _loss(w: np.ndarray, deq: np.ndarray, axis: int | None, in_dim: int | None):
    """(rel_error, median_input_error, zeroed, dominant_input, dominant_share) of one weight."""
    diff = deq - w
    norm = float(np.linalg.norm(w))
    rel = float(np.linalg.norm(diff)) / norm if norm > 0 else 0.0
    nonzero = w != 0
    zeroed = float(np.mean(deq[nonzero] == 0)) if nonzero.any() else 0.0  # q == zero point <=> 0
    if in_dim is None:
        return rel, rel, zeroed, None, 0.0
    cols_w = np.moveaxis(w, in_dim, 0).reshape(w.shape[in_dim], -1)
    cols_d = np.moveaxis(diff, in_dim, 0).reshape(w.shape[in_dim], -1)
    col_norm = np.linalg.norm(cols_w, axis=1)
    live = col_norm > 0
    median = float(np.median(np.linalg.norm(cols_d, axis=1)[live] / col_norm[live])) if live.any() else 0.0
    if axis is None or axis == in_dim:
        return rel, median, zeroed, None, 0.0
    # |w| as (output channel, input channel, rest): which input channel sets each output channel's scale
    per = np.abs(np.moveaxis(w, (axis, in_dim), (0, 1))).reshape(w.shape[axis], w.shape[in_dim], -1).max(axis=2)
    top, count = Counter(np.argmax(per, axis=1).tolist()).most_common(1)[0]
    return rel, median, zeroed, int(top), count / w.shape[axis]


def weight_losses(float_model: onnx.ModelProto, quantized: onnx.ModelProto) -> list[WeightLoss]:
    """Measure, per int8 weight of ``quantized``, what rounding did to the float weight it replaced.

    A weight is a DequantizeLinear whose input is an 8-bit initializer; its
    float original is found through the reading node (same name in both
    models) and input slot. Weights whose reader or float value cannot be
    matched, or whose shape changed, are skipped. Sorted by node, then weight name.
    """
    floats = _float_values(float_model)
    float_nodes = {n.name: n for n in float_model.graph.node if n.name}
    inits = {t.name: t for t in quantized.graph.initializer}
    dq_by_output = {n.output[0]: n for n in quantized.graph.node if n.op_type == "DequantizeLinear"}
    found = []
    for node in quantized.graph.node:
        original = float_nodes.get(node.name)
        if original is None or original.op_type != node.op_type:
            continue
        for slot, name in enumerate(node.input):
            dq = dq_by_output.get(name)
            if dq is None or dq.input[0] not in inits or slot >= len(original.input):
                continue
            q = onnx.numpy_helper.to_array(inits[dq.input[0]])
            w = floats.get(original.input[slot])
            if q.dtype not in (np.int8, np.uint8) or w is None or w.shape != q.shape or dq.input[1] not in inits:
                continue  # int32 biases, activations, or a weight pre-processing changed
            scale = onnx.numpy_helper.to_array(inits[dq.input[1]])
            zero = onnx.numpy_helper.to_array(inits[dq.input[2]]) if len(dq.input) > 2 and dq.input[2] else None
            attrs = {a.name: onnx.helper.get_attribute_value(a) for a in dq.attribute}
            axis = attrs.get("axis", 1) % max(q.ndim, 1) if scale.size > 1 else None  # spec default axis 1
            deq = _dequantize(q, scale, zero, axis if axis is not None else 0)
            in_dim = _input_dim(node, slot, q.ndim)
            rel, median, zeroed, top, share = _loss(w.astype(np.float64), deq, axis, in_dim)
            found.append(WeightLoss(node.name, node.op_type, original.input[slot], tuple(q.shape), axis,
                                    rel, median, zeroed, top, share))
    return sorted(found, key=lambda x: (x.node, x.weight))


def _warn_lossy(losses: list[WeightLoss]) -> None:
    for loss in losses:
        if loss.median_input_error <= LOSSY_WEIGHT:
            continue
        cause = ""
        if loss.dominant_input is not None:
            cause = (f"; input channel {loss.dominant_input} sets the scale of "
                     f"{loss.dominant_share:.0%} of the output channels")
        logger.warning(
            "int8 weights of %s %r lose %.1f%% (median input channel, %.0f%% rounded to zero)%s",
            loss.op_type, loss.node, 100 * loss.median_input_error, 100 * loss.zeroed, cause,
        )


@dataclass
class Int8Result:
    """A quantized model and what int8 rounding did to its weights."""

    model: onnx.ModelProto
    # per int8 weight, against the float model that was actually quantized (after opset conversion and
    # pre-processing, which may fold or rename weights); None when the check itself failed
    weight_losses: list[WeightLoss] | None


def quantize_int8(
    model: onnx.ModelProto,
    calib_batches: Iterable[dict[str, np.ndarray]],
    *,
    per_channel: bool = True,
) -> onnx.ModelProto:
    """Statically quantize ``model`` to QDQ int8 (U8 activations, S8 weights, MinMax) and return it.

    ``calib_batches`` yields feeds (input name -> array) and is read once;
    keys that are not model inputs are ignored. Raises BadDataError if there
    are no batches or they do not fit the model, BadModelError if the model
    cannot be quantized. ``model`` itself is left unchanged.
    """
    return quantize_int8_with_losses(model, calib_batches, per_channel=per_channel).model


def quantize_int8_with_losses(
    model: onnx.ModelProto,
    calib_batches: Iterable[dict[str, np.ndarray]],
    *,
    per_channel: bool = True,
) -> Int8Result:
    """:func:`quantize_int8`, also handing back the weight losses it measured (and warned about)."""
    if model.ByteSize() > PROTOBUF_LIMIT:
        raise BadModelError("model exceeds 2 GiB; int8 quantization of external-data models is not supported")
    batches = iter(calib_batches)
    first = next(batches, None)
    if first is None:
        raise BadDataError("no calibration batches given for int8 quantization")
    reader = _BatchReader(itertools.chain([first], batches), _input_dtypes(model))

    source = _per_channel_ready(model) if per_channel else model

    with tempfile.TemporaryDirectory(prefix="swapper-int8-") as tmp:
        folder = Path(tmp)
        src = folder / "float.onnx"
        src.write_bytes(source.SerializeToString())  # a copy on disk: the caller's proto stays untouched
        prepared = _preprocess(src, folder / "prepared.onnx")
        quantized = _quantize_file(prepared, folder / "int8.onnx", reader, per_channel)
        losses = _checked_losses(prepared, quantized)
    _drop_unused_opsets(quantized)
    logger.info(
        "quantized to int8 QDQ on %d calibration batch(es): %d -> %d nodes",
        reader.count, len(model.graph.node), len(quantized.graph.node),
    )
    return Int8Result(model=quantized, weight_losses=losses)


def _quantize_file(prepared: Path, out: Path, reader: _BatchReader, per_channel: bool) -> onnx.ModelProto:
    """Run onnxruntime's static quantizer from ``prepared`` to ``out`` and load the result."""
    try:
        quantize_static(
            str(prepared),
            str(out),
            reader,
            quant_format=QuantFormat.QDQ,
            per_channel=per_channel,
            activation_type=ACTIVATION_TYPE,
            weight_type=WEIGHT_TYPE,
            calibrate_method=CalibrationMethod.MinMax,
            calibration_providers=["CPUExecutionProvider"],
        )
    except BadDataError:
        raise
    except Exception as exc:  # the quantizer raises plain Exceptions and onnxruntime errors
        raise BadModelError(f"int8 quantization failed: {first_line(exc)}") from None
    try:
        return onnx.load(str(out))
    except Exception as exc:
        raise BadModelError(f"quantized model could not be read back: {first_line(exc)}") from None


def _checked_losses(prepared: Path, quantized: onnx.ModelProto) -> list[WeightLoss] | None:
    """Weight losses against the weights actually quantized (pre-processing may fold some); warn on lossy ones."""
    try:
        losses = weight_losses(onnx.load(str(prepared)), quantized)
    except Exception as exc:  # a diagnostic only: never fail the quantization over it
        logger.debug("int8 weight-loss check skipped: %s", first_line(exc))
        return None
    _warn_lossy(losses)
    return losses
