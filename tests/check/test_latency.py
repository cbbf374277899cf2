"""Tests for swapper.check.latency: structure and schedule of the timing, never the timings themselves.

Machines running the suite are shared and noisy, so no assertion compares a
measured latency against a number; schedules are checked with an injected clock.
"""
from __future__ import annotations

import math
import statistics

import numpy as np
import onnx
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from onnx import TensorProto, helper, numpy_helper
from testkit import conv_classifier

from swapper.check.latency import (
    LatencyStats,
    measure_latency,
    open_sessions,
    stats_from_ns,
    time_interleaved,
)
from swapper.check.size import model_summary, serialized_size
from swapper.errors import BadDataError, BadModelError, UsageError


def _cnn(activation: str = "Relu", opset: int = 17) -> onnx.ModelProto:
    """Conv -> act -> Conv -> act -> GlobalAveragePool -> Flatten -> Gemm, fixed random weights."""
    rng = np.random.default_rng(7)
    weights = {
        "w1": rng.normal(0, 0.3, (4, 3, 3, 3)).astype(np.float32),
        "b1": rng.normal(0, 0.1, (4,)).astype(np.float32),
        "w2": rng.normal(0, 0.3, (6, 4, 3, 3)).astype(np.float32),
        "wf": rng.normal(0, 0.3, (3, 6)).astype(np.float32),
        "unused_shape": np.array([2, 6], dtype=np.int64),
    }
    return conv_classifier(weights, size=8, activations=(activation, activation), opset=opset)


@pytest.fixture(scope="module")
def feeds():
    return {"x": np.random.default_rng(1).normal(size=(2, 3, 8, 8)).astype(np.float32)}


def test_measure_latency_structure(feeds):
    models = {"relu": _cnn("Relu"), "sigmoid": _cnn("Sigmoid").SerializeToString()}  # proto and bytes
    result = measure_latency(models, feeds, warmup=1, repeats=7)
    assert list(result) == ["relu", "sigmoid"]  # sorted names (house rule: deterministic order)
    for stats in result.values():
        assert isinstance(stats, LatencyStats)
        assert stats.runs == 7
        assert math.isfinite(stats.median_ms) and stats.median_ms > 0
        assert stats.p10_ms <= stats.median_ms <= stats.p90_ms


def test_measure_latency_interleaves_with_fake_clock(feeds):
    # The clock returns (call index)^2 ms, so the k-th timed call lasts exactly
    # (2k+1)^2 - (2k)^2 = 4k+1 ms. Round-robin over two models gives model
    # "a" the even k and model "b" the odd k; the expected medians follow
    # from Python's statistics module (independent of numpy).
    calls = iter(range(10_000))

    def clock() -> int:
        i = next(calls)
        return i * i * 1_000_000

    repeats = 9
    result = measure_latency({"b": _cnn("Relu"), "a": _cnn("Tanh")}, feeds, warmup=2, repeats=repeats, clock=clock)
    k_a = [2 * r for r in range(repeats)]
    k_b = [2 * r + 1 for r in range(repeats)]
    assert result["a"].median_ms == pytest.approx(statistics.median(4 * k + 1 for k in k_a))
    assert result["b"].median_ms == pytest.approx(statistics.median(4 * k + 1 for k in k_b))
    # source: Python statistics.quantiles(method="inclusive") is Hyndman & Fan type 7,
    # the same definition as numpy's default linear percentile.
    deciles_a = statistics.quantiles([4 * k + 1 for k in k_a], n=10, method="inclusive")
    assert result["a"].p10_ms == pytest.approx(deciles_a[0])
    assert result["a"].p90_ms == pytest.approx(deciles_a[-1])


def test_open_sessions_are_timed_as_given(feeds):
    sessions = open_sessions({"b": _cnn("Relu"), "a": _cnn("Tanh")})
    assert list(sessions) == ["a", "b"] and open_sessions(sessions)["a"] is sessions["a"]  # passed through
    for batch in (1, 2):  # the same sessions timed on several feeds (batch sizes)
        result = measure_latency(sessions, {"x": feeds["x"][:batch]}, warmup=0, repeats=2)
        assert list(result) == ["a", "b"] and all(s.runs == 2 for s in result.values())


def test_time_interleaved_round_robin_order():
    log: list[tuple[str, str]] = []
    ticks = iter(range(10_000))

    def clock() -> int:
        log.append(("clock", ""))
        return next(ticks)

    runners = {name: (lambda n=name: log.append(("run", n))) for name in ("m2", "m0", "m1")}
    durations = time_interleaved(runners, warmup=2, repeats=3, clock=clock)
    runs = [n for kind, n in log if kind == "run"]
    # Warm-up: each model alone, untimed, in sorted order.
    assert runs[:6] == ["m0", "m0", "m1", "m1", "m2", "m2"]
    # Timed part: every repeat visits every model once, same order.
    assert runs[6:] == ["m0", "m1", "m2"] * 3
    # Each timed call is bracketed by exactly two clock reads.
    timed = log[6:]
    assert [kind for kind, _ in timed] == ["clock", "run", "clock"] * 9
    assert sorted(durations) == ["m0", "m1", "m2"]
    assert all(d == [1, 1, 1] for d in durations.values())


