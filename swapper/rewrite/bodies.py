"""Carry out the swaps of sites inside If/Loop/Scan bodies, one body at a time.

Transformation: (model, sites, plan) -> a copy of the model with the main
graph's swaps done as for any model, then, body by body (outer bodies first),
the swaps of the sites inside that body done on the body as a model of its own
(:func:`swapper.core.bodies.body_as_model`: it borrows the outer constants the
body reads and reserves every name of the model) and the rewritten graph put
back in its place (:func:`swapper.core.bodies.put_body`). So the surrogate's
nodes go into the site's body, parameters fold only into layers of that body
(a layer whose weights live outside the body reads a folded copy held inside
the body; the outer value itself is never changed), and new names,
``swapper/<site-id>/...``, collide with no name of any scope. Outer initializers
that nothing reads any more afterwards are dropped.

The per-graph rewrite is handed in (``rewrite_graph``, the rewriter itself), so
this module needs nothing from it but its calling convention.
"""
from __future__ import annotations

import dataclasses
import logging
from collections.abc import Callable

import onnx

from swapper.core.bodies import body_as_model, put_body
from swapper.core.graph import subgraphs
from swapper.core.surgery import drop_unused, used_names
from swapper.plan.plan import Plan
from swapper.scan.sites import Site

logger = logging.getLogger(__name__)


def has_body_swaps(sites: list[Site], plan: Plan) -> bool:
    """True when ``plan`` swaps a site that sits inside an If/Loop/Scan body."""
    bodies = {s.id for s in sites if s.body}
    return any(s.site_id in bodies for s in plan.swaps)


def node_count(model: onnx.ModelProto) -> int:
    """Nodes in every graph of ``model``, bodies included."""
    return sum(len(g.node) for g in (model.graph, *subgraphs(model.graph)))


def _by_body(sites: list[Site]) -> dict[tuple, list[Site]]:
    """The body sites grouped by body, outer bodies first, each seen as a site of a main graph (its body is one)."""
    groups: dict[tuple, list[Site]] = {}
    for site in sites:
        if site.body:
            groups.setdefault(site.body, []).append(dataclasses.replace(site, body=()))
    return {path: groups[path] for path in sorted(groups, key=lambda p: (len(p), p))}


def _in_each_body(out: onnx.ModelProto, groups: dict[tuple, list[Site]],
                  edit: Callable[[onnx.ModelProto, list[Site]], onnx.ModelProto]) -> None:
    """Replace each body of ``groups`` in ``out`` (in place) by ``edit(body as a model, its sites)``'s graph."""
    for path, inner in groups.items():  # outer bodies first; each is looked up afresh
        body, borrowed = body_as_model(out, path)
        put_body(out, path, edit(body, inner).graph, borrowed)
        logger.info("rewrote %d site(s) inside %s", len(inner), " / ".join(f"{n}.{a}" for n, a in path))


def rewrite_bodies(model: onnx.ModelProto, sites: list[Site], plan: Plan,
                   rewrite_graph: Callable) -> tuple[onnx.ModelProto, list]:
    """A copy of ``model`` with every swap of ``plan`` done (module docstring), and the rewriter's records in
    plan order. ``rewrite_graph(model, sites, plan)`` rewrites the main graph of a model and returns an object
    with ``model`` and ``records``; it is called on sites of the main graph only."""
    inside = {s.id for s in sites if s.body}
    done = rewrite_graph(model, sites, dataclasses.replace(plan, swaps=[s for s in plan.swaps
                                                                       if s.site_id not in inside]))
    out = done.model  # a copy already: the rewriter never touches its input
    records = {r.site_id: r for r in done.records}
    swaps = plan.by_site()

    def edit(body: onnx.ModelProto, inner: list[Site]) -> onnx.ModelProto:
        result = rewrite_graph(body, inner, dataclasses.replace(plan, swaps=[swaps[s.id] for s in inner], skipped=[]))
        records.update({r.site_id: r for r in result.records})
        return result.model

    _in_each_body(out, _by_body([s for s in sites if s.id in swaps]), edit)
    drop_unused(out, used_names(model))  # outer weights only the folded bodies read
    return out, [records[s.site_id] for s in plan.swaps if s.site_id in records]


def floor_with_bodies(model: onnx.ModelProto, sites: list[Site],
                      floor_graph: Callable[[onnx.ModelProto, list[Site]], onnx.ModelProto]) -> onnx.ModelProto:
    """A copy of ``model`` with every site of ``sites`` replaced as ``floor_graph(model, main-graph sites)``
    replaces them (the speed floor's Identity), body sites inside their bodies."""
    out = floor_graph(model, [s for s in sites if not s.body])
    _in_each_body(out, _by_body(sites), floor_graph)
    return out
