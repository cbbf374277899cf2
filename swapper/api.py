"""The Python API: the same pipeline the CLI runs, as plain function calls.

    load -> find sites -> plan -> (calibrate) -> rewrite -> check -> write + report

Every function takes paths or in-memory models and returns dataclasses; none
of them prints. Errors a user can cause raise ``swapper.errors.SwapperError``.
"""
from __future__ import annotations

import logging
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING

import onnx

from swapper.calibrate.loop import CalibrationResult, calibrate
from swapper.core.model_io import LoadedModel, load_model
from swapper.data.dataset import Dataset, batches, input_specs, load_dataset
from swapper.data.images import ImagePrep
from swapper.data.layout import DataLayout
from swapper.data.source import DataSource
from swapper.errors import UsageError
from swapper.options import SwapOptions
from swapper.plan.plan import Plan, make_plan
from swapper.progress import Silent
from swapper.rewrite.apply import RewriteResult, rewrite
from swapper.scan.shapes import measure_shapes, zero_feeds
from swapper.scan.sites import Site, find_sites

if TYPE_CHECKING:  # refit is imported when asked for (it pulls in the ridge solver)
    from swapper.calibrate.refit import RefitResult

logger = logging.getLogger(__name__)


@dataclass
class ScanResult:
    loaded: LoadedModel
    sites: list[Site]


@dataclass
class SwapResult:
    loaded: LoadedModel
    sites: list[Site]
    plan: Plan  # the swaps as rewritten: fitted by calibration (and refit) when there was a calibration set
    candidate: onnx.ModelProto
    rewrite: RewriteResult
    calibration: CalibrationResult | None  # with refit's model, plan, notes and time when it ran
    refit: RefitResult | None = None  # the consumer refit on its own
    options: SwapOptions = field(default_factory=SwapOptions)
    timings: dict[str, float] = field(default_factory=dict)


def _as_loaded(model: str | Path | LoadedModel) -> LoadedModel:
    return model if isinstance(model, LoadedModel) else load_model(model)


def scan(model: str | Path | LoadedModel, *, calib: str | Path | DataSource | Dataset | None = None,
         input_shapes: dict[str, tuple[int, ...]] | None = None) -> ScanResult:
    """Find every activation site of ``model``.

    Cost shares need concrete sizes: with ``calib`` (a data set) the shapes one sample produces,
    else with ``input_shapes`` ({input: shape}) those of zero inputs of that shape; without
    either, sites whose size is symbolic keep an unknown cost (None).
    """
    loaded = _as_loaded(model)
    sites = find_sites(loaded.model)
    feeds = None
    if calib is not None:
        dataset = calib if isinstance(calib, Dataset) else load_data(calib, loaded)
        feeds = next(batches(dataset, 1)).feeds
    elif input_shapes:
        feeds = zero_feeds(loaded.model, input_shapes)
    if feeds is not None:
        shapes = measure_shapes(loaded.model, [s.input for s in sites], feeds)
        sites = find_sites(loaded.model, shapes=shapes)
    return ScanResult(loaded=loaded, sites=sites)


def load_data(path: str | Path | DataSource, loaded: LoadedModel, *, require_labels: bool = False,
              strict: bool = False, layout: DataLayout | None = None, images: ImagePrep | None = None) -> Dataset:
    """Read a calibration or validation set and check it against the model's inputs.

    Arrays the model does not read are left out and named in ``Dataset.notes``; ``strict`` refuses them.
    ``path`` may be a :class:`~swapper.data.source.DataSource` carrying its layout and image
    preprocessing; ``layout`` / ``images`` given here take precedence.
    """
    if isinstance(path, DataSource):
        layout, images, path = layout or path.layout, images or path.images, path.path
    return load_dataset(path, input_specs(loaded.model), require_labels=require_labels, strict=strict,
                        layout=layout, images=images, model=loaded.model)


def swap(
    model: str | Path | LoadedModel,
    *,
    calib: str | Path | Dataset | None = None,
    options: SwapOptions | None = None,
    progress=None,
    **settings,
) -> SwapResult:
    """Plan a swap, calibrate it on ``calib`` (skipped when None) and rewrite a copy of the model.

    ``options`` says what to swap and how (default ``SwapOptions()``);
    ``settings`` are SwapOptions fields as keywords (``to="relu"``,
    ``mode="local"``, ...), a shorthand that overrides the matching fields of
    ``options``. The input model is never changed.
    """
    options = options or SwapOptions()  # checked when built: a wrong option fails even with nothing to calibrate
    if settings:
        options = options.replace(**settings)
    progress = progress or Silent()
    loaded = _as_loaded(model)
    sites = find_sites(loaded.model)
    t0 = time.perf_counter()
    plan = make_plan(loaded.model, sites, **options.plan_settings())
    timings = {"plan_s": time.perf_counter() - t0}
    base = loaded.model
    calibration = refit = None
    if calib is not None and plan.swaps:
        dataset = calib if isinstance(calib, Dataset) else load_data(calib, loaded)
        t0 = time.perf_counter()
        run = {"batch_size": options.batch_size, "seed": options.seed, "threads": options.threads,
               "progress": progress}
        if options.cache_bytes() is not None:
            run["cache_bytes"] = options.cache_bytes()
        calibration = calibrate(loaded.model, sites, plan, dataset, mode=options.mode,
                                bias_correction=options.bias_correction, **run)
        if options.refit_consumers is not False:  # the default: each site's refit judged on held-out samples
            from swapper.calibrate.refit import refit_consumers

            refit = refit_consumers(loaded.model, calibration.model, sites, calibration.plan, dataset, outputs=False,
                                    **run)
            calibration = refit.apply_to(calibration)
        plan, base = calibration.plan, calibration.model
        timings["calibrate_s"] = time.perf_counter() - t0
    elif options.refit_consumers is True:
        raise UsageError("--refit-consumers needs a calibration set (--calib)")
    t0 = time.perf_counter()
    result = rewrite(base, sites, plan)
    timings["rewrite_s"] = time.perf_counter() - t0
    return SwapResult(loaded=loaded, sites=sites, plan=plan, candidate=result.model, rewrite=result,
                      calibration=calibration, refit=refit, options=options, timings=timings)


