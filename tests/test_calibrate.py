"""Tests of swapper.calibrate.loop: levels, sequential inputs, fitting, bias correction, streaming.

References: onnxruntime and ``onnx.reference.ReferenceEvaluator`` execute the
ONNX operator spec (the original model's tensors, and the rewritten model's
tensors cut out with ``expose``); the surrogate formulas are written out in
numpy from the ONNX operator spec; top-1 agreement is scored with
``sklearn.metrics.accuracy_score``; bias correction follows Nagel et al. 2019
(Data-Free Quantization, section on bias correction: subtract the expected
output shift E[W·(x̃ − x)] from the layer's bias).
"""
from __future__ import annotations

import copy
from pathlib import Path

import numpy as np
import onnx
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from onnx import TensorProto, helper, numpy_helper
from onnx.reference import ReferenceEvaluator
from sklearn.metrics import accuracy_score

import swapper.calibrate.bias_correction as bias_correction
import swapper.calibrate.loop as cal
from swapper import api
from swapper.core.graph import GraphIndex
from swapper.core.model_io import load_model
from swapper.core.session import expose, open_session
from swapper.core.tensor_cache import TensorCache
from swapper.data.dataset import Dataset, batches, replicate, subset
from swapper.plan.plan import Plan, SiteSwap, make_plan
from swapper.rewrite.apply import rewrite
from swapper.scan.sites import find_sites

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "demo_models"
DEMO_MODELS = ["meter_cnn_silu", "meter_gelu_mlp", "meter_mlp_tanh_sigmoid", "meter_mlp_mish_gelutanh"]
OPSET = 17


# ------------------------------------------------------------------ helpers
def _init(name: str, arr) -> onnx.TensorProto:
    return numpy_helper.from_array(np.asarray(arr, dtype=np.float32), name)


def _load(model: onnx.ModelProto, tmp_path: Path, name: str = "m.onnx") -> onnx.ModelProto:
    """Through the project's loader (named nodes, inferred shapes), as the CLI would see it."""
    path = tmp_path / name
    onnx.save(model, path)
    return load_model(path).model


def _model(nodes, inputs, outputs, inits) -> onnx.ModelProto:
    graph = helper.make_graph(
        nodes, "g",
        [helper.make_tensor_value_info(n, TensorProto.FLOAT, ["N", d]) for n, d in inputs],
        [helper.make_tensor_value_info(n, TensorProto.FLOAT, ["N", d]) for n, d in outputs],
        initializer=inits,
    )
    return helper.make_model(graph, opset_imports=[helper.make_opsetid("", OPSET)])


def _dataset(x: np.ndarray, name: str = "x") -> Dataset:
    return Dataset(path=Path("<inline>"), arrays={name: x}, labels=None, targets=None, n=len(x),
                   dtypes={name: np.dtype(np.float32)})


def _demo(name: str):
    loaded = load_model(DEMO / f"{name}.onnx")
    return loaded, api.load_data(DEMO / "calib.npz", loaded)


def _run(model: onnx.ModelProto, ds: Dataset, names: list[str]) -> dict[str, np.ndarray]:
    """Tensors ``names`` of ``model`` over the whole data set, by onnxruntime (cut with expose)."""
    session = open_session(expose(model, names))
    outs = [o.name for o in session.get_outputs()]
    parts = [dict(zip(outs, session.run(None, b.feeds))) for b in batches(ds, 128)]
    return {n: np.concatenate([p[n] for p in parts]) for n in names}


@pytest.fixture
def spy(monkeypatch):
    """Record, per site id, every x an observer is fed and its reservoir size after each update;
    and every TensorCache calibrate opens with the names appended to it."""
    seen = {"x": {}, "held": {}, "res_bytes": {}, "observers": {}, "caches": []}
    real = cal.observer_for

    def observer(swap, seed, reservoir):
        obs = real(swap, seed, reservoir)
        sid = swap.site_id
        seen["x"][sid], seen["held"][sid], seen["res_bytes"][sid] = [], [], []
        seen["observers"][sid] = obs
        update = obs.update

        def recording_update(x, y):
            seen["x"][sid].append(np.array(x, copy=True))
            update(x, y)
            seen["held"][sid].append(obs.held)
            seen["res_bytes"][sid].append(obs._res.nbytes)

        obs.update = recording_update
        return obs

    class RecordingCache(TensorCache):
        """Also keeps, per name, the rows it held when discarded (``final_rows``), and fails on
        an append after a discard (a tensor recorded twice)."""

        def __init__(self, *a, **k):
            super().__init__(*a, **k)
            self.names: list[str] = []
            self.discarded: dict[str, int] = {}
            seen["caches"].append(self)

        def append(self, name, array, **kw):
            assert name not in self.discarded, f"{name} appended after it was discarded"
            if name not in self.names:
                self.names.append(name)
            super().append(name, array, **kw)

        def discard(self, name):
            if name in self:
                self.discarded[name] = self.rows(name)
            super().discard(name)

        def final_rows(self) -> dict[str, int]:
            return {n: self.discarded[n] if n in self.discarded else self.rows(n) for n in self.names}

    monkeypatch.setattr(cal, "observer_for", observer)
    monkeypatch.setattr(cal, "TensorCache", RecordingCache)
    return seen


