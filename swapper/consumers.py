"""The linear layers that read a swapped site: reached, and seen as a regression θ = [W; bias].

Reaching (:func:`reach_linear`): from a site output, walk forward through
ops that commute with a per-channel map y -> a·y + d (ONNX operator spec
semantics): MaxPool / GlobalMaxPool (max(a·x) = a·max(x) needs a >= 0;
max(x + d) = max(x) + d also with the implied -inf padding), AveragePool /
GlobalAveragePool (linear; + d passes only without zero padding in the count),
Flatten / Reshape / Squeeze / Unsqueeze / Identity when the channel index maps
one-to-one (checked on inferred shapes), and a Mul by another tensor (a "gate":
a·x·s = a·(x·s); + d does not pass), to the Conv / ConvTranspose / Gemm /
MatMul layers behind them. Every other reader is a dead end, reported as a
reason. Each reached layer is a :class:`Reach`: the steps on its way and
where the channel axis lies at its input.

Regression view (refit): a site output's readers become :class:`Consumer`
records (Gemm with constant B/C; MatMul with a constant 2-D B followed by a
constant bias Add; Conv with constant weights and group = 1), each with its
weights and bias as one (inputs + 1, outputs) matrix θ such that output =
[x, 1]·θ (:func:`theta_of`: Conv weights flattened in im2col column order,
Gemm alpha and beta folded in), and back (:func:`write_theta`, in the model's
dtypes and layouts; a shared initializer is never changed in place).
"""
from __future__ import annotations

import logging
import math
from dataclasses import dataclass

import numpy as np
import onnx
from onnx import helper, numpy_helper

from .emit import Emitter
from .graph import GraphIndex, attr
from .sites import Site

logger = logging.getLogger(__name__)

_DEFAULT = ("", "ai.onnx")
LINEAR = ("Conv", "ConvTranspose", "Gemm", "MatMul")
MAX_POOLS = ("MaxPool", "GlobalMaxPool")
AVG_POOLS = ("AveragePool", "GlobalAveragePool")
RESHAPES = ("Flatten", "Reshape", "Squeeze", "Unsqueeze", "Identity")


# ------------------------------------------------------------ shared look-ups
def float_const(index: GraphIndex, name: str) -> np.ndarray | None:
    """The value of ``name`` if it is a floating-point constant, else None."""
    if not name:
        return None
    value = index.const(name)
    if value is None or value.dtype.kind != "f":
        return None
    return value


def sole_bias_add(index: GraphIndex, mm: onnx.NodeProto) -> onnx.NodeProto | None:
    """The constant-bias Add that alone reads a MatMul's output, if any."""
    out = mm.output[0]
    users = index.users(out)
    if index.is_graph_output(out) or len(users) != 1 or users[0].op_type != "Add" \
            or users[0].domain not in _DEFAULT:
        return None
    add = users[0]
    if list(add.input).count(out) != 1:
        return None
    other = add.input[1] if add.input[0] == out else add.input[0]
    return add if float_const(index, other) is not None else None



# ------------------------------------------------------------------ reaching
@dataclass
class Step:
    """One pass-through op between a site output and a linear layer."""

    node: onnx.NodeProto
    kind: str  # "max" (a needs a >= 0) | "avg" | "reshape" | "gate" (d never passes)
    d_block: str = ""  # why y + d does not pass as + d ("" when it does)


@dataclass
class Reach:
    """A linear layer reading ``tensor``, the site output carried there by ``steps``."""

    node: onnx.NodeProto
    tensor: str
    steps: tuple[Step, ...]
    axis: int | None  # channel axis of per-channel parameters at ``tensor`` (None: scalar or unknown)
    rank: int | None

    @property
    def a_positive(self) -> bool:
        """a passes only when a >= 0 on every channel (a max pool is on the way)."""
        return any(s.kind == "max" for s in self.steps)

    @property
    def d_block(self) -> str:
        return next((s.d_block for s in self.steps if s.d_block), "")


def _label(node: onnx.NodeProto) -> str:
    return f"consumer {node.op_type} {node.name!r}"


def _norm(axis: int | None, rank: int | None) -> int | None:
    return axis + rank if axis is not None and axis < 0 and rank is not None else axis


def _prod(dims) -> int | None:
    return math.prod(dims) if all(isinstance(d, int) and d > 0 for d in dims) else None


def channel_after_reshape(before: tuple | None, after: tuple | None, axis: int, channels: int) -> int | None:
    """The axis of ``after`` holding channel ``c`` of ``before``'s ``axis`` unchanged, or None.

    Row-major reshapes keep the channel index iff the output has an axis of
    size C with the same number of elements after it (or the same dims before it).
    """
    if before is None or after is None or not 0 <= axis < len(before) or before[axis] != channels:
        return None
    tail = _prod(before[axis + 1:])
    head = tuple(before[:axis])
    for k, dim in enumerate(after):
        if dim != channels:
            continue
        if tail is not None and _prod(after[k + 1:]) == tail:
            return k
        if None not in head and tuple(after[:k]) == head:
            return k
    return None


def _avg_d_block(node: onnx.NodeProto) -> str:
    """Why an average pool does not pass + d: zero padding counted in the mean."""
    if node.op_type == "GlobalAveragePool" or int(attr(node, "count_include_pad", 0)) == 0:
        return ""
    auto_pad = attr(node, "auto_pad", b"NOTSET")
    auto_pad = auto_pad.decode() if isinstance(auto_pad, bytes) else str(auto_pad)
    padded = any(p != 0 for p in (attr(node, "pads", None) or [])) or auto_pad not in ("NOTSET", "VALID") \
        or int(attr(node, "ceil_mode", 0)) != 0
    return f"AveragePool {node.name!r} counts zero padding in its mean" if padded else ""


