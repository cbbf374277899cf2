"""The benchmark's measurements for one model and one surrogate family.

Transformation: (loaded model, calibration set, validation set, family) ->
plain dicts for the ``swapper.bench.run/1`` results (see swapper/bench/run.py):

- ``original_reference``: the original run once over the validation set; every
  rung and int8 model of every family is compared with its stored outputs, and
  its session is the one timed;
- ``quality_ladder``: the gate's default figure for the model and its data
  (:func:`metric_for`: top-1 accuracy with labels, top-1 agreement for class
  scores without labels, mean per-sample cosine for embeddings and dense maps,
  SQNR or RMSE otherwise) of the original and of five increasingly complete swaps
  (naive, local, sequential, sequential + bias correction, + consumer refit);
- ``plain_pass_seconds``: one onnxruntime pass of the original over the
  calibration set (the yardstick the tool's own cost is divided by);
- ``tool_cost``: the calibration timings of the sequential + bias rung (and of
  the + consumer refit rung) over it;
- ``speed``: interleaved latency of original, swapped and Identity-floor models;
- ``int8_original`` / ``int8_view``: the same comparison after int8
  quantization of both models (the int8 original scored once per model).

Timing always uses one onnxruntime thread; latency uses full graph optimisation.
Each model gets one session, reused for every batch size it is timed at.
"""
from __future__ import annotations

import logging
import time
from dataclasses import dataclass, field

import numpy as np
import onnx
import onnxruntime as ort

from swapper import api
from swapper.bench.rungs import RUNGS, THREADS, rung_options
from swapper.check.compare import Reference, compare, probe, reference
from swapper.check.gate import GateRule, choose_metric
from swapper.check.latency import measure_latency, open_sessions
from swapper.core.model_io import LoadedModel
from swapper.core.session import open_session
from swapper.data.dataset import Dataset, batches
from swapper.errors import CannotJudge, SwapperError
from swapper.options import SwapOptions
from swapper.progress import Silent
from swapper.rewrite.apply import rewrite_identity_floor

logger = logging.getLogger(__name__)

NOISE_FRACTION = 0.02  # t_orig - t_floor below 2% of t_orig is not a measurable saving (common practice, no source)


@dataclass
class FamilyRun:
    """What the ladder leaves behind for the later measurements of one family."""

    ladder: dict
    swapped: onnx.ModelProto | None = None  # the sequential + bias candidate
    swap_result: api.SwapResult | None = None
    refit_result: api.SwapResult | None = None  # the + consumer refit rung's swap (its timings)
    notes: list[str] = field(default_factory=list)


# Metrics that are shares of samples: a delta in percentage points means something only for these.
FRACTION_METRICS = ("accuracy", "agreement")


def _score(comp, metric: str | None) -> tuple[float | None, float | None]:
    """(original, candidate) on ``metric`` (see :func:`metric_for`); the original against itself where relative."""
    errors = list(comp.output_errors.values())
    if metric == "accuracy":
        return comp.top1_original, comp.top1_candidate
    if metric == "agreement":
        return 1.0, comp.agreement
    if metric == "cosine":  # the worst judged output's mean per-sample cosine
        values = [e["cosine_mean"] for e in errors if e.get("cosine_mean") is not None]
        return 1.0, (min(values) if values else None)
    if metric == "sqnr":  # the original has no noise (+inf dB): no figure to show for it
        values = [e["sqnr_db"] for e in errors if e.get("sqnr_db") is not None]
        return None, (min(values) if values else None)
    if metric == "rmse" and comp.regression is not None:
        return comp.regression["original"]["rmse"], comp.regression["candidate"]["rmse"]
    return None, None


def metric_for(original: Reference, val: Dataset) -> str | None:
    """The gate's default metric for the original's outputs on ``val``, named as the bench names it.

    ``accuracy`` (labels + class scores), ``agreement`` (class scores), ``cosine`` (embeddings, dense
    maps), ``sqnr`` (one value per sample), ``rmse`` (expected); None when the data cannot judge.
    """
    kinds = probe(original, val, batch_size=original.batch_size)  # from the stored outputs: no extra run
    try:
        choice = choose_metric(kinds, GateRule(), has_labels=val.labels is not None,
                               has_expected=val.expected is not None)
    except CannotJudge as exc:
        logger.info("no quality figure: %s", exc)
        return None
    return "accuracy" if choice.metric == "top1" else choice.metric


