"""Activation sites: what they are and how to find them.

A *site* is one activation in the graph, either a single op (``Sigmoid``) or
the decomposed subgraph an exporter wrote (``x·Sigmoid(x)``, the Erf form of
GELU, ...). ``find_sites`` runs the matchers of :mod:`swapper.scan.patterns` over
the graph and describes each match.

Transformation: shape-inferred ModelProto -> list[Site] in graph order, with
ids s1, s2, ... given by the graph position of each site's first node. Sites in
If/Loop/Scan bodies are numbered where their parent node stands and are
reported with supported=False (subgraphs are never rewritten).

Channel axis (the axis per-channel parameters run along): rank 4/5 -> 1; rank
2 -> 1 (= last); rank 3 -> 1 when x comes from Conv/BatchNormalization
(Conv1d), 2 (last) when it comes from MatMul/Gemm/LayerNormalization (token
tensors [N, T, C]); the producer is looked up through at most a few bias /
scale Add/Sub/Mul/Div nodes. Anything else -> None. Rank 4/5 tensors that come
from a MatMul (attention) use the last axis.

Role: "output" if y is a graph output; "gate" if y is read by a Mul or Div whose
other operand is a different dynamic tensor (squeeze-excite, GLU), unless that
other operand is known to be broadcast onto y (then y is the feature map being
gated, e.g. the SiLU output a squeeze-excite Sigmoid multiplies); else
"pointwise".

Cost: elements per sample x relative cost of the site's function in the form
the graph writes it (:mod:`swapper.functions.costs`, Relu = 1). A site whose elements
are unknown (dynamic dims after the batch) has cost 0; cost_share = cost / sum
of all costs (0 when the sum is 0).

JSON schema "swapper.scan/1" (``sites_to_json``), stable field by field:

- ``schema``: the string "swapper.scan/1".
- ``model``: the model path as given.
- ``opset``: the default-domain opset of the model (int).
- ``total_cost``: sum of the sites' ``cost`` (float, Relu-element units per sample).
- ``sites``: list, one object per site in id order, with
  ``id`` ("s1"...), ``function`` (registry name), ``params`` (object; function
  parameters, tensor names for prelu "slope" / com.microsoft "bias"),
  ``input`` / ``output`` (tensor names), ``nodes`` (list of node names),
  ``form`` ("op" or pattern name such as "gelu/erf"), ``shape`` (list of int,
  string or null per dim; null if unknown), ``channel_axis`` (int|null),
  ``channels`` (int|null), ``producer`` (op type of x's producer | null for a
  graph input), ``consumers`` (list of op types reading y, "<output>" for a
  graph output), ``role`` ("pointwise"|"gate"|"output"), ``elements``
  (int|null), ``cost`` (float), ``cost_share`` (float in [0, 1]),
  ``supported`` (bool), ``reason`` (string|null, why not swappable),
  ``domain`` (op domain, "" for the default one).
"""
from __future__ import annotations

import logging
import math
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Literal

import onnx

from swapper.core.graph import GraphIndex, is_op, node_subgraphs
from swapper.functions.costs import relative_cost
from swapper.scan.match import Decline, Match
from swapper.scan.patterns import match_graph

logger = logging.getLogger(__name__)

Role = Literal["pointwise", "gate", "output"]


@dataclass(frozen=True)
class Site:
    """One activation site. Tensor names are the graph's own; ``nodes`` are node names."""

    id: str  # "s1", "s2", ... in graph order; stable for a given model file
    function: str  # registry name in swapper.functions.registry (e.g. "silu", "gelu", "sigmoid")
    params: dict  # the function's own parameters (swish beta, elu alpha, ...)
    input: str  # the tensor x the activation reads
    output: str  # the tensor y it writes (kept by every rewrite)
    nodes: tuple[str, ...]  # names of the nodes that make up the site
    form: str  # "op" for a single op, else the pattern name (e.g. "silu/mul-sigmoid")
    shape: tuple | None  # static shape of the input (ints; None/str for dynamic dims)
    channel_axis: int | None
    channels: int | None
    producer: str | None  # op type producing x (None for a graph input)
    consumers: tuple[str, ...]  # op types reading y ("<output>" for graph outputs)
    role: Role
    elements: int | None  # elements per sample (product of the static dims after the batch)
    cost: float  # elements x relative cost of the function (cost units per sample)
    cost_share: float  # cost / total activation cost of the model
    supported: bool = True
    reason: str | None = None  # why a site cannot be swapped (e.g. inside a Loop body)
    domain: str = ""

    def to_dict(self) -> dict:
        d = asdict(self)
        d["nodes"] = list(self.nodes)
        d["consumers"] = list(self.consumers)
        d["shape"] = list(self.shape) if self.shape is not None else None
        return d