@settings(max_examples=60, deadline=None)
@given(st.lists(st.integers(min_value=1, max_value=10**10), min_size=2, max_size=50))
def test_stats_match_python_statistics(durations_ns):
    stats = stats_from_ns(durations_ns)
    ms = [d / 1e6 for d in durations_ns]
    # source: Python statistics.median / quantiles(method="inclusive") (Hyndman & Fan type 7)
    assert stats.median_ms == pytest.approx(statistics.median(ms), rel=1e-9)
    deciles = statistics.quantiles(ms, n=10, method="inclusive")
    assert stats.p10_ms == pytest.approx(deciles[0], rel=1e-9)
    assert stats.p90_ms == pytest.approx(deciles[-1], rel=1e-9)
    assert stats.p10_ms <= stats.median_ms <= stats.p90_ms
    assert stats.runs == len(durations_ns)


@pytest.mark.parametrize("level", ["extended", "basic", "disabled"])
def test_every_level_runs(level, feeds):
    result = measure_latency({"m": _cnn()}, feeds, warmup=0, repeats=2, graph_optimization=level, threads=2)
    assert result["m"].runs == 2 and result["m"].median_ms > 0


def test_extra_feeds_are_ignored(feeds):
    extended = dict(feeds, labels=np.zeros(2, dtype=np.int64))
    assert measure_latency({"m": _cnn()}, extended, warmup=0, repeats=1)["m"].runs == 1


def test_bad_inputs_raise_user_errors(feeds):
    with pytest.raises(UsageError, match="optimisation level"):
        measure_latency({"m": _cnn()}, feeds, graph_optimization="turbo")
    with pytest.raises(UsageError, match="repeats"):
        measure_latency({"m": _cnn()}, feeds, repeats=0)
    with pytest.raises(UsageError, match="threads"):
        measure_latency({"m": _cnn()}, feeds, threads=0)
    with pytest.raises(UsageError, match="no models"):
        measure_latency({}, feeds)
    with pytest.raises(BadDataError, match="'x'"):
        measure_latency({"m": _cnn()}, {"image": feeds["x"]})
    with pytest.raises(BadDataError, match="cannot run"):
        measure_latency({"m": _cnn()}, {"x": np.zeros((2, 5, 8, 8), np.float32)})
    with pytest.raises(BadModelError, match="'junk'"):
        measure_latency({"junk": b"not a model"}, feeds)


def test_model_summary_hand_counted():
    summary = model_summary(_cnn("Relu"))
    # Hand count of _cnn: 2 Conv, 2 Relu, 1 GlobalAveragePool, 1 Flatten, 1 Gemm.
    assert summary["nodes"] == 7
    assert summary["op_counts"] == {"Conv": 2, "Flatten": 1, "Gemm": 1, "GlobalAveragePool": 1, "Relu": 2}
    assert list(summary["op_counts"]) == sorted(summary["op_counts"])
    # source: ONNX IR spec element types, FLOAT = 4 bytes, INT64 = 8 bytes.
    # w1 4*3*3*3, b1 4, w2 6*4*3*3, wf 3*6 floats; unused_shape 2 int64.
    assert summary["initializer_bytes"] == 4 * (108 + 4 + 216 + 18) + 8 * 2


def test_model_summary_counts_subgraphs_and_domains():
    then_graph = helper.make_graph(
        [helper.make_node("Neg", ["a"], ["t0"]), helper.make_node("Abs", ["t0"], ["t"])],
        "then", [], [helper.make_tensor_value_info("t", TensorProto.FLOAT, [2])],
    )
    else_graph = helper.make_graph(
        [helper.make_node("Identity", ["a"], ["e"])],
        "else", [], [helper.make_tensor_value_info("e", TensorProto.FLOAT, [2])],
        [numpy_helper.from_array(np.zeros(3, np.float16), "half")],  # 3 * 2 bytes (FLOAT16)
    )
    nodes = [
        helper.make_node("If", ["c"], ["o"], then_branch=then_graph, else_branch=else_graph),
        helper.make_node("FusedMatMul", ["o", "o"], ["z"], domain="com.microsoft"),
    ]
    graph = helper.make_graph(
        nodes, "g",
        [helper.make_tensor_value_info("c", TensorProto.BOOL, []), helper.make_tensor_value_info("a", TensorProto.FLOAT, [2])],
        [helper.make_tensor_value_info("z", TensorProto.FLOAT, None)],
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17), helper.make_opsetid("com.microsoft", 1)])
    summary = model_summary(model)
    # Hand count: If + FusedMatMul at top, Neg + Abs in then, Identity in else.
    assert summary["nodes"] == 5
    assert summary["op_counts"] == {"Abs": 1, "Identity": 1, "If": 1, "Neg": 1, "com.microsoft.FusedMatMul": 1}
    assert summary["initializer_bytes"] == 6


def test_serialized_size_matches_file(tmp_path):
    model = _cnn()
    path = tmp_path / "m.onnx"
    onnx.save_model(model, str(path))  # source: onnx.save_model writes the serialized ModelProto
    assert serialized_size(model) == path.stat().st_size
    assert serialized_size(path.read_bytes()) == path.stat().st_size
