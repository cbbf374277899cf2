"""A candidate against its original on a target: measured speed in the user's own graph, ops the target lacks.

Transformation (measured profiles, ``costs_from: measured``): the original, the
candidate and one feed batch -> :class:`TargetTiming`: both models timed by
:func:`swapper.check.latency.measure_latency` (interleaved runs, medians and
10th/90th percentiles) at the profile's ``measurement`` settings: onnxruntime's
CPU provider, its graph optimisation level and thread count. With one thread
each call is timed in CPU time of the calling thread (``time.thread_time_ns``),
the statistic the built-in profiles were measured with: with one intra-op
thread and sequential execution onnxruntime computes on the caller's thread, so
its CPU time is the model's work, while wall time on a shared machine also
counts the time other processes held the core (measured on the demo ResNet
under a load of 7 on 2 cores: three wall-clock ratios 0.37, 0.94, 0.35; three
CPU-time ratios 0.91, 0.89, 0.92). With more threads, wall time. For an int8
profile both models are first QDQ-quantized by
:func:`swapper.check.int8.quantize_int8` on the calibration batches, as the
profile's ``quantization`` says (U8 activations, S8 per-channel weights, the
settings int8.py uses; a profile asking for others is refused).

A declared profile (an MCU, an NPU) cannot be timed here; :func:`lacking_ops`
names the ops of a model such a target marks as unsupported.
"""
from __future__ import annotations

import logging
from collections import Counter
from collections.abc import Iterable, Mapping
from dataclasses import asdict, dataclass

import numpy as np
import onnx

from swapper.check.int8 import quantize_int8
from swapper.check.latency import LatencyStats, clock_for, measure_latency
from swapper.data.dataset import input_specs
from swapper.errors import UsageError
from swapper.targets.profile import TargetProfile

logger = logging.getLogger(__name__)

# A candidate counts as faster only with a ratio at or below 1 - MIN_SAVING. Repeated interleaved CPU-time
# medians of one unchanged pair moved by about ±1% here (a trial measured 0.993, 1.011, 0.995 for one
# model); 2% keeps a write from hanging on that noise (our choice from those runs, no source).
MIN_SAVING = 0.02

# profile words -> swapper.core.session names of onnxruntime's graph optimisation levels
LEVELS = {"disable_all": "disabled", "basic": "basic", "extended": "extended", "all": "all"}
REPEATS = 50  # timed calls per model; interleaved, so a noisy stretch lands on both
WARMUP = 5


@dataclass(frozen=True)
class TargetTiming:
    """Original and candidate timed on one measured target, on the same batch."""

    target: str
    original: LatencyStats
    candidate: LatencyStats
    ratio: float  # candidate median / original median: < 1 is faster
    batch: int
    threads: int
    graph_optimization: str
    quantized: bool  # both models QDQ-quantized before timing
    feeds: str  # where the timed batch came from ("calibration set", "random inputs"...)
    clock: str = "thread CPU time"  # or "wall time" (module docstring)

    @property
    def is_faster(self) -> bool:
        """Measurably faster: at least :data:`MIN_SAVING` below the original, not within timing noise."""
        return self.ratio <= 1.0 - MIN_SAVING

    def to_dict(self) -> dict:
        return asdict(self)

    def record(self) -> dict:
        """What a written model keeps of this timing: how it was measured and whether the candidate was
        faster, without the timings themselves (they differ from run to run, and the same inputs and seed
        must give the same model bytes; the report holds the figures)."""
        return {"target": self.target, "faster": self.is_faster, "batch": self.batch, "threads": self.threads,
                "graph_optimization": self.graph_optimization, "quantized": self.quantized, "feeds": self.feeds,
                "clock": self.clock, "runs": self.original.runs}

    def line(self) -> str:
        """One line for people: the ratio and both medians with their spread."""
        def ms(s: LatencyStats) -> str:
            return f"{s.median_ms:.4g} ms [{s.p10_ms:.4g}, {s.p90_ms:.4g}]"

        kind = "int8 QDQ, " if self.quantized else ""
        return (f"on {self.target} ({kind}batch {self.batch}, {self.threads} thread, optimisation "
                f"{self.graph_optimization}, {self.original.runs} interleaved runs, {self.clock}, {self.feeds}): "
                "candidate "
                f"{self.ratio:.3f}× the original; medians [p10, p90] original {ms(self.original)}, "
                f"candidate {ms(self.candidate)}")


