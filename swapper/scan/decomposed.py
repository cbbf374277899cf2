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

import onnx

from swapper.core.graph import GraphIndex
from swapper.functions.formulas import GELU_TANH_C
from swapper.scan.match import (
    Inner,
    Pattern,
    add_one,
    close,
    close_gate,
    close_product,
    gated_by,
    node_params,
    polynomial_of,
    private_reason,
    produced_by,
    scaled_x,
)

SQRT2 = math.sqrt(2.0)
SQRT_2_OVER_PI = math.sqrt(2.0 / math.pi)

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


# gelu_tanh(x) = 0.5·x·(1 + tanh(√(2/π)·(x + 0.044715·x³)))   (Hendrycks & Gimpel 2016)
# The tanh argument may be written any way that is this cubic in x: Pow(x, 3) or x·x·x in any grouping,
# the constants multiplied in first or last, or distributed (√(2/π)·x + √(2/π)·0.044715·x³).
def _match_gelu_tanh(p: Pattern, ix: GraphIndex, tanh: onnx.NodeProto):
    found = polynomial_of(ix, tanh.input[0], tanh)
    if found is None:
        return None
    x, poly, inner = found
    if x is None or set(poly) != {1, 3} or not inner:
        return None
    k, c = poly[1], poly[3] / poly[1]
    if not close(k, SQRT_2_OVER_PI):
        return f"tanh argument scale {k:.6g}, expected √(2/π) = {SQRT_2_OVER_PI:.6g}"
    if not close(c, GELU_TANH_C):
        return f"cubic coefficient {c:.6g}, expected {GELU_TANH_C}"
    one, reason = add_one(ix, tanh.output[0], "tanh")
    if one is None:
        return reason or "tanh is not followed by Add 1"
    result = close_product(ix, one.output[0], x, 0.5)
    if isinstance(result, str):
        return result
    muls, y = result
    return p.make(ix, x, y, [*inner, tanh, one, *muls])


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
