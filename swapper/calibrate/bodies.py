"""What the sites inside If/Loop/Scan bodies see: their (x, y) pairs on the calibration set.

Transformation: (original model, body sites, their swaps, data set) -> one
filled per-channel observer per site (and notes), for the calibration loop to
fit as it fits any site. Per batch, the main-graph values the bodies read (an
If's condition, a Loop's trip count, condition and initial state, a Scan's
inputs, and the outer-scope values a body reads by name) come from the
original model through the slice runner; each body then runs as a model of its
own the way its node runs it (:class:`swapper.core.body_runs.BodyRunner`):

- If: a branch sees the batches whose condition chose it, and only those;
- Loop / Scan: every iteration is one run, its carried state taken from the
  run before, so each iteration's (x, y) is observed.

Body sites are fitted on the original model's own values (local mode, in
either calibration mode): upstream swaps do not reach them, and their
consumers get no bias correction. A site whose body did not run on any batch
(an If branch the data never takes) is observed empty and keeps its starting
parameters, with a note.
"""
from __future__ import annotations

import logging
from dataclasses import dataclass, field

import onnx

from swapper.core.body_runs import MAX_RUNS, BodyRunner
from swapper.core.session import expose
from swapper.core.slices import SliceRunner
from swapper.core.tensor_cache import TensorCache
from swapper.data.dataset import Dataset, input_batches
from swapper.fit.observe import ChannelObserver
from swapper.plan.plan import SiteSwap
from swapper.progress import Silent
from swapper.scan.sites import Site

logger = logging.getLogger(__name__)

PREFIX = "bodies::"  # cache namespace of the main-graph values read for the bodies (nothing is stored)


@dataclass
class BodyObservations:
    """Per body site: its observer, how many body runs fed it, and notes for the report."""

    observers: dict[str, ChannelObserver]
    runs: dict[str, int]
    notes: dict[str, list[str]] = field(default_factory=dict)


def observe_bodies(original: onnx.ModelProto, sites: list[Site], swaps: dict[str, SiteSwap], dataset: Dataset, *,
                   batch_size: int = 64, seed: int = 0, reservoir: int = 4096, threads: int = 1,
                   progress=None) -> BodyObservations:
    """Observe every body site of ``sites`` (each with a swap in ``swaps``) over ``dataset`` (module docstring)."""
    progress = progress or Silent()
    wanted: dict[tuple, list[str]] = {}
    for site in sites:
        wanted.setdefault(site.body, []).extend([site.input, site.output])
    observers = {}
    for site in sites:
        swap = swaps[site.id]
        axis = swap.channel_axis if swap.channels > 1 else None
        observers[site.id] = ChannelObserver(swap.channels, axis, reservoir=reservoir, seed=seed)
    seen = BodyObservations(observers, {s.id: 0 for s in sites})
    runner = BodyRunner(original, wanted, threads=threads)
    needs = runner.main_needs()
    by_body: dict[tuple, list[Site]] = {}
    for site in sites:
        by_body.setdefault(site.body, []).append(site)
    with TensorCache() as cache, progress.task(f"bodies: observing {len(sites)} site(s)",
                                               -(-dataset.n // batch_size)) as advance:
        # the whole original runs, with the values the bodies read exposed: a slice cut at those values would
        # miss what other bodies on the way read by name
        slices = SliceRunner(cache, input_batches(dataset, batch_size), prefix=PREFIX, threads=threads)
        for _, values in slices.stream(expose(original, needs), needs, whole=True):
            for path, run in runner.runs(values):
                for site in by_body.get(path, []):
                    observers[site.id].update(run[site.input], run[site.output])
                    seen.runs[site.id] += 1
            advance(1)
    for site in sites:
        notes = seen.notes.setdefault(site.id, [])
        notes.append("inside a body: fitted on the original model's own values (local mode), no bias correction")
        if seen.runs[site.id] == 0:
            notes.append("its body did not run on any calibration batch (an If branch the data never takes?); "
                         "starting parameters kept")
        stopped = sum(n for p, n in runner.stopped.items() if site.body[:len(p)] == p)
        if stopped:
            notes.append(f"{stopped} execution(s) of its body's node followed for their first {MAX_RUNS} runs only")
    return seen
