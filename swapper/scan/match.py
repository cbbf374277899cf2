"""What a pattern match is, and the small graph queries every matcher shares.

Transformation: none by itself. :class:`Match` (an activation y = f(x)
found in the graph, with the nodes between x and y) and :class:`Decline` (a
pattern that looked right but was not claimed, and why) are the records
:mod:`swapper.scan.patterns` returns; :class:`Pattern` is one decomposed form
(the pattern modules each hold a tuple of them). The functions read a node's
neighbourhood (scalar constants, sole readers, x·c products, the 0.5·x·(...)
closing product of GELU forms, a polynomial in x) with the rule that a site
may only swallow tensors nobody else reads.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable

import onnx

from swapper import functions
from swapper.core.graph import GraphIndex, attr, is_op

RTOL = 1e-3  # tolerance on pattern constants (exporters round √2, √(2/π), ... differently)


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


def node_params(node: onnx.NodeProto, function: str) -> dict:
    """The registry's default parameters of ``function``, each overridden by ``node``'s attribute of that name.

    ONNX names its activation attributes as the registry names its parameters
    (LeakyRelu/Elu/Celu alpha, Selu alpha/gamma, HardSigmoid alpha/beta).
    """
    return {k: float(attr(node, k, v)) for k, v in functions.get(function).params.items()}


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
    if is_op(node, *op_types):
        return node
    return None


def scaled_x(ix: GraphIndex, tensor: str) -> tuple[str, float, onnx.NodeProto] | None:
    """If ``tensor`` = Mul(x, c) (either order) or Div(x, c), c a scalar constant: (x, factor, node)."""
    node = produced_by(ix, tensor, "Mul", "Div")
    if node is None or len(node.input) != 2:
        return None
    a, b = node.input
    if node.op_type == "Div":
        c = ix.scalar(b)
        return (a, 1.0 / c, node) if c not in (None, 0.0) and ix.is_dynamic(a) else None
    for x, k in ((a, b), (b, a)):
        c = ix.scalar(k)
        if c is not None and ix.is_dynamic(x):
            return x, c, node
    return None


def add_one(ix: GraphIndex, tensor: str, what: str) -> tuple[onnx.NodeProto | None, str | None]:
    """The Add(tensor, 1) reading ``tensor`` (node, None), or (None, reason) / (None, None) if absent."""
    user = sole_user(ix, tensor)
    if user is None:
        adds = [u for u in ix.users(tensor) if u.op_type == "Add"]
        return None, (private_reason(ix, tensor) if adds else None)
    if not is_op(user, "Add"):
        return None, None
    one = ix.scalar(other_operand(user, tensor))
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
        if not is_op(user, "Mul", "Div"):
            break
        other = other_operand(user, cur)
        if user.op_type == "Div":
            c = ix.scalar(user.input[1])
            if user.input[0] != cur or c in (None, 0.0):
                break
            k /= c
        elif other == x and other != cur:
            if have_x:
                return "x appears twice in the product"
            have_x = True
        elif (c := ix.scalar(other)) is not None:
            k *= c
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


def first_private_reason(ix: GraphIndex, pairs) -> str | None:
    """The first reason any ``(tensor, reader)`` in ``pairs`` cannot be swallowed (:func:`private_reason`), or None."""
    for tensor, reader in pairs:
        reason = private_reason(ix, tensor, reader)
        if reason:
            return reason
    return None


def gated_by(ix: GraphIndex, out: str, x: str) -> bool:
    """True if some Mul reads both ``out`` and ``x``: the x·h(x) shape of a gated activation."""
    return any(u.op_type == "Mul" and other_operand(u, out) == x for u in ix.users(out))


def close_gate(ix: GraphIndex, out: str, x: str, private=()) -> tuple[onnx.NodeProto, str] | str:
    """The one Mul computing x·``out``, as (node, its output), once every ``(tensor, reader)`` in
    ``private`` is checked to be read by the pattern alone; else the reason why not."""
    reason = first_private_reason(ix, private)
    if reason:
        return reason
    result = close_product(ix, out, x, 1.0, max_steps=1)
    if isinstance(result, str):
        return result
    (mul,), y = result
    return mul, y


def _times(p: dict[int, float], q: dict[int, float]) -> dict[int, float]:
    out: dict[int, float] = {}
    for i, a in p.items():
        for j, b in q.items():
            out[i + j] = out.get(i + j, 0.0) + a * b
    return out


def polynomial_of(ix: GraphIndex, tensor: str, reader: onnx.NodeProto, max_nodes: int = 10):
    """``tensor`` (read by ``reader``) as Σ c_p·x^p of one tensor x: (x, {p: c_p}, nodes), or None.

    Walks back through Mul, Add, Sub, Div by a scalar and Pow by a small whole
    scalar, each read only by the node after it; the walk stops at x, the one
    dynamic tensor it reaches that something else also reads (a site may only
    swallow what nobody else reads). x is None when ``tensor`` is a constant.
    """
    nodes: list[onnx.NodeProto] = []
    leaves: set[str] = set()

    def walk(t: str, by: onnx.NodeProto) -> dict[int, float]:
        c = ix.scalar(t)
        if c is not None:
            return {0: c}
        node = produced_by(ix, t, "Mul", "Add", "Sub", "Div", "Pow")
        user = sole_user(ix, t)
        divisor = ix.scalar(node.input[1]) if node is not None and node.op_type in ("Div", "Pow") else None
        if (node is None or user is None or user.name != by.name or len(nodes) >= max_nodes
                or (node.op_type == "Div" and divisor in (None, 0.0))
                or (node.op_type == "Pow" and divisor not in (1.0, 2.0, 3.0, 4.0))):
            leaves.add(t)
            return {1: 1.0}
        nodes.append(node)
        a = walk(node.input[0], node)
        if node.op_type == "Pow":
            out = {0: 1.0}
            for _ in range(int(divisor)):
                out = _times(out, a)
            return out
        if node.op_type == "Div":
            return {k: v / divisor for k, v in a.items()}
        b = walk(node.input[1], node)
        if node.op_type == "Mul":
            return _times(a, b)
        sign = -1.0 if node.op_type == "Sub" else 1.0
        return {k: a.get(k, 0.0) + sign * b.get(k, 0.0) for k in set(a) | set(b)}

    poly = walk(tensor, reader)
    if len(leaves) > 1 or any(not ix.is_dynamic(t) for t in leaves):
        return None
    poly = {k: v for k, v in poly.items() if v != 0.0}
    return (next(iter(leaves)) if leaves else None), poly, nodes
