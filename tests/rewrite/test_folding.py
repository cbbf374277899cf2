"""Tests of swapper.rewrite.folding: the fold arithmetic of per-channel scales and offsets into linear layers.

The arithmetic is checked against onnxruntime executing single Conv /
ConvTranspose / Gemm / MatMul nodes (ONNX operator spec): a folded layer run
on x must equal the original layer's output with the affine map applied.
"""
from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from onnx import helper
from testkit import float_model, init, run

from swapper.rewrite.folding import input_offset, input_scale, scale_shift_output


def _run_node(node, inits, feeds):
    names = [i for i in node.input if i and i not in {t.name for t in inits}]
    model = float_model([node], [(n, list(feeds[n].shape)) for n in names], [(node.output[0], None)], inits)
    return run(model, feeds)[0].astype(np.float64)


def _conv(op, w, bias, x, **attrs):
    inits = [init("W", w)] + ([init("B", bias)] if bias is not None else [])
    node = helper.make_node(op, ["X", "W"] + (["B"] if bias is not None else []), ["Y"], **attrs)
    return _run_node(node, inits, {"X": x.astype(np.float32)})


@settings(max_examples=20, deadline=None)
@given(op=st.sampled_from(["Conv", "ConvTranspose"]), group=st.sampled_from([1, 2]),
       pads=st.sampled_from([0, 1]), scalar=st.booleans(), seed=st.integers(0, 2**16))
def test_output_scale_shift_matches_onnxruntime(op, group, pads, scalar, seed):
    # source: ONNX operator spec, Conv / ConvTranspose weight layouts, executed by onnxruntime
    rng = np.random.default_rng(seed)
    c_in, m = 4, 6
    shape = (m, c_in // group, 3, 3) if op == "Conv" else (c_in, m // group, 3, 3)
    w, bias, x = rng.normal(size=shape), rng.normal(size=m), rng.normal(size=(1, c_in, 5, 5))
    b = rng.uniform(0.5, 2.0, 1 if scalar else m) * rng.choice([-1, 1], 1 if scalar else m)
    c = rng.normal(size=1 if scalar else m)
    kind = "conv" if op == "Conv" else "convtranspose"
    node = helper.make_node(op, ["X", "W", "B"], ["Y"], group=group)
    new_w, new_b = scale_shift_output(kind, node, w, bias, b, c)
    assert new_b.shape == (m,)
    attrs = {"group": group, "pads": [pads] * 4}
    want = _conv(op, w, bias, x, **attrs) * b.reshape(-1, 1, 1) + c.reshape(-1, 1, 1)
    np.testing.assert_allclose(_conv(op, new_w, new_b, x, **attrs), want, rtol=1e-4, atol=1e-4)


@settings(max_examples=20, deadline=None)
@given(group=st.sampled_from([1, 2, 4]), seed=st.integers(0, 2**16))
def test_conv_input_scale_and_offset_match_onnxruntime(group, seed):
    # source: ONNX operator spec, Conv (grouped, no padding) executed by onnxruntime:
    # Conv(W, a∘x + d) = Conv(W∘a, x) + Σ W·d
    rng = np.random.default_rng(seed)
    c_in, m = 4, 8
    w, x = rng.normal(size=(m, c_in // group, 3, 3)), rng.normal(size=(1, c_in, 5, 5))
    a, d = rng.normal(size=c_in), rng.normal(size=c_in)
    node = helper.make_node("Conv", ["X", "W"], ["Y"], group=group)
    got = _conv("Conv", input_scale("conv", node, w, a), input_offset("conv", node, w, d), x, group=group)
    want = _conv("Conv", w, None, x * a.reshape(-1, 1, 1) + d.reshape(-1, 1, 1), group=group)
    np.testing.assert_allclose(got, want, rtol=1e-4, atol=1e-4)


@pytest.mark.parametrize("trans_b", [0, 1])
def test_gemm_folds_match_onnxruntime(trans_b):
    # source: ONNX operator spec, Gemm: Y = alpha·A'·B' + beta·C, executed by onnxruntime
    rng = np.random.default_rng(trans_b)
    k, n = 5, 3
    w = rng.normal(size=(n, k) if trans_b else (k, n))
    cb, x = rng.normal(size=(1, n)), rng.normal(size=(4, k))
    node = helper.make_node("Gemm", ["X", "W", "C"], ["Y"], transB=trans_b, alpha=0.7, beta=1.3)

    def gemm(w_, c_, x_):
        return _run_node(node, [init("W", w_), init("C", c_)], {"X": x_.astype(np.float32)})

    b, c = rng.normal(size=n), rng.normal(size=n)
    new_w, new_c = scale_shift_output("gemm", node, w, cb, b, c)
    np.testing.assert_allclose(gemm(new_w, new_c, x), gemm(w, cb, x) * b + c, rtol=1e-4, atol=1e-4)
    a, d = rng.normal(size=k), rng.normal(size=k)
    shifted = cb + input_offset("gemm", node, w, d) / 1.3
    np.testing.assert_allclose(gemm(input_scale("gemm", node, w, a), shifted, x), gemm(w, cb, x * a + d),
                               rtol=1e-4, atol=1e-4)


def test_matmul_folds_match_numpy():
    # source: ONNX operator spec, MatMul (numpy.matmul semantics), executed by onnxruntime
    rng = np.random.default_rng(9)
    w, x = rng.normal(size=(5, 3)), rng.normal(size=(2, 4, 5))
    a, d = rng.normal(size=5), rng.normal(size=5)
    node = helper.make_node("MatMul", ["X", "W"], ["Y"])
    got = _run_node(node, [init("W", input_scale("matmul", node, w, a))], {"X": x.astype(np.float32)})
    got = got + input_offset("matmul", node, w, d)
    want = _run_node(node, [init("W", w)], {"X": (x * a + d).astype(np.float32)})
    np.testing.assert_allclose(got, want, rtol=1e-4, atol=1e-4)
