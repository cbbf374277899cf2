"""The linear layers that read a swapped site: reached, and seen as a regression θ = [W; bias].

Layers (:func:`linear_layer`, the one test placement, bias correction and
refit share): a Conv / ConvTranspose / Gemm / MatMul (``LINEAR``) that reads a
tensor as its data input only, with constant weights; its bias is input 2, or
for a MatMul the constant operand of the Add that alone reads it; its channels
come from the weight layout (:func:`layer_widths`, ONNX operator spec).

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

from swapper.core.conv import pads_input
from swapper.core.graph import GraphIndex, attr, is_op
from swapper.core.surgery import all_names, input_at, set_const_input
from swapper.scan.match import other_operand
from swapper.scan.sites import Site

logger = logging.getLogger(__name__)

LINEAR = ("Conv", "ConvTranspose", "Gemm", "MatMul")
MAX_POOLS = ("MaxPool", "GlobalMaxPool")
AVG_POOLS = ("AveragePool", "GlobalAveragePool")
RESHAPES = ("Flatten", "Reshape", "Squeeze", "Unsqueeze", "Identity")
_REFIT = "swapper/refit"  # name prefix of the weight copies write_theta makes


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
    if index.is_graph_output(out) or len(users) != 1 or not is_op(users[0], "Add"):
        return None
    add = users[0]
    if list(add.input).count(out) != 1:
        return None
    return add if float_const(index, other_operand(add, out)) is not None else None


@dataclass
class Layer:
    """A linear layer reading a tensor as its data input, with constant weights (:func:`linear_layer`)."""

    kind: str  # "conv" | "convtranspose" | "gemm" | "matmul"
    node: onnx.NodeProto
    weight: np.ndarray  # input 1
    bias: np.ndarray | None  # the bias value (None: no bias yet)
    bias_node: onnx.NodeProto | None  # holds the bias: ``node`` itself, a MatMul's bias Add, None (MatMul, no Add)
    bias_slot: int  # input slot of the bias in bias_node (2 for Conv/Gemm, even while it is absent)

    @property
    def add(self) -> onnx.NodeProto | None:
        """The constant-bias Add after a MatMul, if any."""
        return self.bias_node if self.kind == "matmul" else None

    def bias_name(self) -> str:
        """The bias tensor ("" when the layer has none)."""
        return input_at(self.bias_node, self.bias_slot) if self.bias_node is not None else ""

    @property
    def axis(self) -> str:
        """Where its input and output channels run: "first" (axis 1) or "last"."""
        return "first" if self.kind in ("conv", "convtranspose") else "last"

    def widths(self) -> tuple[int, int]:
        """(input channels it reads, output channels it writes), from the weight layout (module docstring)."""
        return layer_widths(self.kind, self.node, self.weight)


def layer_widths(kind: str, node: onnx.NodeProto, w: np.ndarray) -> tuple[int, int]:
    """(input, output) channels of a ``kind`` layer with weight ``w``: Conv W [M, C/group, k...],
    ConvTranspose W [C, M/group, k...], Gemm B [K, N] (transB: [N, K]), MatMul B [..., K, N] (1-D: [K])."""
    group = int(attr(node, "group", 1))
    if kind == "conv":
        return w.shape[1] * group, w.shape[0]
    if kind == "convtranspose":
        return w.shape[0], w.shape[1] * group
    if kind == "gemm":
        return (w.shape[1], w.shape[0]) if attr(node, "transB", 0) else (w.shape[0], w.shape[1])
    return (w.shape[-2], w.shape[-1]) if w.ndim >= 2 else (w.shape[0], 1)


def linear_layer(index: GraphIndex, node: onnx.NodeProto, tensor: str) -> tuple[Layer | None, str]:
    """``node`` as a linear layer reading ``tensor`` as its data input only, with constant weights and
    bias; or None and why not (a phrase to follow the node's label: "is not a linear layer", ...)."""
    if not is_op(node, *LINEAR):
        return None, "is not a linear layer"
    if [i for i, t in enumerate(node.input) if t == tensor] != [0]:
        return None, f"does not read {tensor!r} as its data input only"
    w = float_const(index, input_at(node, 1))
    bias_name = input_at(node, 2)
    bias = float_const(index, bias_name)
    if w is None or (bias_name and bias is None):
        return None, "has non-constant weights"
    if node.op_type != "MatMul":
        return Layer(node.op_type.lower(), node, w, bias, node, 2), ""
    add = sole_bias_add(index, node)
    if add is None:
        return Layer("matmul", node, w, None, None, -1), ""
    slot = 1 - list(add.input).index(node.output[0])
    return Layer("matmul", node, w, float_const(index, add.input[slot]), add, slot), ""


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


def norm_axis(axis: int | None, rank: int | None) -> int | None:
    """``axis`` counted from the front (a negative axis needs the rank; unknown rank: left as is)."""
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
    padded = pads_input(node) or int(attr(node, "ceil_mode", 0)) != 0
    return f"AveragePool {node.name!r} counts zero padding in its mean" if padded else ""


def _step(index: GraphIndex, node: onnx.NodeProto, tensor: str, axis: int | None, rank: int | None,
          channels: int, gates: bool) -> tuple[Step | None, int | None, int | None, str]:
    """How ``node`` carries per-channel parameters from ``tensor``: (step, axis, rank after it, why not)."""
    op, label = node.op_type, _label(node)
    outs = [o for o in node.output if o]
    out_shape = index.shape(outs[0]) if outs else None
    out_rank = len(out_shape) if out_shape is not None else None
    if not is_op(node, *MAX_POOLS, *AVG_POOLS, *RESHAPES, "Mul") or (op == "Mul" and not gates):
        ways = "pool, reshape or gate Mul" if gates else "pool or reshape"
        return None, None, None, f"{label} is not a linear layer (nor a {ways} the parameters pass through)"
    if len(outs) != 1:  # e.g. MaxPool's Indices: they would have to stay valid too
        return None, None, None, f"{label} has more than one output"
    if op != "Mul" and node.input[0] != tensor:
        return None, None, None, f"{label} does not read {tensor!r} as its data input"
    if op in MAX_POOLS + AVG_POOLS:
        if axis is not None and (rank is None or rank < 3 or norm_axis(axis, rank) != 1):
            return None, None, None, f"{label} pools along the parameters' channel axis {axis}"
        kind = "max" if op in MAX_POOLS else "avg"
        return Step(node, kind, "" if kind == "max" else _avg_d_block(node)), axis, rank, ""
    if op in RESHAPES:
        if axis is None:
            return Step(node, "reshape"), None, out_rank, ""
        new = channel_after_reshape(index.shape(tensor), out_shape, norm_axis(axis, rank), channels)
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
    new = norm_axis(axis, rank) + out_rank - rank
    if isinstance(out_shape[new], int) and out_shape[new] != channels:
        return None, None, None, f"{label} broadcasts the channel axis"
    return gate, new, out_rank, ""


def reach_linear(index: GraphIndex, start: str, axis: int | None, rank: int | None, channels: int, *,
                 gates: bool = True, limit: int = 64, skip: frozenset = frozenset()
                 ) -> tuple[list[Reach], list[str]]:
    """The linear layers behind pass-through ops from ``start`` (module docstring), and the dead ends.

    ``axis``/``rank``: where per-channel parameters run at ``start`` (axis None:
    one scalar set, so any reshape passes). ``gates``: follow Mul by other
    tensors (a only). A dead end is a reader that is neither, a graph output on
    the way, or a node reading two carried tensors (x·x is not linear). Readers of
    ``start`` named in ``skip`` are left out (the caller routes them: residual Adds).
    """
    reached: list[Reach] = []
    failed: list[str] = []
    carried, seen = {start}, {}
    queue = [(start, (), axis, rank)]
    while queue:
        tensor, steps, ax, rk = queue.pop(0)
        if tensor != start and index.is_graph_output(tensor):
            failed.append(f"{tensor!r} (after {steps[-1].node.op_type}) is a graph output")
        for node in {n.name: n for n in index.users(tensor)}.values():  # graph order, each node once
            if node.name in seen or (tensor == start and node.name in skip):
                continue  # read through two carried tensors: caught below
            seen[node.name] = node
            if is_op(node, *LINEAR):
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
    for node in {n.name: n for n in index.users(site.output)}.values():  # graph order, each node once
        label = f"no refit of {node.op_type} {node.name!r}"
        if node.name in blocked:
            notes.append(f"{label}: it is part of a swapped site")
            continue
        layer, why = linear_layer(index, node, site.output)
        if layer is None:
            notes.append(f"{label}: it {why}")
            continue
        why = _why_not_refit(layer, blocked)
        if why:
            notes.append(f"{label}: {why}")
            continue
        bias = layer.bias_node
        found.append(Consumer(site.id, layer.kind, node.name, bias.name, layer.bias_slot, site.output,
                              bias.output[0]))
    return found, notes


def _why_not_refit(layer: Layer, blocked: set[str]) -> str:
    """Why a linear layer cannot be seen as output = [x, 1]·θ (module docstring), or ""."""
    node, w = layer.node, layer.weight
    if layer.kind == "convtranspose":
        return "transposed convolutions are not refitted"
    if layer.kind == "conv" and int(attr(node, "group", 1)) != 1:
        return f"grouped Conv (group={attr(node, 'group', 1)})"
    if layer.kind == "gemm":
        if int(attr(node, "transA", 0)) or float(attr(node, "alpha", 1.0)) == 0.0 \
                or float(attr(node, "beta", 1.0)) == 0.0:
            return "transA=1, alpha=0 or beta=0"
        if layer.bias is not None and not _along_last(layer.bias, layer.widths()[1]):
            return "C is not a per-output-channel bias"
    if layer.kind == "matmul":
        if w.ndim != 2 or layer.add is None or layer.add.name in blocked:
            return "needs a 2-D constant weight and a constant bias Add"
        if not _along_last(layer.bias, w.shape[1]):
            return "its bias does not run along the output channels"
    return ""


def _bias_name(index: GraphIndex, c: Consumer) -> str:
    return input_at(index.nodes_by_name[c.bias_node], c.bias_slot)


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
def write_theta(model: onnx.ModelProto, c: Consumer, theta: np.ndarray, index: GraphIndex | None = None,
                taken: set[str] | None = None) -> None:
    """Store ``theta`` (as from :func:`theta_of`) back into the consumer's weight and bias, in their dtypes.

    A weight or bias other readers share gets a fresh copy (:func:`swapper.core.surgery.set_const_input`).
    ``index``: a GraphIndex of ``model`` itself, from before any write to this consumer; ``taken``:
    the names new tensors must avoid (:func:`swapper.core.surgery.all_names`, updated here). Callers writing
    many consumers pass both so neither is rebuilt per call.
    """
    index = GraphIndex.of(model) if index is None else index
    taken = all_names(model) if taken is None else taken
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
    set_const_input(model, node, 1, new_w, w.dtype, taken, _REFIT)
    set_const_input(model, bias_node, c.bias_slot, bias, old_bias.dtype if old_bias is not None else w.dtype,
                    taken, _REFIT)
