"""A read-only index over an ONNX graph: who produces and who consumes each tensor.

Built once per model (or after each edit); plain protobuf underneath, so every
module that reads graphs uses the same look-ups. A node carrying an If/Loop/Scan
body that reads a tensor of the graph by name (an outer-scope value) counts as
one of that tensor's consumers, like a node that reads it as an input.
"""
from __future__ import annotations

import math
from collections import defaultdict
from collections.abc import Iterator
from dataclasses import dataclass, field

import numpy as np
import onnx
from onnx import numpy_helper

# The default (ONNX) operator domain: an empty string, or its long spelling (ONNX spec, "Operator Sets").
DEFAULT_DOMAINS = ("", "ai.onnx")


def is_op(node: onnx.NodeProto | None, *op_types: str) -> bool:
    """True when ``node`` is one of the default-domain ops ``op_types`` (another domain's "Conv" is not)."""
    return node is not None and node.op_type in op_types and node.domain in DEFAULT_DOMAINS


def attr(node: onnx.NodeProto, name: str, default=None):
    """Value of attribute ``name`` of ``node`` (ints, floats, strings, lists, tensors) or ``default``."""
    for a in node.attribute:
        if a.name == name:
            return onnx.helper.get_attribute_value(a)
    return default


def node_subgraphs(node: onnx.NodeProto) -> list[onnx.GraphProto]:
    """The bodies a node carries (If branches, Loop/Scan bodies), in attribute-name order."""
    graphs = []
    for a in sorted(node.attribute, key=lambda a: a.name):
        if a.type == onnx.AttributeProto.GRAPH:
            graphs.append(a.g)
        elif a.type == onnx.AttributeProto.GRAPHS:
            graphs.extend(a.graphs)
    return graphs


def named_subgraphs(node: onnx.NodeProto) -> list[tuple[str, onnx.GraphProto]]:
    """(attribute name, body) for each body ``node`` carries, in the order of :func:`node_subgraphs`.

    A GRAPHS attribute gives one entry per graph, named ``"<attribute>[i]"``.
    """
    named = []
    for a in sorted(node.attribute, key=lambda a: a.name):
        if a.type == onnx.AttributeProto.GRAPH:
            named.append((a.name, a.g))
        elif a.type == onnx.AttributeProto.GRAPHS:
            named.extend((f"{a.name}[{i}]", g) for i, g in enumerate(a.graphs))
    return named


def outer_names(graph: onnx.GraphProto) -> set[str]:
    """The tensor names ``graph`` reads from enclosing graphs (bodies nested in it included).

    ONNX lets an If/Loop/Scan body read any value of an enclosing graph by
    name (ONNX IR spec, "Names Within a Graph": outer-scope values); those are
    the names read but not defined here (inputs, initializers, node outputs).
    """
    defined = {v.name for v in graph.input} | {t.name for t in graph.initializer}
    defined |= {o for node in graph.node for o in node.output if o}
    read: set[str] = {o.name for o in graph.output}
    for node in graph.node:
        read.update(i for i in node.input if i)
        for body in node_subgraphs(node):
            read |= outer_names(body)
    return read - defined


def subgraphs(graph: onnx.GraphProto) -> Iterator[onnx.GraphProto]:
    """Every graph nested in ``graph`` (bodies of bodies included), depth first, in node order."""
    for node in graph.node:
        for body in node_subgraphs(node):
            yield body
            yield from subgraphs(body)


def _is_constant(node: onnx.NodeProto | None) -> bool:
    # Constant is a default-domain op (ONNX operator spec); another domain's
    # "Constant" is an unknown op whose output we cannot know.
    return is_op(node, "Constant")


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
        return cls.of_graph(model.graph, {o.domain or "": o.version for o in model.opset_import})

    @classmethod
    def of_graph(cls, g: onnx.GraphProto, opsets: dict[str, int]) -> "GraphIndex":
        """The index of one graph (the main graph or an If/Loop/Scan body, which shares its model's opsets)."""
        index = cls(graph=g, opsets=dict(opsets))
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
            # A node whose body reads a tensor of this graph by name (outer-scope value) consumes it too:
            # a site may not swallow it, nor a fold change it, behind that body's back.
            explicit = set(node.input)
            for name in sorted(set().union(*map(outer_names, node_subgraphs(node))) - explicit):
                index.consumers[name].append(node)
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
        if _is_constant(node):
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
        init = self.initializers.get(name)
        if init is not None and math.prod(init.dims) != 1:
            return None  # decided from the header: weights can be large, or live in external data
        value = self.const(name)
        if value is None or value.size != 1:
            return None
        return float(value.reshape(()))

    def is_dynamic(self, name: str) -> bool:
        """True if ``name`` is computed at run time (not an initializer or Constant output).

        Decided from the graph alone, without decoding any tensor.
        """
        return name not in self.initializers and not _is_constant(self.producer.get(name))

    def users(self, name: str) -> list[onnx.NodeProto]:
        return list(self.consumers.get(name, []))

    def is_graph_output(self, name: str) -> bool:
        return name in self.graph_outputs

    def shape(self, name: str) -> tuple | None:
        return self.shapes.get(name)
