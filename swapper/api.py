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
from swapper.scan.body_sizes import measure_body_sizes
from swapper.scan.shapes import measure_shapes, zero_feeds
from swapper.scan.sites import Site, find_sites
from swapper.targets import TargetProfile, load_target

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
    target: TargetProfile | None = None  # the profile the plan was made for (options.target, loaded)
    base: onnx.ModelProto | None = None  # the model the plan was made on: ``loaded.model`` or its opset conversion


def resolve_target(target: str | Path | TargetProfile | None) -> TargetProfile | None:
    """A profile from a built-in name or a .json path (None stays None: no target)."""
    if target is None or isinstance(target, TargetProfile):
        return target
    return load_target(target)


def _sample_batches(data: Dataset | None, model: onnx.ModelProto, batch_size: int, limit: int = 256):
    """Up to ``limit`` samples of ``data`` as feeds batches, or one random batch when there is no data."""
    from swapper.check.on_target import random_feeds
    from swapper.data.dataset import batches

    if data is None:
        return [random_feeds(model, batch_size)], f"random inputs (batch {batch_size}, no data given)"
    return [b.feeds for b in batches(data, batch_size, limit=limit)], f"calibration data {data.path.name}"


def _converted(loaded: LoadedModel, opset: int | None, calib: Dataset | None, batch_size: int):
    """(model to plan on, conversion record or None): ``loaded`` moved to ``opset`` and checked, when asked."""
    if opset is None or opset == loaded.opset:
        return loaded.model, None
    from swapper.core.opset import check_conversion, convert_opset

    converted = convert_opset(loaded.model, opset)
    batches, where = _sample_batches(calib, loaded.model, batch_size)
    return converted, check_conversion(loaded.model, converted, opset, batches, feeds_from=where)


def _as_loaded(model: str | Path | LoadedModel) -> LoadedModel:
    return model if isinstance(model, LoadedModel) else load_model(model)


def scan(model: str | Path | LoadedModel, *, calib: str | Path | DataSource | Dataset | None = None,
         input_shapes: dict[str, tuple[int, ...]] | None = None) -> ScanResult:
    """Find every activation site of ``model``.

    Cost shares need concrete sizes: with ``calib`` (a data set) the shapes one sample produces,
    else with ``input_shapes`` ({input: shape}) those of zero inputs of that shape; without
    either, sites whose size is symbolic keep an unknown cost (None), and so do sites inside
    If/Loop/Scan bodies (how often a body runs is known only by running it).
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
        shapes = measure_shapes(loaded.model, [s.input for s in sites if not s.body], feeds)
        body_sizes = measure_body_sizes(loaded.model, sites, feeds)  # sites inside If/Loop/Scan bodies
        sites = find_sites(loaded.model, shapes=shapes, body_sizes=body_sizes)
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

    ``options.target`` (default ``ort-cpu``, a built-in name or a profile .json
    path; None: no target, registry defaults): sites, surrogates and forms are
    chosen to pay there (:mod:`swapper.plan.choose`). ``options.opset``: the
    model is converted to that opset first, checked and compared on ``calib``
    (recorded in ``plan.conversion``). ``options.choices`` pins single sites.
    """
    options = options or SwapOptions()  # checked when built: a wrong option fails even with nothing to calibrate
    if settings:
        options = options.replace(**settings)
    progress = progress or Silent()
    loaded = _as_loaded(model)
    profile = resolve_target(options.target)
    if options.opset is not None and profile is not None and not profile.accepts_opset(options.opset):
        raise UsageError(f"--opset {options.opset}: {profile.name} accepts opsets "
                         f"{profile.opset_min}..{profile.opset_max}")
    dataset = None
    if calib is not None:
        dataset = calib if isinstance(calib, Dataset) else load_data(calib, loaded)
    t0 = time.perf_counter()
    work, conversion = _converted(loaded, options.opset, dataset, options.batch_size)
    sites = find_sites(work)
    plan = make_plan(work, sites, **options.plan_settings(), target=profile)
    plan.conversion = conversion
    timings = {"plan_s": time.perf_counter() - t0}
    base = work
    calibration = refit = None
    if dataset is not None and plan.swaps:
        t0 = time.perf_counter()
        run = {"batch_size": options.batch_size, "seed": options.seed, "threads": options.threads,
               "progress": progress, "mask_input": options.mask_input}
        if options.cache_bytes() is not None:
            run["cache_bytes"] = options.cache_bytes()
        from threadpoolctl import threadpool_limits  # installed with scikit-learn

        # BLAS on as many threads as onnxruntime: on a loaded 2-core machine the refit's eigendecompositions
        # and Grams of meter_resnet_silu took 23 s with OpenBLAS's own 2 threads, 3 s with one
        with threadpool_limits(limits=options.threads):
            calibration = calibrate(work, sites, plan, dataset, mode=options.mode,
                                    bias_correction=options.bias_correction, **run)
            if options.refit_consumers is not False:  # the default: each site's refit judged on held-out samples
                from swapper.calibrate.refit import refit_consumers

                refit = refit_consumers(work, calibration.model, sites, calibration.plan, dataset, outputs=False,
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
                      calibration=calibration, refit=refit, options=options, timings=timings, target=profile,
                      base=work)


