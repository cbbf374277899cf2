"""Moving a model to another default-domain opset, and showing the move changed nothing that matters.

Transformation: a loaded model at opset m and a wanted opset n -> a copy at
opset n written by ``onnx.version_converter.convert_version``, checked with
``onnx.checker.check_model(full_check=True)``, shape-inferred and with every
node named as :func:`swapper.core.model_io.load_model` names them; then
:func:`compare_outputs` runs both on the same batches in onnxruntime and
:func:`check_conversion` refuses (one line) a conversion whose outputs differ
by more than float32 rounding. Nothing changes the opset silently: only an
explicit ``--opset N`` gets here, and the record goes into the plan.
"""
from __future__ import annotations

import logging
from collections.abc import Iterable

import numpy as np
import onnx
import onnx.version_converter

from swapper.core.model_io import MAX_OPSET, MIN_OPSET, default_opset, name_unnamed_nodes
from swapper.core.session import open_session
from swapper.errors import BadModelError, UsageError, first_line

logger = logging.getLogger(__name__)

# float32 keeps ~7 significant digits; a converted graph may run its ops in another order or fused
# differently, so allow a few ulps of the output scale accumulated over the network
# (common practice, no source).
ROUNDING = 1e-5


def convert_opset(model: onnx.ModelProto, opset: int) -> onnx.ModelProto:
    """A copy of ``model`` at default-domain ``opset``, checked (full check), shape-inferred, nodes named.

    Raises UsageError for an opset swapper does not read, BadModelError with
    one line when the converter or the checker fails. ``model`` is unchanged.
    """
    if not MIN_OPSET <= opset <= MAX_OPSET:
        raise UsageError(f"--opset {opset} is outside the opsets swapper reads ({MIN_OPSET}..{MAX_OPSET})")
    before = default_opset(model)
    try:
        converted = onnx.version_converter.convert_version(model, opset)
        onnx.checker.check_model(converted, full_check=True)
        converted = onnx.shape_inference.infer_shapes(converted, check_type=True, strict_mode=True, data_prop=True)
    except Exception as exc:  # the converter raises RuntimeError/ValueError/its own C++ errors
        raise BadModelError(f"cannot convert opset {before} -> {opset}: {first_line(exc)}") from None
    name_unnamed_nodes(converted)
    logger.info("converted opset %s -> %d: %d -> %d nodes", before, opset, len(model.graph.node),
                len(converted.graph.node))
    return converted


def compare_outputs(original: onnx.ModelProto, converted: onnx.ModelProto,
                    batches: Iterable[dict[str, np.ndarray]]) -> dict:
    """Largest |difference| over every output and batch, the largest |output| of the original, the samples run."""
    a, b = open_session(original, what="the original model"), open_session(converted, what="the converted model")
    names = [i.name for i in a.get_inputs()]
    diff, scale, samples = 0.0, 0.0, 0
    for feeds in batches:
        feeds = {k: v for k, v in feeds.items() if k in names}
        for ya, yb in zip(a.run(None, feeds), b.run(None, feeds)):
            ya, yb = np.asarray(ya, dtype=np.float64), np.asarray(yb, dtype=np.float64)
            if ya.size:
                with np.errstate(invalid="ignore"):
                    diff = max(diff, float(np.nanmax(np.abs(ya - yb))) if ya.shape == yb.shape else np.inf)
                scale = max(scale, float(np.nanmax(np.abs(ya))))
        samples += len(next(iter(feeds.values()))) if feeds else 0
    return {"max_abs_diff": diff, "max_abs_output": scale, "samples": samples}


def check_conversion(original: onnx.ModelProto, converted: onnx.ModelProto, opset: int,
                     batches: Iterable[dict[str, np.ndarray]], *, feeds_from: str) -> dict:
    """The conversion record for the plan; BadModelError when outputs moved by more than float32 rounding."""
    before = default_opset(original)
    found = compare_outputs(original, converted, batches)
    bound = ROUNDING * max(1.0, found["max_abs_output"])
    if not found["max_abs_diff"] <= bound:  # also catches NaN
        raise BadModelError(f"opset {before} -> {opset} changes the outputs by up to {found['max_abs_diff']:.3g} "
                            f"on {found['samples']} samples ({feeds_from}), more than float32 rounding "
                            f"({bound:.3g}); not converted")
    return {"from": before, "to": opset, "tool": "onnx.version_converter.convert_version",
            "checked": "onnx.checker.check_model(full_check=True)", "compared_on": feeds_from,
            "samples": found["samples"], "max_abs_diff": found["max_abs_diff"], "bound": bound}
