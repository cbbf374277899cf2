"""Activation sites: what they are and how to find them.

A *site* is one activation in the graph, either a single op (``Sigmoid``) or
the decomposed subgraph an exporter wrote (``x·Sigmoid(x)``, the Erf form of
GELU, ...). ``find_sites`` runs the matchers of :mod:`swapper.scan.patterns` over
the graph and describes each match.

Transformation: shape-inferred ModelProto -> list[Site]: first the main
graph's sites, ids s1 ... sN by the graph position of each site's first node
(so they do not depend on what bodies hold), then the sites inside If/Loop/Scan
bodies, numbered on from N+1 depth first in node order, each with the path of
its body (``body``: (node name, attribute) steps from the main graph inward).
A body site is swappable like a main-graph one when its body can be run on its
own as its node runs it (:func:`swapper.core.bodies.why_not_runnable`: If, Loop
and Scan bodies passing tensors); otherwise supported=False with a one-line
reason naming the body.

Channel axis (the axis per-channel parameters run along): rank 4/5 -> 1; rank
2 -> 1 (= last); rank 3 -> 1 when x comes from Conv/BatchNormalization
(Conv1d), 2 (last) when it comes from MatMul/Gemm/LayerNormalization (token
tensors [N, T, C]); the producer is looked up through at most a few bias /
scale Add/Sub/Mul/Div nodes. Anything else -> None. Rank 4/5 tensors that come
from a MatMul (attention) use the last axis.

Role (:mod:`swapper.scan.roles`, following y through ops that pass values on
unchanged, into and out of If/Loop/Scan bodies): "output" if y's values reach an
output of the main graph; else "gate" if they are multiplied by a different
dynamic tensor (squeeze-excite, GLU), unless that tensor is known to be
broadcast onto them (then y is the feature map being gated); else "hidden" (an
ordinary activation inside the network, the kind swapped by default).

Cost: elements per sample x relative cost of the site's function in the form
the graph writes it (:mod:`swapper.functions.costs`, Relu = 1). Elements come
from concrete shapes when the caller measured them (``shapes``: from calibration
data or given input shapes, :mod:`swapper.scan.shapes`), else from the model's
static shapes. A site whose elements stay unknown (symbolic dims after the
batch) has cost None; cost_share = cost / sum of all costs, None when that sum
is unknown (a share is never made up as 0). A body site's elements are what its
body computes on the measured feeds, summed over the body's runs (every
iteration of a Loop/Scan; 0 for an If branch the feeds did not take;
:mod:`swapper.scan.body_sizes`); unmeasured, they are unknown, since how often
a body runs is known only by running it.

JSON schema "swapper.scan/1" (``sites_to_json``), stable field by field:

- ``schema``: the string "swapper.scan/1".
- ``model``: the model path as given.
- ``opset``: the default-domain opset of the model (int).
- ``total_cost``: sum of the sites' ``cost`` (float, Relu-element units per
  sample; null when any site's cost is unknown).
- ``sites``: list, one object per site in id order, with
  ``id`` ("s1"...), ``function`` (registry name), ``params`` (object; function
  parameters, tensor names for prelu "slope" / com.microsoft "bias"),
  ``input`` / ``output`` (tensor names), ``nodes`` (list of node names),
  ``form`` ("op" or pattern name such as "gelu/erf"), ``shape`` (list of int,
  string or null per dim; null if unknown), ``channel_axis`` (int|null),
  ``channels`` (int|null), ``producer`` (op type of x's producer | null for a
  graph input), ``consumers`` (list of op types reading y, "<output>" for a
  graph output), ``role`` ("hidden"|"gate"|"output"; "hidden" was written
  "pointwise" before, same meaning), ``elements``
  (int|null), ``cost`` (float|null), ``cost_share`` (float in [0, 1]|null),
  ``supported`` (bool), ``reason`` (string|null, why not swappable),
  ``domain`` (op domain, "" for the default one), ``body`` (list of
  [node name, attribute] steps from the main graph to the site's body; empty
  for a main-graph site).
"""
from __future__ import annotations

import logging
import math
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Literal

import onnx

from swapper.core.bodies import why_not_runnable
from swapper.core.graph import GraphIndex
from swapper.functions.costs import relative_cost
from swapper.scan.match import Decline, Match
from swapper.scan.patterns import match_graph
from swapper.scan.roles import Scope, role_of

logger = logging.getLogger(__name__)

Role = Literal["hidden", "gate", "output"]


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
    cost: float | None  # elements x relative cost of the function (cost units per sample); None: unknown
    cost_share: float | None  # cost / total activation cost of the model; None when unknown
    supported: bool = True
    reason: str | None = None  # why a site cannot be swapped (e.g. inside a body that is not run on its own)
    domain: str = ""
    body: tuple[tuple[str, str], ...] = ()  # (node name, attribute) steps to the site's body; () = main graph

    def to_dict(self) -> dict:
        d = asdict(self)
        d["nodes"] = list(self.nodes)
        d["consumers"] = list(self.consumers)
        d["shape"] = list(self.shape) if self.shape is not None else None
        d["body"] = [list(step) for step in self.body]
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