# ------------------------------------------------------------- site levels
def _chain():
    # x -> Tanh (s1) -> MatMul -> Sigmoid (s2) -> MatMul -> Tanh (s3) -> MatMul -> y
    W = _init("W", np.eye(4))
    nodes = [
        helper.make_node("Tanh", ["x"], ["t1"], name="n1"),
        helper.make_node("MatMul", ["t1", "W"], ["m1"], name="n2"),
        helper.make_node("Sigmoid", ["m1"], ["s1"], name="n3"),
        helper.make_node("MatMul", ["s1", "W"], ["m2"], name="n4"),
        helper.make_node("Tanh", ["m2"], ["t2"], name="n5"),
        helper.make_node("MatMul", ["t2", "W"], ["y"], name="n6"),
    ]
    return _model(nodes, [("x", 4)], [("y", 4)], [W])


def _parallel():
    # x -> MatMul A -> Tanh (s1) ; x -> MatMul B -> Sigmoid (s2) ; Add -> Tanh (s3) -> MatMul -> y
    A, B = _init("A", np.eye(4)), _init("B", -np.eye(4))
    nodes = [
        helper.make_node("MatMul", ["x", "A"], ["a"], name="n1"),
        helper.make_node("Tanh", ["a"], ["ta"], name="n2"),
        helper.make_node("MatMul", ["x", "B"], ["b"], name="n3"),
        helper.make_node("Sigmoid", ["b"], ["sb"], name="n4"),
        helper.make_node("Add", ["ta", "sb"], ["s"], name="n5"),
        helper.make_node("Tanh", ["s"], ["tc"], name="n6"),
        helper.make_node("MatMul", ["tc", "A"], ["y"], name="n7"),
    ]
    return _model(nodes, [("x", 4)], [("y", 4)], [A, B])


def _residual():
    # x -> MatMul A -> Tanh (s1) = h ; h -> MatMul B -> Sigmoid (s2) = g ; Add(h, g) -> Tanh (s3) -> MatMul -> y
    A, B = _init("A", np.eye(4)), _init("B", 0.5 * np.eye(4))
    nodes = [
        helper.make_node("MatMul", ["x", "A"], ["a"], name="n1"),
        helper.make_node("Tanh", ["a"], ["h"], name="n2"),
        helper.make_node("MatMul", ["h", "B"], ["b"], name="n3"),
        helper.make_node("Sigmoid", ["b"], ["g"], name="n4"),
        helper.make_node("Add", ["h", "g"], ["r"], name="n5"),
        helper.make_node("Tanh", ["r"], ["t"], name="n6"),
        helper.make_node("MatMul", ["t", "A"], ["y"], name="n7"),
    ]
    return _model(nodes, [("x", 4)], [("y", 4)], [A, B])


# Depths worked out by hand from the drawings above: 1 + the most swapped sites on any path
# from a graph input to the site's input (a longest-path count over the DAG).
LEVEL_CASES = [
    (_chain, {"s1", "s2", "s3"}, {"s1": 1, "s2": 2, "s3": 3}),
    (_chain, {"s1", "s3"}, {"s1": 1, "s3": 2}),
    (_chain, {"s2", "s3"}, {"s2": 1, "s3": 2}),
    (_chain, {"s3"}, {"s3": 1}),
    (_parallel, {"s1", "s2", "s3"}, {"s1": 1, "s2": 1, "s3": 2}),
    (_parallel, {"s2", "s3"}, {"s2": 1, "s3": 2}),
    (_parallel, {"s1", "s2"}, {"s1": 1, "s2": 1}),
    (_residual, {"s1", "s2", "s3"}, {"s1": 1, "s2": 2, "s3": 3}),  # the skip path is shorter
    (_residual, {"s1", "s3"}, {"s1": 1, "s3": 2}),
    (_residual, {"s2", "s3"}, {"s2": 1, "s3": 2}),
]


@pytest.mark.parametrize("build, swapped, expected", LEVEL_CASES)
def test_site_levels_hand_built(build, swapped, expected, tmp_path):
    model = _load(build(), tmp_path)
    sites = find_sites(model)
    assert [s.function for s in sites][:2] in (["tanh", "sigmoid"], ["tanh", "tanh"])
    assert cal.site_levels(GraphIndex.of(model), sites, swapped) == expected


