"""Activations written with clamps: hard-swish and hard-sigmoid as Clip/Min/Max of an affine, leaky ReLU as a Max.

Transformation: like :mod:`swapper.scan.decomposed`, an anchor node (here the
last node of a clamp, or the Max of max(x, α·x)) becomes a Match covering
every node from x to y, a reason string when the neighbourhood has the right
shape but must be declined, or None when it is not this pattern.

A *clamp* is any of the ways exporters write min(max(z, lo), hi): Clip with
min/max inputs (opset >= 11) or attributes (opset < 11), Min(Max(z, lo), hi),
Max(Min(z, hi), lo), Min(Relu(z), hi), Relu(Min(z, hi)) (ONNX operator spec,
Clip, Min, Max, Relu). An *affine* of x is a·x + b written with at most one
Mul/Div by a scalar and one Add/Sub of a scalar, in either order.
"""
from __future__ import annotations

import math

import onnx

from swapper.core.graph import GraphIndex, attr
from swapper.scan.match import (
    Pattern,
    close,
    close_product,
    other_operand,
    private_reason,
    produced_by,
    sole_user,
)

CLIP_DEFAULT = 3.4028234663852886e38  # Clip-6 attribute defaults: ±FLT_MAX (ONNX operator spec, Clip-6)

# (x, a, b, nodes from x in data-flow order) for a tensor equal to a·x + b
Affine = tuple[str, float, float, list[onnx.NodeProto]]
# (z, lo, hi, nodes from z in data-flow order) for a tensor equal to min(max(z, lo), hi)
Clamp = tuple[str, float, float, list[onnx.NodeProto]]


def _const_and_dynamic(ix: GraphIndex, node: onnx.NodeProto) -> tuple[str, float, int] | None:
    """(dynamic input, scalar constant, position of the constant) of a binary node, or None."""
    if len(node.input) != 2:
        return None
    for pos in (1, 0):
        value, other = ix.scalar(node.input[pos]), node.input[1 - pos]
        if value is not None and ix.is_dynamic(other):
            return other, value, pos
    return None


def _clip_bounds(ix: GraphIndex, node: onnx.NodeProto) -> tuple[float, float] | None:
    """(lo, hi) of a Clip: inputs 1/2 from opset 11, attributes before; None when a bound is not a constant."""
    if ix.opset < 11:
        return float(attr(node, "min", -CLIP_DEFAULT)), float(attr(node, "max", CLIP_DEFAULT))
    bounds = []
    for pos, default in ((1, -math.inf), (2, math.inf)):
        name = node.input[pos] if len(node.input) > pos else ""
        value = ix.scalar(name) if name else default
        if value is None:
            return None
        bounds.append(value)
    return bounds[0], bounds[1]


def _one_sided(ix: GraphIndex, tensor: str) -> tuple[str, str, float, onnx.NodeProto] | None:
    """("lo" | "hi", z, bound, node) when ``tensor`` = Max(z, lo) / Relu(z) or Min(z, hi)."""
    node = produced_by(ix, tensor, "Max", "Min", "Relu")
    if node is None:
        return None
    if node.op_type == "Relu":
        return "lo", node.input[0], 0.0, node
    found = _const_and_dynamic(ix, node)
    if found is None:
        return None
    z, bound, _ = found
    return ("lo" if node.op_type == "Max" else "hi"), z, bound, node


def clamp_of(ix: GraphIndex, tensor: str) -> Clamp | None:
    """``tensor`` as min(max(z, lo), hi) (see the module docstring), or None."""
    clip = produced_by(ix, tensor, "Clip")
    if clip is not None:
        bounds = _clip_bounds(ix, clip)
        return (clip.input[0], bounds[0], bounds[1], [clip]) if bounds else None
    outer = _one_sided(ix, tensor)
    if outer is None:
        return None
    inner = _one_sided(ix, outer[1])
    if inner is None or inner[0] == outer[0] or sole_user(ix, inner[3].output[0]) is not outer[3]:
        return None
    bound = {inner[0]: inner[2], outer[0]: outer[2]}
    return inner[1], bound["lo"], bound["hi"], [inner[3], outer[3]]


def affine_of(ix: GraphIndex, tensor: str, reader: onnx.NodeProto) -> Affine:
    """``tensor`` (read by ``reader``) as a·x + b through at most one scale and one shift.

    The walk back stops at a tensor anything else reads: that tensor is x (a
    site may only swallow what nobody else reads). x = ``tensor``, a = 1, b = 0
    when there is nothing to walk through.
    """
    x, a, b, nodes, kinds = tensor, 1.0, 0.0, [], set()
    for _ in range(2):
        node = produced_by(ix, x, "Mul", "Div", "Add", "Sub")
        found = _const_and_dynamic(ix, node) if node is not None else None
        if found is None or sole_user(ix, x) is not reader:
            break
        z, c, pos = found
        kind = "scale" if node.op_type in ("Mul", "Div") else "shift"
        # c/z and c − z are not affine in z the way these forms use it
        if kind in kinds or (node.op_type in ("Div", "Sub") and pos == 0) or (node.op_type == "Div" and c == 0.0):
            break
        kinds.add(kind)
        # tensor = a·z + b with z = k·z' gives a·k·z' + b; with z = z' + c gives a·z' + (a·c + b)
        if kind == "scale":
            a *= c if node.op_type == "Mul" else 1.0 / c
        else:
            b += a * (c if node.op_type == "Add" else -c)
        x, reader = z, node
        nodes.insert(0, node)
    return x, a, b, nodes


