"""Slices of a graph: the part that computes some tensors from others."""
from __future__ import annotations

import logging

import onnx
from onnx.utils import Extractor

from swapper.core.graph import GraphIndex
from swapper.core.session import expose

logger = logging.getLogger(__name__)


def segment_model(model: onnx.ModelProto, inputs: list[str], outputs: list[str]) -> onnx.ModelProto:
    """The part of ``model`` that computes ``outputs`` from ``inputs`` (graph inputs always allowed).

    Extraction needs a type for every tensor on the cut's edges: an input
    without one is left out (the segment then starts further up, same values),
    an output without one is typed as :func:`~swapper.core.session.expose` types it.
    """
    index = GraphIndex.of(model)
    untyped = [t for t in outputs if t not in index.dtypes]
    if untyped:
        model = expose(model, untyped)
    starts = list(dict.fromkeys(index.graph_inputs + [t for t in inputs if t in index.dtypes]))
    seg = Extractor(model).extract_model(starts, outputs)
    # keep only the inputs the segment really reads, so we feed no more than needed
    used = {t for n in seg.graph.node for t in n.input} | set(outputs)
    kept = [v for v in seg.graph.input if v.name in used]
    del seg.graph.input[:]
    seg.graph.input.extend(kept)
    return seg


def boundary_reads(index: GraphIndex, boundary: set[str], outputs: list[str]) -> list[str]:
    """The ``boundary`` tensors that computing ``outputs`` reads (a backward walk stopping at the boundary)."""
    reads, seen, stack = set(), set(), list(outputs)
    while stack:
        name = stack.pop()
        if not name or name in seen:
            continue
        seen.add(name)
        if name in boundary:
            reads.add(name)
            continue
        node = index.producer.get(name)
        if node is not None:
            stack.extend(node.input)
    return sorted(reads)
