"""Concrete shapes for cost shares, where the model's own shapes are symbolic.

Transformation: (model, one batch of input feeds, tensor names) -> {tensor:
concrete shape}. First ONNX shape inference runs on a copy whose inputs carry
the feeds' shapes (nothing is executed); the tensors it leaves symbolic
(shapes computed at run time, e.g. through Resize or Reshape of a Shape) are
then measured by running the model once in onnxruntime with them exposed as
outputs. The feeds are one sample of the calibration data, or zeros of the
shapes the user gives (``--input-shape NAME=1x3x48x320``); values only matter
where the model branches on them.

Only main-graph tensors are measured; a tensor that stays unknown keeps an
unknown cost (it is logged, never guessed).
"""
from __future__ import annotations

import logging

import numpy as np
import onnx

from swapper.core.graph import GraphIndex
from swapper.core.session import ORT_ERRORS, expose, open_session
from swapper.data.dataset import input_specs
from swapper.errors import BadModelError, UsageError, first_line

logger = logging.getLogger(__name__)


def parse_input_shapes(values: list[str] | None) -> dict[str, tuple[int, ...]]:
    """``NAME=1x3x48x320`` options as {name: shape}; ``NAME=`` is a scalar. Raises UsageError."""
    shapes = {}
    for text in values or []:
        name, sep, dims = text.partition("=")
        try:
            shape = tuple(int(d) for d in dims.lower().split("x")) if dims.strip() else ()
        except ValueError:
            shape = None
        if not sep or not name.strip() or shape is None or any(d < 1 for d in shape):
            raise UsageError(f"--input-shape {text}: expected NAME=DIMS with positive dims, e.g. x=1x3x48x320")
        shapes[name.strip()] = shape
    return shapes


def zero_feeds(model: onnx.ModelProto, shapes: dict[str, tuple[int, ...]]) -> dict[str, np.ndarray]:
    """Zeros for every model input: of the given shape, or of the input's own shape when all of it is fixed."""
    specs = input_specs(model)
    names = [s.name for s in specs]
    unknown = sorted(set(shapes) - set(names))
    if unknown:
        raise UsageError(f"--input-shape: the model has no input {unknown[0]!r} (inputs: {', '.join(names)})")
    feeds = {}
    for spec in specs:
        fixed = spec.shape is not None and all(isinstance(d, int) and d > 0 for d in spec.shape)
        shape = shapes.get(spec.name, spec.shape if fixed else None)
        if shape is None:
            raise UsageError(f"--input-shape: give a shape for input {spec.name!r} "
                             f"(its shape is {_fmt(spec.shape)})")
        if spec.shape is not None:
            clash = len(shape) != len(spec.shape) or any(
                isinstance(w, int) and w > 0 and w != g for w, g in zip(spec.shape, shape))
            if clash:
                raise UsageError(f"--input-shape {spec.name}={'x'.join(map(str, shape))}: "
                                 f"input {spec.name!r} has shape {_fmt(spec.shape)}")
        feeds[spec.name] = np.zeros(shape, dtype=spec.dtype)
    return feeds


def _fmt(shape) -> str:
    if shape is None:
        return "unknown"
    return "(" + ", ".join(str(d) if isinstance(d, int) and d > 0 else "?" for d in shape) + ")"


def _concrete(shape) -> bool:
    return shape is not None and all(isinstance(d, int) and d > 0 for d in shape)


def _inferred(model: onnx.ModelProto, feeds: dict[str, np.ndarray]) -> dict[str, tuple]:
    """Static shape inference with the inputs' dims fixed to the feeds' shapes."""
    fixed = onnx.ModelProto()
    fixed.CopyFrom(model)
    del fixed.graph.value_info[:]
    for vi in fixed.graph.input:
        if vi.name in feeds:
            dims = vi.type.tensor_type.shape.dim
            del dims[:]
            for d in feeds[vi.name].shape:
                dims.add().dim_value = int(d)
    for vi in fixed.graph.output:
        vi.type.tensor_type.ClearField("shape")
    try:
        fixed = onnx.shape_inference.infer_shapes(fixed, data_prop=True)
    except (onnx.shape_inference.InferenceError, ValueError) as exc:
        logger.info("shape inference with fixed inputs failed (%s); measuring instead", first_line(exc))
        return {}
    return GraphIndex.of(fixed).shapes


def measure_shapes(model: onnx.ModelProto, tensors: list[str], feeds: dict[str, np.ndarray]) -> dict[str, tuple]:
    """Concrete shapes of the main-graph ``tensors`` for inputs ``feeds`` (see the module docstring)."""
    index = GraphIndex.of(model)
    wanted = [t for t in dict.fromkeys(tensors) if t in index.producer or t in index.graph_inputs]
    found = {t: tuple(feeds[t].shape) for t in wanted if t in feeds}
    static = _inferred(model, feeds)
    found.update({t: static[t] for t in wanted if t not in found and _concrete(static.get(t))})
    missing = [t for t in wanted if t not in found]
    if missing:
        try:
            session = open_session(expose(model, missing), what="the model (measuring shapes)")
            names = [o.name for o in session.get_outputs()]
            values = dict(zip(names, session.run(None, feeds)))
            found.update({t: tuple(values[t].shape) for t in missing if t in values})
        except (*ORT_ERRORS, BadModelError) as exc:
            logger.warning("could not run the model to measure %d tensor shapes: %s", len(missing), first_line(exc))
    return found