def _affine_clamp(ix: GraphIndex, anchor: onnx.NodeProto) -> tuple[str, float, float, Clamp, list] | None:
    """(x, a, b, clamp, affine nodes) for ``anchor`` = the last node of clamp(a·x + b)."""
    clamp = clamp_of(ix, anchor.output[0])
    if clamp is None or clamp[3][-1].name != anchor.name:
        return None
    x, a, b, pre = affine_of(ix, clamp[0], clamp[3][0])
    return x, a, b, clamp, pre


def _fmt(v: float) -> str:
    return f"{v:.6g}"


# hard_swish(x) = x·Clip(x + 3, 0, 6)/6 = x·ReLU6(x + 3)/6   (Howard et al. 2019, MobileNetV3)
# The /6 may be a Div by 6 or a Mul by 1/6, before or after the multiplication by x.
def _match_hard_swish_clip(p: Pattern, ix: GraphIndex, anchor: onnx.NodeProto):
    found = _affine_clamp(ix, anchor)
    if found is None:
        return None
    x, a, b, (_, lo, hi, clamp), pre = found
    if not ix.is_dynamic(x) or hi <= 0 or not math.isfinite(hi):
        return None
    closed = close_product(ix, anchor.output[0], x, 1.0 / hi)
    if isinstance(closed, str):
        return None if closed == "the result is not multiplied by x" else closed
    muls, y = closed
    alpha, beta = a / hi, b / hi
    if not (close(lo, 0.0, 0) and close(alpha, 1.0 / 6.0) and close(beta, 0.5)):
        return (f"x·Clip({_fmt(a)}·x + {_fmt(b)}, {_fmt(lo)}, {_fmt(hi)})/{_fmt(hi)}: "
                "hard-swish needs x·Clip(x + 3, 0, 6)/6")
    return p.make(ix, x, y, [*pre, *clamp, *muls])


def _constant_scales(ix: GraphIndex, tensor: str, steps: int = 2) -> list[tuple[float, onnx.NodeProto]]:
    """The Mul/Div-by-a-scalar nodes that follow ``tensor`` one after another as its sole readers."""
    chain, cur = [], tensor
    for _ in range(steps):
        user = sole_user(ix, cur)
        if user is None or user.op_type not in ("Mul", "Div") or user.domain not in ("", "ai.onnx"):
            break
        found = _const_and_dynamic(ix, user)
        if found is None or found[0] != cur or (user.op_type == "Div" and (found[2] == 0 or found[1] == 0.0)):
            break
        chain.append((found[1] if user.op_type == "Mul" else 1.0 / found[1], user))
        cur = user.output[0]
    return chain


# hard_sigmoid(x; α, β) = max(0, min(1, α·x + β))   (ONNX operator spec, HardSigmoid)
# written as Clip(α·x + β, 0, 1), or Clip(x + 3, 0, 6)/6 (α = 1/6, β = 1/2): clamp(a·x + b, 0, hi)·k with
# hi·k = 1, so α = a·k, β = b·k. A clamp with neither an affine nor a scale (ReLU6) is not claimed.
def _match_hard_sigmoid_clip(p: Pattern, ix: GraphIndex, anchor: onnx.NodeProto):
    found = _affine_clamp(ix, anchor)
    if found is None:
        return None
    x, a, b, (_, lo, hi, clamp), pre = found
    candidates = _constant_scales(ix, anchor.output[0])
    if not ix.is_dynamic(x) or not math.isfinite(hi) or not close(lo, 0.0, 0) or not (pre or candidates):
        return None
    k, scales = 1.0, []
    for factor, node in [(1.0, None), *candidates]:
        if node is not None:
            k *= factor
            scales.append(node)
        if close(hi * k, 1.0):
            break
    else:
        if not pre:
            return None  # a plain clamp followed by some scaling: not an activation form
        return f"Clip(a·x + b, 0, {_fmt(hi)}) is scaled by {_fmt(k)}: hard-sigmoid needs its upper end at 1"
    if not (pre or scales):
        return None
    alpha, beta = a * k, b * k
    if alpha <= 0:
        return f"slope α = {_fmt(alpha)}: hard-sigmoid rises with x"
    y = (scales[-1] if scales else clamp[-1]).output[0]
    return p.make(ix, x, y, [*pre, *clamp, *scales], {"alpha": alpha, "beta": beta})


# leaky_relu(x; α) = max(x, α·x) for 0 < α < 1   (Maas et al. 2013; ONNX operator spec, LeakyRelu)
def _match_leaky_max(p: Pattern, ix: GraphIndex, mx: onnx.NodeProto):
    if len(mx.input) != 2:
        return None
    for x, scaled in ((mx.input[0], mx.input[1]), (mx.input[1], mx.input[0])):
        mul = produced_by(ix, scaled, "Mul")
        alpha = ix.scalar(other_operand(mul, x) or "") if mul is not None else None
        if alpha is None or not ix.is_dynamic(x):
            continue
        if not 0.0 < alpha < 1.0:
            return f"max(x, {_fmt(alpha)}·x) is leaky ReLU only for 0 < α < 1"
        reason = private_reason(ix, scaled, mx)
        if reason:
            return reason
        return p.make(ix, x, mx.output[0], [mul, mx], {"alpha": alpha})
    return None


CLAMP_ANCHORS = ("Clip", "Min", "Max", "Relu")

# Tried in this order at each anchor, after swapper.scan.decomposed.PATTERNS; the first Match wins.
PATTERNS: tuple[Pattern, ...] = (
    Pattern("leaky_relu/max-scaled", "leaky_relu", ("Max",), _match_leaky_max),
    Pattern("hard_swish/mul-clip", "hard_swish", CLAMP_ANCHORS, _match_hard_swish_clip),
    Pattern("hard_sigmoid/clip", "hard_sigmoid", CLAMP_ANCHORS, _match_hard_sigmoid_clip),
)