def _elements(shape: tuple | None) -> int | None:
    if shape is None or len(shape) == 0:
        return None if shape is None else 1
    dims = shape[1:]
    if not all(isinstance(d, int) and d > 0 for d in dims):
        return None
    return math.prod(dims)


def _collect(scope: Scope, out: list, declines: list) -> None:
    """Append (scope, match) for this graph's sites, then for its bodies' (depth first, in node order)."""
    matches, declined = match_graph(scope.index)
    declines.extend(declined)
    out.extend((scope, m) for m in matches)
    for node, attribute, graph in scope.bodies_here():
        _collect(scope.body(node, attribute, graph), out, declines)


def _steps(scope: Scope) -> list[tuple[onnx.NodeProto, str, onnx.GraphProto]]:
    """(owner node, attribute, body) from the main graph inward to ``scope``; [] for the main graph."""
    steps = []
    while scope.owner is not None:
        steps.append((scope.owner, scope.attribute, scope.index.graph))
        scope = scope.parent
    return steps[::-1]


def body_path(scope: Scope) -> tuple[tuple[str, str], ...]:
    """The ``Site.body`` of a site in ``scope``: (node name, attribute) steps from the main graph."""
    return tuple((owner.name, attribute) for owner, attribute, _ in _steps(scope))


def _elements_of(scope: Scope, m: Match, shapes: dict, sizes: dict) -> int | None:
    """Elements per sample of a match's input: from ``shapes`` (main graph) when given, else the model's shapes;
    in a body, from ``sizes`` (summed over the body's runs) or unknown."""
    if scope.owner is not None:
        return sizes.get((body_path(scope), m.input))
    if m.input in shapes:
        return _elements(tuple(shapes[m.input]))
    return _elements(scope.shape(m.input))


def _describe(sid: str, scope: Scope, m: Match, elements: int | None, total_cost: float | None) -> Site:
    """The Site for a match with ``elements`` per sample, its share of ``total_cost`` (None: unknown)."""
    ix = scope.index
    shape = scope.shape(m.input)
    axis = channel_axis(scope.defining(m.input).index, m.input, shape)
    channels = shape[axis] if axis is not None and isinstance(shape[axis], int) else None
    producer = scope.defining(m.input).index.producer.get(m.input)
    consumers = [u.op_type for u in ix.users(m.output)]
    if ix.is_graph_output(m.output):
        consumers.append("<output>")
    cost = None if elements is None else float(elements * relative_cost(m.function, m.form, m.domain))
    inside = why_not_runnable(_steps(scope)) if scope.owner is not None else None
    return Site(
        id=sid, function=m.function, params=dict(m.params), input=m.input, output=m.output,
        nodes=tuple(m.nodes), form=m.form, shape=shape, channel_axis=axis, channels=channels,
        producer=producer.op_type if producer is not None else None, consumers=tuple(consumers),
        role=role_of(scope, m.output), elements=elements, cost=cost,
        cost_share=cost / total_cost if cost is not None and total_cost else None,
        supported=m.supported and inside is None, reason=inside or m.reason, domain=m.domain,
        body=body_path(scope),
    )


def find_sites(model: onnx.ModelProto, *, declines: list[Decline] | None = None,
               shapes: dict[str, tuple] | None = None, body_sizes: dict | None = None) -> list[Site]:
    """Every activation site of a loaded, shape-inferred model (ids s1, s2, ...; see the module docstring).

    Pass a list as ``declines`` to receive the decomposed patterns that were
    seen but not claimed, with their reasons. ``shapes`` maps main-graph tensor
    names to concrete shapes (:func:`swapper.scan.shapes.measure_shapes`), used
    for elements and cost where the model's own shapes are symbolic; ``body_sizes``
    maps (body path, tensor) to the elements a body site's input takes over the
    body's runs (:func:`swapper.scan.body_sizes.measure_body_sizes`). Nodes are
    referred to by name, so the model's nodes, subgraph bodies included, must be
    named as :func:`swapper.core.model_io.load_model` leaves them (``name_unnamed_nodes``).
    """
    found: list = []
    seen_declines: list[Decline] = []
    _collect(Scope.of(model), found, seen_declines)
    elements = [_elements_of(scope, m, shapes or {}, body_sizes or {}) for scope, m in found]
    costs = [None if e is None else e * relative_cost(m.function, m.form, m.domain)
             for e, (_, m) in zip(elements, found)]
    unknown = [i for i, c in enumerate(costs) if c is None]
    if unknown:
        logger.info("%d of %d sites have symbolic sizes; cost shares unknown (give shapes or data)",
                    len(unknown), len(found))
    total = None if unknown else sum(costs)  # a share of an unknown total is unknown, never 0
    sites = [_describe(f"s{i}", scope, m, e, total)
             for i, ((scope, m), e) in enumerate(zip(found, elements), start=1)]
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
        "total_cost": None if any(s.cost is None for s in sites) else float(sum(s.cost for s in sites)),
    }
