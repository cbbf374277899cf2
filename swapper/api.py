"""The Python API: the same pipeline the CLI runs, as plain function calls.

    load -> find sites -> plan -> (calibrate) -> rewrite -> check -> write + report

Every function takes paths or in-memory models and returns dataclasses; none
of them prints. Errors a user can cause raise ``swapper.errors.SwapperError``.
"""
from __future__ import annotations

import hashlib
import logging
import time
from dataclasses import dataclass, field
from pathlib import Path

import onnx

from .calibrate import CalibrationResult, calibrate, check_mode
from .data import Dataset, input_specs, load_dataset
from .errors import UsageError
from .model_io import LoadedModel, load_model
from .plan import Plan, make_plan
from .progress import Silent
from .rewrite import RewriteResult, rewrite
from .sites import Site, find_sites

logger = logging.getLogger(__name__)


@dataclass
class ScanResult:
    loaded: LoadedModel
    sites: list[Site]


@dataclass
class SwapResult:
    loaded: LoadedModel
    sites: list[Site]
    plan: Plan
    candidate: onnx.ModelProto
    rewrite: RewriteResult
    calibration: CalibrationResult | None
    timings: dict[str, float] = field(default_factory=dict)


def sha256_file(path: str | Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            digest.update(chunk)
    return digest.hexdigest()


def _as_loaded(model: str | Path | LoadedModel) -> LoadedModel:
    return model if isinstance(model, LoadedModel) else load_model(model)


def scan(model: str | Path | LoadedModel) -> ScanResult:
    """Find every activation site of ``model``."""
    loaded = _as_loaded(model)
    return ScanResult(loaded=loaded, sites=find_sites(loaded.model))


def load_data(path: str | Path, loaded: LoadedModel, *, require_labels: bool = False) -> Dataset:
    """Read a calibration or validation set and check it against the model's inputs."""
    return load_dataset(path, input_specs(loaded.model), require_labels=require_labels)


def swap(
    model: str | Path | LoadedModel,
    *,
    calib: str | Path | Dataset | None = None,
    to: str | None = None,
    site_ids: list[str] | None = None,
    only: str | None = None,
    include_gates: bool = False,
    include_outputs: bool = False,
    fold: str = "exact",
    mode: str = "sequential",
    bias_correction: bool = True,
    refit_consumers: bool = False,
    seed: int = 0,
    batch_size: int = 64,
    threads: int = 1,
    progress=None,
    cache_mb: float | None = None,
) -> SwapResult:
    """Plan a swap, calibrate it on ``calib`` (skipped when None) and rewrite a copy of the model."""
    progress = progress or Silent()
    check_mode(mode)  # also when there is nothing to calibrate: a wrong option is an error, not ignored
    loaded = _as_loaded(model)
    sites = find_sites(loaded.model)
    t0 = time.perf_counter()
    plan = make_plan(loaded.model, sites, to=to, site_ids=site_ids, only=only,
                     include_gates=include_gates, include_outputs=include_outputs, fold=fold)
    timings = {"plan_s": time.perf_counter() - t0}
    base = loaded.model
    calibration = None
    if calib is not None and plan.swaps:
        dataset = calib if isinstance(calib, Dataset) else load_data(calib, loaded)
        t0 = time.perf_counter()
        extra = {} if cache_mb is None else {"cache_bytes": int(cache_mb * (1 << 20))}
        calibration = calibrate(loaded.model, sites, plan, dataset, mode=mode, bias_correction=bias_correction,
                                batch_size=batch_size, seed=seed, threads=threads, progress=progress, **extra)
        base = calibration.model
        if refit_consumers:
            from .refit import refit_consumers as refit

            base = refit(loaded.model, base, sites, plan, dataset, batch_size=batch_size, seed=seed,
                         threads=threads, progress=progress, result=calibration)
            calibration.model = base
        timings["calibrate_s"] = time.perf_counter() - t0
    elif refit_consumers:
        raise UsageError("--refit-consumers needs a calibration set (--calib)")
    t0 = time.perf_counter()
    result = rewrite(base, sites, plan)
    timings["rewrite_s"] = time.perf_counter() - t0
    return SwapResult(loaded=loaded, sites=sites, plan=plan, candidate=result.model, rewrite=result,
                      calibration=calibration, timings=timings)


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
    from .data import batches
    from .evaluate import Budget, compare, decide
    from .latency import measure_latency, model_summary, serialized_size

    budget = budget or Budget()
    progress = progress or Silent()
    comparison = compare(original, candidate, val, batch_size=batch_size, threads=threads, progress=progress)
    verdict = decide(comparison, budget)
    feeds = next(batches(val, batch_size)).feeds
    timed = measure_latency({"original": original, "candidate": candidate}, feeds, threads=threads,
                            repeats=latency_repeats)
    latency = {k: v.__dict__ for k, v in timed.items()}
    latency["ratio"] = timed["candidate"].median_ms / timed["original"].median_ms
    latency["batch_size"] = int(next(iter(feeds.values())).shape[0])
    latency["threads"] = threads
    size = {
        "original": {"bytes": serialized_size(original), **model_summary(original)},
        "candidate": {"bytes": serialized_size(candidate), **model_summary(candidate)},
    }
    int8_view = None
    if int8:
        from dataclasses import asdict

        from .quantize import LOSSY_WEIGHT, quantize_int8, weight_losses

        source = calib if calib is not None else val
        with progress.task("quantizing to int8", 2) as advance:
            q_orig = quantize_int8(original, (b.feeds for b in batches(source, batch_size)))
            advance(1)
            q_cand = quantize_int8(candidate, (b.feeds for b in batches(source, batch_size)))
            advance(1)
        q_comp = compare(q_orig, q_cand, val, batch_size=batch_size, threads=threads)
        q_time = measure_latency({"original": q_orig, "candidate": q_cand}, feeds, threads=threads,
                                 repeats=latency_repeats)
        int8_view = {
            "comparison": q_comp.to_dict(),
            "latency": {k: v.__dict__ for k, v in q_time.items()}
            | {"ratio": q_time["candidate"].median_ms / q_time["original"].median_ms},
            "size": {"original_bytes": serialized_size(q_orig), "candidate_bytes": serialized_size(q_cand)},
            "quantization": "QDQ, per-channel int8 weights, MinMax calibration (see swapper/quantize.py)",
            # layers whose int8 weights lose much of an input channel (one channel sets the row's scale)
            "lossy_weights": [asdict(w) for w in weight_losses(candidate, q_cand)
                              if w.median_input_error > LOSSY_WEIGHT],
        }
    return CheckResult(comparison=comparison, verdict=verdict, budget=budget, latency=latency, size=size,
                       int8=int8_view)
