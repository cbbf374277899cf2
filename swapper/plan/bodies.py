"""The graph a site's placement is decided on: the main graph, or the site's own If/Loop/Scan body.

Transformation: (model, site) -> the GraphIndex the placement of that site is
read from. A main-graph site gets the main graph's index; a site inside a body
gets the index of its body as a model of its own
(:func:`swapper.core.bodies.body_as_model`), which sees the outer constants the
body reads (so a layer of the body whose weights live outside it still folds:
the rewriter gives the layer a folded copy inside the body) but no producer for
a value the body reads from outside or takes as a formal input, and no readers
outside the body. So b, c fold only into a layer of the same body, a, d only
into layers of the same body behind the site, and a value of an enclosing graph
is never changed. The rewriter builds the same view, so what the plan says
holds in the graph.
"""
from __future__ import annotations

import logging

import onnx

from swapper.core.bodies import BodyPath, body_as_model
from swapper.core.graph import GraphIndex
from swapper.scan.sites import Site

logger = logging.getLogger(__name__)


class SiteGraphs:
    """The index each site's placement is decided on, built once per body of ``model``."""

    def __init__(self, model: onnx.ModelProto, main: GraphIndex | None = None):
        self.model = model
        self.main = main if main is not None else GraphIndex.of(model)
        self._bodies: dict[BodyPath, GraphIndex] = {}

    def index_for(self, site: Site) -> GraphIndex:
        """The index of the graph ``site`` sits in (its body as a model of its own, for a body site)."""
        if not site.body:
            return self.main
        if site.body not in self._bodies:
            self._bodies[site.body] = GraphIndex.of(body_as_model(self.model, site.body)[0])
        return self._bodies[site.body]