# ------------------------------------------------------- surrogate formula
# source: ONNX operator spec — Relu: max(0, x); HardSigmoid: max(0, min(1, alpha·x + beta));
# HardSwish: x·max(0, min(1, x/6 + 1/2)); Clip(min=-1, max=1) for hard tanh
G = {
    "relu": (lambda z, p: np.maximum(z, 0.0), {}),
    "hard_sigmoid": (lambda z, p: np.maximum(0.0, np.minimum(1.0, p["alpha"] * z + p["beta"])),
                     {"alpha": 0.2, "beta": 0.5}),
    "hard_swish": (lambda z, p: z * np.maximum(0.0, np.minimum(1.0, z / 6.0 + 0.5)), {}),
    "hard_tanh": (lambda z, p: np.clip(z, -1.0, 1.0), {}),
}


def _swap_for(target: str, axis, channels: int, rng) -> SiteSwap:
    params = {p: rng.normal(size=channels) for p in "abcd"}
    return SiteSwap(site_id="s1", source="tanh", source_params={}, target=target, target_params=dict(G[target][1]),
                    channel_axis=axis, channels=channels, placement={p: "nodes" for p in "abcd"}, **params)


@settings(max_examples=40, deadline=None)
@given(
    target=st.sampled_from(sorted(G)),
    ndim=st.integers(2, 4),
    where=st.sampled_from(["axis1", "last", "minus1", "none"]),
    dims=st.lists(st.integers(1, 5), min_size=4, max_size=4),
    seed=st.integers(0, 2**16),
)
def test_surrogate_output_matches_per_channel_formula(target, ndim, where, dims, seed):
    rng = np.random.default_rng(seed)
    shape = tuple(dims[:ndim])
    axis = {"axis1": 1, "last": ndim - 1, "minus1": -1, "none": None}[where]
    channels = shape[axis] if axis is not None else 1
    swap = _swap_for(target, axis, channels, rng)
    x = (3 * rng.normal(size=shape)).astype(np.float32)
    g, p = G[target]
    expected = np.empty(shape)
    for k in range(channels):  # one channel at a time, no broadcasting tricks
        idx = [slice(None)] * ndim
        if axis is not None:
            idx[axis] = k
        xs = x[tuple(idx)].astype(np.float64)
        expected[tuple(idx)] = swap.a[k] * g(swap.b[k] * xs + swap.c[k], p) + swap.d[k]
    got = cal.surrogate_output(swap, x)
    assert got.dtype == np.float32 and got.shape == shape
    np.testing.assert_allclose(got, expected.astype(np.float32), rtol=1e-6, atol=1e-6)


# ------------------------------------------------ fit never worse (demo models)
@pytest.mark.parametrize("name", DEMO_MODELS)
def test_calibrated_never_worse_than_start_on_demo_models(name):
    loaded, calib = _demo(name)
    sites = find_sites(loaded.model)
    for mode in cal.MODES:
        plan = make_plan(loaded.model, sites)
        before = {s.site_id: copy.deepcopy(s.params()) for s in plan.swaps}
        result = cal.calibrate(loaded.model, sites, plan, calib, mode=mode)
        assert [s.site_id for s in result.sites] == [s.site_id for s in plan.swaps]
        for sc in result.sites:
            # the fitter's contract (swapper/fit/channel.py): the start is always a candidate, so the
            # fitted mse on the calibration reservoir cannot exceed the starting one
            assert np.isfinite(sc.mse_fit) and sc.mse_fit <= sc.mse_start, (name, mode, sc)
            assert sc.level >= 1 and (mode == "sequential" or sc.level == 1)
        moved = sum(not np.allclose(before[s.site_id][p], s.params()[p]) for s in result.plan.swaps for p in "abcd")
        assert moved > 0  # calibration really changed something
        # the original is never mutated
        assert loaded.model.SerializeToString() == load_model(DEMO / f"{name}.onnx").model.SerializeToString()


def test_reported_mse_equals_independent_recomputation():
    """Local mode, reservoir larger than the data: the objective is the plain per-channel mse over
    every sample, recomputed here from ReferenceEvaluator's tensors and the numpy formulas."""
    loaded, calib = _demo("meter_mlp_tanh_sigmoid")
    sites = find_sites(loaded.model)
    plan = make_plan(loaded.model, sites)
    start = {s.site_id: {p: v.copy() for p, v in s.params().items()} for s in plan.swaps}
    result = cal.calibrate(loaded.model, sites, plan, calib, mode="local", bias_correction=False)
    feeds = next(batches(calib, calib.n)).feeds
    # source: ONNX operator spec as executed by onnx.reference.ReferenceEvaluator
    ref = ReferenceEvaluator(loaded.model).run(None, feeds, intermediate=True)
    by_id = {s.id: s for s in sites}
    for swap, sc in zip(result.plan.swaps, result.sites):
        x = ref[by_id[swap.site_id].input].astype(np.float64)
        y = ref[by_id[swap.site_id].output].astype(np.float64)
        g, p = G[swap.target]

        def mse(par):
            return float(np.mean(np.mean((y - (par["a"] * g(par["b"] * x + par["c"], p) + par["d"])) ** 2, axis=0)))

        assert sc.mse_start == pytest.approx(mse(start[swap.site_id]), rel=1e-3)
        assert sc.mse_fit == pytest.approx(mse(swap.params()), rel=1e-3)
        assert sc.mse_fit < 0.9 * sc.mse_start  # real data: calibration must buy something
        np.testing.assert_allclose(sc.x_min, x.min(axis=0), rtol=1e-5, atol=1e-6)
        np.testing.assert_allclose(sc.x_max, x.max(axis=0), rtol=1e-5, atol=1e-6)


