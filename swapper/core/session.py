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
import os

import onnx
import onnxruntime as ort
from onnx import helper
from onnxruntime.capi import onnxruntime_pybind11_state as _ort_state

from swapper.core.graph import GraphIndex
from swapper.errors import BadModelError, UsageError, first_line
from swapper.options import check_threads

logger = logging.getLogger(__name__)

# Names a user can give for onnxruntime's graph optimisation levels.
OPTIMIZATION_LEVELS: dict[str, ort.GraphOptimizationLevel] = {
    "all": ort.GraphOptimizationLevel.ORT_ENABLE_ALL,
    "extended": ort.GraphOptimizationLevel.ORT_ENABLE_EXTENDED,
    "basic": ort.GraphOptimizationLevel.ORT_ENABLE_BASIC,
    "disabled": ort.GraphOptimizationLevel.ORT_DISABLE_ALL,
}


# onnxruntime's own logger writes errors to stderr before swapper can say anything; swapper reports every
# failure itself in one line, so only fatal messages are let through (severity 4 = fatal, onnxruntime's
# logging levels 0 verbose .. 4 fatal).
ORT_LOG_SEVERITY = 4
ort.set_default_logger_severity(ORT_LOG_SEVERITY)

# onnxruntime raises its own exception classes (not RuntimeError subclasses).
ORT_ERRORS: tuple[type[Exception], ...] = tuple(
    getattr(_ort_state, name)
    for name in ("Fail", "InvalidArgument", "InvalidGraph", "InvalidProtobuf", "NoSuchFile",
                 "NotImplemented", "RuntimeException", "EPFail", "EngineError", "NoModel", "NotFound",
                 "ModelRequiresCompilation")
    if hasattr(_ort_state, name)
)


def session_options(threads: int = 1, graph_optimization: str = "all") -> ort.SessionOptions:
    """Fixed threading and one optimisation level, so repeated runs give identical numbers."""
    if graph_optimization not in OPTIMIZATION_LEVELS:
        known = ", ".join(OPTIMIZATION_LEVELS)
        raise UsageError(f"unknown graph optimisation level {graph_optimization!r} (known: {known})")
    check_threads(threads)
    options = ort.SessionOptions()
    options.intra_op_num_threads = threads
    # One inter-op thread in sequential mode: parallel branches would make results and
    # timings depend on scheduling luck.
    options.inter_op_num_threads = 1
    options.execution_mode = ort.ExecutionMode.ORT_SEQUENTIAL
    options.graph_optimization_level = OPTIMIZATION_LEVELS[graph_optimization]
    options.log_severity_level = ORT_LOG_SEVERITY  # errors are reported by swapper, in one line
    return options


def open_session(model: onnx.ModelProto | bytes | bytearray | os.PathLike, *, threads: int = 1,
                 graph_optimization: str = "all", what: str = "the model") -> ort.InferenceSession:
    """A CPU session of ``model`` with :func:`session_options`.

    ``model`` is a ModelProto, its serialised bytes, or the path of a model file
    (whose external data onnxruntime finds beside it). ``graph_optimization`` is
    one of all|extended|basic|disabled. Raises UsageError for bad settings and
    BadModelError (one line, naming ``what``) when onnxruntime cannot load the model.
    """
    options = session_options(threads, graph_optimization)
    if isinstance(model, onnx.ModelProto):
        data = model.SerializeToString()
    elif isinstance(model, (bytes, bytearray)):
        data = bytes(model)
    elif isinstance(model, os.PathLike):
        data = os.fspath(model)
    else:  # a caller's bug, not a bad model file
        raise TypeError(f"{what} must be an onnx.ModelProto, serialized bytes or a path, got {type(model).__name__}")
    try:
        return ort.InferenceSession(data, options, providers=["CPUExecutionProvider"])
    except (*ORT_ERRORS, RuntimeError) as exc:  # RuntimeError: failures pybind raises as itself
        raise BadModelError(f"onnxruntime cannot load {what}: {first_line(exc)}") from None


def run_session(session: ort.InferenceSession, outputs: list[str] | None, feeds: dict, *,
                what: str = "the model", data: str = "the data") -> list:
    """``session.run(outputs, feeds)``, its failures as one BadModelError line naming ``what`` and ``data``.

    For runs over user data (calibration, bias correction, refit), where a model
    that loads can still fail: a batch dimension fixed to another size, a shape
    only some inputs reach, a kernel refusing values.
    """
    try:
        return session.run(outputs, feeds)
    except (*ORT_ERRORS, RuntimeError) as exc:
        raise BadModelError(f"onnxruntime failed running {what} on {data}: {first_line(exc)}") from None


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