SCHEMA = "swapper.scan/1"
CONV_LIKE = frozenset({"Conv", "ConvTranspose", "BatchNormalization", "InstanceNormalization",
                       "MaxPool", "AveragePool", "LpPool", "QLinearConv", "ConvInteger"})
TOKEN_LIKE = frozenset({"MatMul", "Gemm", "LayerNormalization", "MatMulInteger", "QLinearMatMul",
                        "FusedMatMul", "SkipLayerNormalization", "Attention"})
PASS_THROUGH = frozenset({"Add", "Sub", "Mul", "Div"})  # bias adds / scales keep the layout


def _producer_kind(ix: GraphIndex, tensor: str, depth: int = 4) -> str | None:
    """"conv" or "token" by the layer that made ``tensor`` (through bias/scale ops), else None."""
    node = ix.producer.get(tensor)
    for _ in range(depth):
        if node is None:
            return None
        if node.op_type in CONV_LIKE:
            return "conv"
        if node.op_type in TOKEN_LIKE:
            return "token"
        if node.op_type not in PASS_THROUGH:
            return None
        live = [t for t in node.input if t and ix.is_dynamic(t)]
        kinds = {_producer_kind(ix, t, 1) for t in live}
        for kind in ("conv", "token"):  # a dynamic operand made by a layer decides
            if kind in kinds:
                return kind
        node = ix.producer.get(live[0]) if live else None
    return None


def channel_axis(ix: GraphIndex, x: str, shape: tuple | None) -> int | None:
    """The axis per-channel parameters run along for tensor ``x`` (see module docstring)."""
    if shape is None:
        return None
    rank = len(shape)
    if rank == 2:
        return 1
    if rank not in (3, 4, 5):
        return None
    kind = _producer_kind(ix, x)
    if kind == "token":
        return rank - 1
    if rank in (4, 5) or kind == "conv":
        return 1
    return None


def _strictly_broadcast(small: tuple | None, big: tuple | None) -> bool:
    """True if ``small`` is known to broadcast onto the larger ``big`` (e.g. [N,C,1,1] onto [N,C,H,W])."""
    if small is None or big is None or len(small) != len(big):
        return False
    if any(s != 1 and s != b for s, b in zip(small, big)):
        return False
    return any(s == 1 and b != 1 for s, b in zip(small, big))


def role_of(ix: GraphIndex, y: str) -> str:
    """"output", "gate" or "pointwise" for a site writing ``y`` (see module docstring)."""
    if ix.is_graph_output(y):
        return "output"
    for user in ix.users(y):
        if is_op(user, "Mul", "Div") and len(user.input) == 2:
            others = [t for t in user.input if t != y]
            # the feature map a squeeze-excite gate multiplies is gated, not a gate
            if others and ix.is_dynamic(others[0]) and not _strictly_broadcast(ix.shape(others[0]), ix.shape(y)):
                return "gate"
    return "pointwise"


def _elements(shape: tuple | None) -> int | None:
    if shape is None or len(shape) == 0:
        return None if shape is None else 1
    dims = shape[1:]
    if not all(isinstance(d, int) and d > 0 for d in dims):
        return None
    return math.prod(dims)


def _article(word: str) -> str:
    return "an" if word[:1].upper() in "AEIOU" else "a"


