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

The input model is never mutated: it is serialised into a temporary folder,
pre-processed there (onnxruntime's offline ONNX shape inference + basic graph
optimisation, as the same documentation recommends before quantizing), and the
quantized file is loaded back as a fresh ModelProto.
"""
from __future__ import annotations

import itertools
import logging
import tempfile
from collections.abc import Iterable, Iterator
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

from .errors import BadDataError, BadModelError

logger = logging.getLogger(__name__)

ACTIVATION_TYPE = QuantType.QUInt8  # U8 activations: what x86 CPU QDQ fusion accepts (module docstring)
WEIGHT_TYPE = QuantType.QInt8  # S8 weights: the U8S8 integer GEMM path
# Per-channel QDQ needs DequantizeLinear's `axis` attribute, added in opset 13
# (ONNX operator spec, DequantizeLinear-13).
MIN_PER_CHANNEL_OPSET = 13
PROTOBUF_LIMIT = 2**31 - 1


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__


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
        logger.warning("quantization pre-processing skipped (%s); quantizing the model as given", _first_line(exc))
        return src


def _per_channel_ready(model: onnx.ModelProto) -> onnx.ModelProto:
    """The model itself, or a copy converted to opset 13 when it is older.

    onnxruntime's quantizer writes DequantizeLinear with ``axis`` regardless of
    the opset, which is invalid below 13 (measured with onnxruntime 1.32: the
    output fails onnx.checker), so older models are upgraded first.
    """
    opset = next((o.version for o in model.opset_import if o.domain in ("", "ai.onnx")), 0)
    if opset >= MIN_PER_CHANNEL_OPSET:
        return model
    logger.info("opset %d < %d: converting a copy to opset %d for per-channel scales",
                opset, MIN_PER_CHANNEL_OPSET, MIN_PER_CHANNEL_OPSET)
    try:
        return onnx.version_converter.convert_version(model, MIN_PER_CHANNEL_OPSET)
    except Exception as exc:
        raise BadModelError(
            f"cannot convert opset {opset} to {MIN_PER_CHANNEL_OPSET} for per-channel int8: {_first_line(exc)}"
        ) from None


def _drop_unused_opsets(model: onnx.ModelProto) -> None:
    """Remove opset imports no node uses (pre-processing lists every onnxruntime domain)."""
    used = {""} | {f.domain or "" for f in model.functions}
    pending = [model.graph] + [f for f in model.functions]
    while pending:  # graphs and function bodies, including If/Loop/Scan subgraphs
        for node in pending.pop().node:
            used.add(node.domain or "")
            for a in node.attribute:
                pending.extend([a.g] if a.type == onnx.AttributeProto.GRAPH else list(a.graphs))
    keep = [o for o in model.opset_import if (o.domain or "") in used]
    del model.opset_import[:]
    model.opset_import.extend(keep)


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
    if model.ByteSize() > PROTOBUF_LIMIT:
        raise BadModelError("model exceeds 2 GiB; int8 quantization of external-data models is not supported")
    dtypes = _input_dtypes(model)
    batches = iter(calib_batches)
    first = next(batches, None)
    if first is None:
        raise BadDataError("no calibration batches given for int8 quantization")
    reader = _BatchReader(itertools.chain([first], batches), dtypes)

    source = _per_channel_ready(model) if per_channel else model

    with tempfile.TemporaryDirectory(prefix="swapper-int8-") as tmp:
        folder = Path(tmp)
        src = folder / "float.onnx"
        src.write_bytes(source.SerializeToString())  # a copy on disk: the caller's proto stays untouched
        prepared = _preprocess(src, folder / "prepared.onnx")
        out = folder / "int8.onnx"
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
            raise BadModelError(f"int8 quantization failed: {_first_line(exc)}") from None
        try:
            quantized = onnx.load(str(out))
        except Exception as exc:
            raise BadModelError(f"quantized model could not be read back: {_first_line(exc)}") from None
    _drop_unused_opsets(quantized)
    logger.info(
        "quantized to int8 QDQ on %d calibration batch(es): %d -> %d nodes",
        reader.count, len(model.graph.node), len(quantized.graph.node),
    )
    return quantized
