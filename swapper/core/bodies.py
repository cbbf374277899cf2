"""If/Loop/Scan bodies as graphs of their own: where a body sits, what it reads from outside, the body as a model.

Transformation: (model, body path) -> the body graph and the chain of graphs
around it (:func:`find_body`); the names the body reads from enclosing graphs,
split into constants (initializers, Constant outputs) and run-time values
(:func:`outer_reads`); the body as a ModelProto of its own, either to analyse
and rewrite it (:func:`body_as_model`: the outer constants it reads become
initializers, so a fold into a layer of the body sees its weights; every other
name of the model is reserved, so new names never collide with a name of any
scope; :func:`put_body` puts the rewritten graph back without the borrowed
constants) or to run it (:func:`standalone_body`: its formal inputs and the
run-time values it reads from outside become graph inputs).

A body path names a body from the main graph inward, one ``(node name,
attribute)`` step per level, e.g. ``(("If_0", "then_branch"),)``; node names
are unique per graph (:func:`swapper.core.model_io.name_unnamed_nodes`). A body
may read any value of an enclosing graph by name (ONNX IR spec, "Names Within a
Graph"); it may not redefine one, so a borrowed name never clashes with the
body's own.
"""
from __future__ import annotations

import logging
from dataclasses import dataclass

import numpy as np
import onnx
from onnx import helper, numpy_helper

from swapper.core.graph import DEFAULT_DOMAINS, GraphIndex, outer_names, subgraphs
from swapper.errors import BadModelError

logger = logging.getLogger(__name__)

BodyPath = tuple[tuple[str, str], ...]
FORMS = ("If", "Loop", "Scan")  # the default-domain ops whose bodies are followed (ONNX operator spec)


@dataclass
class BodyPlace:
    """A body and what surrounds it: ``graphs[0]`` is the main graph, ``graphs[-1]`` the body;
    ``owners[i]`` is the node of ``graphs[i]`` that carries ``graphs[i + 1]`` under ``attributes[i]``."""

    graphs: list[onnx.GraphProto]
    owners: list[onnx.NodeProto]
    attributes: list[str]

    @property
    def body(self) -> onnx.GraphProto:
        return self.graphs[-1]

    @property
    def owner(self) -> onnx.NodeProto:
        return self.owners[-1]

    @property
    def attribute(self) -> str:
        return self.attributes[-1]


def describe(owner: onnx.NodeProto, attribute: str) -> str:
    """``the then_branch of If 'If_0'``: where a body sits, for messages."""
    return f"the {attribute} of {owner.op_type} {owner.name!r}"


def _graph_attribute(node: onnx.NodeProto, attribute: str) -> onnx.AttributeProto | None:
    for a in node.attribute:
        if a.name == attribute and a.type == onnx.AttributeProto.GRAPH:
            return a
    return None


def find_body(model: onnx.ModelProto, path: BodyPath) -> BodyPlace:
    """The body at ``path`` in ``model`` (the graphs are the model's own, not copies); BadModelError if absent."""
    place = BodyPlace([model.graph], [], [])
    for node_name, attribute in path:
        graph = place.graphs[-1]
        node = next((n for n in graph.node if n.name == node_name), None)
        found = None if node is None else _graph_attribute(node, attribute)
        if found is None:
            raise BadModelError(f"no body {attribute!r} of a node {node_name!r} in the graph {graph.name!r}")
        place.graphs.append(found.g)
        place.owners.append(node)
        place.attributes.append(attribute)
    return place


