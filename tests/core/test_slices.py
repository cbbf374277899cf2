"""Tests of swapper.core.slices.SliceRunner: running part of a graph from cached tensors.

References: ``onnx.reference.ReferenceEvaluator`` executes the ONNX operator
spec in numpy and hands back every intermediate result (``intermediate=True``);
Tanh and Relu are also written out in numpy from the ONNX operator spec
(Relu(x) = max(0, x)), so a slice that starts from a planted cached tensor can
be told apart from one that recomputes it.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import onnx
import onnx.parser
from onnx import numpy_helper
from onnx.reference import ReferenceEvaluator

from swapper.core.slices import LastReads, SliceRunner, row_spans
from swapper.core.tensor_cache import TensorCache
from swapper.data.dataset import Dataset, input_batches

# x -> MatMul W -> Tanh -> Relu -> y
CHAIN = """
<ir_version: 8, opset_import: ["" : 17]>
chain (float[N, 3] x) => (float[N, 3] y) {
    h = MatMul(x, W)
    t = Tanh(h)
    y = Relu(t)
}
"""
# s, u -> Sub -> d (every input comes from the cache)
SUB = """
<ir_version: 8, opset_import: ["" : 17]>
difference (float[N, 3] s, float[N, 3] u) => (float[N, 3] d) {
    d = Sub(s, u)
}
"""


def _chain(scale: float = 1.0) -> tuple[onnx.ModelProto, np.ndarray]:
    w = (scale * np.random.default_rng(0).normal(size=(3, 3))).astype(np.float32)
    model = onnx.parser.parse_model(CHAIN)
    model.graph.initializer.append(numpy_helper.from_array(w, "W"))
    return onnx.shape_inference.infer_shapes(model), w


def _dataset(n: int = 10, seed: int = 1) -> Dataset:
    x = np.random.default_rng(seed).normal(size=(n, 3)).astype(np.float32)
    return Dataset(path=Path("<inline>"), arrays={"x": x}, labels=np.arange(n), expected=None, n=n,
                   dtypes={"x": np.dtype(np.float32)})


def _reference(model: onnx.ModelProto, x: np.ndarray) -> dict[str, np.ndarray]:
    # source: ONNX operator spec as executed by onnx.reference.ReferenceEvaluator
    return ReferenceEvaluator(model).run(None, {"x": x}, intermediate=True)


def test_recorded_tensors_match_the_reference():
    model, _ = _chain()
    ds = _dataset()
    with TensorCache() as cache:
        runner = SliceRunner(cache, input_batches(ds, 4), prefix="m::")
        calls = []
        runner.record(model, ["t", "x"], advance=calls.append)
        assert calls == [1, 1, 1]  # 10 samples in batches of 4
        assert runner.recorded() == ["t", "x"] and cache.names() == ["m::t", "m::x"]
        ref = _reference(model, ds.arrays["x"])
        np.testing.assert_allclose(runner.read("t", 0, 10), ref["t"], rtol=1e-6, atol=1e-6)
        np.testing.assert_array_equal(runner.read("x", 0, 10), ds.arrays["x"])  # graph inputs stored as fed


def test_slice_starts_from_the_cached_tensor():
    model, _ = _chain()
    ds = _dataset()
    ref = _reference(model, ds.arrays["x"])
    planted = -ref["t"]  # not what the model computes at t: shows whether t is read or recomputed
    with TensorCache() as cache:
        cache.append("m::t", planted)
        runner = SliceRunner(cache, input_batches(ds, 4), prefix="m::")
        ys = np.concatenate([v["y"] for _, v in runner.stream(model, ["y", "t", "x"])])
        # Relu(x) = max(0, x) (ONNX operator spec) of the cached values: nothing upstream of t ran
        np.testing.assert_allclose(ys, np.maximum(planted, 0), rtol=0, atol=0)
        # explicit starts: only the graph inputs, so t is computed again and y is the model's own
        ys = np.concatenate([v["y"] for _, v in runner.stream(model, ["y"], starts=[])])
        np.testing.assert_allclose(ys, ref["y"], rtol=1e-6, atol=1e-6)


def test_two_models_share_one_cache_under_their_prefixes():
    (first, w1), (second, w2) = _chain(1.0), _chain(2.0)
    ds = _dataset()
    with TensorCache() as cache:
        source = input_batches(ds, 3)
        a = SliceRunner(cache, source, prefix="first::")
        b = SliceRunner(cache, source, prefix="second::")
        a.record(first, ["t"])
        b.record(second, ["t"])
        x = ds.arrays["x"].astype(np.float64)
        # Tanh and MatMul written out in numpy (ONNX operator spec)
        np.testing.assert_allclose(a.read("t", 0, 10), np.tanh(x @ w1), rtol=1e-5, atol=1e-6)
        np.testing.assert_allclose(b.read("t", 0, 10), np.tanh(x @ w2), rtol=1e-5, atol=1e-6)
        a.discard(["t"])
        assert not a.has("t") and b.has("t") and cache.names() == ["second::t"]


def test_store_skips_what_is_recorded_and_stream_yields_every_batch():
    model, _ = _chain()
    ds = _dataset(n=7)
    with TensorCache() as cache:
        runner = SliceRunner(cache, input_batches(ds, 2), prefix="")
        runner.record(model, ["h"])
        spans = [(batch.start, batch.stop) for batch, _ in runner.stream(model, ["y"], store=["h", "t"])]
        assert spans == [(0, 2), (2, 4), (4, 6), (6, 7)]
        assert cache.rows("h") == 7 and cache.rows("t") == 7  # h was not appended a second time


def test_whole_model_on_cached_tensors_under_other_keys():
    model = onnx.parser.parse_model(SUB)
    rng = np.random.default_rng(2)
    s, u = rng.normal(size=(9, 3)).astype(np.float32), rng.normal(size=(9, 3)).astype(np.float32)
    with TensorCache() as cache:
        cache.append("student", s)
        cache.append("teacher", u)
        runner = SliceRunner(cache, row_spans(9, 4))
        out = list(runner.stream(model, ["d"], keys={"s": "student", "u": "teacher"}, whole=True))
        assert [(b.start, b.stop) for b, _ in out] == [(0, 4), (4, 8), (8, 9)]
        # Sub (ONNX operator spec): elementwise s - u, exact in float32
        np.testing.assert_array_equal(np.concatenate([v["d"] for _, v in out]), s - u)
        # no model at all: the cached tensors come back as they are
        both = [v for _, v in runner.stream(None, ["s", "u"], keys={"s": "student", "u": "teacher"})]
        np.testing.assert_array_equal(np.concatenate([v["s"] for v in both]), s)


def test_input_batches_hold_only_the_named_arrays():
    ds = _dataset(n=5)
    batches = list(input_batches(ds, 2)(["x"]))
    assert all(set(b.feeds) == {"x"} and b.labels is None for b in batches)
    assert [len(b.feeds["x"]) for b in batches] == [2, 2, 1]
    assert all(b.feeds == {} for b in input_batches(ds, 2)([]))


def test_last_reads_free_each_key_after_its_last_step():
    last = LastReads()
    for key, step in [("a", 1), ("b", 1), ("a", 3), ("c", 2), ("b", 2), ("a", 2)]:
        last.read_at(key, step)
    assert last == {"a": 3, "b": 2, "c": 2}
    assert last.done(1) == [] and last.done(2) == ["b", "c"] and last.done(3) == ["a"]


# x -> Conv -> Tanh (the site) -> AveragePool -> Conv (its linear consumer, behind one linear step)
POOLED = """
<ir_version: 8, opset_import: ["" : 17]>
pooled (float[N, 2, 6, 6] x) => (float[N, 3, 3, 3] y) {
    h = Conv <pads = [1, 1, 1, 1]> (x, W1, B1)
    t = Tanh(h)
    p = AveragePool <kernel_shape = [2, 2], strides = [2, 2]> (t)
    y = Conv <pads = [1, 1, 1, 1]> (p, W2, B2)
}
"""


def test_bias_correction_difference_model_subtracts_as_numpy_did(tmp_path):
    """The per-batch difference model forms student - teacher itself (Cast to double, Sub, Cast back), so
    it runs from the cached tensors; its output must be bit-equal to the same steps run on
    ``np.subtract(s, t, dtype=float64).astype(float32)`` (IEEE 754: both subtract exactly-widened values
    in float64 and round once to float32), whatever the exponents of s and t."""
    import swapper.calibrate.bias_correction as bc
    from swapper.core.graph import GraphIndex
    from swapper.core.model_io import load_model
    from swapper.core.session import open_session
    from swapper.plan.layers import reach_linear
    from swapper.scan.sites import find_sites

    rng = np.random.default_rng(6)
    model = onnx.parser.parse_model(POOLED)
    for name, shape in (("W1", (2, 2, 3, 3)), ("B1", (2,)), ("W2", (3, 2, 3, 3)), ("B2", (3,))):
        model.graph.initializer.append(numpy_helper.from_array(rng.normal(size=shape).astype(np.float32), name))
    onnx.save(model, tmp_path / "pooled.onnx")
    model = load_model(tmp_path / "pooled.onnx").model  # named nodes, inferred shapes, as the CLI sees it
    index = GraphIndex.of(model)
    site = find_sites(model)[0]
    (reach,), _ = reach_linear(index, site.output, None, None, 1, gates=False)
    assert [s.node.op_type for s in reach.steps] == ["AveragePool"] and reach.node.op_type == "Conv"
    scale = 10.0 ** rng.uniform(-30, 30, size=(20, 2, 6, 6))  # s and u of very different sizes, too
    s = (rng.normal(size=scale.shape) * scale).astype(np.float32)
    u = (rng.normal(size=scale.shape) * scale[::-1]).astype(np.float32)
    old = bc._difference_model(model, index, site, reach, False, with_layer=True)
    want = open_session(old).run(None, {f"{bc._TMP}delta": np.subtract(s, u, dtype=np.float64).astype(np.float32)})[0]
    new = bc._difference_model(model, index, site, reach, False, with_layer=True, subtract=True)
    with TensorCache() as cache:
        cache.append("student", s)
        cache.append("teacher", u)
        keys = {f"{bc._TMP}student": "student", f"{bc._TMP}teacher": "teacher"}
        got = np.concatenate([v[f"{bc._TMP}shift"] for _, v in SliceRunner(cache, row_spans(20, 8)).stream(
            new, [f"{bc._TMP}shift"], keys=keys, whole=True)])
    assert got.tobytes() == want.tobytes()