def _step(index: GraphIndex, node: onnx.NodeProto, tensor: str, axis: int | None, rank: int | None,
          channels: int, gates: bool) -> tuple[Step | None, int | None, int | None, str]:
    """How ``node`` carries per-channel parameters from ``tensor``: (step, axis, rank after it, why not)."""
    op, label = node.op_type, _label(node)
    outs = [o for o in node.output if o]
    out_shape = index.shape(outs[0]) if outs else None
    out_rank = len(out_shape) if out_shape is not None else None
    if node.domain not in _DEFAULT or op not in MAX_POOLS + AVG_POOLS + RESHAPES + ("Mul",) \
            or (op == "Mul" and not gates):
        ways = "pool, reshape or gate Mul" if gates else "pool or reshape"
        return None, None, None, f"{label} is not a linear layer (nor a {ways} the parameters pass through)"
    if len(outs) != 1:  # e.g. MaxPool's Indices: they would have to stay valid too
        return None, None, None, f"{label} has more than one output"
    if op != "Mul" and node.input[0] != tensor:
        return None, None, None, f"{label} does not read {tensor!r} as its data input"
    if op in MAX_POOLS + AVG_POOLS:
        if axis is not None and (rank is None or rank < 3 or _norm(axis, rank) != 1):
            return None, None, None, f"{label} pools along the parameters' channel axis {axis}"
        kind = "max" if op in MAX_POOLS else "avg"
        return Step(node, kind, "" if kind == "max" else _avg_d_block(node)), axis, rank, ""
    if op in RESHAPES:
        if axis is None:
            return Step(node, "reshape"), None, out_rank, ""
        new = channel_after_reshape(index.shape(tensor), out_shape, _norm(axis, rank), channels)
        if new is None:
            return None, None, None, f"{label} does not keep the {channels} channels on one axis"
        return Step(node, "reshape"), new, out_rank, ""
    # Mul by another operand: a·x·s = a·(x·s), but (x + d)·s != x·s + d
    gate = Step(node, "gate", f"Mul {node.name!r} multiplies it (a gate)")
    if len(node.input) != 2:
        return None, None, None, f"{label} does not have two inputs"
    if axis is None:
        return gate, None, out_rank, ""
    if rank is None or out_rank is None or out_rank < rank:
        return None, None, None, f"{label}: ranks unknown, cannot follow the channel axis"
    new = _norm(axis, rank) + out_rank - rank
    if isinstance(out_shape[new], int) and out_shape[new] != channels:
        return None, None, None, f"{label} broadcasts the channel axis"
    return gate, new, out_rank, ""


def reach_linear(index: GraphIndex, start: str, axis: int | None, rank: int | None, channels: int, *,
                 gates: bool = True, limit: int = 64) -> tuple[list[Reach], list[str]]:
    """The linear layers behind pass-through ops from ``start`` (module docstring), and the dead ends.

    ``axis``/``rank``: where per-channel parameters run at ``start`` (axis None:
    one scalar set, so any reshape passes). ``gates``: follow Mul by other
    tensors (a only). A dead end is a reader that is neither, a graph output on
    the way, or a node reading two carried tensors (x·x is not linear).
    """
    reached: list[Reach] = []
    failed: list[str] = []
    carried, seen = {start}, {}
    queue = [(start, (), axis, rank)]
    while queue:
        tensor, steps, ax, rk = queue.pop(0)
        if tensor != start and index.is_graph_output(tensor):
            failed.append(f"{tensor!r} (after {steps[-1].node.op_type}) is a graph output")
        users = sorted({n.name: n for n in index.users(tensor)}.values(),
                       key=lambda n: index.node_position.get(n.name, 0))
        for node in users:
            if node.name in seen:
                continue  # read through two carried tensors: caught below
            seen[node.name] = node
            if node.domain in _DEFAULT and node.op_type in LINEAR:
                reached.append(Reach(node, tensor, steps, ax, rk))
                continue
            if len(steps) >= limit:
                failed.append(f"{_label(node)}: more than {limit} pass-through ops")
                continue
            step, new_ax, new_rk, why = _step(index, node, tensor, ax, rk, channels, gates)
            if step is None:
                failed.append(why)
                continue
            carried.add(node.output[0])
            queue.append((node.output[0], steps + (step,), new_ax, new_rk))
    for node in sorted(seen.values(), key=lambda n: index.node_position.get(n.name, 0)):
        if sum(1 for t in node.input if t in carried) != 1 and node.op_type not in LINEAR:
            failed.append(f"{_label(node)} reads the site output along two paths")
    logger.debug("reach from %s: %d layers, %d dead ends", start, len(reached), len(failed))
    return reached, failed


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
        w = float_const(index, node.input[1])
        bias_name = node.input[2] if len(node.input) > 2 else ""
        bias = float_const(index, bias_name) if bias_name else None
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
            if not _along_last(float_const(index, add.input[slot]), w.shape[1]):
                notes.append(f"{label}: its bias does not run along the output channels")
                continue
            found.append(Consumer(site.id, "matmul", node.name, add.name, slot, site.output, add.output[0]))
    return found, notes


def _bias_add(index: GraphIndex, mm: onnx.NodeProto, blocked: set[str]) -> onnx.NodeProto | None:
    """The constant-bias Add that alone reads ``mm``'s output, unless it belongs to a swapped site."""
    add = sole_bias_add(index, mm)
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
