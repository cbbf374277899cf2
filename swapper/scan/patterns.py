"""Matchers that recognise activations in an ONNX graph.

Transformation: graph -> list of non-overlapping :class:`Match` (one per
activation), each naming the function, its parameters, the tensor x it reads,
the tensor y it writes, and the nodes between them.

Two kinds of matcher:

- *single ops* (``Sigmoid``, ``Gelu``, com.microsoft ``QuickGelu`` ...),
  one table lookup each (:func:`match_single_op`);
- *decomposed patterns*: the subgraphs exporters write (``x·Sigmoid(x)``, the
  Erf form of GELU, ...). Each is a small :class:`Pattern` anchored at one node
  (the transcendental op of the form, or the last node of a clamp). ``match`` returns
  None when the neighbourhood does not look like the pattern at all, a
  *reason string* when it does but must be declined (a constant is off, an
  intermediate tensor is read elsewhere), or a Match. Other exporters'
  spellings live in :mod:`swapper.scan.sigmoid_forms` (1/(1+exp(−x)), SiLU
  across Casts) and :mod:`swapper.scan.clamped` (hard-swish / hard-sigmoid
  written with Clip, Min/Max or Relu; leaky ReLU as max(x, α·x)).

A pattern only claims nodes whose intermediate outputs are read by the pattern
alone and are not graph outputs: rewriting the site replaces all of its nodes,
so anything else reading an intermediate would lose its input. When a pattern
declines, its inner op (e.g. the Sigmoid of a SiLU) is reported as a single op.

This module is the entry point and holds the single-op table; the decomposed
patterns live in :mod:`swapper.scan.decomposed`, the Match/Decline records
and shared graph queries in :mod:`swapper.scan.match`.
"""
from __future__ import annotations

import logging

import onnx

from swapper.core.graph import DEFAULT_DOMAINS, GraphIndex, attr
from swapper.functions.formulas import QUICK_GELU_BETA
from swapper.scan import clamped, decomposed, sigmoid_forms
from swapper.scan.match import Decline, Match, close, node_params

logger = logging.getLogger(__name__)

MS_DOMAIN = "com.microsoft"
# Every decomposed form, in the order they are tried at an anchor: the measured forms first
# (their costs are in swapper/functions/op_costs.json), then other exporters' spellings.
PATTERNS = decomposed.PATTERNS + sigmoid_forms.PATTERNS + clamped.PATTERNS
# (domain, op type) -> registry function; parameters come from the registry's
# defaults overridden by the node's attributes (pattern_base.node_params).
SINGLE_OPS: dict[tuple[str, str], str] = {
    ("", "Sigmoid"): "sigmoid", ("", "Tanh"): "tanh", ("", "Relu"): "relu", ("", "Softplus"): "softplus",
    ("", "Softsign"): "softsign", ("", "HardSwish"): "hard_swish", ("", "Mish"): "mish",
    ("", "LeakyRelu"): "leaky_relu", ("", "PRelu"): "prelu", ("", "Elu"): "elu", ("", "Celu"): "celu",
    ("", "Selu"): "selu", ("", "HardSigmoid"): "hard_sigmoid", ("", "Gelu"): "gelu",
    (MS_DOMAIN, "Gelu"): "gelu", (MS_DOMAIN, "BiasGelu"): "gelu", (MS_DOMAIN, "FastGelu"): "gelu_tanh",
    (MS_DOMAIN, "QuickGelu"): "quick_gelu",
}


def _single(node: onnx.NodeProto) -> tuple[str, dict] | tuple[None, None]:
    """(function, params) for a single activation op, or (None, None)."""
    domain = "" if node.domain in DEFAULT_DOMAINS else node.domain
    function = SINGLE_OPS.get((domain, node.op_type))
    if function is None:
        return None, None
    if function == "prelu":  # the slope is an input tensor (often per channel), recorded by name
        return function, {"slope": node.input[1]}
    if function == "gelu" and domain == "" and _text(attr(node, "approximate", "none")) == "tanh":
        return "gelu_tanh", {}
    if function == "quick_gelu":  # x·σ(alpha·x); the registry's quick_gelu fixes alpha = 1.702
        alpha = float(attr(node, "alpha", QUICK_GELU_BETA))
        if not close(alpha, QUICK_GELU_BETA):
            return "swish", {"beta": alpha}
    return function, node_params(node, function)


def _text(value) -> str:
    return value.decode() if isinstance(value, bytes) else value


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
        if node.domain not in DEFAULT_DOMAINS or node.name in claimed:
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
