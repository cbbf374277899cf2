"""Tests of swapper.core.conv: Conv output geometry and the im2col patch matrix.

Reference: the ONNX operator spec for Conv (pads, strides, dilations,
auto_pad), executed by onnxruntime, and by onnx.reference.ReferenceEvaluator
where onnxruntime refuses the combination (dilation with SAME_* padding).
"""
from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st
from onnx import helper
from onnx.reference import ReferenceEvaluator
from testkit import float_model, init, run

from swapper.core.conv import conv_geometry, im2col, patches_at


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
    model = float_model([node], [("X", None)], [("Y", None)], [init("W", w), init("B", b)])
    # source: ONNX operator spec, Conv (pads/strides/dilations/auto_pad), executed by onnxruntime;
    # onnxruntime refuses dilation with SAME_* padding, so there onnx.reference.ReferenceEvaluator runs it
    if auto_pad.startswith("SAME") and max(dilations) > 1:
        ref = ReferenceEvaluator(model).run(None, {"X": x})[0].astype(np.float64)
    else:
        ref = run(model, {"X": x})[0].astype(np.float64)
    begin, end, s, dl, out = conv_geometry(node, tuple(kernel), tuple(spatial))
    assert list(ref.shape[2:]) == out
    rows = im2col(x.astype(np.float64), kernel, s, dl, begin, end)
    got = rows @ w.reshape(m, -1).T.astype(np.float64) + b
    got = np.moveaxis(got.reshape([2] + out + [m]), -1, 1)
    np.testing.assert_allclose(got, ref, rtol=1e-4, atol=1e-4)
    # chosen positions only: the same Conv outputs at those positions (same reference)
    count = int(np.prod(out))
    samples = rng.integers(0, 2, size=5)
    positions = rng.integers(0, count, size=5)
    part = patches_at(x.astype(np.float64), kernel, s, dl, begin, end, out, samples, positions)
    want = ref.reshape(2, m, count)[samples, :, positions]
    np.testing.assert_allclose(part @ w.reshape(m, -1).T.astype(np.float64) + b, want, rtol=1e-4, atol=1e-4)
