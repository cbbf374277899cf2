"""Size of a model: serialized bytes, node and op counts, initializer bytes."""
from __future__ import annotations

import logging
import math
from collections import Counter

import numpy as np
import onnx

from swapper.core.graph import DEFAULT_DOMAINS, subgraphs

logger = logging.getLogger(__name__)

PACKED_4BIT = {
    getattr(onnx.TensorProto, n) for n in ("INT4", "UINT4", "FLOAT4E2M1") if hasattr(onnx.TensorProto, n)
}


def _tensor_bytes(tensor: onnx.TensorProto) -> int:
    """Bytes the tensor's values take in memory, however the protobuf stores them."""
    count = math.prod(tensor.dims)
    if tensor.data_type == onnx.TensorProto.STRING:
        return sum(len(s) for s in tensor.string_data)
    # 4-bit types are stored two per byte (ONNX IR spec, INT4/UINT4 packing).
    if tensor.data_type in PACKED_4BIT:
        return (count + 1) // 2
    return count * np.dtype(onnx.helper.tensor_dtype_to_np_dtype(tensor.data_type)).itemsize


def model_summary(model: onnx.ModelProto) -> dict:
    """Node count, op counts (sorted by op name) and initializer bytes, subgraphs included.

    Ops outside the default ONNX domain are keyed ``domain.OpType`` so a
    contrib op never merges with a standard op of the same name.
    """
    counts: Counter[str] = Counter()
    init_bytes = 0
    for graph in [model.graph, *subgraphs(model.graph)]:
        for node in graph.node:
            key = node.op_type if node.domain in DEFAULT_DOMAINS else f"{node.domain}.{node.op_type}"
            counts[key] += 1
        init_bytes += sum(_tensor_bytes(t) for t in graph.initializer)
        init_bytes += sum(_tensor_bytes(s.values) + _tensor_bytes(s.indices) for s in graph.sparse_initializer)
    return {
        "nodes": int(sum(counts.values())),
        "op_counts": dict(sorted(counts.items())),
        "initializer_bytes": int(init_bytes),
    }


def serialized_size(model: onnx.ModelProto | bytes) -> int:
    """Size in bytes of the model as written to an .onnx file (external data not included)."""
    if isinstance(model, (bytes, bytearray)):
        return len(model)
    return int(model.ByteSize())