def time_on_target(original: onnx.ModelProto, candidate: onnx.ModelProto,
                   target: str | Path | TargetProfile, *, calib: Dataset | None = None, batch_size: int = 64,
                   repeats: int | None = None):
    """Time ``candidate`` against ``original`` on a measured target (:mod:`swapper.check.on_target`).

    The timed batch is the first ``batch_size`` samples of ``calib`` (random
    inputs without it); an int8 profile quantizes both models on up to 256
    samples of it first. Returns a TargetTiming (ratio < 1: the candidate is faster).
    """
    from swapper.check import on_target

    profile = resolve_target(target)
    batches, where = _sample_batches(calib, original, batch_size)
    extra = {} if repeats is None else {"repeats": repeats}
    return on_target.time_on_target(original, candidate, profile, batches[0], calib_batches=batches,
                                    feeds_from=where, **extra)


@dataclass
class CheckResult:
    comparison: object  # evaluate.Comparison
    verdict: object  # evaluate.Verdict
    budget: object  # evaluate.Budget
    latency: dict | None  # "original"/"candidate" -> LatencyStats, plus "ratio"; None when not measured
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
    target: str | Path | TargetProfile | None = None,
) -> CheckResult:
    """Compare ``candidate`` with ``original`` on ``val`` and decide against ``budget``.

    ``latency_repeats`` timed runs per model give the latency figures (0: not measured, ``latency`` None).
    With ``target``, ``latency["target"]`` says how the pair fares there: a
    measured profile times both at its settings (int8: both quantized on
    ``calib``, else ``val``); a declared one names the ops of each model it
    cannot run (:mod:`swapper.check.on_target`). Not measured either without latency.
    """
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
    latency = None
    if latency_repeats:
        latency = _timed(sessions, feeds, threads, latency_repeats, progress)
        latency["batch_size"] = int(next(iter(feeds.values())).shape[0])
        latency["threads"] = threads
        profile = resolve_target(target)
        if profile is not None:
            latency["target"] = _on_target(original, candidate, profile, feeds, calib if calib is not None else val,
                                           batch_size)
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


def _on_target(original, candidate, profile: TargetProfile, feeds: dict, calib: Dataset, batch_size: int) -> dict:
    """The ``latency["target"]`` entry of :func:`check` (see there)."""
    from swapper.check import on_target
    from swapper.data.dataset import batches

    entry = {"target": profile.name, "costs_from": profile.costs_from,
             "lacking_ops": {"original": on_target.lacking_ops(original, profile),
                             "candidate": on_target.lacking_ops(candidate, profile)}}
    if profile.costs_from != "measured":
        return entry
    calib_feeds = [b.feeds for b in batches(calib, batch_size, limit=256)]
    timing = on_target.time_on_target(original, candidate, profile, feeds, calib_batches=calib_feeds,
                                      feeds_from="the first validation batch")
    entry.update(timing.to_dict())
    return entry


