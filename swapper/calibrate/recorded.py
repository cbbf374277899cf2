"""Calibration from a shared recording: the original's site tensors recorded once, read by many plans.

Transformation, in two steps:

1. :func:`record_sites`: (original model, sites, calibration set) -> a folder
   of ``.npy`` files, per site its input x and output y on every calibration
   sample (axis 0 = samples), plus ``recording.json`` naming them. The
   original runs once, as one onnxruntime session of the slice from the graph
   inputs to those tensors.
2. :func:`calibrate_recorded`: (original, sites, a plan, the folder) ->
   :class:`~swapper.calibrate.loop.CalibrationResult`, every swap fitted on the
   original's own inputs and outputs read from the folder (memory-mapped),
   then the mean shift at its linear consumers corrected
   (:func:`~swapper.calibrate.bias_correction.correct_bias`).

That is what :func:`~swapper.calibrate.loop.calibrate` computes in ``local``
mode, and for a plan with one swapped site in either mode (a lone site sits at
level 1, where sequential and local calibration read the same inputs): same
observers, seeds, batches and order, so the same parameters and the same
corrected model. Many single-site candidates (the sweep) then each read the
recording instead of each running the original again.

Folder format (``recording.json``, schema ``swapper.recording/1``)::

    {"schema": "swapper.recording/1", "samples": n, "batch_size": b,
     "sites": {"s3": {"input": "<tensor>", "output": "<tensor>", "x": "s3.x.npy", "y": "s3.y.npy"}}}
"""
from __future__ import annotations

import copy
import json
import logging
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import onnx

from swapper.calibrate.bias_correction import DeltaSum, correct_bias
from swapper.calibrate.loop import (
    CANDIDATE,
    ORIGINAL,
    CalibrationResult,
    SiteCalibration,
    observer_for,
    surrogate_output,
)
from swapper.calibrate.site_fit import fit_rules, fit_swap
from swapper.core.graph import GraphIndex
from swapper.core.session import open_session
from swapper.core.slices import SliceRunner, row_spans, segment_model
from swapper.core.surgery import copy_model
from swapper.core.tensor_cache import MEMORY_BUDGET, TensorCache
from swapper.data.dataset import Dataset, batches
from swapper.errors import UsageError
from swapper.plan.plan import Plan
from swapper.scan.sites import Site

logger = logging.getLogger(__name__)

SCHEMA = "swapper.recording/1"
MANIFEST = "recording.json"


@dataclass(frozen=True)
class Recording:
    """A folder written by :func:`record_sites`: per site id, its input and output files."""

    folder: Path
    samples: int
    batch_size: int
    sites: dict  # site id -> {"input", "output", "x", "y"}

    @classmethod
    def open(cls, folder: str | Path) -> Recording:
        folder = Path(folder)
        try:
            meta = json.loads((folder / MANIFEST).read_text(encoding="utf-8"))
        except (OSError, ValueError) as exc:
            raise UsageError(f"{folder}: not a site recording ({exc})") from None
        if meta.get("schema") != SCHEMA:
            raise UsageError(f"{folder}: recording schema {meta.get('schema')!r}, expected {SCHEMA!r}")
        return cls(folder, int(meta["samples"]), int(meta["batch_size"]), dict(meta["sites"]))

    def array(self, site_id: str, which: str) -> np.ndarray:
        """The recorded input (``which="x"``) or output (``"y"``) of a site, memory-mapped read-only."""
        if site_id not in self.sites:
            raise UsageError(f"{self.folder}: site {site_id} was not recorded")
        return np.load(self.folder / self.sites[site_id][which], mmap_mode="r")


