"""Sigmoid and SiLU as some exporters write them: 1/(1 + exp(−x)), and x·Cast(σ(Cast(x))) in fp16 models.

Transformation: like :mod:`swapper.scan.decomposed`, an anchor node (Exp, or
the Sigmoid between two Casts) becomes a Match covering every node from x to
y, a reason string when the neighbourhood has the right shape but must be
declined, or None when it is not this pattern.
"""
from __future__ import annotations

import onnx

from swapper.core.graph import GraphIndex, attr
from swapper.scan.match import (
    Pattern,
    add_one,
    close,
    close_gate,
    first_private_reason,
    gated_by,
    produced_by,
    sole_user,
)

T = onnx.TensorProto
# float element types from least to most precise; a Cast up this list loses nothing (IEEE 754 formats)
FLOAT_RANK = {T.BFLOAT16: 0, T.FLOAT16: 0, T.FLOAT: 1, T.DOUBLE: 2}


def _negated(ix: GraphIndex, tensor: str) -> tuple[str, float, onnx.NodeProto] | None:
    """(x, k, node) when ``tensor`` = −k·x written as Neg(x), Mul(x, −k) (either order), Div(x, −1/k) or Sub(0, x)."""
    node = produced_by(ix, tensor, "Neg", "Mul", "Div", "Sub")
    if node is None:
        return None
    if node.op_type == "Neg":
        return node.input[0], 1.0, node
    a, b = node.input[0], node.input[1]
    if node.op_type == "Sub":
        zero = ix.scalar(a)
        return (b, 1.0, node) if zero == 0.0 and ix.is_dynamic(b) else None
    if node.op_type == "Div":
        c = ix.scalar(b)
        return (a, -1.0 / c, node) if c not in (None, 0.0) and c < 0 and ix.is_dynamic(a) else None
    for x, k in ((a, b), (b, a)):
        c = ix.scalar(k)
        if c is not None and c < 0 and ix.is_dynamic(x):
            return x, -c, node
    return None


def _reciprocal_of(ix: GraphIndex, tensor: str) -> tuple[onnx.NodeProto | None, float | None]:
    """(node, numerator) for the sole reader computing c/``tensor`` (Reciprocal: c = 1), else (None, None)."""
    user = sole_user(ix, tensor)
    if user is None or user.domain not in ("", "ai.onnx"):
        return None, None
    if user.op_type == "Reciprocal":
        return user, 1.0
    if user.op_type == "Div" and user.input[1] == tensor and user.input[0] != tensor:
        return user, ix.scalar(user.input[0])
    return None, None


# sigmoid(x) = 1/(1 + exp(−x))   (ONNX operator spec, Sigmoid), the division as Reciprocal or Div(1, ·)
def _match_sigmoid_exp(p: Pattern, ix: GraphIndex, exp: onnx.NodeProto):
    neg = _negated(ix, exp.input[0])
    if neg is None:
        return None
    x, k, neg_node = neg
    adds = [u for u in ix.users(exp.output[0]) if u.op_type == "Add"]
    if len(adds) != 1:
        return None
    recip, numerator = _reciprocal_of(ix, adds[0].output[0])
    if recip is None:
        return None
    if not close(k, 1.0):
        return f"exp argument is −{k:.6g}·x, sigmoid needs −x"
    add, reason = add_one(ix, exp.output[0], "exp(−x)")
    if add is None:
        return reason
    if not close(numerator, 1.0):
        return f"numerator {numerator}, sigmoid needs 1/(1 + exp(−x))"
    reason = first_private_reason(ix, ((exp.input[0], exp),))
    if reason:
        return reason
    return p.make(ix, x, recip.output[0], [neg_node, exp, add, recip])


def _cast_to(node: onnx.NodeProto) -> int:
    return int(attr(node, "to", T.UNDEFINED))


def _name(elem: int | None) -> str:
    return T.DataType.Name(elem).lower() if elem else "unknown"


# silu(x) = x·σ(x)   (Elfwing et al. 2018), σ evaluated in a wider float type: x·Cast(σ(Cast(x)))
def _match_silu_cast(p: Pattern, ix: GraphIndex, sig: onnx.NodeProto):
    up = produced_by(ix, sig.input[0], "Cast")
    down = sole_user(ix, sig.output[0])
    if up is None or down is None or down.op_type != "Cast":
        return None
    x, out = up.input[0], down.output[0]
    if not gated_by(ix, out, x):
        return None
    x_type, wide, back = ix.dtypes.get(x), _cast_to(up), _cast_to(down)
    if x_type is None:
        return "the element type of x is unknown, so the Casts cannot be checked"
    if wide not in FLOAT_RANK or back not in FLOAT_RANK or x_type not in FLOAT_RANK:
        return (f"Casts {_name(x_type)} -> {_name(wide)} -> {_name(back)}: not a float round trip, "
                "so this is not a pure activation")
    if back != x_type or FLOAT_RANK[wide] < FLOAT_RANK[x_type] or (FLOAT_RANK[wide] == FLOAT_RANK[x_type]
                                                                   and wide != x_type):
        return (f"Casts {_name(x_type)} -> {_name(wide)} -> {_name(back)} lose precision before the Sigmoid, "
                "so this is not a pure activation")
    closed = close_gate(ix, out, x, [(sig.input[0], sig), (sig.output[0], down)])
    if isinstance(closed, str):
        return closed
    mul, y = closed
    return p.make(ix, x, y, [up, sig, down, mul])


PATTERNS: tuple[Pattern, ...] = (
    Pattern("sigmoid/exp-reciprocal", "sigmoid", ("Exp",), _match_sigmoid_exp),
    Pattern("silu/mul-cast-sigmoid", "silu", ("Sigmoid",), _match_silu_cast),
)
