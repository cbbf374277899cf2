"""Where a site's values go: its role, decided by following the data.

Transformation: (the graph a site sits in, the tensor y it writes) -> "output",
"gate" or "hidden".

The walk starts at y and follows every op that hands values on without
computing new ones (:data:`CARRIERS`): reshaping and reordering (Reshape,
Squeeze, Unsqueeze, Flatten, Transpose, DepthToSpace, SpaceToDepth),
Identity/Dropout, Cast/CastLike, whole-value copies and selections (Concat,
Split, Slice, Gather*, Expand, Tile, Pad, Where's value inputs) and the
reductions that summarise values into one of them or their mean (ReduceMax,
ReduceMin, ReduceMean, ReduceSum: a detector reporting the mean of its per-frame
probabilities still reports the site's values), Abs/Neg, Softmax/LogSoftmax,
Sum/Max/Min/Mean of several tensors, and an affine step by a constant (Add, Sub,
Mul or Div with an initializer or Constant: a box decoder's y·2 − 0.5). Pooling layers (MaxPool,
AveragePool, their Global forms) are not followed: in the networks we see they
start the next stage rather than hand a result out (a judgement call, no
source). It also
crosses If/Loop/Scan boundaries in both directions: a body reading y from the
enclosing graph (ONNX IR spec, outer-scope names), a Loop/Scan input passed to
its body, and a body output leaving through its node's outputs (If: output k
-> node output k; Loop: body output k >= 1 -> node output k-1, the first is the
condition; Scan: k -> k; ONNX operator spec, If/Loop/Scan).

- "output": some tensor reached is an output of the main graph;
- "gate": otherwise, some tensor reached is multiplied (Mul, or either side of a
  Div) by a different dynamic tensor, unless that other tensor is known to be
  broadcast onto it (then the site's value is the feature map being gated, e.g.
  a SiLU output a squeeze-excite Sigmoid multiplies);
- "hidden": neither: an ordinary activation inside the network, the kind swapped by
  default (every activation is pointwise; this word says where its values go).
  Called "pointwise" before; ``swapper.scan/1`` files written then carry that word.

"output" wins over "gate": a site that is also a graph output is never swapped
by default, whatever else reads it.
"""
from __future__ import annotations

import logging
from dataclasses import dataclass, field

import onnx

from swapper.core.graph import GraphIndex, named_subgraphs, outer_names

logger = logging.getLogger(__name__)

# op type -> the input positions whose values the outputs carry (None: every input)
CARRIERS: dict[str, tuple[int, ...] | None] = {
    **dict.fromkeys(("Identity", "Cast", "CastLike", "Reshape", "Squeeze", "Unsqueeze", "Flatten", "Transpose",
                     "DepthToSpace", "SpaceToDepth", "Split", "Slice", "Gather", "GatherElements", "GatherND",
                     "Expand", "Tile", "Pad", "Dropout", "ReduceMax", "ReduceMin", "ReduceMean",
                     # sign flips, magnitudes, sums and normalisations: the output still shows the site's values
                     "Abs", "Neg", "ReduceSum", "Softmax", "LogSoftmax"), (0,)),
    **dict.fromkeys(("Concat", "Sum", "Max", "Min", "Mean"), None),
    "Where": (1, 2),
}
# an affine step by a constant (y·2 − 0.5, a box decoder's scale and shift) hands the site's values on too
AFFINE = ("Add", "Sub", "Mul", "Div")
# outputs that do not carry values (Dropout's mask)
NOT_CARRIED: dict[str, tuple[int, ...]] = {"Dropout": (1,)}
CONTROL_FLOW = ("If", "Loop", "Scan")
DEFAULT_DOMAINS = ("", "ai.onnx")


@dataclass
class Scope:
    """One graph of a model's nesting: its index, and the node whose body it is in the enclosing scope."""

    index: GraphIndex
    parent: "Scope | None" = None
    owner: onnx.NodeProto | None = None  # the If/Loop/Scan node of ``parent`` holding this body
    attribute: str = ""  # which body of ``owner`` ("then_branch", "body", ...)
    # cache shared by every scope of one model: id(body) -> (Scope, names it reads from outside)
    bodies: dict = field(default_factory=dict, repr=False)

    @classmethod
    def of(cls, model: onnx.ModelProto) -> "Scope":
        return cls(GraphIndex.of(model))

    def body(self, node: onnx.NodeProto, attribute: str, graph: onnx.GraphProto) -> "Scope":
        """The scope of ``graph``, a body of ``node`` in this scope (built once)."""
        return self.body_entry(node, attribute, graph)[0]

    def body_entry(self, node, attribute, graph) -> tuple["Scope", set[str]]:
        key = id(graph)
        if key not in self.bodies:
            scope = Scope(GraphIndex.of_graph(graph, self.index.opsets), self, node, attribute, self.bodies)
            self.bodies[key] = (scope, outer_names(graph))
        return self.bodies[key]

    def bodies_here(self):
        """(node, attribute, body) for every body carried by a node of this graph, in node order."""
        for node in self.index.graph.node:
            for attribute, graph in named_subgraphs(node):
                yield node, attribute, graph

    def defining(self, name: str) -> "Scope":
        """The scope that defines ``name`` (a body may read a value of an enclosing graph), else this one."""
        here: Scope | None = self
        while here is not None:
            ix = here.index
            if name in ix.producer or name in ix.initializers or name in ix.graph_inputs:
                return here
            here = here.parent
        return self

    def shape(self, name: str) -> tuple | None:
        """The static shape of ``name`` as this graph sees it (an enclosing graph's for outer-scope values)."""
        return self.index.shape(name) or self.defining(name).index.shape(name)

    def where(self) -> str:
        """Where this graph sits, for messages: "" for the main graph, else e.g. "the then_branch of If 'x'"."""
        if self.owner is None:
            return ""
        return f"the {self.attribute} of {self.owner.op_type} {self.owner.name!r}"


