"""Tests of swapper.calibrate.refit: ridge-toward-prior consumer refit.

References: scikit-learn's Ridge is the reference ridge solver; onnxruntime
executes the ONNX Conv spec (pads, strides, dilations, auto_pad); the ONNX
checker validates the returned models; onnxruntime runs original and
candidate to measure the output error the refit is meant to reduce.
"""
from __future__ import annotations

import math
import tracemalloc
from pathlib import Path

import numpy as np
import onnx
import onnxruntime as ort
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from onnx import TensorProto, helper, numpy_helper
from onnx.reference import ReferenceEvaluator
from sklearn.linear_model import Ridge

from swapper.calibrate.loop import calibrate
from swapper.calibrate.refit import accumulate_level, refit_consumers
from swapper.calibrate.ridge import (
    FoldedGram,
    GramAccumulator,
    RidgePath,
    choose_ridge,
    ridge_toward_prior,
)
from swapper.core.conv import conv_geometry, im2col
from swapper.core.graph import GraphIndex
from swapper.data.dataset import Dataset, replicate
from swapper.plan.layers import find_consumers
from swapper.plan.plan import make_plan
from swapper.progress import Silent
from swapper.rewrite.apply import rewrite
from swapper.scan.sites import find_sites

OPSET = 17
DEMO = Path(__file__).resolve().parent.parent / "demo_models"


# ------------------------------------------------------------------ helpers
def _init(name, value):
    return numpy_helper.from_array(np.asarray(value, dtype=np.float32), name)


def _model(nodes, inits, x_shape, outs=("Y",)):
    graph = helper.make_graph(nodes, "g", [helper.make_tensor_value_info("X", TensorProto.FLOAT, list(x_shape))],
                              [helper.make_tensor_value_info(o, TensorProto.FLOAT, None) for o in outs], inits)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", OPSET)])
    model.ir_version = 8
    return onnx.shape_inference.infer_shapes(model)


def _dataset(x):
    x = np.asarray(x, dtype=np.float32)
    return Dataset(path=Path("<memory>"), arrays={"X": x}, labels=None, targets=None, n=len(x),
                   dtypes={"X": np.dtype(np.float32)})


def _run(model, x):
    so = ort.SessionOptions()
    so.intra_op_num_threads = 1
    sess = ort.InferenceSession(model.SerializeToString(), so, providers=["CPUExecutionProvider"])
    return sess.run(["Y"], {"X": np.asarray(x, dtype=np.float32)})[0].astype(np.float64)


def mlp(consumer="gemm", k=6, h=16, m=5, seed=0):
    """X[N, k] -> Gemm -> Tanh -> (Gemm | MatMul + Add) -> Y."""
    rng = np.random.default_rng(seed)
    inits = [_init("W1", rng.normal(size=(h, k)) * 0.8), _init("B1", rng.normal(size=h) * 0.3),
             _init("W2", rng.normal(size=(h, m)) * 0.6), _init("B2", rng.normal(size=m) * 0.2)]
    nodes = [helper.make_node("Gemm", ["X", "W1", "B1"], ["h"], name="fc1", transB=1),
             helper.make_node("Tanh", ["h"], ["a"], name="act")]
    if consumer == "gemm":
        nodes.append(helper.make_node("Gemm", ["a", "W2", "B2"], ["Y"], name="fc2", alpha=1.3, beta=0.7))
    else:
        nodes += [helper.make_node("MatMul", ["a", "W2"], ["q"], name="fc2"),
                  helper.make_node("Add", ["B2", "q"], ["Y"], name="fc2_bias")]
    return _model(nodes, inits, ("N", k))


