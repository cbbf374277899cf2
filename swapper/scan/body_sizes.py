"""How much a body site computes per sample, measured by running its body.

Transformation: (model, its sites, one batch of input feeds) -> {(body path,
tensor): elements}, the elements of each body site's input summed over every
run of its body on those feeds: each iteration of a Loop or Scan counts, an If
branch the feeds did not take counts 0. The main graph is run once in
onnxruntime for the values the bodies read; the bodies then run as their nodes
run them (:class:`swapper.core.body_runs.BodyRunner`). The feeds are one
sample of the calibration data or zeros of the shapes the user gives, so a
branch or trip count that depends on the values follows those values.

Sites whose body cannot be run on its own are left out (their cost stays
unknown); a failure to run is logged and leaves every body size unknown.
"""
from __future__ import annotations

import logging

import numpy as np
import onnx

from swapper.core.body_runs import BodyRunner
from swapper.core.session import ORT_ERRORS, expose, open_session
from swapper.errors import BadModelError, first_line
from swapper.scan.sites import Site

logger = logging.getLogger(__name__)


def main_values(model: onnx.ModelProto, names: list[str], feeds: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    """The main-graph tensors ``names`` for ``feeds`` (graph inputs are taken from the feeds)."""
    values = {n: feeds[n] for n in names if n in feeds}
    rest = [n for n in names if n not in feeds]
    if rest:
        session = open_session(expose(model, rest), what="the model (running it for its bodies' inputs)")
        values.update(zip(rest, session.run(rest, feeds)))
    return values


def measure_body_sizes(model: onnx.ModelProto, sites: list[Site], feeds: dict[str, np.ndarray]) -> dict:
    """{(body path, site input): elements over the body's runs} for the swappable body sites (module docstring)."""
    wanted: dict = {}
    for site in sites:
        if site.body and site.supported:
            wanted.setdefault(site.body, []).append(site.input)
    if not wanted:
        return {}
    sizes = {(path, name): 0 for path, names in wanted.items() for name in names}
    try:
        runner = BodyRunner(model, wanted)
        for path, values in runner.runs(main_values(model, runner.main_needs(), feeds)):
            for name in wanted[path]:
                sizes[(path, name)] += int(np.asarray(values[name]).size)
    except (*ORT_ERRORS, BadModelError) as exc:
        logger.warning("could not run the model's bodies to measure their sites: %s", first_line(exc))
        return {}
    return sizes