def _collect(ix: GraphIndex, key: tuple, inside: str | None, out: list, declines: list) -> None:
    """Append (order key, index, match, reason-from-context) for this graph and its bodies."""
    matches, declined = match_graph(ix)
    declines.extend(declined)
    for m in matches:
        out.append((key + (ix.node_position[m.nodes[0]],), ix, m, inside))
    for node in ix.graph.node:
        for k, body in enumerate(node_subgraphs(node)):
            reason = f"inside {_article(node.op_type)} {node.op_type} body (subgraphs are not rewritten)"
            _collect(GraphIndex.of_graph(body, ix.opsets), key + (ix.node_position[node.name], k), reason,
                     out, declines)


def _cost(sid: str, ix: GraphIndex, m: Match) -> tuple[int | None, float]:
    """(elements per sample, cost) of a match; cost 0 when the elements are unknown."""
    shape = ix.shape(m.input)
    elements = _elements(shape)
    if elements is None:
        logger.info("site %s: elements per sample unknown (shape %s); cost counted as 0", sid, shape)
        return None, 0.0
    return elements, float(elements * relative_cost(m.function, m.form, m.domain))


def _describe(sid: str, ix: GraphIndex, m: Match, inside: str | None, measured: tuple[int | None, float],
              total_cost: float) -> Site:
    """The Site for a match; ``measured`` is its (elements, cost) from :func:`_cost`."""
    shape = ix.shape(m.input)
    axis = channel_axis(ix, m.input, shape)
    channels = shape[axis] if axis is not None and isinstance(shape[axis], int) else None
    producer = ix.producer.get(m.input)
    consumers = [u.op_type for u in ix.users(m.output)]
    if ix.is_graph_output(m.output):
        consumers.append("<output>")
    elements, cost = measured
    return Site(
        id=sid, function=m.function, params=dict(m.params), input=m.input, output=m.output,
        nodes=tuple(m.nodes), form=m.form, shape=shape, channel_axis=axis, channels=channels,
        producer=producer.op_type if producer is not None else None, consumers=tuple(consumers),
        role=role_of(ix, m.output), elements=elements, cost=cost,
        cost_share=cost / total_cost if total_cost > 0 else 0.0,
        supported=m.supported and inside is None, reason=inside or m.reason, domain=m.domain,
    )


def find_sites(model: onnx.ModelProto, *, declines: list[Decline] | None = None) -> list[Site]:
    """Every activation site of a loaded, shape-inferred model, in graph order (ids s1, s2, ...).

    Pass a list as ``declines`` to receive the decomposed patterns that were
    seen but not claimed, with their reasons. Nodes are referred to by name, so
    the model's nodes, subgraph bodies included, must be named as
    :func:`swapper.core.model_io.load_model` leaves them (``name_unnamed_nodes``).
    """
    found: list = []
    seen_declines: list[Decline] = []
    _collect(GraphIndex.of(model), (), None, found, seen_declines)
    found.sort(key=lambda item: item[0])
    ids = [f"s{i}" for i in range(1, len(found) + 1)]
    measured = [_cost(sid, ix, m) for sid, (_, ix, m, _) in zip(ids, found)]
    total = sum(cost for _, cost in measured)  # first, so each Site is built once, with its share
    sites = [_describe(sid, ix, m, inside, cost, total)
             for sid, (_, ix, m, inside), cost in zip(ids, found, measured)]
    if declines is not None:
        declines.extend(seen_declines)
    logger.info("found %d activation sites (%d declined patterns)", len(sites), len(seen_declines))
    return sites


def sites_to_json(sites: list[Site], model_path: str | Path, opset: int) -> dict:
    """The "swapper.scan/1" document (module docstring) for ``sites`` of the model at ``model_path``.

    ``opset`` is the model's default-domain opset (``LoadedModel.opset``).
    """
    return {
        "schema": SCHEMA,
        "model": str(model_path),
        "opset": int(opset),
        "sites": [s.to_dict() for s in sites],
        "total_cost": float(sum(s.cost for s in sites)),
    }
