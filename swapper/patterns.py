"""Matchers that recognise activations in an ONNX graph.

Transformation: graph -> list of non-overlapping :class:`Match` (one per
activation), each naming the function, its parameters, the tensor x it reads,
the tensor y it writes, and the nodes between them.

Two kinds of matcher:

- *single ops* (``Sigmoid``, ``Gelu``, com.microsoft ``QuickGelu`` ...),
  one table lookup each (:func:`match_single_op`);
- *decomposed patterns*: the subgraphs exporters write (``x·Sigmoid(x)``, the
  Erf form of GELU, ...). Each is a small :class:`Pattern` anchored at its one
  transcendental node (Sigmoid, Erf, Tanh, HardSigmoid). ``match`` returns
  None when the neighbourhood does not look like the pattern at all, a
  *reason string* when it does but must be declined (a constant is off, an
  intermediate tensor is read elsewhere), or a Match.

A pattern only claims nodes whose intermediate outputs are read by the pattern
alone and are not graph outputs: rewriting the site replaces all of its nodes,
so anything else reading an intermediate would lose its input. When a pattern
declines, its inner op (e.g. the Sigmoid of a SiLU) is reported as a single op.
"""
from __future__ import annotations

import logging
import math
from dataclasses import dataclass, field
from typing import Callable

import onnx

from .graph import GraphIndex, attr

logger = logging.getLogger(__name__)

MS_DOMAIN = "com.microsoft"
RTOL = 1e-3  # tolerance on pattern constants (exporters round √2, √(2/π), ... differently)

SQRT2 = math.sqrt(2.0)
SQRT_2_OVER_PI = math.sqrt(2.0 / math.pi)
GELU_TANH_CUBIC = 0.044715  # Hendrycks & Gimpel 2016, tanh approximation
# ONNX operator spec, Selu defaults
SELU_ALPHA = 1.67326319217681884765625
SELU_GAMMA = 1.05070102214813232421875
QUICK_GELU_ALPHA = 1.702  # com.microsoft QuickGelu default alpha (onnxruntime contrib op docs)


@dataclass(frozen=True)
class Match:
    """One recognised activation: y = function(x; params)."""

    form: str  # "op" or the pattern name
    function: str
    params: dict
    input: str
    output: str
    nodes: tuple[str, ...]  # node names, in graph order
    domain: str = ""
    supported: bool = True
    reason: str | None = None


@dataclass(frozen=True)
class Decline:
    """A pattern that looked right at ``anchor`` but was not claimed, and why."""

    pattern: str
    anchor: str
    reason: str


def scalar(ix: GraphIndex, name: str) -> float | None:
    """ix.scalar without decoding large initializers (weights may live in external data)."""
    init = ix.initializers.get(name)
    if init is not None and math.prod(init.dims) != 1:
        return None
    return ix.scalar(name)


def dynamic(ix: GraphIndex, name: str) -> bool:
    """True if ``name`` is computed at run time (not an initializer or a Constant output)."""
    node = ix.producer.get(name)
    return name not in ix.initializers and not (node is not None and node.op_type == "Constant")


def close(value: float | None, target: float, rtol: float = RTOL) -> bool:
    return value is not None and abs(value - target) <= rtol * abs(target)


def other_operand(node: onnx.NodeProto, name: str) -> str | None:
    """The other input of a binary node that reads ``name`` (``name`` itself for Mul(t, t))."""
    a, b = node.input[0], node.input[1]
    if a == name:
        return b
    if b == name:
        return a
    return None


def private_reason(ix: GraphIndex, tensor: str, reader: onnx.NodeProto | None = None) -> str | None:
    """Why ``tensor`` cannot be swallowed by a site (read elsewhere / a graph output), or None."""
    if ix.is_graph_output(tensor):
        return f"intermediate {tensor!r} is a graph output"
    users = ix.users(tensor)
    if len(users) != 1 or (reader is not None and users[0].name != reader.name):
        return f"intermediate {tensor!r} is read by {len(users)} nodes"
    return None


def sole_user(ix: GraphIndex, tensor: str) -> onnx.NodeProto | None:
    users = ix.users(tensor)
    return users[0] if len(users) == 1 and not ix.is_graph_output(tensor) else None


def produced_by(ix: GraphIndex, tensor: str, *op_types: str) -> onnx.NodeProto | None:
    node = ix.producer.get(tensor)
    if node is not None and node.op_type in op_types and node.domain in ("", "ai.onnx"):
        return node
    return None


