"""Decomposed activations: the subgraphs exporters write for SiLU, GELU, Mish ...

Transformation: an anchor node (the one transcendental op of the form:
Sigmoid, Erf, Tanh, HardSigmoid) becomes a :class:`~swapper.scan.match.Match`
covering every node between x and y, a reason string when the neighbourhood
has the right shape but must be declined (a constant is off, an intermediate
is read elsewhere), or None when it is not this pattern. :data:`PATTERNS`
lists them in the order :func:`swapper.scan.patterns.match_graph` tries them.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Callable

import onnx

from swapper.core.graph import GraphIndex
from swapper.functions.formulas import GELU_TANH_C
from swapper.scan.match import (
    Match,
    add_one,
    close,
    close_gate,
    close_product,
    first_private_reason,
    gated_by,
    node_params,
    private_reason,
    produced_by,
    scaled_x,
    sole_user,
)

SQRT2 = math.sqrt(2.0)
SQRT_2_OVER_PI = math.sqrt(2.0 / math.pi)

# What feeds a gate's anchor: (x, the nodes from x to the anchor in data-flow order, the function's params).
Inner = tuple[str, list[onnx.NodeProto], dict]


@dataclass
class Pattern:
    """A decomposed activation: the subgraph to look for, anchored at one op type."""

    name: str  # the Site.form, "<function>/<shape>"
    function: str
    anchors: tuple[str, ...]
    matcher: Callable[["Pattern", GraphIndex, onnx.NodeProto], "Match | str | None"] = field(repr=False)
    # For x·h(x) gates sharing one matcher: finds x and the nodes between x and the anchor, or None.
    inner: Callable[[GraphIndex, onnx.NodeProto], Inner | None] | None = field(default=None, repr=False)

    def match(self, ix: GraphIndex, anchor: onnx.NodeProto) -> Match | str | None:
        """None if ``anchor`` does not start this pattern; a reason if declined; else the Match."""
        return self.matcher(self, ix, anchor)

    def make(self, ix: GraphIndex, x: str, y: str, nodes, params=None) -> Match:
        ordered = tuple(sorted({n.name for n in nodes}, key=lambda n: ix.node_position[n]))
        return Match(self.name, self.function, dict(params or {}), x, y, ordered)


def _match_gate(p: Pattern, ix: GraphIndex, anchor: onnx.NodeProto):
    """x·h(x) where h is the chain ``p.inner`` finds followed by ``anchor``; every link read by the chain alone."""
    found = p.inner(ix, anchor)
    if found is None:
        return None
    x, pre, params = found
    out = anchor.output[0]
    if not gated_by(ix, out, x):
        return None
    chain = [*pre, anchor]
    closed = close_gate(ix, out, x, [(node.output[0], reader) for node, reader in zip(chain, chain[1:])])
    if isinstance(closed, str):
        return closed
    mul, y = closed
    return p.make(ix, x, y, [*chain, mul], params)


# silu(x) = x·σ(x)                 (Elfwing et al. 2018)
def _silu_inner(ix: GraphIndex, sig: onnx.NodeProto) -> Inner:
    return sig.input[0], [], {}


# swish(x; β) = x·σ(β·x)           (Ramachandran et al. 2017)
def _swish_inner(ix: GraphIndex, sig: onnx.NodeProto) -> Inner | None:
    scaled = scaled_x(ix, sig.input[0])
    if scaled is None or scaled[2].op_type != "Mul":  # only β·x written as a Mul is claimed
        return None
    x, beta, mul = scaled
    return x, [mul], {"beta": beta}


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
        return [node] if a == x and close(ix.scalar(b), 3.0) else None
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
    if not close(c, GELU_TANH_C):
        return f"cubic coefficient {c:.6g}, expected {GELU_TANH_C}"
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
def _softplus_inner(ix: GraphIndex, tanh: onnx.NodeProto) -> Inner | None:
    sp = produced_by(ix, tanh.input[0], "Softplus")
    return (sp.input[0], [sp], {}) if sp is not None else None


def _exp_log_inner(ix: GraphIndex, tanh: onnx.NodeProto) -> Inner | None:
    """ln(1 + eˣ) written as Log(Add(Exp(x), 1)), the Add in either operand order."""
    log = produced_by(ix, tanh.input[0], "Log")
    add = produced_by(ix, log.input[0], "Add") if log else None
    exp = None
    if add is not None:
        for e_out, one in ((add.input[0], add.input[1]), (add.input[1], add.input[0])):
            cand = produced_by(ix, e_out, "Exp")
            if cand is not None and close(ix.scalar(one), 1.0):
                exp = cand
    return (exp.input[0], [exp, add, log], {}) if exp is not None else None


# hard_swish(x) = x·HardSigmoid(x; α=1/6, β=0.5)   (Howard et al. 2019; ONNX operator spec, HardSwish)
def _match_hard_swish(p: Pattern, ix: GraphIndex, hs: onnx.NodeProto):
    x, out = hs.input[0], hs.output[0]
    if not gated_by(ix, out, x):
        return None
    hsig = node_params(hs, "hard_sigmoid")  # ONNX HardSigmoid defaults unless the node sets them
    alpha, beta = hsig["alpha"], hsig["beta"]
    if not (close(alpha, 1.0 / 6.0) and close(beta, 0.5)):
        return f"HardSigmoid has alpha={alpha:.6g}, beta={beta:.6g}; hard-swish needs 1/6, 0.5"
    closed = close_gate(ix, out, x)
    if isinstance(closed, str):
        return closed
    mul, y = closed
    return p.make(ix, x, y, [hs, mul])


# Tried in this order at each anchor; the first Match wins.
PATTERNS: tuple[Pattern, ...] = (
    Pattern("swish/mul-sigmoid-scaled", "swish", ("Sigmoid",), _match_gate, _swish_inner),
    Pattern("silu/mul-sigmoid", "silu", ("Sigmoid",), _match_gate, _silu_inner),
    Pattern("gelu/erf", "gelu", ("Erf",), _match_gelu_erf),
    Pattern("gelu_tanh/tanh-cubic", "gelu_tanh", ("Tanh",), _match_gelu_tanh),
    Pattern("mish/softplus-tanh", "mish", ("Tanh",), _match_gate, _softplus_inner),
    Pattern("mish/exp-log-tanh", "mish", ("Tanh",), _match_gate, _exp_log_inner),
    Pattern("hard_swish/mul-hardsigmoid", "hard_swish", ("HardSigmoid",), _match_hard_swish),
)