def original_reference(model: onnx.ModelProto, val: Dataset, *, batch_size: int) -> Reference:
    """The original's outputs on ``val`` (one pass per model, shared by every family) and its session."""
    return reference(model, val, batch_size=batch_size, threads=THREADS)


def quality_ladder(loaded: LoadedModel, calib: Dataset, val: Dataset, *, original: Reference, family: SwapOptions,
                   rungs: tuple[str, ...], log=None) -> FamilyRun:
    """Score every rung in ``rungs`` on ``val`` against ``original``; keep the sequential + bias candidate."""
    metric = metric_for(original, val)
    ladder: dict = {"metric": metric, "original": None}
    notes: list[str] = []
    run = FamilyRun(ladder=ladder, notes=notes)
    for rung in RUNGS:
        if rung not in rungs:
            ladder[rung] = None
            continue
        t0 = time.perf_counter()
        try:
            result = api.swap(loaded, calib=None if rung == "naive" else calib,
                              options=rung_options(rung, family))
        except SwapperError as exc:  # a rung the model cannot take (e.g. nothing for refit to fit)
            ladder[rung] = None
            notes.append(f"{rung}: {exc}")
            continue
        comp = compare(original, result.candidate, val, batch_size=family.batch_size, threads=THREADS)
        original_score, score = _score(comp, metric)
        if ladder["original"] is None:  # every rung is compared with the same stored outputs: same score
            ladder["original"] = original_score
        ladder[rung] = score
        if rung == "sequential_bias":
            run.swapped, run.swap_result = result.candidate, result
        elif rung == "refit":
            run.refit_result = result
        if log:
            log(f"{rung}: {metric} {_fmt(score, metric)} ({time.perf_counter() - t0:.1f}s)")
    ladder["drop_pp"] = {  # original − rung, in points: the one sign convention (a gain is negative)
        r: (None if ladder[r] is None or ladder["original"] is None or metric not in FRACTION_METRICS
            else 100.0 * (ladder["original"] - ladder[r]))
        for r in RUNGS
    }
    ladder["n"] = val.n
    return run


def _fmt(x: float | None, metric: str | None = "accuracy") -> str:
    if x is None:
        return "-"
    return f"{100 * x:.2f}%" if metric in FRACTION_METRICS else f"{x:.5g}"


def plain_pass_seconds(session: ort.InferenceSession, calib: Dataset, *, batch_size: int, runs: int = 3) -> float:
    """Median wall time of one pass of the original's ``session`` (one thread) over ``calib``, batched."""
    names = [i.name for i in session.get_inputs()]
    # batching and building the feed dicts is not what we time
    feeds = [{n: b.feeds[n] for n in names} for b in batches(calib, batch_size)]
    session.run(None, feeds[0])  # first call allocates; not part of a pass
    times = []
    for _ in range(runs):
        t0 = time.perf_counter()
        for f in feeds:
            session.run(None, f)
        times.append(time.perf_counter() - t0)
    return float(np.median(times))


def tool_cost(result: api.SwapResult, plain_s: float) -> dict:
    """Calibration time of one swap as seconds and as multiples of one plain pass (``refit_s``: the consumer
    refit's part of ``total_s``, null when it did not run)."""
    t = result.calibration.timings if result.calibration is not None else {}
    total = result.timings.get("calibrate_s")
    cost = {
        "plain_pass_s": plain_s,
        "record_s": t.get("record_s"),
        "segments_s": t.get("segments_s"),
        "fit_s": t.get("fit_s"),
        "bias_correction_s": t.get("bias_correction_s"),
        "refit_s": t.get("refit_s"),
        "total_s": total,
    }
    for key in ("total", "record", "fit", "refit"):
        v = cost[f"{key}_s"]
        cost[f"ratio_{key}"] = None if v is None or plain_s <= 0 else v / plain_s
    return cost


def _first_feeds(ds: Dataset, batch: int) -> dict[str, np.ndarray]:
    return next(batches(ds, batch)).feeds


