"""Run a model with onnxruntime and hand out the tensors inside it.

``expose`` adds internal tensors as extra graph outputs (on a copy);
``open_session`` builds a deterministic CPU session (every session of the
package is opened here); ``TensorCache`` keeps
recorded tensors batch by batch, in RAM up to a byte budget and on disk beyond
it, so memory does not grow with the calibration set past the budget (spilled
reads come back one batch at a time with ``np.fromfile``).
"""
from __future__ import annotations

import logging

import onnx
import onnxruntime as ort
from onnx import helper
from onnxruntime.capi import onnxruntime_pybind11_state as _ort_state

from swapper.core.graph import GraphIndex
from swapper.errors import BadModelError, UsageError, first_line

logger = logging.getLogger(__name__)

# Names a user can give for onnxruntime's graph optimisation levels.
OPTIMIZATION_LEVELS: dict[str, ort.GraphOptimizationLevel] = {
    "all": ort.GraphOptimizationLevel.ORT_ENABLE_ALL,
    "extended": ort.GraphOptimizationLevel.ORT_ENABLE_EXTENDED,
    "basic": ort.GraphOptimizationLevel.ORT_ENABLE_BASIC,
    "disabled": ort.GraphOptimizationLevel.ORT_DISABLE_ALL,
}


# onnxruntime raises its own exception classes (not RuntimeError subclasses).
ORT_ERRORS: tuple[type[Exception], ...] = tuple(
    getattr(_ort_state, name)
    for name in ("Fail", "InvalidArgument", "InvalidGraph", "InvalidProtobuf", "NoSuchFile",
                 "NotImplemented", "RuntimeException")
    if hasattr(_ort_state, name)
)


def session_options(threads: int = 1, graph_optimization: str = "all") -> ort.SessionOptions:
    """Fixed threading and one optimisation level, so repeated runs give identical numbers."""
    if graph_optimization not in OPTIMIZATION_LEVELS:
        known = ", ".join(OPTIMIZATION_LEVELS)
        raise UsageError(f"unknown graph optimisation level {graph_optimization!r} (known: {known})")
    if threads < 1:
        raise UsageError(f"threads must be >= 1, got {threads}")
    options = ort.SessionOptions()
    options.intra_op_num_threads = threads
    # One inter-op thread in sequential mode: parallel branches would make results and
    # timings depend on scheduling luck.
    options.inter_op_num_threads = 1
    options.execution_mode = ort.ExecutionMode.ORT_SEQUENTIAL
    options.graph_optimization_level = OPTIMIZATION_LEVELS[graph_optimization]
    options.log_severity_level = 3  # errors only; warnings would flood calibration and benchmark logs
    return options


def open_session(model: onnx.ModelProto | bytes | bytearray, *, threads: int = 1, graph_optimization: str = "all",
                 what: str = "the model") -> ort.InferenceSession:
    """A CPU session of ``model`` with :func:`session_options`.

    ``graph_optimization`` is one of all|extended|basic|disabled. Raises
    UsageError for bad settings and BadModelError (one line, naming ``what``)
    when onnxruntime cannot load the model.
    """
    options = session_options(threads, graph_optimization)
    if isinstance(model, onnx.ModelProto):
        data = model.SerializeToString()
    elif isinstance(model, (bytes, bytearray)):
        data = bytes(model)
    else:  # a caller's bug, not a bad model file
        raise TypeError(f"{what} must be an onnx.ModelProto or serialized bytes, got {type(model).__name__}")
    try:
        return ort.InferenceSession(data, options, providers=["CPUExecutionProvider"])
    except ORT_ERRORS as exc:
        raise BadModelError(f"onnxruntime cannot load {what}: {first_line(exc)}") from None


def expose(model: onnx.ModelProto, names: list[str]) -> onnx.ModelProto:
    """A copy of ``model`` whose graph outputs also include ``names`` (in order, no duplicates)."""
    out = onnx.ModelProto()
    out.CopyFrom(model)
    index = GraphIndex.of(out)
    present = {o.name for o in out.graph.output}
    for name in dict.fromkeys(names):
        if name in present:
            continue
        elem = index.dtypes.get(name, onnx.TensorProto.FLOAT)
        out.graph.output.append(helper.make_tensor_value_info(name, elem, None))
        present.add(name)
    return out
