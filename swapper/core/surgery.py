"""Graph surgery for the rewriter: put new nodes where a site's nodes were, drop what died.

Transformation: given each site's node positions and the nodes (plus
initializers) that replace them, the graph gets the new nodes at the place of
each site's first node, loses the site's nodes, and then loses initializers,
Constant nodes and value_info that nothing reads any more, but only ones the
graph read before the edit, so a caller's new tensors are never dropped.
Subgraphs (If/Loop/Scan bodies) count as readers.

Also the one way a layer's constant input gets a new value
(:func:`set_const_input`, used by bias correction and refit): in place when
that input alone reads the initializer, else as a fresh copy; the rewriter's
always-fresh copies use the same naming (:func:`copy_name`) and IR < 4 rule
(:func:`add_initializers`).
"""
from __future__ import annotations

import logging

import numpy as np
import onnx
from onnx import helper, numpy_helper

from swapper.core.emit import Emitter
from swapper.core.graph import node_subgraphs, subgraphs
from swapper.errors import BadModelError, UsageError

logger = logging.getLogger(__name__)


def _bodies(nodes):
    """Every graph nested in ``nodes`` (bodies of bodies included)."""
    for node in nodes:
        for body in node_subgraphs(node):
            yield body
            yield from subgraphs(body)


def deep_inputs(nodes) -> set[str]:
    """Every tensor name read by ``nodes``, including from inside their subgraphs."""
    used = {t for node in nodes for t in node.input if t}
    for body in _bodies(nodes):
        used.update(t for node in body.node for t in node.input if t)
        used.update(o.name for o in body.output)  # a body may pass an outer tensor straight out
    return used


def readers(model: onnx.ModelProto, name: str) -> int:
    """How many times ``name`` is read: node inputs (subgraphs included, as :func:`deep_inputs`) and outputs."""
    graphs = [model.graph, *subgraphs(model.graph)]
    return sum(list(n.input).count(name) for g in graphs for n in g.node) \
        + sum(1 for g in graphs for o in g.output if o.name == name)


def site_positions(model: onnx.ModelProto, sites: list) -> dict[str, list[int]]:
    """Site id -> sorted positions of its nodes in ``model``; names must be unique and sites disjoint.

    ``sites``: anything with an ``id`` and the ``nodes`` (node names) it replaces, e.g. scan's ``Site``.
    """
    positions: dict[str, list[int]] = {}
    for i, node in enumerate(model.graph.node):
        positions.setdefault(node.name, []).append(i)
    out, owner = {}, {}
    for site in sites:
        pos = []
        for name in site.nodes:
            found = positions.get(name, [])
            if len(found) != 1:
                what = "not found" if not found else "not unique (load the model with swapper.core.model_io.load_model)"
                raise BadModelError(f"site {site.id}: node name {name!r} is {what}")
            if found[0] in owner:
                raise UsageError(f"sites {owner[found[0]]} and {site.id} share node {name!r}")
            owner[found[0]] = site.id
            pos.append(found[0])
        out[site.id] = sorted(pos)
    return out


def splice(model: onnx.ModelProto, sites: list, positions: dict[str, list[int]],
           inserts: dict[str, list[onnx.NodeProto]], initializers: list[onnx.TensorProto],
           used_before: set[str]) -> None:
    """Replace each site's nodes by its inserted nodes (at the first site node); drop what became unused.

    ``used_before``: the tensors the graph read before any edit (only those may be dropped).
    """
    g = model.graph
    removed = {p for s in sites for p in positions[s.id]}
    at = {positions[s.id][0]: inserts[s.id] for s in sites}
    kept = [n for i, n in enumerate(g.node) if i not in removed]
    new_nodes = [n for s in sites for n in inserts[s.id]]
    used = deep_inputs(kept + new_nodes) | {o.name for o in g.output}
    outputs = {s.output for s in sites}
    for i in sorted(removed):
        node = g.node[i]
        dangling = [t for t in node.output if t and t in used and t not in outputs]
        if dangling and node.op_type == "Constant":
            removed.discard(i)  # a shared constant of the pattern: keep it for its other readers
        elif dangling:
            raise BadModelError(f"site tensor {dangling[0]!r} is also read outside the site")
    nodes = []
    for i, node in enumerate(g.node):
        nodes.extend(at.get(i, []))
        if i not in removed:
            nodes.append(node)
    del g.node[:]
    g.node.extend(nodes)
    add_initializers(model, initializers)
    drop_unused(model, used_before, used)