def why_not_runnable(steps: list[tuple[onnx.NodeProto, str, onnx.GraphProto]]) -> str | None:
    """Why a body cannot be run on its own as its node runs it, or None. ``steps``: (owner, attribute, body)
    from the main graph inward. Followed: If, Loop and Scan of the default domain, bodies passing tensors only."""
    for owner, attribute, body in steps:
        where = describe(owner, attribute)
        if owner.op_type not in FORMS or owner.domain not in DEFAULT_DOMAINS:
            return f"inside {where}; bodies of {owner.op_type} are not run by the calibration"
        if "[" in attribute:
            return f"inside {where}; bodies in a list attribute are not run by the calibration"
        for value in list(body.input) + list(body.output):
            if value.type.WhichOneof("value") not in (None, "tensor_type"):
                return (f"inside {where}; the body passes {value.name!r}, a "
                        f"{value.type.WhichOneof('value').replace('_type', '')} and not a tensor, "
                        f"which the calibration cannot feed")
    return None


class _Defs:
    """What one graph defines, looked up by name: initializers, node outputs (with their node), formal inputs."""

    def __init__(self, graph: onnx.GraphProto):
        self.graph = graph
        self.initializers = {t.name: t for t in graph.initializer}
        self.producers = {o: n for n in graph.node for o in n.output if o}
        self.inputs = {v.name for v in graph.input}
        self.infos = {v.name: v for v in list(graph.input) + list(graph.value_info) + list(graph.output)
                      if v.type.HasField("tensor_type")}

    def defines(self, name: str) -> bool:
        return name in self.initializers or name in self.producers or name in self.inputs

    def constant(self, name: str) -> onnx.TensorProto | None:
        """``name`` as a TensorProto (a copy) if it is an initializer or a Constant output here, else None."""
        found = self.initializers.get(name)
        if found is not None:
            out = onnx.TensorProto()
            out.CopyFrom(found)
            return out
        node = self.producers.get(name)
        if node is None or node.op_type != "Constant" or node.domain not in DEFAULT_DOMAINS:
            return None
        value = next((a.t for a in node.attribute if a.name == "value"), None)
        if value is not None:
            out = onnx.TensorProto()
            out.CopyFrom(value)
            out.name = name
            return out
        array = GraphIndex.of_graph(self.graph, {}).const(name)  # value_float, value_ints, ...: small by definition
        return None if array is None else numpy_helper.from_array(np.asarray(array), name)


@dataclass
class OuterReads:
    """What a body reads from its enclosing graphs: constants (TensorProtos named as read) and run-time values
    (names in the order read, with their declared types where the enclosing graph states them)."""

    constants: dict[str, onnx.TensorProto]
    dynamic: list[str]
    types: dict[str, onnx.ValueInfoProto]


def outer_reads(place: BodyPlace) -> OuterReads:
    """The values the body of ``place`` (and the bodies inside it) reads from enclosing graphs, each looked up
    in the nearest enclosing graph that defines it."""
    reads = OuterReads({}, [], {})
    enclosing = [_Defs(g) for g in reversed(place.graphs[:-1])]  # nearest first
    for name in sorted(outer_names(place.body)):
        defs = next((d for d in enclosing if d.defines(name)), None)
        if defs is None:
            continue
        tensor = defs.constant(name)
        if tensor is not None:
            reads.constants[name] = tensor
            continue
        reads.dynamic.append(name)
        if name in defs.infos:
            reads.types[name] = defs.infos[name]
    return reads


def model_names(model: onnx.ModelProto) -> set[str]:
    """Every node and tensor name in every graph of ``model``: what a new name must avoid anywhere."""
    names: set[str] = set()
    for g in (model.graph, *subgraphs(model.graph)):
        names |= {n.name for n in g.node} | {t for n in g.node for t in list(n.input) + list(n.output) if t}
        names |= {t.name for t in g.initializer}
        names |= {v.name for v in list(g.input) + list(g.output) + list(g.value_info)}
    return names


def _shell(model: onnx.ModelProto, graph: onnx.GraphProto) -> onnx.ModelProto:
    """A model around ``graph`` with ``model``'s IR version, opsets and local functions."""
    out = onnx.ModelProto()
    out.ir_version = model.ir_version
    out.opset_import.extend(model.opset_import)
    out.functions.extend(model.functions)
    out.graph.CopyFrom(graph)
    return out


