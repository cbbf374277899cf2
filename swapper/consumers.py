"""The linear layers that read a swapped site, seen as a regression θ = [W; bias].

Transformation: a site output's readers become :class:`Consumer` records (Gemm
with constant B/C; MatMul with a constant 2-D B followed by a constant bias
Add; Conv with constant weights and group = 1), each with its weights and
bias as one (inputs + 1, outputs) matrix θ such that output = [x, 1]·θ
(:func:`theta_of`: Conv weights flattened in im2col column order, Gemm alpha
and beta folded in), and back (:func:`write_theta`, in the model's dtypes and
layouts; a shared initializer is never changed in place).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import onnx
from onnx import helper, numpy_helper

from .emit import Emitter
from .fold import _bias_add as _sole_bias_add, _float_const
from .graph import GraphIndex, attr
from .sites import Site

_DEFAULT = ("", "ai.onnx")


@dataclass
class Consumer:
    """A linear layer reading a site output, by node names (valid in every copy of the graph)."""

    site_id: str
    kind: str  # "conv" | "gemm" | "matmul"
    node: str  # the layer holding the weight
    bias_node: str  # the node holding the bias (the Add of a MatMul), == node otherwise
    bias_slot: int  # input slot of the bias in bias_node (may not exist yet: Conv/Gemm without bias)
    data: str  # the site output it reads
    output: str  # the tensor the regression targets (the Add output for MatMul)


def _along_last(value: np.ndarray, width: int) -> bool:
    """A bias that broadcasts along the last axis only: shape (), (1,), (W,), (1, W), ..."""
    return value.size in (1, width) and (value.ndim == 0 or value.shape[-1] == value.size)


def find_consumers(index: GraphIndex, site: Site, blocked: set[str]) -> tuple[list[Consumer], list[str]]:
    """The refittable linear consumers of ``site.output`` in graph order, and notes on the others."""
    found, notes = [], []
    users = sorted({n.name: n for n in index.users(site.output)}.values(),
                   key=lambda n: index.node_position[n.name])
    for node in users:
        label = f"no refit of {node.op_type} {node.name!r}"
        if node.name in blocked:
            notes.append(f"{label}: it is part of a swapped site")
            continue
        if node.domain not in _DEFAULT or node.op_type not in ("Conv", "Gemm", "MatMul"):
            notes.append(f"{label}: not a linear layer")
            continue
        if [t for t in node.input].count(site.output) != 1 or node.input[0] != site.output:
            notes.append(f"{label}: does not read the site as its data input only")
            continue
        w = _float_const(index, node.input[1])
        bias_name = node.input[2] if len(node.input) > 2 else ""
        bias = _float_const(index, bias_name) if bias_name else None
        if w is None or (bias_name and bias is None):
            notes.append(f"{label}: weights are not constant")
            continue
        if node.op_type == "Conv":
            if int(attr(node, "group", 1)) != 1:
                notes.append(f"{label}: grouped Conv (group={attr(node, 'group', 1)})")
                continue
            found.append(Consumer(site.id, "conv", node.name, node.name, 2, site.output, node.output[0]))
        elif node.op_type == "Gemm":
            width = w.shape[0] if attr(node, "transB", 0) else w.shape[1]
            if int(attr(node, "transA", 0)) or float(attr(node, "alpha", 1.0)) == 0.0 \
                    or float(attr(node, "beta", 1.0)) == 0.0:
                notes.append(f"{label}: transA=1, alpha=0 or beta=0")
                continue
            if bias is not None and not _along_last(bias, width):
                notes.append(f"{label}: C is not a per-output-channel bias")
                continue
            found.append(Consumer(site.id, "gemm", node.name, node.name, 2, site.output, node.output[0]))
        else:
            add = _bias_add(index, node, blocked)
            if w.ndim != 2 or add is None:
                notes.append(f"{label}: needs a 2-D constant weight and a constant bias Add")
                continue
            slot = 1 if add.input[0] == node.output[0] else 0
            if not _along_last(_float_const(index, add.input[slot]), w.shape[1]):
                notes.append(f"{label}: its bias does not run along the output channels")
                continue
            found.append(Consumer(site.id, "matmul", node.name, add.name, slot, site.output, add.output[0]))
    return found, notes


def _bias_add(index: GraphIndex, mm: onnx.NodeProto, blocked: set[str]) -> onnx.NodeProto | None:
    """The constant-bias Add that alone reads ``mm``'s output, unless it belongs to a swapped site."""
    add = _sole_bias_add(index, mm)
    return None if add is None or add.name in blocked else add