# ------------------------------------------------- end-to-end on the demo CNN
def test_cnn_silu_to_relu_calibrated_agrees_far_more_than_naive():
    loaded, calib = _demo("meter_cnn_silu")
    val = api.load_data(DEMO / "val.npz", loaded, require_labels=True)

    def top1(model):
        session = open_session(model)
        return np.concatenate([session.run(None, b.feeds)[0].argmax(axis=1) for b in batches(val, 128)])

    reference = top1(loaded.model)
    naive = api.swap(loaded, to="relu", only="silu")
    tuned = api.swap(loaded, calib=calib, to="relu", only="silu", mode="sequential", bias_correction=True)
    assert [s.target for s in tuned.plan.swaps] == ["relu"] * 3
    # source: sklearn.metrics.accuracy_score as the agreement rate of two label vectors
    naive_agree = accuracy_score(reference, top1(naive.candidate))
    tuned_agree = accuracy_score(reference, top1(tuned.candidate))
    # measured on val.npz (450 samples): naive 0.940 (423/450), calibrated 0.991 (446/450)
    assert naive_agree < 0.965
    assert tuned_agree > 0.98
    assert tuned_agree - naive_agree > 0.03


# ----------------------------------------- sequential inputs are the swapped ones
def test_sequential_level2_input_comes_from_partially_swapped_model(spy):
    loaded, calib = _demo("meter_mlp_tanh_sigmoid")
    calib = subset(calib, 128)
    sites = find_sites(loaded.model)
    plan = make_plan(loaded.model, sites, fold="off")
    result = cal.calibrate(loaded.model, sites, plan, calib, mode="sequential", batch_size=48)
    s1, s2 = sites[0], sites[1]
    assert [r.level for r in result.sites] == [1, 2]
    recorded = np.concatenate(spy["x"]["s2"])
    # onnxruntime on the rewritten model with only level 1 swapped (fold off: explicit nodes),
    # built from the calibrated model (which carries level 1's bias correction), cut at s2's input
    first_only = Plan(fold="off", swaps=[result.plan.by_site()["s1"]])
    partial = rewrite(result.model, sites, first_only).model
    want = _run(partial, calib, [s2.input])[s2.input]
    original = _run(loaded.model, calib, [s2.input])[s2.input]
    assert recorded.shape == want.shape == (128, 32)
    np.testing.assert_allclose(recorded, want, rtol=1e-5, atol=1e-5)
    assert np.max(np.abs(recorded - original)) > 1e-2  # and it is not the original's tensor
    # level 1 still sees the original input (graph input side of the first swap)
    np.testing.assert_allclose(np.concatenate(spy["x"]["s1"]), _run(loaded.model, calib, [s1.input])[s1.input],
                               rtol=1e-6, atol=1e-6)


# --------------------------------------------------------- bias correction
def _gemm_tanh_gemm(beta: float = 1.0, shared: bool = False, seed: int = 0) -> onnx.ModelProto:
    """x -> Gemm(W1, b1) -> Tanh -> Gemm(W2, b2, beta) -> y; with ``shared``, b2 also biases z = Gemm(x, W3, b2)."""
    rng = np.random.default_rng(seed)
    inits = [_init("W1", rng.normal(size=(4, 6))), _init("b1", rng.normal(size=6)),
             _init("W2", rng.normal(size=(6, 3))), _init("b2", rng.normal(size=3))]
    nodes = [helper.make_node("Gemm", ["x", "W1", "b1"], ["h"], name="g1"),
             helper.make_node("Tanh", ["h"], ["t"], name="tanh"),
             helper.make_node("Gemm", ["t", "W2", "b2"], ["y"], name="g2", beta=beta)]
    outputs = [("y", 3)]
    if shared:
        inits.append(_init("W3", rng.normal(size=(4, 3))))
        nodes.append(helper.make_node("Gemm", ["x", "W3", "b2"], ["z"], name="g3"))
        outputs.append(("z", 3))
    return _model(nodes, [("x", 4)], outputs, inits)