def scaled_x(ix: GraphIndex, tensor: str) -> tuple[str, float, onnx.NodeProto] | None:
    """If ``tensor`` = Mul(x, c) (either order) or Div(x, c), c a scalar constant: (x, factor, node)."""
    node = produced_by(ix, tensor, "Mul", "Div")
    if node is None or len(node.input) != 2:
        return None
    a, b = node.input
    if node.op_type == "Div":
        c = scalar(ix, b)
        return (a, 1.0 / c, node) if c not in (None, 0.0) and dynamic(ix, a) else None
    for x, k in ((a, b), (b, a)):
        c = scalar(ix, k)
        if c is not None and dynamic(ix, x):
            return x, c, node
    return None


def add_one(ix: GraphIndex, tensor: str, what: str) -> tuple[onnx.NodeProto | None, str | None]:
    """The Add(tensor, 1) reading ``tensor`` (node, None), or (None, reason) / (None, None) if absent."""
    user = sole_user(ix, tensor)
    if user is None:
        adds = [u for u in ix.users(tensor) if u.op_type == "Add"]
        return None, (private_reason(ix, tensor) if adds else None)
    if user.op_type != "Add" or user.domain not in ("", "ai.onnx"):
        return None, None
    one = scalar(ix, other_operand(user, tensor))
    if not close(one, 1.0):
        return None, f"{what} is offset by {one}, expected 1"
    return user, None


def close_product(
    ix: GraphIndex, start: str, x: str, want: float, max_steps: int = 3
) -> tuple[list[onnx.NodeProto], str] | str:
    """Follow the Mul/Div chain reading ``start`` until it equals want·x·start.

    Accepts any grouping exporters write: (x·0.5)·u, 0.5·(x·u), x·(0.5·u),
    (x·u)/2 ... Returns (nodes, output tensor) or a reason string.
    """
    cur, nodes, have_x, k = start, [], False, 1.0
    for _ in range(max_steps):
        user = sole_user(ix, cur)
        if user is None:
            if have_x:  # x is in, only the constant is off
                break
            return private_reason(ix, cur) or f"{cur!r} has no reader"
        if user.op_type not in ("Mul", "Div") or user.domain not in ("", "ai.onnx"):
            break
        other = other_operand(user, cur)
        if user.op_type == "Div":
            c = scalar(ix, user.input[1])
            if user.input[0] != cur or c in (None, 0.0):
                break
            k /= c
        elif other == x and other != cur:
            if have_x:
                return "x appears twice in the product"
            have_x = True
        elif scalar(ix, other) is not None:
            k *= scalar(ix, other)
        else:
            inner = scaled_x(ix, other)  # (x·0.5) or (x/2) computed first
            if inner is None or inner[0] != x or have_x:
                break
            reason = private_reason(ix, other, user)
            if reason:
                return reason
            have_x, k = True, k * inner[1]
            nodes.append(inner[2])
        nodes.append(user)
        cur = user.output[0]
        if have_x and close(k, want):
            return nodes, cur
    if not have_x:
        return "the result is not multiplied by x"
    return f"outer factor {k:.6g}, expected {want:g}"


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
    muls = [u for u in ix.users(out) if u.op_type == "Mul" and other_operand(u, out) == x]
    if not muls:
        return None
    if scaled:
        reason = private_reason(ix, s, sig)
        if reason:
            return reason
    result = close_product(ix, out, x, 1.0, max_steps=1)
    if isinstance(result, str):
        return result
    (mul,), y = result
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
    for tensor, reader in ((tanh.input[0], tanh), (inner, outer_mul), (w, add), (cube_out, cubic_mul)):
        reason = private_reason(ix, tensor, reader)
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
    if not any(u.op_type == "Mul" and other_operand(u, out) == x for u in ix.users(out)):
        return None
    chain = [*pre, tanh]
    for node, reader in zip(chain, chain[1:]):
        reason = private_reason(ix, node.output[0], reader)
        if reason:
            return reason
    result = close_product(ix, out, x, 1.0, max_steps=1)
    if isinstance(result, str):
        return result
    (mul,), y = result
    return p.make(ix, x, y, [*chain, mul])


# hard_swish(x) = x·HardSigmoid(x; α=1/6, β=0.5)   (Howard et al. 2019; ONNX operator spec, HardSwish)
def _match_hard_swish(p: Pattern, ix: GraphIndex, hs: onnx.NodeProto):
    x, out = hs.input[0], hs.output[0]
    if not any(u.op_type == "Mul" and other_operand(u, out) == x for u in ix.users(out)):
        return None
    alpha, beta = attr(hs, "alpha", 0.2), attr(hs, "beta", 0.5)
    if not (close(alpha, 1.0 / 6.0) and close(beta, 0.5)):
        return f"HardSigmoid has alpha={alpha:.6g}, beta={beta:.6g}; hard-swish needs 1/6, 0.5"
    result = close_product(ix, out, x, 1.0, max_steps=1)
    if isinstance(result, str):
        return result
    (mul,), y = result
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


