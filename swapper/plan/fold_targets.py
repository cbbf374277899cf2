"""The layers a site's parameters can fold into, and whether each fold is exact.

Transformation: a swapped site computes ``y = a·g(b·x + c) + d`` per channel.
``b`` and ``c`` are an affine map of ``x``, so they fold exactly into the
layer that produces ``x`` (scale its output channel, shift its bias):
:func:`producer_fold`. ``a`` and ``d`` are an affine map of ``y``, so they
fold exactly into the linear layers that read ``y`` (scale their
input-channel weights, add ``W·d`` to their bias), also behind ops they
commute with (:func:`swapper.plan.layers.reach_linear`): :func:`consumer_folds`,
one :class:`ConsumerFold` per reached layer. Every path from ``y`` must end
in such a layer. This module only looks at the graph; where each parameter
goes is decided from these answers in :mod:`swapper.plan.placement`.

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
from swapper.core.graph import GraphIndex, attr, is_op
from swapper.plan.layers import (
    Layer,
    Reach,
    float_const,
    layer_widths,
    linear_layer,
    norm_axis,
    reach_linear,
    sole_bias_add,
)
from swapper.scan.sites import Site

logger = logging.getLogger(__name__)


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
    """Whether a and d fold into one linear layer behind a site's output.

    ``reach`` is the way there (pass-through steps: a max pool asks a >= 0, a
    gate or a padded average stops d); ``layer`` the layer itself, as
    :func:`swapper.plan.layers.linear_layer` sees it (kind, weight, where its bias is).
    """

    reach: Reach
    layer: Layer
    d_exact: bool  # d folds exactly into the layer's bias
    d_approx: bool  # a zero-padded Conv: d folds into its bias, inexact at borders

    @property
    def path(self) -> tuple[str, ...]:
        """Pass-through nodes between the site output and this layer."""
        return tuple(s.node.name for s in self.reach.steps)


def site_rank(index: GraphIndex, site: Site) -> int | None:
    """Rank of the site's tensors (from the site, else the inferred shapes), None when unknown."""
    if site.shape is not None:
        return len(site.shape)
    shape = index.shape(site.input) or index.shape(site.output)
    return len(shape) if shape is not None else None


def per_channel(site: Site) -> bool:
    """True when the site has one parameter set per channel (not one scalar set)."""
    return site.channel_axis is not None and site.channels is not None and site.channels > 1


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
    through = reach is not None and bool(reach.steps)
    where, rank = (reach.axis, reach.rank) if through else (site.channel_axis, site_rank(index, site))
    if not _axis_at(where, rank, axis):
        return f"channel axis {where} is not the layer's {axis} axis"
    if width != site.channels:
        return f"layer has {width} channels, site has {site.channels}"
    return ""


def producer_fold(index: GraphIndex, site: Site, tensor: str | None = None,
                  readers: tuple[str, ...] | None = None) -> tuple[ProducerFold | None, str]:
    """The exact b/c fold target for ``site``, or None and the reason there is none.

    ``tensor``/``readers``: the layer producing another tensor laid out like the
    site input (an operand of the residual Add that produces it), read only by
    the nodes named in ``readers``.
    """
    x = site.input if tensor is None else tensor
    node = index.producer.get(x)
    if node is None:  # in a body: its formal input, or a value of an enclosing graph (never folded into)
        where = "a graph input" if x in index.graph_inputs else \
            "a constant" if x in index.initializers else "read from an enclosing graph"
        return None, f"{x!r} is {where}"
    if index.is_graph_output(x):
        return None, f"{x!r} is also a graph output"
    inside = set(site.nodes if readers is None else readers)
    if any(u.name not in inside for u in index.users(x)):
        return None, f"{x!r} also feeds nodes outside the site" if readers is None else f"{x!r} has other readers"
    if any(out and out != x for out in node.output):
        return None, f"{node.op_type} {node.name!r} has more than one output"
    if is_op(node, "Conv", "ConvTranspose", "Gemm"):
        w = float_const(index, node.input[1])
        has_bias = len(node.input) > 2 and node.input[2]
        if w is None or (has_bias and float_const(index, node.input[2]) is None):
            return None, f"{node.op_type} {node.name!r} weights are not constant"
        kind = node.op_type.lower()
        why = _check_layer(index, site, "last" if kind == "gemm" else "first", layer_widths(kind, node, w)[1])
        if why:
            return None, why
        beta = float(attr(node, "beta", 1.0))  # Gemm: Y = alpha·A'·B' + beta·C (a Conv has no beta)
        return ProducerFold(kind, node, node, 2, beta != 0.0, "Gemm beta is 0" if beta == 0.0 else ""), ""
    if is_op(node, "BatchNormalization"):
        if int(attr(node, "training_mode", 0)):
            return None, f"BatchNormalization {node.name!r} is in training mode"
        scale, shift = float_const(index, node.input[1]), float_const(index, node.input[2])
        if scale is None or shift is None:
            return None, f"BatchNormalization {node.name!r} scale/bias are not constant"
        why = _check_layer(index, site, "first", scale.shape[0])
        return (None, why) if why else (ProducerFold("batchnorm", node, node, 2, True), "")
    if is_op(node, "Add"):
        return _matmul_add(index, site, node)
    if is_op(node, "MatMul"):
        w = float_const(index, node.input[1])
        if w is None or w.ndim < 2:
            return None, f"MatMul {node.name!r} has no constant 2-D weight"
        why = _check_layer(index, site, "last", layer_widths("matmul", node, w)[1])
        if why:
            return None, why
        return ProducerFold("matmul", node, None, -1, False, "MatMul has no bias; c needs an Add node"), ""
    return None, f"producer {node.op_type} {node.name!r} is not a foldable linear layer"


