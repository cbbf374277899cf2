"""Checks on the tensors a model carries: payload sizes against dims, and finiteness.

``check_tensor_sizes`` holds every initializer, sparse initializer and Constant
value (subgraphs included) to what its dims promise before any of it is
decoded: no negative dims, a known element type, and exactly as many bytes in
``raw_data`` (or values in the typed field) as the dims need (ONNX IR spec,
TensorProto: ``raw_data`` is the little-endian values, 4-bit types packed two
per byte; typed fields hold one value per element, two per complex element,
and 4-bit types two per int32 entry). onnx.checker does not check this, and
numpy_helper.to_array fails on it with errors that name no tensor.
``nonfinite_tensor`` finds the first float weight holding NaN or Inf;
``undecodable_text`` the first string field that is not valid UTF-8 (protobuf
hands such a field over as bytes, which breaks every name look-up after it).
"""
from __future__ import annotations

import logging
import math
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import onnx
from onnx import TensorProto, numpy_helper

from swapper.core.graph import node_subgraphs
from swapper.errors import BadModelError

logger = logging.getLogger(__name__)

PACKED_4BIT = {getattr(TensorProto, n) for n in ("INT4", "UINT4", "FLOAT4E2M1") if hasattr(TensorProto, n)}
PACKED_2BIT = {getattr(TensorProto, n) for n in ("INT2", "UINT2") if hasattr(TensorProto, n)}
COMPLEX = {TensorProto.COMPLEX64, TensorProto.COMPLEX128}
FLOATS = {TensorProto.FLOAT, TensorProto.DOUBLE, TensorProto.FLOAT16, TensorProto.BFLOAT16}


def _graph_tensors(graph: onnx.GraphProto) -> Iterator[tuple[str, TensorProto]]:
    """(kind, tensor) for every constant tensor of ``graph`` and the bodies inside it."""
    for t in graph.initializer:
        yield "initializer", t
    for s in graph.sparse_initializer:
        yield "sparse initializer values", s.values
        yield "sparse initializer indices", s.indices
    for node in graph.node:
        for a in node.attribute:
            if a.type == onnx.AttributeProto.TENSOR:
                yield f"attribute {a.name!r} of node", a.t
            elif a.type == onnx.AttributeProto.TENSORS:
                for t in a.tensors:
                    yield f"attribute {a.name!r} of node", t
        for body in node_subgraphs(node):
            yield from _graph_tensors(body)


def _itemsize(data_type: int) -> int | None:
    try:
        return np.dtype(onnx.helper.tensor_dtype_to_np_dtype(data_type)).itemsize
    except (KeyError, TypeError, ValueError):
        return None


def _raw_bytes_needed(data_type: int, count: int) -> int | None:
    if data_type in PACKED_4BIT:
        return (count + 1) // 2
    if data_type in PACKED_2BIT:
        return (count + 3) // 4
    size = _itemsize(data_type)
    return None if size is None else count * size


def _typed_values_needed(data_type: int, count: int) -> int:
    if data_type in COMPLEX:
        return 2 * count
    if data_type in PACKED_4BIT:
        return (count + 1) // 2
    if data_type in PACKED_2BIT:
        return (count + 3) // 4
    return count


def tensor_problem(t: TensorProto) -> str | None:
    """Why the payload of ``t`` does not fit its dims and type, or None. External tensors are judged by ``length``."""
    dims = list(t.dims)
    if any(d < 0 for d in dims):
        return f"has a negative dimension {dims}"
    count = math.prod(dims)
    if t.data_type == TensorProto.UNDEFINED or t.data_type not in TensorProto.DataType.values():
        return f"has no known element type ({t.data_type})"
    if t.data_type == TensorProto.STRING:
        return None if len(t.string_data) == count else f"holds {len(t.string_data)} strings, its dims {dims} need {count}"
    need = _raw_bytes_needed(t.data_type, count)
    if need is None:
        return f"has an element type numpy cannot hold ({t.data_type})"
    if t.data_location == TensorProto.EXTERNAL:
        length = next((e.value for e in t.external_data if e.key == "length"), None)
        if length is not None and length.isdigit() and int(length) != need:
            return f"has {length} bytes of external data, its dims {dims} need {need}"
        return None
    if t.raw_data:
        if len(t.raw_data) != need:
            return f"holds {len(t.raw_data)} bytes, its dims {dims} need {need}"
        return None
    try:
        field = onnx.helper.tensor_dtype_to_field(t.data_type)
    except (KeyError, TypeError, ValueError):
        return f"has an element type without a value field ({t.data_type})"
    got, want = len(getattr(t, field)), _typed_values_needed(t.data_type, count)
    if got != want:
        return f"holds {got} values in {field}, its dims {dims} need {want}"
    return None


def check_tensor_sizes(model: onnx.ModelProto, path: str | Path | None = None) -> None:
    """Raise BadModelError (naming ``path`` and the tensor) for the first tensor whose payload misfits its dims."""
    for kind, t in _graph_tensors(model.graph):
        problem = tensor_problem(t)
        if problem:
            raise BadModelError(f"{kind} {t.name!r} {problem}", path)


def undecodable_text(message, where: str = "model") -> str | None:
    """The path of the first string field of ``message`` (recursively) that is not valid UTF-8, else None.

    ONNX's .proto declares names, domains and string attributes as ``string``, which
    must hold UTF-8 (protobuf language guide, scalar value types); a damaged file
    breaks that and protobuf's Python parser returns the raw bytes instead of text.
    """
    for field, value in message.ListFields():
        name = f"{where}.{field.name}"
        # protobuf 6 has is_repeated; older versions only the label
        repeated = field.is_repeated if hasattr(field, "is_repeated") else field.label == field.LABEL_REPEATED
        if field.type == field.TYPE_STRING:
            if any(isinstance(v, bytes) for v in (value if repeated else [value])):
                return name
        elif field.type == field.TYPE_MESSAGE:
            for i, item in enumerate(value if repeated else [value]):
                found = undecodable_text(item, f"{name}[{i}]" if repeated else name)
                if found:
                    return found
    return None


def nonfinite_tensor(model: onnx.ModelProto) -> str | None:
    """The name of the first float initializer or Constant value holding NaN or Inf, else None.

    Tensors whose bytes live in external files are skipped (they are not in memory).
    """
    for _, t in _graph_tensors(model.graph):
        if t.data_type not in FLOATS or t.data_location == TensorProto.EXTERNAL:
            continue
        values = numpy_helper.to_array(t)
        if values.dtype.kind == "f" and not np.isfinite(values).all():
            return t.name
        if values.dtype.kind != "f":  # bfloat16 comes back as a float view in newer onnx; cast to check
            if not np.isfinite(values.astype(np.float32)).all():
                return t.name
    return None