@pytest.mark.parametrize("beta", [1.0, 0.5])
def test_bias_correction_restores_consumer_mean(beta, tmp_path):
    model = _load(_gemm_tanh_gemm(beta=beta), tmp_path)
    sites = find_sites(model)
    x = (2 * np.random.default_rng(1).normal(size=(512, 4))).astype(np.float32)
    ds = _dataset(x)
    means = {}
    for corrected in (False, True):
        # a small reservoir fits on a subsample, so the surrogate leaves a real mean shift behind
        plan = make_plan(model, sites, fold="off", to="relu")
        result = cal.calibrate(model, sites, plan, ds, bias_correction=corrected, reservoir=16)
        assert result.sites[0].bias_corrected == (["g2"] if corrected else [])
        candidate = rewrite(result.model, sites, result.plan).model
        means[corrected] = _run(candidate, ds, ["y"])["y"].astype(np.float64).mean(axis=0)
    target = _run(model, ds, ["y"])["y"].astype(np.float64).mean(axis=0)
    # source: Nagel et al. 2019, bias correction: after it, E[candidate output] = E[original output]
    # (here exactly, on the calibration set itself; float32 tolerance)
    assert np.max(np.abs(means[False] - target)) > 0.05  # the shift was there
    np.testing.assert_allclose(means[True], target, rtol=0, atol=1e-4)


def test_bias_correction_leaves_shared_bias_alone(tmp_path):
    model = _load(_gemm_tanh_gemm(shared=True), tmp_path)
    pristine = model.SerializeToString()
    sites = find_sites(model)
    assert [s.function for s in sites] == ["tanh"]
    ds = _dataset((2 * np.random.default_rng(2).normal(size=(256, 4))).astype(np.float32))
    plan = make_plan(model, sites, fold="off", to="relu")
    result = cal.calibrate(model, sites, plan, ds, reservoir=16)
    assert result.sites[0].bias_corrected == ["g2"]
    assert model.SerializeToString() == pristine  # calibrate never mutates its input
    index = GraphIndex.of(result.model)
    g2, g3 = index.nodes_by_name["g2"], index.nodes_by_name["g3"]
    b2 = numpy_helper.to_array(GraphIndex.of(model).initializers["b2"])
    assert g3.input[2] == "b2" and g2.input[2] != "b2"  # g2 got its own copy
    np.testing.assert_array_equal(numpy_helper.to_array(index.initializers["b2"]), b2)
    assert not np.allclose(numpy_helper.to_array(index.initializers[g2.input[2]]), b2)
    # the other user's output is bit-identical (onnxruntime, same graph path)
    np.testing.assert_array_equal(_run(result.model, ds, ["z"])["z"], _run(model, ds, ["z"])["z"])
    candidate = rewrite(result.model, sites, result.plan).model
    np.testing.assert_allclose(_run(candidate, ds, ["y"])["y"].mean(axis=0),
                               _run(model, ds, ["y"])["y"].mean(axis=0), rtol=0, atol=1e-4)


# -------------------------------------------------------------- streaming
def test_batch_size_does_not_change_the_fit():
    # 256 samples x 1 position per channel < reservoir 4096: every pair is held, whatever the batching
    loaded, calib = _demo("meter_gelu_mlp")
    sites = find_sites(loaded.model)
    fitted = {}
    for bs in (16, 256):
        plan = make_plan(loaded.model, sites)
        result = cal.calibrate(loaded.model, sites, plan, calib, batch_size=bs)
        fitted[bs] = (result.plan, result)
    (p16, r16), (p256, r256) = fitted[16], fitted[256]
    for s16, s256 in zip(p16.swaps, p256.swaps):
        for p in "abcd":
            np.testing.assert_allclose(getattr(s16, p), getattr(s256, p), rtol=1e-6, atol=1e-8)
    for c16, c256 in zip(r16.sites, r256.sites):
        np.testing.assert_allclose(c16.x_min, c256.x_min, rtol=1e-6)
        np.testing.assert_allclose(c16.x_max, c256.x_max, rtol=1e-6)
        assert c16.mse_fit == pytest.approx(c256.mse_fit, rel=1e-6)


def test_replicated_set_runs_in_bounded_observer_memory(spy):
    loaded, calib = _demo("meter_cnn_silu")
    sites = find_sites(loaded.model)
    reservoir = 1024
    held, res_bytes = {}, {}
    for times in (1, 8):
        big = replicate(calib, times)
        plan = make_plan(loaded.model, sites)
        result = cal.calibrate(loaded.model, sites, plan, big, reservoir=reservoir, batch_size=128)
        assert result.samples == 256 * times
        for s in result.plan.swaps:
            assert all(np.isfinite(v).all() for v in s.params().values())
        cache = spy["caches"][-1]
        assert cache.names and all(r == big.n for r in cache.final_rows().values())
        held[times] = {sid: max(h) for sid, h in spy["held"].items()}
        res_bytes[times] = {sid: max(b) for sid, b in spy["res_bytes"].items()}
        shapes = {s.id: s.shape for s in sites}
        for sid, obs in spy["observers"].items():  # every position of every sample was observed
            assert obs.n == big.n * int(np.prod(shapes[sid][2:]))
    # common practice, no source: a streaming observer holds at most `reservoir` pairs per channel,
    # so 8x the data must not grow what it holds (256 x 64 positions already exceeds the reservoir)
    assert held[1] == held[8] and all(v == reservoir for v in held[8].values())
    assert res_bytes[1] == res_bytes[8]


