"""Where each surrogate parameter can live without adding nodes.

Transformation: a swapped site computes ``y = a·g(b·x + c) + d`` per channel.
``b`` and ``c`` are an affine map of ``x``, so they fold exactly into the
layer that produces ``x`` (scale its output channel, shift its bias);
``a`` and ``d`` are an affine map of ``y``, so they fold exactly into linear
layers that read ``y`` (scale their input-channel weights, add ``W·d`` to
their bias), also behind ops they commute with (pools, channel-keeping
reshapes; ``a`` also through a gate Mul; a max pool passes ``a`` only when
a >= 0, hence placement "consumers+"; see
:func:`swapper.plan.layers.reach_linear`). Every path from ``y`` must end in
such a layer, or that parameter goes where the policy puts what cannot fold.
This module decides, per site and fold policy, which of these folds are
exact (``decide_placement``) and holds the numpy arithmetic of each fold;
:mod:`swapper.rewrite.apply` applies them to a graph copy.

Weight layouts (ONNX operator spec): Conv W is [M, C/group, k...];
ConvTranspose W is [C, M/group, k...]; Gemm computes alpha·A'·B' + beta·C with
B' = B or Bᵀ (transB); MatMul B is [..., K, N]; BatchNormalization computes
scale·(x − mean)/sqrt(var + eps) + B.
"""
from __future__ import annotations

import logging
from dataclasses import dataclass

import onnx

from swapper.core.conv import pads_input
from swapper.core.graph import GraphIndex, attr
from swapper.functions.params import PARAMS
from swapper.functions.registry import Function
from swapper.options import check_fold
from swapper.plan.layers import (
    Layer,
    Reach,
    linear_layer,
    norm_axis,
    reach_linear,
    sole_bias_add,
)
from swapper.plan.layers import float_const as _float_const
from swapper.scan.sites import Site

logger = logging.getLogger(__name__)

POSITIVE_A = ("inner", "consumers+")  # placements of a that the fitter must keep > 0
_DEFAULT = ("", "ai.onnx")


# ------------------------------------------------------------------ analysis
@dataclass
class ProducerFold:
    """The layer that produces a site's input, and how b, c fold into it."""

    kind: str  # "conv" | "convtranspose" | "gemm" | "matmul_add" | "matmul" | "batchnorm"
    node: onnx.NodeProto  # the layer holding the weights (input 1; BatchNormalization: its scale)
    bias_node: onnx.NodeProto | None  # holds the bias: ``node`` (input 2), a MatMul's Add, None (bare MatMul)
    bias_slot: int  # input slot of the bias in bias_node
    can_shift: bool  # c folds without a node
    reason: str = ""  # why c cannot fold, when it cannot


@dataclass
class ConsumerFold:
    """One linear layer reading a site's output (the end of ``reach``), and how a, d fold into it."""

    reach: Reach
    layer: Layer
    d_exact: bool
    d_approx: bool  # a zero-padded Conv: d folds into its bias, inexact at borders

    @property
    def kind(self) -> str:  # "conv" | "convtranspose" | "gemm" | "matmul"
        return self.layer.kind

    @property
    def node(self) -> onnx.NodeProto:
        return self.reach.node

    @property
    def bias_node(self) -> onnx.NodeProto | None:
        """Where d folds: the layer itself, or the bias Add after a MatMul."""
        return self.layer.bias_node

    @property
    def bias_slot(self) -> int:
        return self.layer.bias_slot

    @property
    def path(self) -> tuple[str, ...]:
        """Pass-through nodes between the site output and this layer."""
        return tuple(s.node.name for s in self.reach.steps)

    @property
    def a_positive(self) -> bool:
        """A max pool is on the path: a folds only where a >= 0."""
        return self.reach.a_positive

    @property
    def d_block(self) -> str:
        """Why d cannot reach this layer ("" when it can)."""
        return self.reach.d_block


def _is(node: onnx.NodeProto, op: str) -> bool:
    return node.op_type == op and node.domain in _DEFAULT


def site_rank(index: GraphIndex, site: Site) -> int | None:
    """Rank of the site's tensors (from the site, else the inferred shapes), None when unknown."""
    if site.shape is not None:
        return len(site.shape)
    shape = index.shape(site.input) or index.shape(site.output)
    return len(shape) if shape is not None else None


def per_channel(site: Site) -> bool:
    """True when the site has one parameter set per channel (not one scalar set)."""
    return site.channel_axis is not None and site.channels is not None and site.channels > 1


def _axis_is(index: GraphIndex, site: Site, want: str) -> bool:
    """Is the site's channel axis the layer's channel axis ("first" = axis 1, "last")?"""
    return _axis_at(site.channel_axis, site_rank(index, site), want)


def _axis_at(axis: int | None, rank: int | None, want: str) -> bool:
    """Is ``axis`` of a rank-``rank`` tensor the layer's channel axis ("first" = axis 1, "last")?"""
    if axis is None:
        return False
    if want == "last" and axis == -1:
        return True
    if rank is None:
        return want == "first" and axis == 1
    axis = axis + rank if axis < 0 else axis
    return axis == (1 if want == "first" else rank - 1)


