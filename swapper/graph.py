"""A read-only index over an ONNX graph: who produces and who consumes each tensor.

Built once per model (or after each edit); plain protobuf underneath, so every
module that reads graphs uses the same look-ups.
"""
from __future__ import annotations

from collections import defaultdict
from dataclasses import dataclass, field

import numpy as np
import onnx
from onnx import numpy_helper


def attr(node: onnx.NodeProto, name: str, default=None):
    """Value of attribute ``name`` of ``node`` (ints, floats, strings, lists, tensors) or ``default``."""
    for a in node.attribute:
        if a.name == name:
            return onnx.helper.get_attribute_value(a)
    return default


@dataclass
class GraphIndex:
    """Producer/consumer look-ups, constants and static shapes of one graph."""

    graph: onnx.GraphProto
    opsets: dict[str, int] = field(default_factory=dict)
    producer: dict[str, onnx.NodeProto] = field(default_factory=dict)
    consumers: dict[str, list[onnx.NodeProto]] = field(default_factory=lambda: defaultdict(list))
    initializers: dict[str, onnx.TensorProto] = field(default_factory=dict)
    nodes_by_name: dict[str, onnx.NodeProto] = field(default_factory=dict)
    node_position: dict[str, int] = field(default_factory=dict)
    graph_inputs: list[str] = field(default_factory=list)
    graph_outputs: list[str] = field(default_factory=list)
    shapes: dict[str, tuple] = field(default_factory=dict)
    dtypes: dict[str, int] = field(default_factory=dict)

    @classmethod
    def of(cls, model: onnx.ModelProto) -> "GraphIndex":
        g = model.graph
        index = cls(graph=g, opsets={o.domain or "": o.version for o in model.opset_import})
        for init in g.initializer:
            index.initializers[init.name] = init
        for pos, node in enumerate(g.node):
            index.nodes_by_name[node.name] = node
            index.node_position[node.name] = pos
            for out in node.output:
                if out:
                    index.producer[out] = node
            for inp in node.input:
                if inp:
                    index.consumers[inp].append(node)
        index.graph_inputs = [v.name for v in g.input if v.name not in index.initializers]
        index.graph_outputs = [v.name for v in g.output]
        for vi in list(g.input) + list(g.value_info) + list(g.output):
            ttype = vi.type.tensor_type
            if not vi.type.HasField("tensor_type"):
                continue
            index.dtypes[vi.name] = ttype.elem_type
            if ttype.HasField("shape"):
                index.shapes[vi.name] = tuple(
                    d.dim_value if d.HasField("dim_value") else (d.dim_param or None) for d in ttype.shape.dim
                )
        return index

    @property
    def opset(self) -> int:
        return self.opsets.get("", self.opsets.get("ai.onnx", 0))

    def const(self, name: str) -> np.ndarray | None:
        """The value of ``name`` if it is an initializer or a Constant node's output, else None."""
        if name in self.initializers:
            return numpy_helper.to_array(self.initializers[name])
        node = self.producer.get(name)
        if node is not None and node.op_type == "Constant" and node.domain in ("", "ai.onnx"):
            for a in node.attribute:
                if a.name == "value":
                    return numpy_helper.to_array(a.t)
                if a.name == "value_float":
                    return np.array(a.f, dtype=np.float32)
                if a.name == "value_floats":
                    return np.array(list(a.floats), dtype=np.float32)
                if a.name == "value_int":
                    return np.array(a.i, dtype=np.int64)
                if a.name == "value_ints":
                    return np.array(list(a.ints), dtype=np.int64)
        return None

    def scalar(self, name: str) -> float | None:
        """A constant with exactly one element, as float; None if ``name`` is not such a constant."""
        value = self.const(name)
        if value is None or value.size != 1:
            return None
        return float(value.reshape(()))

    def is_dynamic(self, name: str) -> bool:
        """True if ``name`` is computed at run time (not an initializer or Constant output)."""
        return self.const(name) is None

    def users(self, name: str) -> list[onnx.NodeProto]:
        return list(self.consumers.get(name, []))

    def is_graph_output(self, name: str) -> bool:
        return name in self.graph_outputs

    def shape(self, name: str) -> tuple | None:
        return self.shapes.get(name)