def _settings(profile: TargetProfile) -> tuple[int, str, bool]:
    if profile.costs_from != "measured" or profile.measurement is None:
        raise UsageError(f"{profile.name} is a declared target: its costs come from its profile file, "
                         "not from timing on this machine")
    m = profile.measurement
    if m.runtime != "onnxruntime" or m.provider != "CPUExecutionProvider":
        raise UsageError(f"{profile.name}: only onnxruntime's CPUExecutionProvider can be timed here, "
                         f"not {m.runtime} {m.provider}")
    q = m.quantization
    if q is not None and (q.format, q.activations, q.weights) != ("QDQ", "uint8", "int8"):
        raise UsageError(f"{profile.name}: int8 timing quantizes QDQ with uint8 activations and int8 weights "
                         f"(swapper/check/int8.py), not {q.format} {q.activations}/{q.weights}")
    return m.threads, LEVELS[m.graph_optimization_level], q is not None


def time_on_target(original: onnx.ModelProto, candidate: onnx.ModelProto, profile: TargetProfile,
                   feeds: Mapping[str, np.ndarray], *, calib_batches: Iterable[dict] | None = None,
                   feeds_from: str = "the given batch", repeats: int = REPEATS,
                   warmup: int = WARMUP) -> TargetTiming:
    """Time ``candidate`` against ``original`` on ``feeds`` at the measured ``profile``'s settings.

    ``calib_batches`` (feeds dicts, read twice: a list) calibrate the int8
    quantization of both models; ``feeds`` alone when not given. Raises
    UsageError for a declared profile; what measure_latency and quantize_int8
    raise for models or feeds that do not run.
    """
    threads, level, quantized = _settings(profile)
    models = {"original": original, "candidate": candidate}
    if quantized:
        batches = list(calib_batches) if calib_batches is not None else [dict(feeds)]
        per_channel = profile.measurement.quantization.per_channel is not False
        models = {k: quantize_int8(m, iter(batches), per_channel=per_channel) for k, m in models.items()}
    clock, clock_name = clock_for(threads)
    timed = measure_latency(models, feeds, threads=threads, warmup=warmup, repeats=repeats,
                            graph_optimization=level, clock=clock)
    batch = int(next(iter(feeds.values())).shape[0]) if feeds else 0
    ratio = timed["candidate"].median_ms / timed["original"].median_ms
    result = TargetTiming(profile.name, timed["original"], timed["candidate"], ratio, batch, threads, level,
                          quantized, feeds_from, clock_name)
    logger.info("timed %s", result.line())
    return result


def random_feeds(model: onnx.ModelProto, batch: int = 64, seed: int = 0) -> dict[str, np.ndarray]:
    """One batch for timing when no data is at hand: N(0, 1) floats, zeros for integer inputs, True for booleans.

    Dynamic dimensions after the batch are taken as 1 (a timing, not an accuracy, batch).
    """
    rng = np.random.default_rng(seed)
    feeds = {}
    for spec in input_specs(model):
        dims = list(spec.shape or (None,))
        shape = [d if isinstance(d, int) and d > 0 else (batch if i == 0 else 1) for i, d in enumerate(dims)]
        if spec.dtype.kind == "f":
            feeds[spec.name] = rng.standard_normal(shape).astype(spec.dtype)
        elif spec.dtype.kind == "b":
            feeds[spec.name] = np.ones(shape, dtype=spec.dtype)
        else:
            feeds[spec.name] = np.zeros(shape, dtype=spec.dtype)
    return feeds


def lacking_ops(model: onnx.ModelProto, profile: TargetProfile) -> dict[str, int]:
    """{op type: count} of the main graph's default-domain ops that ``profile`` lists with support "none".

    Only ops the profile names explicitly count: a profile describes the
    activation and elementwise ops it was written for, and leaves layers
    (Conv, Gemm...) unlisted.
    """
    counts = Counter(n.op_type for n in model.graph.node if n.domain in ("", "ai.onnx"))
    return {op: k for op, k in sorted(counts.items())
            if op in profile.ops and profile.ops[op].support == "none"}