# ------------------------------------------------------------ determinism
def test_swap_twice_same_seed_is_byte_identical():
    path = DEMO / "meter_cnn_silu.onnx"
    first = api.swap(path, calib=DEMO / "calib.npz", seed=3)
    second = api.swap(path, calib=DEMO / "calib.npz", seed=3)
    other = api.swap(path, calib=DEMO / "calib.npz", seed=4)
    one = first.candidate.SerializeToString(deterministic=True)
    assert one == second.candidate.SerializeToString(deterministic=True)
    # the seed does reach the reservoir sampler (more pairs than the reservoir holds here),
    # so the check above could fail if something were left unseeded
    assert one != other.candidate.SerializeToString(deterministic=True)


# ------------------------------------------------------------- tricky graphs
def _tanh_sigmoid_back_to_back(seed: int = 0) -> onnx.ModelProto:
    rng = np.random.default_rng(seed)
    inits = [_init("W1", rng.normal(size=(4, 6))), _init("b1", rng.normal(size=6)),
             _init("W2", rng.normal(size=(6, 3))), _init("b2", rng.normal(size=3))]
    nodes = [helper.make_node("Gemm", ["x", "W1", "b1"], ["h"], name="g1"),
             helper.make_node("Tanh", ["h"], ["t"], name="tanh"),
             helper.make_node("Sigmoid", ["t"], ["s"], name="sig"),
             helper.make_node("Gemm", ["s", "W2", "b2"], ["y"], name="g2")]
    return _model(nodes, [("x", 4)], [("y", 3)], inits)


@pytest.mark.parametrize("mode", cal.MODES)
def test_site_reading_another_site_output(mode, spy, tmp_path):
    model = _load(_tanh_sigmoid_back_to_back(), tmp_path)
    sites = find_sites(model)
    assert [(s.function, s.input, s.output) for s in sites] == [("tanh", "h", "t"), ("sigmoid", "t", "s")]
    ds = _dataset((1.5 * np.random.default_rng(4).normal(size=(100, 4))).astype(np.float32))
    plan = make_plan(model, sites, fold="off")
    result = cal.calibrate(model, sites, plan, ds, mode=mode, batch_size=32)
    assert [r.level for r in result.sites] == ([1, 2] if mode == "sequential" else [1, 1])
    assert all(r.mse_fit <= r.mse_start for r in result.sites)
    # no tensor is recorded twice: every cached name holds exactly one row per sample
    cache = spy["caches"][-1]
    assert {"original::t", "candidate::t"} <= set(cache.names)
    assert cache.final_rows() == {n: 100 for n in cache.names}
    seen_t = np.concatenate(spy["x"]["s2"])
    assert seen_t.shape == (100, 6)
    if mode == "local":
        # local: the original's Tanh output (source: ONNX operator spec via ReferenceEvaluator)
        ref = ReferenceEvaluator(model).run(None, {"x": ds.arrays["x"]}, intermediate=True)["t"]
        np.testing.assert_allclose(seen_t, ref, rtol=1e-5, atol=1e-6)
    else:
        # sequential: what onnxruntime computes at t with the Tanh swapped
        partial = rewrite(result.model, sites, Plan(fold="off", swaps=[result.plan.by_site()["s1"]])).model
        np.testing.assert_allclose(seen_t, _run(partial, ds, ["t"])["t"], rtol=1e-5, atol=1e-6)
        # and with both swapped plus the consumer's correction, the output mean is the original's
        candidate = rewrite(result.model, sites, result.plan).model
        np.testing.assert_allclose(_run(candidate, ds, ["y"])["y"].mean(axis=0),
                                   _run(model, ds, ["y"])["y"].mean(axis=0), rtol=0, atol=1e-4)
    assert result.sites[1].bias_corrected == ["g2"]


@pytest.mark.parametrize("mode", cal.MODES)
def test_site_reading_a_graph_input(mode, spy, tmp_path):
    rng = np.random.default_rng(5)
    raw = _model([helper.make_node("Tanh", ["x"], ["t"], name="tanh"),
                  helper.make_node("Gemm", ["t", "W", "b"], ["y"], name="g")],
                 [("x", 4)], [("y", 2)], [_init("W", rng.normal(size=(4, 2))), _init("b", rng.normal(size=2))])
    model = _load(raw, tmp_path)
    sites = find_sites(model)
    assert [(s.input, s.producer) for s in sites] == [("x", None)]
    x = (2 * rng.normal(size=(90, 4))).astype(np.float32)
    ds = _dataset(x)
    plan = make_plan(model, sites, fold="off")
    result = cal.calibrate(model, sites, plan, ds, mode=mode, batch_size=32)
    np.testing.assert_array_equal(np.concatenate(spy["x"]["s1"]), x)  # fed straight from the data set
    cache = spy["caches"][-1]
    assert cache.final_rows() == {n: 90 for n in cache.names}
    assert result.sites[0].mse_fit <= result.sites[0].mse_start
    assert result.sites[0].bias_corrected == ["g"]