def drop_unused(model: onnx.ModelProto, used_before: set[str], used: set[str] | None = None) -> None:
    """Remove initializers and Constants in ``used_before`` nothing reads now, and stale value_info.

    ``used``: what the graph reads now (:func:`used_names`), when the caller has it already.
    """
    g = model.graph
    used = used_names(model) if used is None else used
    gone = {t.name for t in g.initializer if t.name in used_before and t.name not in used}
    stale_consts = [n for n in g.node if n.op_type == "Constant" and n.output[0] in used_before
                    and n.output[0] not in used]
    if gone:
        keep = [t for t in g.initializer if t.name not in gone]
        del g.initializer[:]
        g.initializer.extend(keep)
        keep_in = [v for v in g.input if v.name not in gone]
        del g.input[:]
        g.input.extend(keep_in)
    if stale_consts:
        drop = {n.output[0] for n in stale_consts}
        keep_nodes = [n for n in g.node if not (n.op_type == "Constant" and n.output[0] in drop)]
        del g.node[:]
        g.node.extend(keep_nodes)
    produced = {t for n in g.node for t in n.output} | {v.name for v in g.input} | {t.name for t in g.initializer}
    keep_vi = [v for v in g.value_info if v.name in produced]
    del g.value_info[:]
    g.value_info.extend(keep_vi)
    logger.debug("dropped %d initializers, %d constants", len(gone), len(stale_consts))


def used_names(model: onnx.ModelProto) -> set[str]:
    """Tensors read by any node (subgraphs included) or listed as graph outputs."""
    return deep_inputs(model.graph.node) | {o.name for o in model.graph.output}


def all_names(model: onnx.ModelProto) -> set[str]:
    """Every node and tensor name of the main graph: what a new name must avoid."""
    g = model.graph
    names = {n.name for n in g.node} | {t for n in g.node for t in list(n.input) + list(n.output)}
    names |= {t.name for t in g.initializer} | {v.name for v in list(g.input) + list(g.output) + list(g.value_info)}
    return names


def add_initializers(model: onnx.ModelProto, tensors: list[onnx.TensorProto]) -> None:
    """Append ``tensors`` as initializers (IR < 4: also as graph inputs, as that IR requires)."""
    model.graph.initializer.extend(tensors)
    if model.ir_version < 4:
        for t in tensors:
            model.graph.input.append(helper.make_tensor_value_info(t.name, t.data_type, list(t.dims)))


def input_at(node: onnx.NodeProto, slot: int) -> str:
    """Name of ``node``'s input ``slot`` ("" when absent, e.g. an optional bias)."""
    return node.input[slot] if slot < len(node.input) else ""


def copy_name(node: onnx.NodeProto, slot: int, taken: set[str], prefix: str, hint: str | None = None) -> str:
    """A new name for a private copy of ``node``'s input ``slot``: ``prefix/node/in<slot>`` (or
    ``prefix/hint``), made unique against ``taken`` and added to it."""
    return Emitter(prefix, 0, taken).fresh(hint or f"{node.name}/in{slot}")


def rewire(node: onnx.NodeProto, slot: int, name: str) -> None:
    """Make ``node`` read ``name`` in input ``slot``, padding skipped optional inputs with ""."""
    while len(node.input) <= slot:
        node.input.append("")
    node.input[slot] = name


def set_const_input(model: onnx.ModelProto, node: onnx.NodeProto, slot: int, value: np.ndarray, dtype,
                    taken: set[str], prefix: str, hint: str | None = None) -> str:
    """Make ``node``'s input ``slot`` hold ``value`` (as ``dtype``); returns the tensor's name.

    An initializer only this slot reads (subgraphs and graph outputs count, as
    in :func:`readers`) is overwritten in place; anything else (shared, a
    Constant node, absent) is left as it is and the slot is rewired to a fresh
    copy named by :func:`copy_name`.
    """
    name = input_at(node, slot)
    tensor = numpy_helper.from_array(np.asarray(value).astype(dtype), name)
    init = next((t for t in model.graph.initializer if t.name == name), None) if name else None
    if init is not None and readers(model, name) == 1:
        if list(init.dims) != list(tensor.dims) or init.data_type != tensor.data_type:
            _redeclare(model, tensor)
        init.CopyFrom(tensor)
        return name
    tensor.name = copy_name(node, slot, taken, prefix, hint)
    add_initializers(model, [tensor])
    rewire(node, slot, tensor.name)
    return tensor.name


def _redeclare(model: onnx.ModelProto, tensor: onnx.TensorProto) -> None:
    """Make the declarations of initializer ``tensor`` state its new type: its graph input entry (always
    there in IR < 4) is rewritten, a value_info entry (inferred for the old shape) dropped."""
    g = model.graph
    for v in g.input:
        if v.name == tensor.name:
            v.CopyFrom(helper.make_tensor_value_info(tensor.name, tensor.data_type, list(tensor.dims)))
    keep = [v for v in g.value_info if v.name != tensor.name]
    if len(keep) != len(g.value_info):
        del g.value_info[:]
        g.value_info.extend(keep)


def copy_model(model: onnx.ModelProto) -> onnx.ModelProto:
    """A deep copy (the input model is never mutated)."""
    out = onnx.ModelProto()
    out.CopyFrom(model)
    return out
