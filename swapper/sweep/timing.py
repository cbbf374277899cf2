"""Timing one single-site candidate on a measured target, in the site's neighbourhood or in the whole model.

Transformation: (original, candidate with one site swapped, the site, a
measured profile) -> the target timing (``TargetTiming`` fields) of the
candidate against the original, by
:func:`swapper.check.on_target.time_on_target` at the profile's settings.

Scope ``neighbourhood`` (the default): both models cut to the same part, from
the inputs of the site's producer to the outputs of the layers that read the
site (:func:`swapper.core.slices.segment_model`), fed random inputs of the
calibration batch's size. That part holds everything a swap changes and what
the runtime fuses it with: the producer (a Conv that absorbs a Relu), the
site, the parameter nodes a placement adds, the consumers that take folded
weights or add a residual. The rest of the graph runs the same in both and
only adds noise: one of the 13 SiLU sites of the demo ResNet saves about 0.6%
of the whole model's time, and three whole-model timings of it gave ratios
1.006, 0.971 and 1.015. Scope ``model``: the whole graphs on the calibration
batch, as the verification of a combined plan times them.
"""
from __future__ import annotations

import logging

import onnx

from swapper.check.on_target import random_feeds, time_on_target
from swapper.core.graph import GraphIndex
from swapper.core.slices import segment_model
from swapper.scan.sites import Site
from swapper.targets.profile import TargetProfile

logger = logging.getLogger(__name__)

SCOPES = ("neighbourhood", "model")


def neighbourhood(model: onnx.ModelProto, site: Site) -> tuple[list[str], list[str]]:
    """(inputs, outputs) of the part around ``site``: its producer's inputs and its readers' other inputs,
    and its readers' outputs (the site output itself when a graph output or nothing reads it)."""
    index = GraphIndex.of(model)
    inside = set(site.nodes)
    producer = index.producer.get(site.input)
    nodes = [producer] if producer is not None and producer.name not in inside else []
    readers = [n for n in index.consumers.get(site.output, []) if n.name not in inside]
    nodes += readers
    made = {t for n in nodes for t in n.output} | {site.output, site.input}
    for name in site.nodes:
        node = index.nodes_by_name.get(name)
        if node is not None:
            made |= set(node.output)
    inputs = [t for n in nodes for t in n.input if t and t not in made and index.const(t) is None]
    if producer is None or producer.name in inside:
        inputs.append(site.input)
    outputs = [t for n in readers for t in n.output if t] or [site.output]
    if site.output in {o.name for o in model.graph.output}:
        outputs.append(site.output)
    return list(dict.fromkeys(inputs)), list(dict.fromkeys(outputs))


def time_candidate(original: onnx.ModelProto, candidate: onnx.ModelProto, site: Site, profile: TargetProfile, *,
                   feeds: dict, calib_batches: list[dict], scope: str = "neighbourhood", repeats: int = 20,
                   batch: int = 64) -> dict:
    """The timing of ``candidate`` against ``original`` on ``profile`` (module docstring), as a dict."""
    if scope == "model":
        return time_on_target(original, candidate, profile, feeds, calib_batches=calib_batches,
                              feeds_from="the calibration set", repeats=repeats).to_dict()
    inputs, outputs = neighbourhood(original, site)
    parts = [segment_model(m, inputs, outputs) for m in (original, candidate)]
    local = random_feeds(parts[0], batch)
    timing = time_on_target(parts[0], parts[1], profile, local, calib_batches=[local],
                            feeds_from=f"random inputs, the part from {', '.join(inputs)} to {', '.join(outputs)}",
                            repeats=repeats)
    return timing.to_dict()
