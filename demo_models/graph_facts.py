"""What an exported graph shows: activation patterns and opset, as manifest.json states them.

Transformation: an ONNX ModelProto -> counts of activation forms (decomposed SiLU,
Sigmoid gate, exact and tanh GELU, decomposed Mish, single ops, Softmax, and the
normalisation layers) and the default domain's opset. build.py refuses a model whose
counts differ from what its spec expects.
"""
from __future__ import annotations

import logging
from collections import Counter

import numpy as np
import onnx

logger = logging.getLogger(__name__)


def _const_value(graph: onnx.GraphProto, name: str) -> np.ndarray | None:
    for init in graph.initializer:
        if init.name == name:
            return onnx.numpy_helper.to_array(init)
    for node in graph.node:
        if node.op_type == "Constant" and node.output[0] == name:
            return onnx.numpy_helper.to_array(node.attribute[0].t)
    return None


def _is_scalar(graph: onnx.GraphProto, name: str, value: float) -> bool:
    c = _const_value(graph, name)
    return c is not None and c.size == 1 and abs(float(c.reshape(())) - value) < 1e-6


def activation_patterns(proto: onnx.ModelProto) -> dict[str, int]:
    """Count the activation forms in an exported graph (the claims README and manifest make)."""
    graph = proto.graph
    producer = {out: n for n in graph.node for out in n.output}
    consumers: dict[str, list] = {}
    for n in graph.node:
        for inp in n.input:
            consumers.setdefault(inp, []).append(n)
    counts: Counter = Counter()
    for n in graph.node:
        if n.op_type == "Sigmoid":
            muls = [m for m in consumers.get(n.output[0], []) if m.op_type == "Mul"]
            if muls and all(n.input[0] in m.input for m in muls):
                counts["silu_decomposed"] += 1
            elif muls:
                counts["sigmoid_gate"] += 1
            else:
                counts["sigmoid"] += 1
        elif n.op_type == "Erf":
            div = producer.get(n.input[0])
            ok = div is not None and div.op_type == "Div"
            ok = ok and _is_scalar(graph, div.input[1], np.sqrt(2.0))  # erf(x / sqrt(2))
            counts["gelu_erf" if ok else "erf"] += 1
        elif n.op_type == "Tanh":
            src = producer.get(n.input[0])
            if src is not None and src.op_type == "Softplus":
                counts["mish_decomposed"] += 1
            elif src is not None and src.op_type == "Mul" and any(
                    _is_scalar(graph, i, np.sqrt(2.0 / np.pi)) for i in src.input):
                counts["gelu_tanh"] += 1  # tanh(sqrt(2/pi) * (x + 0.044715 x^3))
            else:
                counts["tanh"] += 1
        elif n.op_type == "Relu":
            counts["relu"] += 1
        elif n.op_type == "BatchNormalization":
            counts["batchnorm"] += 1
        elif n.op_type == "LayerNormalization":
            counts["layernorm"] += 1
        elif n.op_type == "Softmax":
            counts["softmax"] += 1  # attention weights: a costly exp, but over a row, not per channel
        elif n.op_type in ("Gelu", "Mish", "Elu", "Selu", "HardSwish", "HardSigmoid"):
            counts[n.op_type.lower() + "_op"] += 1  # single-op forms (none expected at these opsets)
    return dict(sorted(counts.items()))


def default_opset(proto: onnx.ModelProto) -> int:
    """Version of the default ('' / ai.onnx) domain."""
    return next(e.version for e in proto.opset_import if e.domain in ("", "ai.onnx"))