def record_sites(original: onnx.ModelProto, sites: list[Site], dataset: Dataset, folder: str | Path, *,
                 batch_size: int = 64, threads: int = 1) -> Recording:
    """Run ``original`` once over ``dataset`` and write every site's input and output to ``folder``."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    tensors = list(dict.fromkeys(t for s in sites for t in (s.input, s.output)))
    inputs = [i.name for i in original.graph.input]
    session = open_session(segment_model(original, inputs, tensors), threads=threads, what="the original model")
    feeds = [i.name for i in session.get_inputs()]
    files: dict[str, np.ndarray] = {}
    names = {}
    for s in sites:
        names[s.input] = names.get(s.input, f"{s.id}.x.npy")
        names[s.output] = names.get(s.output, f"{s.id}.y.npy")
    for batch in batches(dataset, batch_size):
        for tensor, value in zip(tensors, session.run(tensors, {n: batch.feeds[n] for n in feeds})):
            if tensor not in files:  # shape and dtype from the first batch (rows = samples, as the cache keeps them)
                files[tensor] = np.lib.format.open_memmap(folder / names[tensor], mode="w+", dtype=value.dtype,
                                                          shape=(dataset.n,) + value.shape[1:])
            files[tensor][batch.start:batch.stop] = value
    for array in files.values():
        array.flush()
    meta = {"schema": SCHEMA, "samples": dataset.n, "batch_size": batch_size,
            "sites": {s.id: {"input": s.input, "output": s.output, "x": names[s.input], "y": names[s.output]}
                      for s in sites}}
    (folder / MANIFEST).write_text(json.dumps(meta, indent=1), encoding="utf-8")
    logger.info("recorded %d site tensors of %d samples in %s", len(tensors), dataset.n, folder)
    return Recording(folder, dataset.n, batch_size, meta["sites"])


def _order(site_id: str) -> int:
    return int(site_id[1:]) if site_id[1:].isdigit() else 0


def calibrate_recorded(original: onnx.ModelProto, sites: list[Site], plan: Plan, recording: Recording, *,
                       bias_correction: bool = True, batch_size: int = 64, seed: int = 0, reservoir: int = 4096,
                       cache_bytes: int = MEMORY_BUDGET) -> CalibrationResult:
    """Fit every swap of ``plan`` on the recorded original tensors (module docstring); a new Plan comes back.

    Neither ``original`` nor ``plan`` is mutated.
    """
    timings = {"record_s": 0.0, "segments_s": 0.0, "fit_s": 0.0, "bias_correction_s": 0.0}
    fitted = copy.deepcopy(plan)
    swaps = fitted.by_site()
    by_id = {s.id: s for s in sites}
    work = copy_model(original)
    n = recording.samples
    results: dict[str, SiteCalibration] = {}
    index = GraphIndex.of(work)  # the fit rules read the graph as calibration does
    with TensorCache(memory_budget=cache_bytes) as cache:
        cached = SliceRunner(cache, row_spans(n, batch_size))
        order = sorted(swaps, key=_order)  # the order calibration's level groups take
        shifts = {}
        for sid in order:
            t0 = time.perf_counter()
            swap, x, y = swaps[sid], recording.array(sid, "x"), recording.array(sid, "y")
            observer = observer_for(swap, seed, reservoir)
            for start in range(0, n, batch_size):
                stop = min(start + batch_size, n)
                observer.update(np.asarray(x[start:stop]), np.asarray(y[start:stop]))
            rules = fit_rules(index, by_id[sid], swap, bias_correction)
            mse_start, mse_fit, fit_notes = fit_swap(swap, observer, rules)
            seen = observer.compute()
            results[sid] = SiteCalibration(sid, 1, mse_start, mse_fit, x_min=[float(v) for v in seen.min_x],
                                           x_max=[float(v) for v in seen.max_x], notes=fit_notes)
            timings["fit_s"] += time.perf_counter() - t0
            if not bias_correction:
                continue
            t0 = time.perf_counter()
            site = by_id[sid]
            delta = DeltaSum()
            for start in range(0, n, batch_size):
                stop = min(start + batch_size, n)
                teacher = np.array(y[start:stop])
                out = surrogate_output(swap, np.asarray(x[start:stop]))
                cache.append(CANDIDATE + site.output, out, owned=True)
                cache.append(ORIGINAL + site.output, teacher, owned=True)
                delta.add(out, teacher)
            shifts[sid] = delta
            timings["bias_correction_s"] += time.perf_counter() - t0
        for sid in order if bias_correction else ():
            t0 = time.perf_counter()
            site = by_id[sid]
            done, notes = correct_bias(work, site, cached, CANDIDATE + site.output, ORIGINAL + site.output,
                                       shifts[sid])
            results[sid].bias_corrected = done
            results[sid].notes += notes
            timings["bias_correction_s"] += time.perf_counter() - t0
        stats = {"bytes_written": cache.bytes_written, "peak_bytes_in_memory": cache.peak_bytes_held,
                 "memory_budget": cache.memory_budget}
    ordered = [results[sid] for sid in swaps if sid in results]
    return CalibrationResult(plan=fitted, model=work, sites=ordered, timings=timings, samples=n, cache=stats)