def _check_layer(index: GraphIndex, site: Site, axis: str, width: int, reach: Reach | None = None) -> str:
    """Empty string if per-channel parameters line up with a layer's ``width`` channels.

    ``reach``: the layer reads the site output through pass-through ops; the
    channel axis is then where the walk carried it.
    """
    if not per_channel(site):
        return ""
    ok = _axis_at(reach.axis, reach.rank, axis) if reach is not None and reach.steps else _axis_is(index, site, axis)
    if not ok:
        where = reach.axis if reach is not None and reach.steps else site.channel_axis
        return f"channel axis {where} is not the layer's {axis} axis"
    if width != site.channels:
        return f"layer has {width} channels, site has {site.channels}"
    return ""


def producer_fold(index: GraphIndex, site: Site) -> tuple[ProducerFold | None, str]:
    """The exact b/c fold target for ``site``, or None and the reason there is none."""
    x = site.input
    node = index.producer.get(x)
    if node is None:
        return None, f"{x!r} is a graph input"
    if index.is_graph_output(x):
        return None, f"{x!r} is also a graph output"
    inside = set(site.nodes)
    if any(u.name not in inside for u in index.users(x)):
        return None, f"{x!r} also feeds nodes outside the site"
    if any(out and out != x for out in node.output):
        return None, f"{node.op_type} {node.name!r} has more than one output"
    if _is(node, "Conv") or _is(node, "ConvTranspose"):
        w = _float_const(index, node.input[1])
        has_bias = len(node.input) > 2 and node.input[2]
        if w is None or (has_bias and _float_const(index, node.input[2]) is None):
            return None, f"{node.op_type} {node.name!r} weights are not constant"
        width = w.shape[0] if _is(node, "Conv") else w.shape[1] * int(attr(node, "group", 1))
        why = _check_layer(index, site, "first", width)
        kind = "conv" if _is(node, "Conv") else "convtranspose"
        return (None, why) if why else (ProducerFold(kind, node, node, 2, True), "")
    if _is(node, "Gemm"):
        w = _float_const(index, node.input[1])
        has_c = len(node.input) > 2 and node.input[2]
        if w is None or (has_c and _float_const(index, node.input[2]) is None):
            return None, f"Gemm {node.name!r} weights are not constant"
        width = w.shape[0] if attr(node, "transB", 0) else w.shape[1]
        why = _check_layer(index, site, "last", width)
        if why:
            return None, why
        beta = float(attr(node, "beta", 1.0))
        return ProducerFold("gemm", node, node, 2, beta != 0.0, "Gemm beta is 0" if beta == 0.0 else ""), ""
    if _is(node, "BatchNormalization"):
        if int(attr(node, "training_mode", 0)):
            return None, f"BatchNormalization {node.name!r} is in training mode"
        scale, shift = _float_const(index, node.input[1]), _float_const(index, node.input[2])
        if scale is None or shift is None:
            return None, f"BatchNormalization {node.name!r} scale/bias are not constant"
        why = _check_layer(index, site, "first", scale.shape[0])
        return (None, why) if why else (ProducerFold("batchnorm", node, node, 2, True), "")
    if _is(node, "Add"):
        return _matmul_add(index, site, node)
    if _is(node, "MatMul"):
        w = _float_const(index, node.input[1])
        if w is None or w.ndim < 2:
            return None, f"MatMul {node.name!r} has no constant 2-D weight"
        why = _check_layer(index, site, "last", w.shape[-1])
        if why:
            return None, why
        return ProducerFold("matmul", node, None, -1, False, "MatMul has no bias; c needs an Add node"), ""
    return None, f"producer {node.op_type} {node.name!r} is not a foldable linear layer"


def _matmul_add(index: GraphIndex, site: Site, add: onnx.NodeProto) -> tuple[ProducerFold | None, str]:
    """An Add that is a MatMul's bias: one operand a MatMul output used only here, the other constant."""
    for slot in (0, 1):
        mm = index.producer.get(add.input[slot])
        bias = _float_const(index, add.input[1 - slot])
        if mm is None or not _is(mm, "MatMul") or bias is None:
            continue
        if sole_bias_add(index, mm) is not add:
            return None, f"MatMul {mm.name!r} output is used outside its bias Add"
        w = _float_const(index, mm.input[1])
        if w is None or w.ndim < 2:
            return None, f"MatMul {mm.name!r} has no constant 2-D weight"
        if bias.ndim and bias.shape[-1] not in (1, w.shape[-1]):
            return None, f"bias of Add {add.name!r} does not run along the MatMul output axis"
        why = _check_layer(index, site, "last", w.shape[-1])
        return (None, why) if why else (ProducerFold("matmul_add", mm, add, 1 - slot, True), "")
    return None, f"Add {add.name!r} is not a MatMul followed by a constant bias"


