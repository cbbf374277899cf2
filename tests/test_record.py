"""Tests of swapper.record: exposing internal tensors and the on-disk TensorCache.

References: ``onnx.reference.ReferenceEvaluator`` executes the ONNX operator
spec in numpy and hands back every intermediate result (``intermediate=True``);
the TensorCache is checked against ``np.concatenate`` of what went in.
"""
from __future__ import annotations

import numpy as np
import onnx
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from onnx import TensorProto, helper, numpy_helper
from onnx.reference import ReferenceEvaluator

from swapper.record import TensorCache, expose, open_session

OPSET = 17


def _small_model() -> onnx.ModelProto:
    """x[N,4] -> MatMul W -> Add b -> Tanh -> Mul x2 -> y, with every intermediate named."""
    rng = np.random.default_rng(3)
    W = numpy_helper.from_array(rng.normal(size=(4, 5)).astype(np.float32), "W")
    b = numpy_helper.from_array(rng.normal(size=5).astype(np.float32), "b")
    two = numpy_helper.from_array(np.array(2.0, dtype=np.float32), "two")
    nodes = [
        helper.make_node("MatMul", ["x", "W"], ["mm"], name="mm"),
        helper.make_node("Add", ["mm", "b"], ["pre"], name="add"),
        helper.make_node("Tanh", ["pre"], ["act"], name="tanh"),
        helper.make_node("Mul", ["act", "two"], ["y"], name="mul"),
    ]
    graph = helper.make_graph(
        nodes, "small",
        [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", 4])],
        [helper.make_tensor_value_info("y", TensorProto.FLOAT, ["N", 5])],
        initializer=[W, b, two],
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", OPSET)])
    return onnx.shape_inference.infer_shapes(model)


def test_expose_matches_reference_intermediates():
    model = _small_model()
    x = np.random.default_rng(0).normal(size=(7, 4)).astype(np.float32)
    names = ["mm", "pre", "act"]
    exposed = expose(model, names + ["act", "y"])  # duplicates and existing outputs are not added twice
    out_names = [o.name for o in exposed.graph.output]
    assert out_names == ["y", "mm", "pre", "act"]
    assert [o.name for o in model.graph.output] == ["y"]  # the input model is left alone
    # source: ONNX operator spec as executed by onnx.reference.ReferenceEvaluator (intermediate=True)
    ref = ReferenceEvaluator(model).run(None, {"x": x}, intermediate=True)
    got = dict(zip(out_names, open_session(exposed).run(None, {"x": x})))
    for name in names + ["y"]:
        np.testing.assert_allclose(got[name], ref[name], rtol=1e-5, atol=1e-6)
        assert got[name].dtype == np.float32


def test_open_session_is_repeatable():
    model = expose(_small_model(), ["act"])
    x = np.random.default_rng(1).normal(size=(33, 4)).astype(np.float32)
    first = open_session(model).run(None, {"x": x})
    second = open_session(model.SerializeToString(), optimize=False).run(None, {"x": x})
    # common practice, no source: two one-thread sessions of one model give bit-equal results (what
    # calibration relies on); graph optimisations may only reorder float math (tolerance)
    for a, b in zip(first, open_session(model).run(None, {"x": x})):
        np.testing.assert_array_equal(a, b)
    for a, b in zip(first, second):
        np.testing.assert_allclose(a, b, rtol=1e-5, atol=1e-6)


@settings(max_examples=25, deadline=None)
@given(
    sizes=st.lists(st.integers(0, 9), min_size=1, max_size=6),
    row_shape=st.sampled_from([(), (3,), (2, 4), (1, 2, 3)]),
    dtype=st.sampled_from([np.float32, np.float64, np.int64]),
    data=st.data(),
)
def test_cache_round_trips_and_reads_only_requested_rows(sizes, row_shape, dtype, data):
    rng = np.random.default_rng(sum(sizes))
    parts = [(rng.normal(size=(n,) + row_shape) * 100).astype(dtype) for n in sizes]
    whole = np.concatenate(parts)  # source: reference = numpy concatenation of the appended batches
    with TensorCache() as cache:
        for p in parts:
            cache.append("t", p)
        assert "t" in cache and "u" not in cache
        assert cache.rows("t") == whole.shape[0]
        assert cache.nbytes() == whole.nbytes  # raw rows, nothing else on disk
        np.testing.assert_array_equal(cache.read("t", 0, whole.shape[0]), whole)
        start = data.draw(st.integers(0, whole.shape[0] + 3))
        stop = data.draw(st.integers(start, whole.shape[0] + 5))
        got = cache.read("t", start, stop)
        expect = whole[start:stop]  # python slicing clips at the end the same way
        assert got.shape == expect.shape and got.dtype == expect.dtype
        np.testing.assert_array_equal(got, expect)


def test_cache_keeps_tensors_apart_and_rejects_changes():
    with TensorCache() as cache:
        a = np.arange(6, dtype=np.float32).reshape(2, 3)
        b = -np.arange(8, dtype=np.float32).reshape(2, 4)
        cache.append("a", a)
        cache.append("b", b)
        cache.append("a", a + 10)
        np.testing.assert_array_equal(cache.read("a", 1, 3), np.concatenate([a, a + 10])[1:3])
        np.testing.assert_array_equal(cache.read("b", 0, 2), b)
        with pytest.raises(ValueError):
            cache.append("a", np.zeros((1, 4), dtype=np.float32))  # row shape changed
        with pytest.raises(ValueError):
            cache.append("a", np.zeros((1, 3), dtype=np.float64))  # dtype changed
        with pytest.raises(ValueError):
            cache.read("a", -1, 2)
        root = cache.root
        assert root.exists()
    assert not root.exists()  # the context manager removes the spill folder


def _held_arrays(obj, seen=None) -> list:
    """Every numpy array reachable from ``obj`` through dicts, lists, tuples and instance __dict__s."""
    seen = set() if seen is None else seen
    if id(obj) in seen:
        return []
    seen.add(id(obj))
    if isinstance(obj, np.ndarray):
        return [obj]
    found = []
    if isinstance(obj, dict):
        for k, v in obj.items():
            found += _held_arrays(k, seen) + _held_arrays(v, seen)
    elif isinstance(obj, (list, tuple, set)):
        for v in obj:
            found += _held_arrays(v, seen)
    elif hasattr(obj, "__dict__") and not isinstance(obj, type) and type(obj).__module__.startswith("swapper"):
        found += _held_arrays(vars(obj), seen)
    return found


def test_cache_footprint_does_not_grow_with_batches():
    batch = np.random.default_rng(2).normal(size=(64, 16, 8, 8)).astype(np.float32)  # 256 KiB a batch

    def state_after(n_batches: int):
        with TensorCache() as cache:
            for _ in range(n_batches):
                cache.append("x", batch)
                cache.append("y", batch[:, :4])
            assert cache.rows("x") == 64 * n_batches
            assert cache.nbytes() == n_batches * (batch.nbytes + batch[:, :4].nbytes)
            arrays = _held_arrays(cache)
            state = {k: repr(v) for k, v in sorted(vars(cache).items()) if k != "_tmp"}
            state["_meta"] = {k: (v[0], v[1]) for k, v in cache._meta.items()}  # drop the row counters
            return arrays, state

    arrays_1, state_1 = state_after(1)
    arrays_40, state_40 = state_after(40)
    # common practice, no source: bounded memory means no recorded data kept in Python attributes
    assert arrays_1 == [] and arrays_40 == []
    assert set(state_1) == set(state_40) and state_1["_meta"] == state_40["_meta"]
    assert len(state_1["_files"]) == len(state_40["_files"])