# ------------------------------------------------ schedule, discards, cache budget
def test_schedule_last_reads_hand_built(tmp_path):
    # _chain with all three swapped (levels 1, 2, 3), worked out by hand from the drawing: each level
    # runs the original from the previous site output (its teacher value) to this site's output, and
    # the swapped model from the previous swapped output to this site's input
    model = _load(_chain(), tmp_path)
    sites = find_sites(model)
    by_id = {s.id: s for s in sites}
    index = GraphIndex.of(model)
    levels = cal.site_levels(index, sites, {"s1", "s2", "s3"})
    sched = cal._schedule(index, by_id, levels)
    assert sched.last == {"original::x": 1, "original::t1": 2, "candidate::t1": 2, "candidate::m1": 2,
                          "original::s1": 3, "candidate::s1": 3, "candidate::m2": 3, "original::t2": 3,
                          "candidate::t2": 3}
    assert sched.original[2].feed == {"t1": "original::t1"} and sched.swapped[2].feed == {"t1": "candidate::t1"}
    assert sched.swapped[3].outputs == ["m2"] and 1 not in sched.swapped


def _small_scale(blocks: int):
    from swapper.bench.scale_model import build_scale_model, scale_data

    return build_scale_model(blocks=blocks, widths=(4, 4), size=8), scale_data(64, size=8, seed=1)


def test_discards_bound_memory_by_level_not_depth_and_change_nothing(monkeypatch):
    # common practice, no source: a tensor nobody reads later can be freed; with every level's tensors
    # the same size, what is held at once must not grow with the number of levels
    peaks, kept = {}, {}
    for blocks in (3, 9):
        model, ds = _small_scale(blocks)
        sites = find_sites(model)
        plan = make_plan(model, sites, to="relu")
        result = cal.calibrate(model, sites, plan, ds)
        peaks[blocks] = result.cache["peak_bytes_in_memory"]
        assert result.cache["bytes_written"] == 0  # well inside the RAM budget
        with monkeypatch.context() as m:
            m.setattr(TensorCache, "discard", lambda self, name: None)
            plan_kept = make_plan(model, sites, to="relu")
            result_kept = cal.calibrate(model, sites, plan_kept, ds)
        kept[blocks] = result_kept.cache["peak_bytes_in_memory"]
        one = rewrite(result.model, sites, result.plan).model.SerializeToString(deterministic=True)
        assert one == rewrite(result_kept.model, sites, result_kept.plan).model.SerializeToString(deterministic=True)
    assert peaks[3] == peaks[9] > 0
    assert kept[9] > 2 * kept[3]  # without discards the cache holds every level's tensors


def test_results_do_not_depend_on_the_cache_budget(monkeypatch):
    model, ds = _small_scale(4)
    sites = find_sites(model)
    out = {}
    for budget in (0, 100_000, 1 << 30):
        plan = make_plan(model, sites, to="relu")
        result = cal.calibrate(model, sites, plan, ds, batch_size=16, cache_bytes=budget)
        assert result.cache["peak_bytes_in_memory"] <= budget
        assert (result.cache["bytes_written"] > 0) == (budget < 1 << 30)
        out[budget] = rewrite(result.model, sites, result.plan).model.SerializeToString(deterministic=True)
    assert len(set(out.values())) == 1  # spilled or not, the same bytes come back