def _single(node: onnx.NodeProto) -> tuple[str, dict] | tuple[None, None]:
    """(function, params) for a single activation op, or (None, None)."""
    op, dom = node.op_type, node.domain or ""
    if dom in ("", "ai.onnx"):
        simple = {"Sigmoid": "sigmoid", "Tanh": "tanh", "Relu": "relu", "Softplus": "softplus",
                  "Softsign": "softsign", "HardSwish": "hard_swish", "Mish": "mish"}
        if op in simple:
            return simple[op], {}
        if op == "LeakyRelu":
            return "leaky_relu", {"alpha": float(attr(node, "alpha", 0.01))}
        if op == "PRelu":
            return "prelu", {"slope": node.input[1]}
        if op in ("Elu", "Celu"):
            return op.lower(), {"alpha": float(attr(node, "alpha", 1.0))}
        if op == "Selu":
            return "selu", {"alpha": float(attr(node, "alpha", SELU_ALPHA)),
                            "gamma": float(attr(node, "gamma", SELU_GAMMA))}
        if op == "HardSigmoid":
            return "hard_sigmoid", {"alpha": float(attr(node, "alpha", 0.2)), "beta": float(attr(node, "beta", 0.5))}
        if op == "Gelu":
            approx = attr(node, "approximate", b"none")
            approx = approx.decode() if isinstance(approx, bytes) else approx
            return ("gelu_tanh" if approx == "tanh" else "gelu"), {}
    elif dom == MS_DOMAIN:
        if op == "Gelu":
            return "gelu", {}
        if op in ("FastGelu", "BiasGelu"):
            return ("gelu_tanh" if op == "FastGelu" else "gelu"), {}
        if op == "QuickGelu":  # x·σ(alpha·x); the registry's quick_gelu fixes alpha = 1.702
            alpha = float(attr(node, "alpha", QUICK_GELU_ALPHA))
            return ("quick_gelu", {}) if close(alpha, QUICK_GELU_ALPHA) else ("swish", {"beta": alpha})
    return None, None


def match_single_op(node: onnx.NodeProto) -> Match | None:
    """The Match for a single activation op, or None if ``node`` is not one.

    com.microsoft BiasGelu / FastGelu-with-bias compute g(x + bias): the site
    records the bias tensor under params["bias"] and is marked unsupported,
    because its x is not a tensor of the graph (the rewrite needs one).
    """
    function, params = _single(node)
    if function is None:
        return None
    supported, reason = True, None
    if node.domain == MS_DOMAIN and len(node.input) > 1 and node.input[1]:
        params = {**params, "bias": node.input[1]}
        supported = False
        reason = f"com.microsoft {node.op_type} adds a bias inside the op; its input is not a graph tensor"
    return Match("op", function, params, node.input[0], node.output[0], (node.name,),
                 domain=node.domain or "", supported=supported, reason=reason)


def match_graph(ix: GraphIndex) -> tuple[list[Match], list[Decline]]:
    """All activations of one graph (no node in two matches), and the declined pattern attempts.

    Decomposed patterns are tried first, at each anchor in graph order; the
    remaining single activation ops are then matched one by one.
    """
    claimed: set[str] = set()
    matches: list[Match] = []
    declines: list[Decline] = []
    nodes = list(ix.graph.node)
    for node in nodes:
        if node.domain not in ("", "ai.onnx") or node.name in claimed:
            continue
        reasons = []
        for pattern in PATTERNS:
            if node.op_type not in pattern.anchors:
                continue
            result = pattern.match(ix, node)
            if result is None:
                continue
            if isinstance(result, str):
                reasons.append(Decline(pattern.name, node.name, result))
                continue
            if claimed.intersection(result.nodes):
                reasons.append(Decline(pattern.name, node.name, "overlaps an earlier site"))
                continue
            claimed.update(result.nodes)
            matches.append(result)
            reasons = []
            break
        for d in reasons:
            logger.info("declined %s at %s: %s", d.pattern, d.anchor, d.reason)
        declines.extend(reasons)
    for node in nodes:
        if node.name in claimed:
            continue
        single = match_single_op(node)
        if single is not None:
            claimed.add(node.name)
            matches.append(single)
    matches.sort(key=lambda m: ix.node_position[m.nodes[0]])
    return matches, declines