def strictly_broadcast(small: tuple | None, big: tuple | None) -> bool:
    """True if ``small`` is known to broadcast onto the larger ``big`` (e.g. [N,C,1,1] onto [N,C,H,W]).

    A lower-rank ``small`` is first padded with leading 1s (ONNX multidirectional broadcasting,
    numpy style), so a scalar scale is broadcast onto anything larger than one element.
    """
    if small is None or big is None or len(small) > len(big):
        return False
    small = (1,) * (len(big) - len(small)) + tuple(small)
    if any(s != 1 and s != b for s, b in zip(small, big)):
        return False
    return any(s == 1 and b != 1 for s, b in zip(small, big))


def _owner_output(scope: Scope, position: int) -> str | None:
    """The owner's output a body output at ``position`` leaves through, or None (Loop's condition)."""
    owner = scope.owner
    out = position - 1 if owner.op_type == "Loop" else position
    if 0 <= out < len(owner.output) and owner.output[out]:
        return owner.output[out]
    return None


def _body_inputs(scope: Scope, node: onnx.NodeProto, tensor: str):
    """(body scope, body input name) for each explicit Loop/Scan input position where ``node`` reads ``tensor``."""
    first = 2 if node.op_type == "Loop" else 0  # Loop's trip count and condition are not values
    for attribute, graph in named_subgraphs(node):
        body = scope.body(node, attribute, graph)
        for pos, name in enumerate(node.input):
            if name == tensor and pos >= first and pos < len(graph.input):
                yield body, graph.input[pos].name


def _is_gate_user(scope: Scope, user: onnx.NodeProto, tensor: str) -> bool:
    if user.op_type not in ("Mul", "Div") or user.domain not in DEFAULT_DOMAINS or len(user.input) != 2:
        return False
    others = [t for t in user.input if t != tensor]
    if not others:
        return False
    # the feature map a squeeze-excite gate multiplies is gated, not a gate
    return scope.defining(others[0]).index.is_dynamic(others[0]) and \
        not strictly_broadcast(scope.shape(others[0]), scope.shape(tensor))


def _next(scope: Scope, tensor: str, found: dict):
    """The (scope, tensor) pairs that carry ``tensor``'s values one step on; notes outputs and gates in ``found``."""
    ix = scope.index
    if ix.is_graph_output(tensor):
        if scope.parent is None:
            found["output"] = True
        else:
            for pos, name in enumerate(ix.graph_outputs):
                out = _owner_output(scope, pos) if name == tensor else None
                if out:
                    yield scope.parent, out
    for user in ix.users(tensor):
        if user.domain not in DEFAULT_DOMAINS:
            continue
        carried = CARRIERS.get(user.op_type, ())
        positions = [p for p, name in enumerate(user.input) if name == tensor]
        if carried is None or any(p in carried for p in positions):
            skip = NOT_CARRIED.get(user.op_type, ())
            yield from ((scope, out) for k, out in enumerate(user.output) if out and k not in skip)
        elif user.op_type in ("Loop", "Scan"):
            yield from _body_inputs(scope, user, tensor)
        elif user.op_type in AFFINE and len(user.input) == 2 and \
                not scope.defining(other := user.input[1 - positions[0]]).index.is_dynamic(other):
            yield scope, user.output[0]
        elif _is_gate_user(scope, user, tensor):
            found["gate"] = True
    for node, attribute, graph in scope.bodies_here():
        body, reads = scope.body_entry(node, attribute, graph)
        if tensor in reads:  # the body reads the value from this graph by name
            yield body, tensor


def follow(scope: Scope, y: str) -> dict:
    """{"output": bool, "gate": bool} for the values of ``y`` in ``scope`` (see module docstring)."""
    found = {"output": False, "gate": False}
    seen: set[tuple[int, str]] = set()
    todo = [(scope, y)]
    while todo and not found["output"]:
        here, tensor = todo.pop()
        key = (id(here.index.graph), tensor)
        if key in seen:
            continue
        seen.add(key)
        todo.extend(_next(here, tensor, found))
    return found


def role_of(scope: Scope | GraphIndex, y: str) -> str:
    """"output", "gate" or "hidden" for a site writing ``y`` (see module docstring).

    ``scope`` is the site's graph; a bare GraphIndex is taken as a main graph.
    """
    if isinstance(scope, GraphIndex):
        scope = Scope(scope)
    found = follow(scope, y)
    if found["output"]:
        return "output"
    return "gate" if found["gate"] else "hidden"
