"""Wall-clock latency of ONNX models on onnxruntime's CPU provider, plus size summaries.

The transformation: a set of named models and one input feed become one
:class:`LatencyStats` per model (median, 10th and 90th percentile of per-call
latency in milliseconds). Every model gets its own CPU session with the same
thread settings; after a warm-up, the timed calls are *interleaved*: each
repeat runs every model once, in the same (sorted-name) order, so a burst of
machine noise lands on all models alike instead of on whichever model
happened to be timed during it.

``model_summary`` and ``serialized_size`` describe what a rewrite did to the
graph (node and op counts, weight bytes, file size) without running it.
"""
from __future__ import annotations

import logging
import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass

import numpy as np
import onnx
import onnxruntime as ort

from swapper.core.session import open_session
from swapper.errors import BadDataError, UsageError, first_line

logger = logging.getLogger(__name__)


@dataclass(frozen=True)
class LatencyStats:
    """Per-call latency of one model, in milliseconds, over ``runs`` timed calls."""

    median_ms: float
    p10_ms: float
    p90_ms: float
    runs: int


def stats_from_ns(durations_ns: list[int] | np.ndarray) -> LatencyStats:
    """Summarise per-call durations (nanoseconds) as median / p10 / p90 milliseconds.

    Percentiles use numpy's default linear interpolation, so p10 <= median <= p90.
    """
    ms = np.asarray(durations_ns, dtype=np.float64) / 1e6
    if ms.size == 0:
        raise UsageError("no timed runs to summarise (repeats must be >= 1)")
    p10, median, p90 = np.percentile(ms, [10.0, 50.0, 90.0])
    return LatencyStats(median_ms=float(median), p10_ms=float(p10), p90_ms=float(p90), runs=int(ms.size))


def time_interleaved(
    runners: Mapping[str, Callable[[], object]],
    *,
    warmup: int = 5,
    repeats: int = 30,
    clock: Callable[[], int] = time.perf_counter_ns,
    advance: Callable[[int], None] | None = None,
) -> dict[str, list[int]]:
    """Call each runner ``warmup`` times, then ``repeats`` rounds of one call per runner.

    Runners are visited in sorted-name order in every round (round-robin), and
    each call is timed alone with ``clock`` (integer nanoseconds). Returns the
    timed durations per runner name, in call order. ``clock`` is injectable so
    the schedule can be checked without real timing; ``advance(1)`` is called
    after each round (progress), outside the timed calls.
    """
    if warmup < 0:
        raise UsageError(f"warmup must be >= 0, got {warmup}")
    if repeats < 1:
        raise UsageError(f"repeats must be >= 1, got {repeats}")
    names = sorted(runners)
    # Warm-up is per model and untimed: first calls pay for allocation and caches.
    for name in names:
        for _ in range(warmup):
            runners[name]()
    durations: dict[str, list[int]] = {name: [] for name in names}
    for _ in range(repeats):
        for name in names:
            start = clock()
            runners[name]()
            durations[name].append(clock() - start)
        if advance is not None:
            advance(1)
    return durations


def clock_for(threads: int) -> tuple[Callable[[], int], str]:
    """The clock and its name for timing onnxruntime calls on ``threads`` intra-op threads.

    With one thread onnxruntime computes on the calling thread, so its CPU time
    (``time.thread_time_ns``) is the model's work and does not grow while other
    processes hold a shared core (check/on_target.py gives measured ratios);
    with more threads, wall time.
    """
    return (time.thread_time_ns, "thread CPU time") if threads == 1 else (time.perf_counter_ns, "wall time")


def _feeds_for(name: str, session: ort.InferenceSession, feeds: Mapping[str, np.ndarray]) -> dict:
    wanted = [i.name for i in session.get_inputs()]
    missing = [i for i in wanted if i not in feeds]
    if missing:
        raise BadDataError(f"model {name!r} needs input(s) {missing} that the feeds do not provide")
    return {i: feeds[i] for i in wanted}


def open_sessions(
    models: Mapping[str, onnx.ModelProto | bytes | ort.InferenceSession],
    *,
    threads: int = 1,
    graph_optimization: str = "all",
) -> dict[str, ort.InferenceSession]:
    """One CPU session per model name (sorted); sessions given are passed through as they are.

    Opening a session costs far more than one timed call, so callers that time
    the same models on several feeds, or that also run them for accuracy, open
    them once here and hand the sessions to :func:`measure_latency`.
    """
    if not models:
        raise UsageError("no models given to time")
    return {
        name: models[name] if isinstance(models[name], ort.InferenceSession)
        else open_session(models[name], threads=threads, graph_optimization=graph_optimization,
                          what=f"model {name!r}")
        for name in sorted(models)
    }


def measure_latency(
    models: Mapping[str, onnx.ModelProto | bytes | ort.InferenceSession],
    feeds: Mapping[str, np.ndarray],
    *,
    threads: int = 1,
    warmup: int = 5,
    repeats: int = 30,
    graph_optimization: str = "all",
    clock: Callable[[], int] = time.perf_counter_ns,
    advance: Callable[[int], None] | None = None,
) -> dict[str, LatencyStats]:
    """Time every model on the same ``feeds`` with interleaved runs; stats per model name.

    One onnxruntime CPU session per model (``intra_op_num_threads=threads``,
    one inter-op thread, ``graph_optimization`` in all|extended|basic|disabled);
    a model given as an open session is timed with the settings it was opened
    with (see :func:`open_sessions`). Feeds a model does not declare as inputs
    are ignored. The result is keyed in sorted-name order. Raises UsageError
    for bad settings, BadModelError if onnxruntime cannot load a model,
    BadDataError if the feeds do not fit it. ``advance(1)`` after each timed round (progress).
    """
    sessions = open_sessions(models, threads=threads, graph_optimization=graph_optimization)
    runners: dict[str, Callable[[], object]] = {}
    for name, session in sessions.items():
        model_feeds = _feeds_for(name, session, feeds)
        try:
            session.run(None, model_feeds)  # fail on bad data here, not mid-benchmark
        except Exception as exc:  # onnxruntime's private error types, and pybind's for unconvertible arrays
            raise BadDataError(f"model {name!r} cannot run on the feeds: {first_line(exc)}") from None
        runners[name] = _bind(session, model_feeds)
    logger.info(
        "timing %d model(s): %d warm-up + %d interleaved runs each, %d thread(s), optimisation %s",
        len(runners), warmup, repeats, threads, graph_optimization,
    )
    durations = time_interleaved(runners, warmup=warmup, repeats=repeats, clock=clock, advance=advance)
    return {name: stats_from_ns(durations[name]) for name in sorted(durations)}


def _bind(session: ort.InferenceSession, model_feeds: dict) -> Callable[[], object]:
    """A zero-argument call of ``session`` on fixed feeds (closure per session)."""
    return lambda: session.run(None, model_feeds)