def conv_chain(c_in=2, ch=6, seed=0, group2=1):
    """X[N, c_in, 7, 7] -> Conv -> SiLU (x·Sigmoid(x)) -> Conv(pads=1) -> Y."""
    rng = np.random.default_rng(seed)
    inits = [_init("W1", rng.normal(size=(ch, c_in, 3, 3)) * 0.5), _init("B1", rng.normal(size=ch) * 0.3),
             _init("W2", rng.normal(size=(4, ch // group2, 3, 3)) * 0.3), _init("B2", rng.normal(size=4) * 0.1)]
    nodes = [helper.make_node("Conv", ["X", "W1", "B1"], ["h"], name="conv1", pads=[1, 1, 1, 1]),
             helper.make_node("Sigmoid", ["h"], ["s"], name="sig"),
             helper.make_node("Mul", ["h", "s"], ["a"], name="mul"),
             helper.make_node("Conv", ["a", "W2", "B2"], ["Y"], name="conv2", pads=[1, 1, 1, 1], group=group2)]
    return _model(nodes, inits, ("N", c_in, 7, 7))


def _poor_plan(model, to, seed=0):
    """A plan whose free parameters are deliberately off (so there is something to repair)."""
    sites = find_sites(model)
    plan = make_plan(model, sites, to=to)
    assert len(plan.swaps) == 1, plan.skipped
    rng = np.random.default_rng(seed)
    sw = plan.swaps[0]
    off = {"a": rng.uniform(0.5, 0.8, sw.channels), "b": rng.uniform(0.5, 0.8, sw.channels),
           "c": rng.uniform(-0.3, 0.3, sw.channels), "d": rng.uniform(-0.2, 0.2, sw.channels)}
    sw.set_params(**{p: v for p, v in off.items() if p in sw.free()})
    return sites, plan


def _node_inputs(model, node_name):
    return list(GraphIndex.of(model).nodes_by_name[node_name].input)


# ---------------------------------------------------- the solve (vs sklearn)
@settings(max_examples=25, deadline=None)
@given(n=st.integers(3, 60), p=st.integers(1, 8), k=st.integers(1, 4),
       log_lam=st.floats(-3.0, 3.0), seed=st.integers(0, 2**16))
def test_ridge_toward_prior_matches_sklearn(n, p, k, log_lam, seed):
    rng = np.random.default_rng(seed)
    X, Y, prior = rng.normal(size=(n, p)), rng.normal(size=(n, k)), rng.normal(size=(p, k))
    lam = 10.0 ** log_lam
    acc = GramAccumulator(p)
    for s in range(0, n, 7):  # fed in batches, as the refit does
        acc.update(X[s:s + 7], Y[s:s + 7])
    got = ridge_toward_prior(acc, lam, prior)
    # source: scikit-learn Ridge (alpha=λ, fit_intercept=False) minimises ||y - Xw||² + α||w||²;
    # substituting w = β − β_prior turns the prior-centred penalty into that problem.
    coef = Ridge(alpha=lam, fit_intercept=False, solver="cholesky").fit(X, Y - X @ prior).coef_
    ref = np.reshape(coef, (k, p)).T + prior  # coef_ is (k, p), or (p,) for a single column
    np.testing.assert_allclose(got, ref, rtol=1e-6, atol=1e-8)


@settings(max_examples=15, deadline=None)
@given(n=st.integers(2, 40), p=st.integers(1, 10), log_lam=st.floats(-4.0, 4.0), seed=st.integers(0, 2**16))
def test_ridge_path_equals_direct_solve(n, p, log_lam, seed):
    rng = np.random.default_rng(seed)
    X, Y, prior = rng.normal(size=(n, p)), rng.normal(size=(n, 3)), rng.normal(size=(p, 3))
    acc = GramAccumulator(p)
    acc.update(X, Y)
    lam = 10.0 ** log_lam
    # source: the eigendecomposition identity (QΛQᵀ + λI)⁻¹ = Q(Λ + λI)⁻¹Qᵀ, checked against a direct
    # numpy.linalg.solve of the normal equations (n < p included: XᵀX singular)
    direct = np.linalg.solve(acc.xtx + lam * np.eye(p), acc.xty + lam * prior)
    np.testing.assert_allclose(RidgePath(acc).solve(lam, prior), direct, rtol=1e-6, atol=1e-8)


def test_huge_lambda_returns_prior_tiny_lambda_least_squares():
    rng = np.random.default_rng(3)
    X, Y, prior = rng.normal(size=(50, 4)), rng.normal(size=(50, 2)), rng.normal(size=(4, 2))
    acc = GramAccumulator(4)
    acc.update(X, Y)
    # source: the ridge objective; as λ → ∞ the penalty dominates and β → β_prior
    np.testing.assert_allclose(ridge_toward_prior(acc, 1e12, prior), prior, atol=1e-9)
    # source: numpy.linalg.lstsq (λ → 0 recovers ordinary least squares for a full-rank X)
    np.testing.assert_allclose(ridge_toward_prior(acc, 1e-10, prior), np.linalg.lstsq(X, Y, rcond=None)[0],
                               atol=1e-8)


def test_cv_picks_regularisation_on_an_underdetermined_problem():
    # 30 rows, 40 features, true weights = prior + small noise: plain least squares overfits, so the
    # held-out error must pick a large λ (common practice, no source: ridge helps when p > n).
    rng = np.random.default_rng(5)
    X = rng.normal(size=(30, 40))
    prior = rng.normal(size=(41, 3))
    true = prior + 0.01 * rng.normal(size=prior.shape)
    Y = np.hstack([X, np.ones((30, 1))]) @ true + 0.05 * rng.normal(size=(30, 3))
    gram = FoldedGram(4, 40)
    gram.update(X, Y, np.arange(30) % 4)
    choice = choose_ridge(gram, prior, prior + 0.5, factors=(1e-8, 1e-2, 1.0, 100.0))
    assert choice.factor >= 1.0 and choice.accepted
    assert np.abs(choice.theta - true).max() < np.abs(prior + 0.5 - true).max()


# --------------------------------------------------- im2col (vs onnxruntime)
@settings(max_examples=30, deadline=None)
@given(data=st.data())
def test_im2col_conv_matches_onnxruntime(data):
    d = data.draw(st.sampled_from([1, 2, 3]), label="spatial dims")
    c = data.draw(st.integers(1, 3))
    m = data.draw(st.integers(1, 4))
    kernel = [data.draw(st.integers(1, 3)) for _ in range(d)]
    strides = [data.draw(st.integers(1, 3)) for _ in range(d)]
    dilations = [data.draw(st.integers(1, 2)) for _ in range(d)]
    auto_pad = data.draw(st.sampled_from(["NOTSET", "VALID", "SAME_UPPER", "SAME_LOWER"]))
    pads = [data.draw(st.integers(0, 2)) for _ in range(2 * d)]
    size = 5 if d == 3 else 8
    spatial = [data.draw(st.integers(max(size - 3, (k - 1) * dl + 1), size)) for k, dl in zip(kernel, dilations)]
    rng = np.random.default_rng(data.draw(st.integers(0, 2**16)))
    x = rng.normal(size=[2, c] + spatial).astype(np.float32)
    w = rng.normal(size=[m, c] + kernel).astype(np.float32)
    b = rng.normal(size=m).astype(np.float32)
    attrs = dict(kernel_shape=kernel, strides=strides, dilations=dilations)
    if auto_pad == "NOTSET":
        attrs["pads"] = pads
    else:
        attrs["auto_pad"] = auto_pad
    node = helper.make_node("Conv", ["X", "W", "B"], ["Y"], name="conv", **attrs)
    graph = helper.make_graph([node], "g", [helper.make_tensor_value_info("X", TensorProto.FLOAT, None)],
                              [helper.make_tensor_value_info("Y", TensorProto.FLOAT, None)],
                              [numpy_helper.from_array(w, "W"), numpy_helper.from_array(b, "B")])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", OPSET)])
    model.ir_version = 8
    # source: ONNX operator spec, Conv (pads/strides/dilations/auto_pad), executed by onnxruntime;
    # onnxruntime refuses dilation with SAME_* padding, so there onnx.reference.ReferenceEvaluator runs it
    if auto_pad.startswith("SAME") and max(dilations) > 1:
        ref = ReferenceEvaluator(model).run(None, {"X": x})[0].astype(np.float64)
    else:
        ref = _run(model, x)
    begin, end, s, dl, out = conv_geometry(node, tuple(kernel), tuple(spatial))
    assert list(ref.shape[2:]) == out
    rows = im2col(x.astype(np.float64), kernel, s, dl, begin, end)
    got = rows @ w.reshape(m, -1).T.astype(np.float64) + b
    got = np.moveaxis(got.reshape([2] + out + [m]), -1, 1)
    np.testing.assert_allclose(got, ref, rtol=1e-4, atol=1e-4)


# ------------------------------------------------------ refits reduce error
def _held_out_gain(model, to, train, test, seed=0):
    sites, plan = _poor_plan(model, to, seed)
    before = rewrite(model, sites, plan).model
    refit = refit_consumers(model, model, sites, plan, _dataset(train), batch_size=50, seed=seed)
    refitted = refit.model
    after = rewrite(refitted, sites, refit.plan).model
    # source: ONNX checker (full_check runs strict shape inference)
    onnx.checker.check_model(refitted, full_check=True)
    onnx.checker.check_model(after, full_check=True)
    ref = _run(model, test)
    mse_before = float(np.mean((_run(before, test) - ref) ** 2))
    mse_after = float(np.mean((_run(after, test) - ref) ** 2))
    return mse_before, mse_after, refitted


@pytest.mark.parametrize("consumer", ["gemm", "matmul"])
def test_refit_reduces_held_out_error_mlp(consumer):
    model = mlp(consumer)
    before_bytes = model.SerializeToString()
    rng = np.random.default_rng(11)
    x = rng.normal(size=(500, 6))
    mse_before, mse_after, refitted = _held_out_gain(model, "hard_tanh", x[:300], x[300:])
    # measured: gemm 1.085 -> 0.0807; matmul 0.642 -> 0.0478 (final-output MSE vs the original on
    # 200 held-out samples, trained on 300); the check asks for at least a 4x reduction
    assert mse_after < 0.25 * mse_before, (mse_before, mse_after)
    # node names are kept; the original model is untouched
    assert [n.name for n in refitted.graph.node] == [n.name for n in model.graph.node]
    assert model.SerializeToString() == before_bytes


def test_refit_reduces_held_out_error_conv_silu_to_relu():
    model = conv_chain()
    before_bytes = model.SerializeToString()
    rng = np.random.default_rng(12)
    x = rng.normal(size=(160, 2, 7, 7))
    mse_before, mse_after, refitted = _held_out_gain(model, "relu", x[:100], x[100:])
    # measured: 1.692 -> 0.0617 (final-output MSE vs the original on 60 held-out samples, trained on 100)
    assert mse_after < 0.25 * mse_before, (mse_before, mse_after)
    assert model.SerializeToString() == before_bytes  # never mutated


def conv_two_level(seed=0, ch=6):
    """X -> Conv -> SiLU -> Conv -> SiLU -> Conv -> Y, all 3x3 with pads=1 (two levels of sites)."""
    rng = np.random.default_rng(seed)
    inits = [_init("W1", rng.normal(size=(ch, 2, 3, 3)) * 0.5), _init("B1", rng.normal(size=ch) * 0.3),
             _init("W2", rng.normal(size=(ch, ch, 3, 3)) * 0.3), _init("B2", rng.normal(size=ch) * 0.3),
             _init("W3", rng.normal(size=(3, ch, 3, 3)) * 0.3), _init("B3", rng.normal(size=3) * 0.1)]
    nodes = []
    for i, (x, w, b, y) in enumerate([("X", "W1", "B1", "h1"), ("a1", "W2", "B2", "h2")], start=1):
        nodes += [helper.make_node("Conv", [x, w, b], [y], name=f"conv{i}", pads=[1] * 4),
                  helper.make_node("Sigmoid", [y], [f"s{i}"], name=f"sig{i}"),
                  helper.make_node("Mul", [y, f"s{i}"], [f"a{i}"], name=f"mul{i}")]
    nodes.append(helper.make_node("Conv", ["a2", "W3", "B3"], ["Y"], name="conv3", pads=[1] * 4))
    return _model(nodes, inits, ("N", 2, 7, 7))


def test_refit_after_sequential_calibration_two_levels():
    model = conv_two_level()
    x = np.random.default_rng(100).normal(size=(200, 2, 7, 7))
    train, test = _dataset(x[:120]), x[120:]
    sites = find_sites(model)
    plan = make_plan(model, sites, to="relu")
    calibration = calibrate(model, sites, plan, train)
    ref = _run(model, test)
    mse_calibrated = float(np.mean((_run(rewrite(calibration.model, sites, calibration.plan).model, test) - ref) ** 2))
    refit = refit_consumers(model, calibration.model, sites, calibration.plan, train)
    out = refit.model
    calibration = refit.apply_to(calibration)
    mse_refit = float(np.mean((_run(rewrite(out, sites, refit.plan).model, test) - ref) ** 2))
    # measured: 0.1509 -> 0.1284 (final-output MSE vs the original on 80 held-out samples; seeds 1-3
    # of this chain gave 0.146 -> 0.112, 0.128 -> 0.112, 0.160 -> 0.135)
    assert mse_refit < 0.95 * mse_calibrated, (mse_calibrated, mse_refit)
    notes = {s.site_id: " ".join(s.notes) for s in calibration.sites}
    assert "refit Conv 'conv2'" in notes["s1"] and "'conv3'" in notes["s2"], notes
    # s2 sits downstream of the refitted conv2: its a, b, c, d were re-fitted on the new inputs
    assert "re-fitted on the refitted upstream layers" in notes["s2"], notes
    onnx.checker.check_model(out, full_check=True)  # source: ONNX checker


def test_infinite_lambda_returns_original_weights():
    model = mlp("gemm")
    sites, plan = _poor_plan(model, "hard_tanh")
    # base: the original with a spoiled consumer (as if a bad correction had been applied)
    base = onnx.ModelProto()
    base.CopyFrom(model)
    for t in base.graph.initializer:
        if t.name in ("W2", "B2"):
            t.CopyFrom(numpy_helper.from_array(numpy_helper.to_array(t) * 1.5 + 0.3, t.name))
    base_bytes = base.SerializeToString()
    x = np.random.default_rng(4).normal(size=(120, 6))
    out = refit_consumers(model, base, sites, plan, _dataset(x), factors=(1e12,)).model
    index, orig = GraphIndex.of(out), GraphIndex.of(model)
    node = index.nodes_by_name["fc2"]
    # source: the ridge objective; as λ → ∞ the solution is the prior, i.e. the ORIGINAL weights,
    # not the current (spoiled) ones and not zero
    np.testing.assert_allclose(index.const(node.input[1]), orig.const("W2"), rtol=1e-5, atol=1e-6)
    np.testing.assert_allclose(index.const(node.input[2]), orig.const("B2"), rtol=1e-5, atol=1e-6)
    assert base.SerializeToString() == base_bytes


def test_keeps_current_weights_when_refit_does_not_help_held_out():
    # 12 samples, 17 inputs (16 + bias), almost no ridge: the fit interpolates its training folds
    # and fails held out, while the current weights are decent -> the guard must keep them.
    model = mlp("gemm")
    sites = find_sites(model)
    plan = make_plan(model, sites, to="hard_tanh")
    x = np.random.default_rng(6).normal(size=(12, 6))
    calibration = calibrate(model, sites, plan, _dataset(x), batch_size=12)
    base = calibration.model
    refit = refit_consumers(model, base, sites, calibration.plan, _dataset(x), factors=(1e-12,))
    out = refit.model
    calibration = refit.apply_to(calibration)
    assert _node_inputs(out, "fc2") == _node_inputs(base, "fc2")
    np.testing.assert_array_equal(GraphIndex.of(out).const(_node_inputs(out, "fc2")[1]),
                                  GraphIndex.of(base).const(_node_inputs(base, "fc2")[1]))
    notes = " ".join(calibration.sites[0].notes)
    assert "kept current weights" in notes, notes


def test_grouped_conv_is_skipped_with_a_note():
    model = conv_chain(group2=2)
    sites = find_sites(model)
    found, notes = find_consumers(GraphIndex.of(model), sites[0], set())
    assert found == [] and any("grouped" in n for n in notes)


# ----------------------------------------------------------------- memory
def test_gram_memory_does_not_grow_with_the_dataset():
    model = conv_chain()
    sites, plan = _poor_plan(model, "relu")
    x = np.random.default_rng(2).normal(size=(40, 2, 7, 7))
    consumers, _ = find_consumers(GraphIndex.of(model), sites[0], set())
    ds = _dataset(x)

    def run(dataset):
        folds = np.arange(dataset.n) % 4
        tracemalloc.start()
        grams = accumulate_level(model, model, sites, plan, consumers, dataset, 4, folds, 20, 1, Silent(), "t")
        peak = tracemalloc.get_traced_memory()[1]
        tracemalloc.stop()
        return grams["conv2"], peak

    one, peak_one = run(ds)
    four, peak_four = run(replicate(ds, 4))
    assert four.held_bytes() == one.held_bytes()
    for a, b in zip(one.parts, four.parts):
        assert a.xtx.shape == b.xtx.shape == (6 * 9 + 1,) * 2
    # every row was seen: the sums of the 4x data set are 4x the sums (exact algebra, no source needed)
    np.testing.assert_allclose(four.total().xtx, 4 * one.total().xtx, rtol=1e-9)
    # numpy's peak allocation is per batch, not per data set (common practice, no source: 1.5x slack)
    assert peak_four < 1.5 * peak_one + 1e6, (peak_one, peak_four)


# ------------------------------------------------------------- end to end
@pytest.mark.skipif(not (DEMO / "meter_cnn_silu.onnx").exists() or not (DEMO / "calib.npz").exists(),
                    reason="demo models not built")
def test_demo_swap_with_refit_passes_checker():
    from swapper.api import swap

    result = swap(DEMO / "meter_cnn_silu.onnx", calib=DEMO / "calib.npz", to="relu", refit_consumers=True)
    # source: ONNX checker
    onnx.checker.check_model(result.candidate, full_check=True)
    onnx.checker.check_model(result.calibration.model, full_check=True)
    notes = [n for s in result.calibration.sites for n in s.notes]
    assert any(n.startswith(("refit ", "kept current weights")) for n in notes), notes
    assert math.isfinite(result.calibration.timings["refit_s"])
