"""Activation sites: what they are and how to find them.

A *site* is one activation in the graph, either a single op (``Sigmoid``) or
the decomposed subgraph an exporter wrote (``x·Sigmoid(x)``, the Erf form of
GELU, ...). ``find_sites`` runs the matchers of :mod:`swapper.patterns` over
the graph and describes each match.
"""
from __future__ import annotations

from dataclasses import asdict, dataclass, field
from typing import Literal

Role = Literal["pointwise", "gate", "output"]


@dataclass(frozen=True)
class Site:
    """One activation site. Tensor names are the graph's own; ``nodes`` are node names."""

    id: str  # "s1", "s2", ... in graph order; stable for a given model file
    function: str  # registry name in swapper.functions (e.g. "silu", "gelu", "sigmoid")
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
