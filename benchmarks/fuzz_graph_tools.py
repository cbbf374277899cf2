"""Shared pieces of the model mutators in benchmarks/fuzz_models*.py: the mutation context and graph queries."""
from __future__ import annotations

import random
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import onnx
from onnx import TensorProto, helper

STANDARD_OPS = ("Relu", "Softmax", "Conv", "Gemm", "MatMul", "Identity", "Reshape", "Sigmoid", "Tanh", "Add",
                "Mul", "Concat", "Transpose", "Flatten", "MaxPool", "BatchNormalization", "Gelu", "HardSwish",
                "Mish", "If", "Loop", "Scan", "Cast", "Shape", "Where", "LayerNormalization", "Dropout")


@dataclass
class Ctx:
    """What a mutation may use besides the model: the case folder, a numpy rng, the other base models."""

    work: Path
    np_rng: np.random.Generator
    others: list[bytes]
    model_name: str = "model.onnx"
    side_files: list[str] = field(default_factory=list)  # extra inputs written beside the model


def pick_node(m: onnx.ModelProto, rng: random.Random, ops=None) -> onnx.NodeProto | None:
    nodes = [n for n in m.graph.node if ops is None or n.op_type in ops]
    return rng.choice(nodes) if nodes else None


def float_inits(m: onnx.ModelProto) -> list[onnx.TensorProto]:
    return [t for t in m.graph.initializer if t.data_type == TensorProto.FLOAT and len(t.dims)]


def edges(m: onnx.ModelProto) -> list[str]:
    return [o for n in m.graph.node for o in n.output if o]


def patch_bytes(data: bytes, marker: str, payload: bytes) -> bytes:
    """Replace a same-length ASCII marker in serialised bytes (to plant bytes protobuf would refuse)."""
    raw = marker.encode()
    assert len(payload) == len(raw)
    return data.replace(raw, payload)


def set_attr(node, name, value):
    for a in list(node.attribute):
        if a.name == name:
            node.attribute.remove(a)
    node.attribute.append(helper.make_attribute(name, value))


def rename_everywhere(m, old, new):
    for n in m.graph.node:
        for seq in (n.input, n.output):
            for k, v in enumerate(seq):
                if v == old:
                    seq[k] = new
    for seq in (m.graph.input, m.graph.output, m.graph.value_info, m.graph.initializer):
        for item in seq:
            if item.name == old:
                item.name = new