def _open_pair(original: onnx.ModelProto, candidate: onnx.ModelProto, threads: int) -> dict:
    from swapper.core.session import open_session

    return {role: open_session(model, threads=threads, what=f"the {role} model")
            for role, model in (("original", original), ("candidate", candidate))}


def _timed(sessions: dict, feeds: dict, threads: int, repeats: int, progress, what: str = "timing latency") -> dict:
    """Per-model latency (LatencyStats fields) of the two sessions, plus candidate/original ratio of medians."""
    from swapper.check.latency import clock_for, measure_latency

    clock, clock_name = clock_for(threads)  # the target timing's clock, so the two figures agree
    with progress.task(what, repeats) as advance:
        timed = measure_latency(sessions, feeds, threads=threads, repeats=repeats, advance=advance, clock=clock)
    ratio = timed["candidate"].median_ms / timed["original"].median_ms
    return {k: v.__dict__ for k, v in timed.items()} | {"ratio": ratio, "clock": clock_name}


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
        "latency": _timed(sessions, feeds, threads, repeats, progress, "timing int8 latency") if repeats else None,
        "size": {"original_bytes": serialized_size(q_orig), "candidate_bytes": serialized_size(q_cand.model)},
        "quantization": "QDQ, per-channel int8 weights, MinMax calibration (see swapper/check/int8.py)",
        # layers whose int8 weights lose much of an input channel (one channel sets the row's scale),
        # measured by the quantizer against the float weights it quantized; null when that check failed
        "lossy_weights": None if losses is None else [asdict(w) for w in losses
                                                      if w.median_input_error > LOSSY_WEIGHT],
    }


# ------------------------------------------------------------------ sweep and automatic plan
def data_pair(source, loaded: LoadedModel, strict: bool = False):
    """(what sweep workers load: a DataSource or a Dataset, the Dataset loaded here)."""
    from swapper.data.source import DataSource

    if isinstance(source, Dataset):
        return source, source
    src = source if isinstance(source, DataSource) else DataSource(Path(source))
    return src, load_data(src, loaded, strict=strict)


def sweep(model: str | Path | LoadedModel, *, calib, val, rule=None, options: SwapOptions | None = None,
          settings=None, progress=None) -> dict:
    """Swap every eligible site alone, per candidate, calibrated, and measure it (:mod:`swapper.sweep.run`).

    ``calib``/``val``: paths, DataSources or Datasets; ``rule`` the gate rule whose metric the costs are
    in (default GateRule()); ``options`` give the target, the opset and which sites; ``settings`` a
    :class:`swapper.sweep.run.SweepSettings` (jobs, scheduler, surrogates...). Returns the
    ``swapper.sweep/1`` payload.
    """
    from dataclasses import replace

    from swapper.check.gate import GateRule
    from swapper.sweep.run import SweepSettings
    from swapper.sweep.run import sweep as run_sweep

    options = options or SwapOptions()
    loaded = _as_loaded(model)
    profile = resolve_target(options.target)
    calib_src, calib_ds = data_pair(calib, loaded)
    val_src, val_ds = data_pair(val, loaded)
    work, _ = _converted(loaded, options.opset, calib_ds, options.batch_size)
    settings = replace(settings or SweepSettings(), batch_size=options.batch_size, seed=options.seed,
                       site_ids=options.site_ids, only=options.only, include_gates=options.include_gates,
                       include_outputs=options.include_outputs, bias_correction=options.bias_correction)
    return run_sweep(work, find_sites(work), calib_src, val_src, calib_data=calib_ds, val_data=val_ds,
                     profile=profile, rule=rule or GateRule(), settings=settings, model_path=loaded.path,
                     progress=progress)