def consumer_folds(index: GraphIndex, site: Site) -> tuple[list[ConsumerFold] | None, str]:
    """Every linear layer behind ``site.output`` (all paths must end in one that folds), or None and why not.

    The layers may sit behind pass-through ops (:func:`swapper.plan.layers.reach_linear`);
    each fold says whether a needs a >= 0 on its path and what stops d.
    """
    y = site.output
    if index.is_graph_output(y):
        return None, f"{y!r} is a graph output"
    if not index.users(y):
        return None, f"{y!r} has no consumers"
    rank = site_rank(index, site)
    axis = norm_axis(site.channel_axis if per_channel(site) else None, rank)
    reached, failed = reach_linear(index, y, axis, rank, site.channels or 1)
    if failed:
        return None, failed[0]
    folds = []
    for reach in reached:
        fold, why = _layer(index, site, reach)
        if fold is None:
            return None, why
        folds.append(fold)
    return folds, ""


def _layer(index: GraphIndex, site: Site, reach: Reach) -> tuple[ConsumerFold | None, str]:
    """The fold into one reached layer, by the same exactness rules whether it reads y directly or not."""
    node = reach.node
    label = f"consumer {node.op_type} {node.name!r}"
    layer, why = linear_layer(index, node, reach.tensor)
    if layer is None:
        return None, f"{label} {why}"
    w = layer.weight
    if layer.kind == "conv":
        why = _check_layer(index, site, "first", w.shape[1] * int(attr(node, "group", 1)), reach)
        exact = not pads_input(node)  # zero padding reads 0, not d, at the borders
        return (None, f"{label}: {why}") if why else (ConsumerFold(reach, layer, exact, not exact), "")
    if layer.kind == "convtranspose":
        why = _check_layer(index, site, "first", w.shape[0], reach)
        # A constant input overlaps unevenly at the output borders: d never folds exactly.
        return (None, f"{label}: {why}") if why else (ConsumerFold(reach, layer, False, False), "")
    if layer.kind == "gemm":
        if int(attr(node, "transA", 0)) and per_channel(site):
            return None, f"{label} has transA=1"
        width = w.shape[1] if attr(node, "transB", 0) else w.shape[0]
        why = _check_layer(index, site, "last", width, reach)
        beta = float(attr(node, "beta", 1.0))
        return (None, f"{label}: {why}") if why else (ConsumerFold(reach, layer, beta != 0.0, False), "")
    why = _check_layer(index, site, "last", w.shape[-2] if w.ndim >= 2 else w.shape[0], reach)
    if why:
        return None, f"{label}: {why}"
    # d folds into the bias Add of a 2-D MatMul only: input_offset computes d·B for a 2-D B
    return ConsumerFold(reach, layer, layer.add is not None and w.ndim == 2, False), ""


# ----------------------------------------------------------------- placement
def decide_placement(index: GraphIndex, site: Site, target: Function, policy: str) -> tuple[dict[str, str], list[str]]:
    """Where a, b, c, d of ``site`` live under fold ``policy``, and why (human-readable notes)."""
    check_fold(policy)
    if policy == "off":
        return {p: "nodes" for p in PARAMS}, ["fold off: every parameter is an explicit Mul/Add node"]
    rest = "nodes" if policy == "nodes" else "held"
    placement: dict[str, str] = {}
    notes: list[str] = []

    prod, why = producer_fold(index, site)
    if prod is not None:
        placement["b"] = "producer"
        placement["c"] = "producer" if prod.can_shift else rest
        if not prod.can_shift:
            notes.append(f"c {rest}: {prod.reason}")
    else:
        placement["b"] = placement["c"] = rest
        notes.append(f"b, c {rest}: {why}")

    cons, cons_why = consumer_folds(index, site)
    if target.homogeneous and placement["b"] in ("producer", "nodes"):
        placement["a"] = "inner"
        notes.append(f"a moved inside {target.name} (needs a > 0)")
    elif cons is not None and any(f.a_positive for f in cons):
        placement["a"] = "consumers+"
        pools = sorted({p for f in cons if f.a_positive for p in f.path})
        notes.append(f"a folded through a max pool on the way to its consumers (needs a >= 0; via {', '.join(pools)})")
    elif cons is not None:
        placement["a"] = "consumers"
    else:
        placement["a"] = rest
        notes.append(f"a {rest}: {cons_why}")

    reaches = cons is not None and not any(f.d_block for f in cons)
    if reaches and all(f.d_exact for f in cons):
        placement["d"] = "consumers"
    elif policy == "approximate" and reaches and all(f.d_exact or f.d_approx for f in cons):
        placement["d"] = "approx"
        padded = ", ".join(f.node.name for f in cons if not f.d_exact)
        notes.append(f"d approx: folded into zero-padded Conv bias ({padded}); inexact at the borders")
    else:
        placement["d"] = rest
        if cons is None:
            notes.append(f"d {rest}: {cons_why}")
        elif not reaches:
            notes.append(f"d {rest}: {next(f.d_block for f in cons if f.d_block)}")
        else:
            blocked = ", ".join(f"{f.node.op_type} {f.node.name!r}" for f in cons if not f.d_exact)
            notes.append(f"d {rest}: no exact bias fold into {blocked}")
    logger.debug("site %s placement %s", site.id, placement)
    return {p: placement[p] for p in PARAMS}, notes

