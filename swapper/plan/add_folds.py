"""Carrying surrogate parameters through residual Adds, exactly, with no added nodes.

A *residual Add* here is an ``Add`` of two run-time tensors of one and the same
shape (no broadcasting, no constant operand: that is a bias). Per channel, with
``z = u + v`` (ONNX operator spec, Add: elementwise), the surrogate
``y = a·g(b·x + c) + d`` of a site gives three rules. Each is decided here from
the graph (and the placements of sites decided before), and carried out by
:mod:`swapper.rewrite.transport`.

Shift, the ``c`` of a site whose input x is an Add's output (:func:`add_input`)::

    b·(u + v) + c = (b·u + c) + b·v
    # c goes into the bias of a linear layer P that produces u and feeds nothing
    # else (its output is not a graph output): bias_P <- b·bias_P + c

Scale, the ``b`` of that site (:func:`add_input`): every operand carries b::

    b·(u + v) = b·u + b·v
    # u = P(w) = W·w + β, P exclusive:  b·u = (b·W)·w + b·β        (rows and bias of P)
    # v = a'·g'(z') + d', the output of another swapped site whose g' is
    # positively homogeneous (g'(s·z) = s·g'(z) for s > 0, ONNX Relu / LeakyRelu):
    #     b·v = a'·g'(b·z') + b·d'                                  needs b > 0
    # so v's pre-activation scales by b (where that site's own b, c live: its
    # producer, or recursively through its own Add), its d' scales with it (d' is
    # fixed at 0, or lives in this Add's other producer, which scales anyway), and
    # v's other readers, linear layers L (also behind pools / reshapes / gates),
    # read b·v instead of v:  L(v) = (L·diag(1/b))(b·v)            (input weights × 1/b)
    # Any other operand (a graph input, another op's output) stops b.

Offset, the ``d`` of a site whose output y feeds a residual Add besides linear
layers (:func:`add_readers`)::

    (y + d) + u = y + (u + d)
    # d goes into the bias of the exclusive linear producer P of the Add's other
    # operand u: bias_P <- bias_P + d
    L(z + d) = L(z) + W·d
    # or onward: into the bias of every linear layer reading the Add's output z
    # (no zero padding, as for any consumer: pad(z + d) != pad(z) + d at the borders)

The linear layers reading y itself take W·d as today (:mod:`swapper.plan.fold_targets`).
Where the algebra stops, nothing is carried: a zero-padded Conv on the way of d
(the border outputs read zeros, not d; ``--fold approximate`` folds it anyway and
reports the border error), a non-linear op, a graph output on the way (a value
that reaches a graph output is never changed), a scale b <= 0 through a site's
activation (the fit keeps b > 0 wherever b passes through an Add), an operand
that is neither an exclusive linear producer nor a swapped site's output.
"""
from __future__ import annotations

import dataclasses
import logging
from dataclasses import dataclass, field

import onnx

from swapper.core.graph import GraphIndex, is_op
from swapper.plan.fold_targets import ConsumerFold, ProducerFold, consumer_folds, producer_fold
from swapper.scan.sites import Site

logger = logging.getLogger(__name__)

THROUGH_ADD = "through-add"  # the placement word for b, c (an Add produces x) and d (y feeds an Add)


@dataclass(frozen=True)
class Upstream:
    """A swapped site decided before: what a scale through its output needs to know."""

    site: Site
    placement: dict  # param -> placement word
    homogeneous: bool  # its surrogate g satisfies g(s·z) = s·g(z) for s > 0


@dataclass
class Operand:
    """One operand of a residual Add, as a carrier of a scale and a shift."""

    tensor: str
    producer: ProducerFold | None = None  # its exclusive linear producer (rows and bias)
    site_id: str | None = None  # the swapped site whose output it is
    readers: list[ConsumerFold] = field(default_factory=list)  # that site's other readers (input weights × 1/b)
    why: str = ""  # why it cannot carry a scale ("" when it can)


@dataclass
class AddInput:
    """The residual Add that produces a site's input: how b and c pass through it."""

    add: onnx.NodeProto
    operands: list[Operand]
    shift: int | None  # index of the operand whose producer takes c (None: c cannot pass)
    scale_why: str  # why b cannot pass ("" when every operand carries it)

    def layers(self) -> list[str]:
        """Names of the layers the Add's operands hand b, c to (producers, and sites by id)."""
        return [o.producer.node.name if o.producer is not None else o.site_id for o in self.operands]


@dataclass
class AddReader:
    """A residual Add reading a site's output: where d goes through it."""

    add: onnx.NodeProto
    producer: ProducerFold | None  # the other operand's exclusive linear producer (its bias takes d)
    onward: list[ConsumerFold] | None  # else: the linear layers reading the Add's output (W·d each)

    def layers(self) -> list[str]:
        if self.producer is not None:
            return [self.producer.bias_node.name]
        return [f.layer.node.name for f in self.onward or []]