@dataclass
class CheckResult:
    comparison: object  # evaluate.Comparison
    verdict: object  # evaluate.Verdict
    budget: object  # evaluate.Budget
    latency: dict  # "original"/"candidate" -> LatencyStats, plus "ratio"
    size: dict  # bytes, node counts and op counts of both models
    int8: dict | None = None  # same figures for int8-quantized versions


def check(
    original: onnx.ModelProto,
    candidate: onnx.ModelProto,
    val: Dataset,
    *,
    budget=None,
    int8: bool = False,
    calib: Dataset | None = None,
    batch_size: int = 64,
    threads: int = 1,
    latency_repeats: int = 30,
    progress=None,
) -> CheckResult:
    """Compare ``candidate`` with ``original`` on ``val`` and decide against ``budget``."""
    from swapper.check.compare import compare
    from swapper.check.gate import Budget, decide
    from swapper.check.size import model_summary, serialized_size
    from swapper.data.dataset import batches

    budget = budget or Budget()
    progress = progress or Silent()
    # One session per model, used for the accuracy pass and then for the timing.
    sessions = _open_pair(original, candidate, threads)
    comparison = compare(sessions["original"], sessions["candidate"], val, batch_size=batch_size, progress=progress)
    verdict = decide(comparison, budget)
    feeds = next(batches(val, batch_size)).feeds  # compare has checked that val is not empty
    latency = _timed(sessions, feeds, threads, latency_repeats)
    latency["batch_size"] = int(next(iter(feeds.values())).shape[0])
    latency["threads"] = threads
    size = {
        "original": {"bytes": serialized_size(original), **model_summary(original)},
        "candidate": {"bytes": serialized_size(candidate), **model_summary(candidate)},
    }
    int8_view = None
    if int8:
        int8_view = _int8_view(original, candidate, val, calib if calib is not None else val, feeds,
                               batch_size=batch_size, threads=threads, repeats=latency_repeats, progress=progress)
    return CheckResult(comparison=comparison, verdict=verdict, budget=budget, latency=latency, size=size,
                       int8=int8_view)


def _open_pair(original: onnx.ModelProto, candidate: onnx.ModelProto, threads: int) -> dict:
    from swapper.core.session import open_session

    return {role: open_session(model, threads=threads, what=f"the {role} model")
            for role, model in (("original", original), ("candidate", candidate))}


def _timed(sessions: dict, feeds: dict, threads: int, repeats: int) -> dict:
    """Per-model latency (LatencyStats fields) of the two sessions, plus candidate/original ratio of medians."""
    from swapper.check.latency import measure_latency

    timed = measure_latency(sessions, feeds, threads=threads, repeats=repeats)
    ratio = timed["candidate"].median_ms / timed["original"].median_ms
    return {k: v.__dict__ for k, v in timed.items()} | {"ratio": ratio}


def _int8_view(original: onnx.ModelProto, candidate: onnx.ModelProto, val: Dataset, source: Dataset, feeds: dict, *,
               batch_size: int, threads: int, repeats: int, progress) -> dict:
    """Accuracy, latency and size of int8-quantized copies of both models, calibrated on ``source``."""
    from dataclasses import asdict

    from swapper.check.compare import compare
    from swapper.check.int8 import (
        LOSSY_WEIGHT,
        quantize_int8,
        quantize_int8_with_losses,
    )
    from swapper.check.size import serialized_size
    from swapper.data.dataset import batches

    with progress.task("quantizing to int8", 2) as advance:
        q_orig = quantize_int8(original, (b.feeds for b in batches(source, batch_size)))
        advance(1)
        q_cand = quantize_int8_with_losses(candidate, (b.feeds for b in batches(source, batch_size)))
        advance(1)
    sessions = _open_pair(q_orig, q_cand.model, threads)
    q_comp = compare(sessions["original"], sessions["candidate"], val, batch_size=batch_size)
    losses = q_cand.weight_losses
    return {
        "comparison": q_comp.to_dict(),
        "latency": _timed(sessions, feeds, threads, repeats),
        "size": {"original_bytes": serialized_size(q_orig), "candidate_bytes": serialized_size(q_cand.model)},
        "quantization": "QDQ, per-channel int8 weights, MinMax calibration (see swapper/check/int8.py)",
        # layers whose int8 weights lose much of an input channel (one channel sets the row's scale),
        # measured by the quantizer against the float weights it quantized; null when that check failed
        "lossy_weights": None if losses is None else [asdict(w) for w in losses
                                                      if w.median_input_error > LOSSY_WEIGHT],
    }