def _matmul_add(index: GraphIndex, site: Site, add: onnx.NodeProto) -> tuple[ProducerFold | None, str]:
    """An Add that is a MatMul's bias: one operand a MatMul output used only here, the other constant."""
    for slot in (0, 1):
        mm = index.producer.get(add.input[slot])
        bias = float_const(index, add.input[1 - slot])
        if not is_op(mm, "MatMul") or bias is None:
            continue
        if sole_bias_add(index, mm) is not add:
            return None, f"MatMul {mm.name!r} output is used outside its bias Add"
        w = float_const(index, mm.input[1])
        if w is None or w.ndim < 2:
            return None, f"MatMul {mm.name!r} has no constant 2-D weight"
        if bias.ndim and bias.shape[-1] not in (1, w.shape[-1]):
            return None, f"bias of Add {add.name!r} does not run along the MatMul output axis"
        why = _check_layer(index, site, "last", w.shape[-1])
        return (None, why) if why else (ProducerFold("matmul_add", mm, add, 1 - slot, True), "")
    return None, f"Add {add.name!r} is not a MatMul followed by a constant bias"


def consumer_folds(index: GraphIndex, site: Site, skip: frozenset = frozenset()
                   ) -> tuple[list[ConsumerFold] | None, str]:
    """Every linear layer behind ``site.output`` (all paths must end in one that folds), or None and why not.

    The layers may sit behind pass-through ops (:func:`swapper.plan.layers.reach_linear`);
    each fold says whether a needs a >= 0 on its path and what stops d. Readers of
    the output named in ``skip`` (residual Adds, routed by :mod:`swapper.plan.add_folds`) are left out.
    """
    y = site.output
    if index.is_graph_output(y):
        return None, f"{y!r} is a graph output"
    if not index.users(y):
        return None, f"{y!r} has no consumers"
    rank = site_rank(index, site)
    axis = norm_axis(site.channel_axis if per_channel(site) else None, rank)
    reached, failed = reach_linear(index, y, axis, rank, site.channels or 1, skip=skip)
    if failed:
        return None, failed[0]
    folds = []
    for reach in reached:
        fold, why = _fold_into(index, site, reach)
        if fold is None:
            return None, why
        folds.append(fold)
    return folds, ""


def _fold_into(index: GraphIndex, site: Site, reach: Reach) -> tuple[ConsumerFold | None, str]:
    """The fold into one reached layer, by the same exactness rules whether it reads y directly or not."""
    node = reach.node
    label = f"consumer {node.op_type} {node.name!r}"
    layer, why = linear_layer(index, node, reach.tensor)
    if layer is None:
        return None, f"{label} {why}"
    if layer.kind == "gemm" and int(attr(node, "transA", 0)) and per_channel(site):
        return None, f"{label} has transA=1"
    why = _check_layer(index, site, layer.axis, layer.widths()[0], reach)
    if why:
        return None, f"{label}: {why}"
    if layer.kind == "conv":
        exact = not pads_input(node)  # zero padding reads 0, not d, at the borders
        return ConsumerFold(reach, layer, exact, not exact), ""
    if layer.kind == "convtranspose":
        # A constant input overlaps unevenly at the output borders: d never folds exactly.
        return ConsumerFold(reach, layer, False, False), ""
    if layer.kind == "gemm":
        return ConsumerFold(reach, layer, float(attr(node, "beta", 1.0)) != 0.0, False), ""
    # d folds into the bias Add of a 2-D MatMul only: input_offset computes d·B for a 2-D B
    return ConsumerFold(reach, layer, layer.add is not None and layer.weight.ndim == 2, False), ""