def residual_operands(index: GraphIndex, node: onnx.NodeProto | None) -> tuple[list[str] | None, str]:
    """The two operands of ``node`` if it is a residual Add (module docstring), or None and why not."""
    if not is_op(node, "Add"):
        return None, "not an Add"
    ins = list(node.input)
    if len(ins) != 2 or ins[0] == ins[1]:
        return None, f"Add {node.name!r} adds a tensor to itself"
    if any(not index.is_dynamic(t) for t in ins):
        return None, f"Add {node.name!r} adds a constant (a bias, not a residual)"
    out = index.shape(node.output[0])
    if out is None or any(index.shape(t) != out for t in ins):
        return None, f"Add {node.name!r} broadcasts, or its operand shapes are unknown"
    return ins, ""


def add_input(index: GraphIndex, site: Site, upstream: dict[str, Upstream]) -> tuple[AddInput | None, str]:
    """How b, c of ``site`` pass through the residual Add producing its input; None and why when it does not.

    ``upstream`` maps the output tensor of every swapped site decided before to its :class:`Upstream`.
    """
    x = site.input
    add = index.producer.get(x)
    operands, why = residual_operands(index, add)
    if operands is None:
        return None, why
    if index.is_graph_output(x):
        return None, f"{x!r} is also a graph output"
    if any(u.name not in set(site.nodes) for u in index.users(x)):
        return None, f"{x!r} also feeds nodes outside the site"
    found = [_operand(index, site, add, t, upstream) for t in operands]
    shift = next((i for i, o in enumerate(found) if o.producer is not None and o.producer.can_shift), None)
    scale_why = next((f"b stops at operand {o.tensor!r} of Add {add.name!r}: {o.why}" for o in found if o.why), "")
    return AddInput(add, found, shift, scale_why), ""


def _operand(index: GraphIndex, site: Site, add: onnx.NodeProto, tensor: str,
             upstream: dict[str, Upstream]) -> Operand:
    """``tensor`` as an operand of ``add``: an exclusive linear producer, a swapped site's output, or neither."""
    prod, why = producer_fold(index, site, tensor, (add.name,))
    if prod is not None:
        return Operand(tensor, producer=prod)
    up = upstream.get(tensor)
    if up is None:
        return Operand(tensor, why=f"not an exclusive linear layer's output ({why}) nor a swapped site's")
    place, sid = up.placement, up.site.id
    if not up.homogeneous:
        return Operand(tensor, site_id=sid, why=f"site {sid}'s surrogate is not positively homogeneous")
    if place["b"] not in ("producer", THROUGH_ADD) or place["c"] not in ("producer", THROUGH_ADD, "fixed"):
        return Operand(tensor, site_id=sid, why=f"site {sid}'s b, c are not folded into layers")
    if place["a"] not in ("in-surrogate", "fixed", "nodes") or place["d"] not in ("fixed", THROUGH_ADD, "approx"):
        return Operand(tensor, site_id=sid, why=f"site {sid}'s a or d would not scale with its output")
    if list(add.input).count(tensor) != 1 or sum(1 for u in index.users(tensor) if is_op(u, "Add")) != 1:
        return Operand(tensor, site_id=sid, why=f"site {sid}'s output feeds more than this Add")
    readers, why = consumer_folds(index, up.site, skip=frozenset({add.name}))
    if readers is None:
        return Operand(tensor, site_id=sid, why=f"site {sid}'s other readers: {why}")
    return Operand(tensor, site_id=sid, readers=readers)


def add_readers(index: GraphIndex, site: Site) -> tuple[list[AddReader], str]:
    """The residual Adds reading ``site.output`` directly, each with where d goes through it.

    Returns the readers and "" when every such Add passes d on (an empty list
    when no Add reads the output), else the readers found so far and why d stops.
    An onward fold into a zero-padded Conv is returned too, marked by its
    ``d_exact``; the placement decides whether the policy accepts it.
    """
    y = site.output
    found: list[AddReader] = []
    for add in {n.name: n for n in index.users(y)}.values():
        operands, _ = residual_operands(index, add)
        if operands is None:
            continue  # not a residual Add: a reader the consumer walk judges
        if operands.count(y) != 1:
            return found, f"Add {add.name!r} reads {y!r} twice"
        other = operands[1 - operands.index(y)]
        # the other operand is laid out as y: its exclusive producer, with the Add as its only reader
        prod, why = producer_fold(index, site, other, (add.name,))
        if prod is not None and prod.can_shift:
            found.append(AddReader(add, prod, None))
            continue
        z = add.output[0]
        onward, why2 = consumer_folds(index, dataclasses.replace(site, output=z))
        blocked = next((f.reach.d_block for f in onward or [] if f.reach.d_block), "")
        if onward is None or blocked:
            reason = prod.reason if prod is not None else why
            return found, (f"d stops at Add {add.name!r}: its other operand's producer cannot take it ({reason}), "
                           f"nor what reads its output ({why2 or blocked})")
        found.append(AddReader(add, None, onward))  # exact only where every fold is (placement decides)
    return found, ""


def residual_readers(index: GraphIndex, site: Site) -> frozenset:
    """Names of the residual Adds reading ``site.output`` directly (left out of the consumer walk)."""
    return frozenset(n.name for n in index.users(site.output) if residual_operands(index, n)[0] is not None)