def speed(original: ort.InferenceSession | onnx.ModelProto, swapped: onnx.ModelProto, floor: onnx.ModelProto,
          val: Dataset, *, batch_sizes: list[int], repeats: int, progress=None) -> dict:
    """Median latency (ms) of original / swapped / floor per batch size, and the saving achieved.

    ``progress`` (swapper.progress) shows each batch size's timed rounds.
    """
    progress = progress or Silent()
    sessions = open_sessions({"original": original, "swapped": swapped, "floor": floor}, threads=THREADS,
                             graph_optimization="all")
    out = {}
    for bs in batch_sizes:
        with progress.task(f"timing batch {bs}", repeats) as advance:
            timed = measure_latency(sessions, _first_feeds(val, bs), repeats=repeats, advance=advance)
        t_o, t_s, t_f = (timed[k].median_ms for k in ("original", "swapped", "floor"))
        row = {
            "original_ms": t_o, "swapped_ms": t_s, "floor_ms": t_f,
            "original_p10_ms": timed["original"].p10_ms, "original_p90_ms": timed["original"].p90_ms,
            "swapped_p10_ms": timed["swapped"].p10_ms, "swapped_p90_ms": timed["swapped"].p90_ms,
            "ratio": t_s / t_o, "saving_fraction": None, "note": None,
        }
        if t_o - t_f < NOISE_FRACTION * t_o:
            row["note"] = (f"original - floor = {t_o - t_f:.4f} ms is under {100 * NOISE_FRACTION:.0f}% of the "
                           "original: no measurable saving to achieve")
        else:
            row["saving_fraction"] = (t_o - t_s) / (t_o - t_f)
        out[str(bs)] = row
    return out


def floor_model(loaded: LoadedModel, result: api.SwapResult) -> onnx.ModelProto:
    """The original with every site of the plan replaced by Identity (speed floor of any swap)."""
    chosen = {s.site_id for s in result.plan.swaps}
    return rewrite_identity_floor(loaded.model, [s for s in result.sites if s.id in chosen])


@dataclass(frozen=True)
class Int8Original:
    """The int8 copy of a model's original: opened and scored once, shared by the model's families."""

    session: ort.InferenceSession
    score: float | None  # accuracy, or top-1 agreement with the fp32 original


def _int8_score(original: Reference, q_session: ort.InferenceSession, val: Dataset, batch_size: int) -> float | None:
    comp = compare(original, q_session, val, batch_size=batch_size)
    return _score(comp, metric_for(original, val))[1]


def int8_original(original: Reference, q_original: onnx.ModelProto, val: Dataset, *, batch_size: int) -> Int8Original:
    """Open and score the int8 original (against the fp32 original's stored outputs)."""
    session = open_session(q_original, threads=THREADS)
    return Int8Original(session=session, score=_int8_score(original, session, val, batch_size))


def int8_view(original: Reference, q_original: Int8Original, q_swapped: onnx.ModelProto, val: Dataset,
              *, batch_sizes: list[int], repeats: int, batch_size: int, progress=None) -> dict:
    """Accuracy (or agreement with the fp32 original) and latency of int8 original vs int8 swapped."""
    progress = progress or Silent()
    swapped = open_session(q_swapped, threads=THREADS)
    scores = {"original": q_original.score, "swapped": _int8_score(original, swapped, val, batch_size)}
    metric = metric_for(original, val)
    view = {"metric": metric, "original": scores["original"], "swapped": scores["swapped"],
            "drop_pp": None if None in scores.values() or metric not in FRACTION_METRICS
            else 100.0 * (scores["original"] - scores["swapped"]),
            "speed": {}}
    sessions = {"original": q_original.session, "swapped": swapped}
    for bs in batch_sizes:
        with progress.task(f"timing int8 batch {bs}", repeats) as advance:
            timed = measure_latency(sessions, _first_feeds(val, bs), repeats=repeats, advance=advance)
        t_o, t_s = timed["original"].median_ms, timed["swapped"].median_ms
        view["speed"][str(bs)] = {"original_ms": t_o, "swapped_ms": t_s, "ratio": t_s / t_o}
    return view