# ------------------------------------------------ bias correction from the mean difference
@settings(max_examples=30, deadline=None)
@given(
    spatial=st.sampled_from([(7,), (6, 5), (5, 7)]),
    kernel=st.integers(1, 3),
    stride=st.integers(1, 2),
    dilation=st.integers(1, 2),
    pad=st.integers(0, 2),
    auto_pad=st.sampled_from(["NOTSET", "SAME_UPPER", "SAME_LOWER", "VALID"]),
    group=st.sampled_from([1, 2]),
    seed=st.integers(0, 2**16),
)
def test_conv_mean_matches_reference_conv(spatial, kernel, stride, dilation, pad, auto_pad, group, seed):
    rng = np.random.default_rng(seed)
    d = len(spatial)
    c_in, c_out = 2 * group, 3 * group
    attrs = {"kernel_shape": [kernel] * d, "strides": [stride] * d, "dilations": [dilation] * d, "group": group}
    if auto_pad == "NOTSET":
        attrs["pads"] = [pad] * (2 * d)
    else:
        attrs["auto_pad"] = auto_pad
    node = helper.make_node("Conv", ["x", "W"], ["y"], **attrs)
    w = rng.normal(size=(c_out, c_in // group) + (kernel,) * d)
    x = rng.normal(size=(1, c_in) + spatial)
    graph = helper.make_graph([node], "conv", [helper.make_tensor_value_info("x", TensorProto.DOUBLE, None)],
                              [helper.make_tensor_value_info("y", TensorProto.DOUBLE, None)],
                              initializer=[numpy_helper.from_array(w, "W")])
    ref_model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", OPSET)])
    # source: ONNX operator spec, Conv (pads / strides / dilations / auto_pad / group), as executed in float64
    # by onnx.reference.ReferenceEvaluator; the mean over output positions per output channel
    y = ReferenceEvaluator(ref_model).run(None, {"x": x})[0]
    want = y.mean(axis=tuple(i for i in range(y.ndim) if i != 1))
    np.testing.assert_allclose(bias_correction._conv_mean(node, w, x), want, rtol=1e-10, atol=1e-12)


@settings(max_examples=20, deadline=None)
@given(sizes=st.lists(st.integers(0, 7), min_size=1, max_size=5), seed=st.integers(0, 2**16))
def test_delta_sum_is_the_mean_difference(sizes, seed):
    rng = np.random.default_rng(seed)
    s_parts = [rng.normal(size=(n, 3, 2)).astype(np.float32) for n in sizes]
    t_parts = [(p + 0.01 * rng.normal(size=p.shape)).astype(np.float32) for p in s_parts]
    delta = bias_correction.DeltaSum()
    for s, t in zip(s_parts, t_parts):
        delta.add(s, t)
    assert delta.n == sum(sizes)
    if delta.n:
        # source: numpy reference, float64 mean over samples of the difference
        want = np.mean(np.concatenate(s_parts).astype(np.float64) - np.concatenate(t_parts), axis=0)
        np.testing.assert_allclose(delta.mean()[0], want, rtol=1e-9, atol=1e-12)


def _conv_pool_conv(pool: str, seed: int = 0) -> onnx.ModelProto:
    """x[N,2,8,8] -> Conv(W1, b1) -> Tanh -> {Average,Max}Pool 2x2 -> Conv(W2, b2, pads 1) -> y."""
    rng = np.random.default_rng(seed)
    inits = [_init("W1", rng.normal(size=(4, 2, 3, 3))), _init("b1", rng.normal(size=4)),
             _init("W2", rng.normal(size=(3, 4, 3, 3))), _init("b2", rng.normal(size=3))]
    nodes = [helper.make_node("Conv", ["x", "W1", "b1"], ["h"], name="c1", kernel_shape=[3, 3], pads=[1, 1, 1, 1]),
             helper.make_node("Tanh", ["h"], ["t"], name="tanh"),
             helper.make_node(pool, ["t"], ["p"], name="pool", kernel_shape=[2, 2], strides=[2, 2]),
             helper.make_node("Conv", ["p", "W2", "b2"], ["y"], name="c2", kernel_shape=[3, 3], pads=[1, 1, 1, 1])]
    graph = helper.make_graph(nodes, "g", [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", 2, 8, 8])],
                              [helper.make_tensor_value_info("y", TensorProto.FLOAT, ["N", 3, 4, 4])],
                              initializer=inits)
    return helper.make_model(graph, opset_imports=[helper.make_opsetid("", OPSET)])


@pytest.mark.parametrize("pool", ["AveragePool", "MaxPool"])
def test_bias_correction_through_pooling_restores_conv_mean(pool, tmp_path, monkeypatch):
    model = _load(_conv_pool_conv(pool), tmp_path)
    sites = find_sites(model)
    assert [s.function for s in sites] == ["tanh"]
    ds = _dataset((np.random.default_rng(3).normal(size=(200, 2, 8, 8))).astype(np.float32))
    biases = {}
    for path in ("mean", "per_batch"):
        with monkeypatch.context() as m:
            if path == "per_batch":  # no shift sums: every consumer falls back to batch-by-batch runs
                m.setattr(cal, "DeltaSum", lambda: None)
            plan = make_plan(model, sites, fold="off", to="relu")
            result = cal.calibrate(model, sites, plan, ds, reservoir=16, batch_size=48)
        assert result.sites[0].bias_corrected == ["c2"]
        biases[path] = numpy_helper.to_array(GraphIndex.of(result.model).initializers["b2"])
        candidate = rewrite(result.model, sites, result.plan).model
        # source: Nagel et al. 2019, bias correction: E[candidate consumer output] = E[original], here per
        # output channel over samples and positions (float32 tolerance)
        got = _run(candidate, ds, ["y"])["y"].astype(np.float64).mean(axis=(0, 2, 3))
        want = _run(model, ds, ["y"])["y"].astype(np.float64).mean(axis=(0, 2, 3))
        np.testing.assert_allclose(got, want, rtol=0, atol=1e-4)
    before = numpy_helper.to_array(GraphIndex.of(model).initializers["b2"])
    assert np.max(np.abs(biases["mean"] - before)) > 1e-3  # a real correction happened
    np.testing.assert_allclose(biases["mean"], biases["per_batch"], rtol=0, atol=1e-6)
