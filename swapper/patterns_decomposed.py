"""Decomposed activations: the subgraphs exporters write for SiLU, GELU, Mish ...

Transformation: an anchor node (the one transcendental op of the form:
Sigmoid, Erf, Tanh, HardSigmoid) becomes a :class:`~swapper.pattern_base.Match`
covering every node between x and y, a reason string when the neighbourhood
has the right shape but must be declined (a constant is off, an intermediate
is read elsewhere), or None when it is not this pattern. :data:`PATTERNS`
lists them in the order :func:`swapper.patterns.match_graph` tries them.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Callable

import onnx

from .graph import GraphIndex, attr
from .pattern_base import (Match, add_one, close, close_gate, close_product, first_private_reason, gated_by,
                           private_reason, produced_by, scalar, scaled_x, sole_user)

SQRT2 = math.sqrt(2.0)
SQRT_2_OVER_PI = math.sqrt(2.0 / math.pi)
GELU_TANH_CUBIC = 0.044715  # Hendrycks & Gimpel 2016, tanh approximation


@dataclass
class Pattern:
    """A decomposed activation: the subgraph to look for, anchored at one op type."""

    name: str  # the Site.form, "<function>/<shape>"
    function: str
    anchors: tuple[str, ...]
    maths: str
    matcher: Callable[["Pattern", GraphIndex, onnx.NodeProto], "Match | str | None"] = field(repr=False)

    def match(self, ix: GraphIndex, anchor: onnx.NodeProto) -> Match | str | None:
        """None if ``anchor`` does not start this pattern; a reason if declined; else the Match."""
        return self.matcher(self, ix, anchor)

    def make(self, ix: GraphIndex, x: str, y: str, nodes, params=None) -> Match:
        ordered = tuple(sorted({n.name for n in nodes}, key=lambda n: ix.node_position[n]))
        return Match(self.name, self.function, dict(params or {}), x, y, ordered)


# silu(x) = x·σ(x)                 (Elfwing et al. 2018)
# swish(x; β) = x·σ(β·x)           (Ramachandran et al. 2017)
def _match_sigmoid_gate(p: Pattern, ix: GraphIndex, sig: onnx.NodeProto):
    s = sig.input[0]
    scaled = scaled_x(ix, s) if p.function == "swish" else None
    x = scaled[0] if scaled else s
    if p.function == "swish" and (scaled is None or scaled[2].op_type != "Mul"):
        return None
    out = sig.output[0]
    if not gated_by(ix, out, x):
        return None
    closed = close_gate(ix, out, x, [(s, sig)] if scaled else [])
    if isinstance(closed, str):
        return closed
    mul, y = closed
    nodes = [sig, mul] + ([scaled[2]] if scaled else [])
    return p.make(ix, x, y, nodes, {"beta": scaled[1]} if scaled else {})


# gelu(x) = 0.5·x·(1 + erf(x/√2))   (Hendrycks & Gimpel 2016)
def _match_gelu_erf(p: Pattern, ix: GraphIndex, erf: onnx.NodeProto):
    scaled = scaled_x(ix, erf.input[0])
    if scaled is None:
        return None
    x, k, pre = scaled
    if not close(k, 1.0 / SQRT2):
        return f"erf argument is x·{k:.6g}, expected x/√2"
    reason = private_reason(ix, erf.input[0], erf)
    if reason:
        return reason
    add, reason = add_one(ix, erf.output[0], "erf")
    if add is None:
        return reason
    result = close_product(ix, add.output[0], x, 0.5)
    if isinstance(result, str):
        return result
    muls, y = result
    return p.make(ix, x, y, [pre, erf, add, *muls])


def _cube_of(ix: GraphIndex, tensor: str, x: str) -> list[onnx.NodeProto] | None:
    """Nodes computing ``tensor`` = x³ as Pow(x, 3) or Mul(Mul(x, x), x) in any order."""
    node = produced_by(ix, tensor, "Pow", "Mul")
    if node is None:
        return None
    a, b = node.input
    if node.op_type == "Pow":
        return [node] if a == x and close(scalar(ix, b), 3.0) else None
    for sq, lin in ((a, b), (b, a)):
        inner = produced_by(ix, sq, "Mul")
        if lin == x and inner is not None and list(inner.input) == [x, x]:
            if getattr(sole_user(ix, sq), "name", None) == node.name:  # x·x read only by this Mul
                return [inner, node]
    return None


# gelu_tanh(x) = 0.5·x·(1 + tanh(√(2/π)·(x + 0.044715·x³)))   (Hendrycks & Gimpel 2016)
def _match_gelu_tanh(p: Pattern, ix: GraphIndex, tanh: onnx.NodeProto):
    scaled = scaled_x(ix, tanh.input[0])
    if scaled is None or scaled[2].op_type != "Mul":
        return None
    inner, k, outer_mul = scaled
    add = produced_by(ix, inner, "Add")
    if add is None:
        return None
    found = None
    for x, w in ((add.input[0], add.input[1]), (add.input[1], add.input[0])):
        term = scaled_x(ix, w)
        if term is not None and term[2].op_type == "Mul":
            cube = _cube_of(ix, term[0], x)
            if cube is not None:
                found = (x, w, term, cube)
                break
    if found is None:
        return None
    x, w, (cube_out, c, cubic_mul), cube = found
    if not close(k, SQRT_2_OVER_PI):
        return f"tanh argument scale {k:.6g}, expected √(2/π) = {SQRT_2_OVER_PI:.6g}"
    if not close(c, GELU_TANH_CUBIC):
        return f"cubic coefficient {c:.6g}, expected {GELU_TANH_CUBIC}"
    reason = first_private_reason(ix, ((tanh.input[0], tanh), (inner, outer_mul), (w, add), (cube_out, cubic_mul)))
    if reason:
        return reason
    one, reason = add_one(ix, tanh.output[0], "tanh")
    if one is None:
        return reason or "tanh is not followed by Add 1"
    result = close_product(ix, one.output[0], x, 0.5)
    if isinstance(result, str):
        return result
    muls, y = result
    return p.make(ix, x, y, [outer_mul, add, cubic_mul, *cube, tanh, one, *muls])


# mish(x) = x·tanh(softplus(x)),  softplus(x) = ln(1 + eˣ)   (Misra 2019)
def _match_mish(p: Pattern, ix: GraphIndex, tanh: onnx.NodeProto):
    t_in = tanh.input[0]
    if p.name == "mish/softplus-tanh":
        sp = produced_by(ix, t_in, "Softplus")
        if sp is None:
            return None
        x, pre = sp.input[0], [sp]
    else:
        log = produced_by(ix, t_in, "Log")
        add = produced_by(ix, log.input[0], "Add") if log else None
        exp = None
        if add is not None:
            for e_out, one in ((add.input[0], add.input[1]), (add.input[1], add.input[0])):
                cand = produced_by(ix, e_out, "Exp")
                if cand is not None and close(scalar(ix, one), 1.0):
                    exp = cand
        if exp is None:
            return None
        x, pre = exp.input[0], [exp, add, log]
    out = tanh.output[0]
    if not gated_by(ix, out, x):
        return None
    chain = [*pre, tanh]
    closed = close_gate(ix, out, x, [(node.output[0], reader) for node, reader in zip(chain, chain[1:])])
    if isinstance(closed, str):
        return closed
    mul, y = closed
    return p.make(ix, x, y, [*chain, mul])


# hard_swish(x) = x·HardSigmoid(x; α=1/6, β=0.5)   (Howard et al. 2019; ONNX operator spec, HardSwish)
def _match_hard_swish(p: Pattern, ix: GraphIndex, hs: onnx.NodeProto):
    x, out = hs.input[0], hs.output[0]
    if not gated_by(ix, out, x):
        return None
    alpha, beta = attr(hs, "alpha", 0.2), attr(hs, "beta", 0.5)
    if not (close(alpha, 1.0 / 6.0) and close(beta, 0.5)):
        return f"HardSigmoid has alpha={alpha:.6g}, beta={beta:.6g}; hard-swish needs 1/6, 0.5"
    closed = close_gate(ix, out, x)
    if isinstance(closed, str):
        return closed
    mul, y = closed
    return p.make(ix, x, y, [hs, mul])


# Tried in this order at each anchor; the first Match wins.
PATTERNS: tuple[Pattern, ...] = (
    Pattern("swish/mul-sigmoid-scaled", "swish", ("Sigmoid",), "x·σ(β·x)", _match_sigmoid_gate),
    Pattern("silu/mul-sigmoid", "silu", ("Sigmoid",), "x·σ(x)", _match_sigmoid_gate),
    Pattern("gelu/erf", "gelu", ("Erf",), "0.5·x·(1 + erf(x/√2))", _match_gelu_erf),
    Pattern("gelu_tanh/tanh-cubic", "gelu_tanh", ("Tanh",),
            "0.5·x·(1 + tanh(√(2/π)·(x + 0.044715·x³)))", _match_gelu_tanh),
    Pattern("mish/softplus-tanh", "mish", ("Tanh",), "x·tanh(softplus(x))", _match_mish),
    Pattern("mish/exp-log-tanh", "mish", ("Tanh",), "x·tanh(ln(1 + eˣ))", _match_mish),
    Pattern("hard_swish/mul-hardsigmoid", "hard_swish", ("HardSigmoid",),
            "x·HardSigmoid(x; 1/6, 0.5)", _match_hard_swish),
)