def body_as_model(model: onnx.ModelProto, path: BodyPath) -> tuple[onnx.ModelProto, set[str]]:
    """The body at ``path`` as a model to analyse and rewrite, and the names borrowed from outside.

    Its graph is a copy of the body plus, as initializers, the outer constants
    it reads (borrowed: :func:`put_body` leaves them out again), typed
    value_info for the outer run-time values it reads, and an untyped
    value_info entry for every other name of the model, so a builder that
    avoids the graph's names avoids every scope's (the rewriter drops value_info
    of tensors the graph does not produce).
    """
    place = find_body(model, path)
    reads = outer_reads(place)
    out = _shell(model, place.body)
    g = out.graph
    g.initializer.extend(reads.constants.values())
    g.value_info.extend(reads.types.values())
    mine = {v.name for v in g.value_info} | {v.name for v in g.input} | {v.name for v in g.output} \
        | {t.name for t in g.initializer} | {t for n in g.node for t in n.output}
    g.value_info.extend(onnx.ValueInfoProto(name=n) for n in sorted(model_names(model) - mine))
    return out, set(reads.constants)


def put_body(model: onnx.ModelProto, path: BodyPath, graph: onnx.GraphProto, borrowed: set[str]) -> None:
    """Make ``graph`` the body at ``path`` of ``model`` (in place), without the ``borrowed`` outer constants
    (:func:`body_as_model`) and without value_info for names it does not define."""
    place = find_body(model, path)
    new = onnx.GraphProto()
    new.CopyFrom(graph)
    kept = [t for t in new.initializer if t.name not in borrowed]
    del new.initializer[:]
    new.initializer.extend(kept)
    defined = {t.name for t in new.initializer} | {v.name for v in new.input} | {t for n in new.node for t in n.output}
    infos = [v for v in new.value_info if v.name in defined and v.type.HasField("tensor_type")]
    del new.value_info[:]
    new.value_info.extend(infos)
    _graph_attribute(place.owner, place.attribute).g.CopyFrom(new)


def _typed(name: str, value: np.ndarray) -> onnx.ValueInfoProto:
    """A graph input of ``value``'s dtype and rank, every dimension left free (feeds vary from run to run)."""
    elem = helper.np_dtype_to_tensor_dtype(np.asarray(value).dtype)
    return helper.make_tensor_value_info(name, elem, [None] * np.asarray(value).ndim)


def standalone_body(model: onnx.ModelProto, path: BodyPath, outputs: list[str],
                    example: dict[str, np.ndarray]) -> onnx.ModelProto:
    """The body at ``path`` as a runnable model: inputs are its formal inputs, then the outer run-time values it
    reads, typed from ``example`` (one run's feeds, by name); the outer constants it reads are initializers;
    its outputs are ``outputs`` (tensors the body computes)."""
    place = find_body(model, path)
    reads = outer_reads(place)
    out = _shell(model, place.body)
    g = out.graph
    names = [v.name for v in place.body.input] + reads.dynamic
    missing = [n for n in names if n not in example]
    if missing:
        raise BadModelError(f"{describe(place.owner, place.attribute)}: no value for {missing[0]!r} to run it")
    del g.input[:]
    g.input.extend(_typed(n, example[n]) for n in names)
    g.initializer.extend(reads.constants.values())
    # element types where the body states them, shapes left to onnxruntime (dims vary from run to run)
    elems = {v.name: v.type.tensor_type.elem_type for v in list(place.body.value_info) + list(place.body.output)
             if v.type.HasField("tensor_type") and v.type.tensor_type.elem_type}
    del g.output[:]
    g.output.extend(helper.make_tensor_value_info(n, elems[n], None) if n in elems else onnx.ValueInfoProto(name=n)
                    for n in outputs)
    return out