def _bias_name(index: GraphIndex, c: Consumer) -> str:
    node = index.nodes_by_name[c.bias_node]
    return node.input[c.bias_slot] if c.bias_slot < len(node.input) else ""


def theta_of(index: GraphIndex, c: Consumer) -> np.ndarray:
    """[W_eff; bias_eff] (inputs + 1, outputs) of the consumer so that output = [x, 1]·θ."""
    node = index.nodes_by_name[c.node]
    w = index.const(node.input[1]).astype(np.float64)
    name = _bias_name(index, c)
    bias = index.const(name).astype(np.float64).ravel() if name else np.zeros(1)
    if c.kind == "conv":
        w_eff = w.reshape(w.shape[0], -1).T
    elif c.kind == "gemm":
        w_eff = float(attr(node, "alpha", 1.0)) * (w.T if attr(node, "transB", 0) else w)
        bias = float(attr(node, "beta", 1.0)) * bias
    else:
        w_eff = w
    return np.vstack([w_eff, np.broadcast_to(bias, (w_eff.shape[1],))[None, :]])


# ---------------------------------------------------------------- writing
def _references(model: onnx.ModelProto, name: str) -> int:
    def count(nodes) -> int:
        total = 0
        for n in nodes:
            total += sum(1 for t in n.input if t == name)
            for a in n.attribute:
                for g in ([a.g] if a.type == onnx.AttributeProto.GRAPH else list(a.graphs)):
                    total += count(g.node)
        return total
    return count(model.graph.node) + sum(1 for o in model.graph.output if o.name == name)


def _put(model: onnx.ModelProto, index: GraphIndex, node: onnx.NodeProto, slot: int, value: np.ndarray,
         dtype: np.dtype) -> None:
    """Set ``node`` input ``slot`` to ``value``: in place if only it reads the initializer, else a fresh copy."""
    name = node.input[slot] if slot < len(node.input) else ""
    tensor = numpy_helper.from_array(np.asarray(value).astype(dtype), name)
    init = index.initializers.get(name) if name else None
    if init is not None and list(init.dims) == list(tensor.dims) and _references(model, name) == 1:
        init.CopyFrom(tensor)
        return
    taken = {t.name for t in model.graph.initializer} | {t for n in model.graph.node for t in
                                                         list(n.input) + list(n.output)}
    fresh = Emitter("swapper/refit", index.opset, taken).fresh(f"{node.name}/in{slot}")
    tensor.name = fresh
    model.graph.initializer.append(tensor)
    if model.ir_version < 4:  # old IR: initializers are also graph inputs
        model.graph.input.append(helper.make_tensor_value_info(fresh, tensor.data_type, list(tensor.dims)))
    while len(node.input) <= slot:
        node.input.append("")
    node.input[slot] = fresh


def write_theta(model: onnx.ModelProto, c: Consumer, theta: np.ndarray) -> None:
    """Store ``theta`` (as from :func:`theta_of`) back into the consumer's weight and bias, in their dtypes."""
    index = GraphIndex.of(model)
    node, bias_node = index.nodes_by_name[c.node], index.nodes_by_name[c.bias_node]
    w = index.const(node.input[1])
    old_bias_name = _bias_name(index, c)
    old_bias = index.const(old_bias_name) if old_bias_name else None
    w_eff, bias = theta[:-1], theta[-1]
    if c.kind == "conv":
        new_w = w_eff.T.reshape(w.shape)
    elif c.kind == "gemm":
        new_w = w_eff / float(attr(node, "alpha", 1.0))
        new_w = new_w.T if attr(node, "transB", 0) else new_w
        bias = bias / float(attr(node, "beta", 1.0))
    else:
        new_w = w_eff
    if old_bias is not None and old_bias.size == bias.size:
        bias = bias.reshape(old_bias.shape)  # keep the layout the model had
    _put(model, index, node, 1, new_w, w.dtype)
    _put(model, index, bias_node, c.bias_slot, bias, old_bias.dtype if old_bias is not None else w.dtype)
