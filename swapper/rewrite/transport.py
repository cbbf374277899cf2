"""Carrying out the "through-add" placements: parameters passed through residual Adds into layers.

Transformation (the rules and their maths: :mod:`swapper.plan.add_folds`):

- b, c of a site reading ``z = u + v``: every operand is scaled by b (an
  exclusive linear producer's rows and bias; a swapped site's pre-activation
  wherever that site's own b lives, recursively, with that site's other readers
  reading through 1/b), then c is added to one exclusive producer's bias;
- d of a site whose output feeds residual Adds: added to each Add's other
  exclusive producer's bias, or to the bias of the linear layers reading the
  Add's output (W·d).

The folds go through the rewriter's :class:`~swapper.rewrite.weights.Weights`
copies, so they compose with every other fold in the order made. Sites are
carried out in graph order: a scale from a downstream site must land on an
upstream site's pre-activation *after* that site's own b, c (s·(b·x + c), not
s·b·x + c). The routes are worked out on the untouched graph, before any fold
rewires a weight, with the placements of the plan being carried out.
"""
from __future__ import annotations

import logging

import numpy as np

from swapper.core.emit import Emitter
from swapper.core.graph import GraphIndex
from swapper.errors import UsageError
from swapper.plan.add_folds import THROUGH_ADD, AddInput, AddReader, Upstream, add_input, add_readers
from swapper.plan.fold_targets import ProducerFold
from swapper.rewrite.weights import Weights, apply_consumer, apply_producer
from swapper.scan.sites import Site

logger = logging.getLogger(__name__)


class Transport:
    """The through-add routes of one plan on one graph, and the folds along them."""

    def __init__(self, index: GraphIndex, weights: Weights, swaps: list[tuple[Site, dict, bool]],
                 producers: dict[str, tuple[ProducerFold | None, str]]):
        """``swaps``: (site, placement, surrogate is homogeneous) in graph order; ``producers``: each
        site's :func:`~swapper.plan.fold_targets.producer_fold`, taken on the untouched graph."""
        self.weights = weights
        self.producers = producers
        self.placements = {site.id: place for site, place, _ in swaps}
        self.inputs: dict[str, tuple[AddInput | None, str]] = {}
        self.readers: dict[str, tuple[list[AddReader], str]] = {}
        upstream: dict[str, Upstream] = {}
        for site, place, homogeneous in swaps:
            if place.get("b") == THROUGH_ADD or place.get("c") == THROUGH_ADD:
                self.inputs[site.id] = add_input(index, site, upstream)
            if place.get("d") in (THROUGH_ADD, "approx"):
                self.readers[site.id] = add_readers(index, site)
            upstream[site.output] = Upstream(site, place, homogeneous)

    def input_route(self, site_id: str, need_scale: bool, need_shift: bool) -> AddInput:
        """The Add route of ``site_id``'s b, c; UsageError when the graph does not allow what is asked."""
        route, why = self.inputs.get(site_id, (None, "its input does not come from a residual Add"))
        if route is None:
            raise UsageError(f"site {site_id}: plan passes b/c through an add but {why}")
        if need_scale and route.scale_why:
            raise UsageError(f"site {site_id}: plan passes b through an add but {route.scale_why}")
        if need_shift and route.shift is None:
            raise UsageError(f"site {site_id}: plan passes c through an add but no operand's producer has a bias")
        return route

    def fold_input(self, site_id: str, b: np.ndarray | None, c: np.ndarray | None, em: Emitter) -> list[str]:
        """Fold x -> b·x + c of ``site_id`` through the Add producing x (None: that one is not carried)."""
        route = self.input_route(site_id, b is not None, c is not None)
        touched = self.scale_add(route, b, em) if b is not None else []
        if c is not None:  # after the scale: b·(u + v) + c = (b·u + c) + b·v
            touched += apply_producer(self.weights, route.operands[route.shift].producer, np.ones(1), c, em)
        return touched

    def scale_add(self, route: AddInput, s: np.ndarray, em: Emitter) -> list[str]:
        """Scale every operand of ``route``'s Add by ``s`` (> 0 where an operand is a site's output)."""
        touched = []
        for op in route.operands:
            if op.producer is not None:
                touched += apply_producer(self.weights, op.producer, s, np.zeros(1), em)
                continue
            if np.any(s <= 0):
                raise UsageError(f"a scale through the output of site {op.site_id} needs every value > 0")
            touched += self.scale_preactivation(op.site_id, s, em)
            for f in op.readers:  # they read s·v now: L(v) = (L·diag(1/s))(s·v)
                touched += apply_consumer(self.weights, f, 1.0 / s, None, em)
        return touched

    def scale_preactivation(self, site_id: str, s: np.ndarray, em: Emitter) -> list[str]:
        """Scale the argument of ``site_id``'s g by ``s`` > 0 where its b lives: g(s·z) = s·g(z)."""
        where = self.placements[site_id]["b"]
        if where == "producer":
            pf, why = self.producers[site_id]
            if pf is None:
                raise UsageError(f"site {site_id}: a scale cannot reach its producer: {why}")
            return apply_producer(self.weights, pf, s, np.zeros(1), em)
        if where == THROUGH_ADD:
            return self.scale_add(self.input_route(site_id, True, False), s, em)
        raise UsageError(f"site {site_id}: a scale cannot reach its pre-activation (b is {where!r})")

    def fold_offset(self, site_id: str, d: np.ndarray, em: Emitter) -> list[str]:
        """Fold + d of ``site_id``'s output through the residual Adds reading it (module docstring)."""
        routes, why = self.readers.get(site_id, ([], ""))
        if why:
            raise UsageError(f"site {site_id}: plan passes d through an add but {why}")
        touched = []
        for r in routes:
            if r.producer is not None:  # (y + d) + u = y + (u + d)
                touched += apply_producer(self.weights, r.producer, np.ones(1), d, em)
            else:  # L(z + d) = L(z) + W·d
                for f in r.onward:
                    touched += apply_consumer(self.weights, f, None, d, em)
        return touched

    def onward(self, site_id: str) -> list:
        """The consumer folds d reaches behind the Adds (for the checks and the border report)."""
        return [f for r in self.readers.get(site_id, ([], ""))[0] for f in r.onward or []]
