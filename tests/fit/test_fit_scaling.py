"""Tests that fitted parameters are well scaled (swapper.varpro band / affine / canonical forms, swapper.fit).

References: the ONNX operator spec (HardSwish, Relu, LeakyRelu, HardSigmoid, Clip)
executed by ``onnx.reference.ReferenceEvaluator``; scikit-learn's LinearRegression
for the best affine fit; the identity a·g(b·x + c) = (a/k)·g(k·b·x + k·c) for
positively homogeneous g and k > 0 (a mathematical identity).
"""
from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn.linear_model import LinearRegression
from testkit import dhard_swish, drelu, hard_sigmoid, hard_swish, leaky_relu, reference_op, relu, wmse

from swapper.fit.channel import fit_channel
from swapper.fit.param_scale import (
    MARGIN,
    affine_params,
    canonical_params,
    is_homogeneous,
    linear_pieces,
)
from swapper.fit.rows import fit_rows
from swapper.fit.varpro import BETA_MAX, BETA_MIN, in_band


# -- the cheap functions' pieces, against the ONNX operator spec ---------------
def test_linear_pieces_match_the_onnx_spec():
    # source: ONNX operator spec via onnx.reference: HardSwish is 0 for x <= -3 and x for x >= 3;
    # HardSigmoid (0.2, 0.5) is 0.2x + 0.5 on [-2.5, 2.5]; Relu is x on [0, inf)
    pieces = linear_pieces(hard_swish)
    assert [(p.lo, p.hi, p.slope, p.intercept) for p in pieces] == [(-np.inf, -3.0, 0.0, 0.0), (3.0, np.inf, 1.0, 0.0)]
    hs, hsig = reference_op("HardSwish", np.float32), reference_op("HardSigmoid", np.float32, alpha=0.2, beta=0.5)
    for p in pieces:  # the ONNX op (float32) agrees with each found line
        z = np.linspace(max(p.lo, -60.0), min(p.hi, 60.0), 50)
        np.testing.assert_allclose(hs(z), p.slope * z + p.intercept, rtol=1e-6, atol=1e-6)
    mid = [p for p in linear_pieces(hard_sigmoid) if p.slope != 0]
    assert len(mid) == 1 and (mid[0].lo, mid[0].hi) == (-2.5, 2.5)
    z = np.linspace(-2.5, 2.5, 11)
    np.testing.assert_allclose(hsig(z), mid[0].slope * z + mid[0].intercept, rtol=1e-6, atol=1e-7)
    # positively homogeneous (g(kz) = k g(z), k > 0): Relu and LeakyRelu yes, HardSwish no
    assert is_homogeneous(relu) and is_homogeneous(leaky_relu) and not is_homogeneous(hard_swish)
    assert linear_pieces(np.tanh) == []  # no affine stretch of at least 1/4 unit (tanh'' != 0 off 0)


# -- the affine form: exact on the data, inside the piece, balanced ----------
@settings(max_examples=60, deadline=None)
@given(s=st.floats(-50, 50).filter(lambda v: abs(v) > 1e-3), t=st.floats(-20, 20),
       lo=st.floats(-100, 100), width=st.floats(1e-2, 100), gi=st.integers(0, 2))
def test_affine_params_are_exact_on_the_range_and_balanced(s, t, lo, width, gi):
    g, name, attrs = [(hard_swish, "HardSwish", {}), (relu, "Relu", {}),
                      (hard_sigmoid, "HardSigmoid", {"alpha": 0.2, "beta": 0.5})][gi]
    piece = [p for p in linear_pieces(g) if p.slope != 0][0]
    a, b, c, d = (float(v[0]) for v in affine_params(np.array([s]), np.array([t]), lo, lo + width, piece))
    assert a > 0
    x = np.linspace(lo, lo + width, 101)
    z = b * x + c
    # z stays in the piece with the documented margin (MARGIN of the z range; bounded pieces centred)
    R = abs(b) * width
    assert z.min() >= piece.lo + MARGIN * R * (1 - 1e-9) - 1e-9 and z.max() <= piece.hi
    # exact: the surrogate is the line s·x + t on the range (float64 formula), and the ONNX op agrees
    np.testing.assert_allclose(a * g(z) + d, s * x + t, rtol=1e-9, atol=1e-9 * (1 + abs(t) + abs(s) * abs(x).max()))
    ref = reference_op(name, np.float32, **attrs)  # float32, as the op runs in a model
    zz = z.astype(np.float32).astype(np.float64)  # what the float32 op sees
    np.testing.assert_allclose(ref(zz), g(zz), rtol=1e-6, atol=1e-6)
    # scale-free form: a = 1/|m| (consumer weights keep their size), |b| = |s| (the slope goes to the
    # producer), unless a bounded piece is too narrow for the range (then |b| shrinks and a grows)
    m = piece.slope
    if np.isinf(piece.hi) or abs(s) * width * (1 + 2 * MARGIN) <= piece.hi - piece.lo:
        np.testing.assert_allclose([a, abs(b)], [1 / abs(m), abs(s)], rtol=1e-12)
    else:
        assert a >= (1 / abs(m)) * (1 - 1e-12)


# -- inputs entirely on a linear piece: |a| stays bounded, the fit stays as good ------
@pytest.mark.parametrize("g,dg,lo", [(hard_swish, dhard_swish, 3.0), (relu, drelu, 0.0)])
def test_fit_on_one_linear_piece_is_well_scaled(g, dg, lo):
    rng = np.random.default_rng(21)
    x = rng.normal(size=2048)
    y = 0.7 * x + 0.2 + 0.01 * rng.normal(size=x.size)
    # a drifting solution like the one measured on meter_gelu_mlp s1 ch47: b -> 0, |a| huge, z pinned
    # just inside the linear piece (z >= lo), so a·g(z) + d is an affine map of x
    b_drift = 1e-4
    c_drift = lo + 1e-3 - b_drift * x.min()
    a_drift = 0.7 / b_drift
    d_drift = 0.2 - a_drift * c_drift
    drift = (a_drift, b_drift, c_drift, d_drift)
    mse_drift = wmse(y, a_drift * g(b_drift * x + c_drift) + d_drift)
    # source: scikit-learn LinearRegression, the best affine fit (the drift can only equal it)
    lr = LinearRegression().fit(x[:, None], y)
    mse_affine = wmse(y, lr.predict(x[:, None]))
    assert mse_affine <= mse_drift * (1 + 1e-9)
    for r in (fit_channel(x, y, g, init=drift, dg=dg),
              fit_rows(x[None], y[None], g, init={p: np.array([v]) for p, v in zip("abcd", drift)}, dg=dg)):
        a, b, c, d = (float(np.ravel(getattr(r, p))[0]) for p in "abcd")
        mse = float(np.ravel(r.mse)[0])
        # the bound: the scale-free affine form has a = 1/m = 1 on this piece; a fit that uses g's
        # curvature instead must stay within the band |β| >= BETA_MIN, so |a| <= std(y)/(m·BETA_MIN).
        # Either way far below the drift's 7e3.
        assert abs(a) <= max(1.01, np.std(y) / BETA_MIN)
        assert mse <= mse_drift  # never worse than the drifting start
        assert mse <= mse_affine * (1 + 1e-6)
        assert mse == pytest.approx(wmse(y, a * g(b * x + c) + d), rel=1e-9)
        assert in_band(b * np.std(x))


# -- the homogeneous rescaling is the identity a·g(b·x+c) = (a/k)·g(k·b·x + k·c) ----------
@settings(max_examples=60, deadline=None)
@given(a=st.floats(0.01, 1e3), b=st.floats(1e-3, 1e3), c=st.floats(-10, 10), d=st.floats(-5, 5),
       sign=st.sampled_from([1.0, -1.0]), leaky_g=st.booleans())
def test_homogeneous_rescaling_is_exact_and_balances(a, b, c, d, sign, leaky_g):
    g = leaky_relu if leaky_g else relu
    x = np.linspace(-3.0, 3.0, 61)
    z = sign * b * x + c
    if not ((z < 0).any() and (z > 0).any()):
        return  # z in one piece: the affine form applies instead (tested above)
    (a2, b2, c2, d2), changed = canonical_params(np.array([a]), np.array([sign * b]), np.array([c]),
                                                 np.array([d]), x.min(), x.max(), linear_pieces(g), True, "abcd")
    k = float(b2[0] / (sign * b))
    assert k > 0 and d2[0] == d
    # the identity with this k, and |a'| = |b'| (balanced)
    np.testing.assert_allclose([a2[0], c2[0]], [a / k, k * c], rtol=1e-12)
    np.testing.assert_allclose(abs(a2[0]), abs(b2[0]), rtol=1e-12)
    np.testing.assert_allclose(a2[0] * g(b2[0] * x + c2[0]) + d2[0], a * g(sign * b * x + c) + d,
                               rtol=1e-9, atol=1e-9 * (abs(a) * (abs(b) * 3 + abs(c)) + abs(d)))
    # held c: no scale freedom, nothing changes
    _, changed = canonical_params(np.array([a]), np.array([b]), np.array([c]), np.array([d]),
                                  x.min(), x.max(), linear_pieces(g), True, "abd")
    assert not changed.any()


def test_relu_fit_is_balanced_and_equivalent_to_the_truth():
    # y = 4·relu(0.25·x − 0.1) + 0.3: only a·b = 1, c/b = −0.4 and d are identified (homogeneity);
    # the fitter returns the balanced member |a| = |b| = 1 of that family
    rng = np.random.default_rng(22)
    x = rng.normal(scale=2.0, size=4096)
    y = 4.0 * relu(0.25 * x - 0.1) + 0.3 + 0.01 * rng.normal(size=x.size)
    for r in (fit_channel(x, y, relu, dg=drelu), fit_channel(x, y, relu, dg=drelu, positive_a=True)):
        np.testing.assert_allclose([r.a * r.b, r.c / r.b, r.d], [1.0, -0.4, 0.3], atol=0.02)
        np.testing.assert_allclose(abs(r.a), abs(r.b), rtol=1e-9)
        assert r.a > 0


# -- the band on β, every fit --------------------------------------------------
@settings(max_examples=30, deadline=None)
@given(seed=st.integers(0, 2**31 - 1), gi=st.integers(0, 1), scale=st.sampled_from([1e-3, 1.0, 1e3]))
def test_projected_fits_stay_in_the_band(seed, gi, scale):
    g, dg = [(hard_swish, dhard_swish), (np.tanh, None)][gi]
    rng = np.random.default_rng(seed)
    X = rng.standard_t(4, size=(6, 300)) * scale
    Y = np.tanh(X / scale + rng.normal(size=(6, 1))) + 0.1 * rng.normal(size=X.shape)
    r = fit_rows(X, Y, g, init={"a": np.ones(6), "b": np.full(6, 1 / scale), "c": np.zeros(6), "d": np.zeros(6)},
                 dg=dg)
    beta = np.abs(r.b) * X.std(axis=1)
    moved = np.array(["projected" in n for n in r.notes])
    # a projected optimum outside the band is restarted inside it, never returned
    assert (beta[moved] >= BETA_MIN * (1 - 1e-9)).all() and (beta[moved] <= BETA_MAX * (1 + 1e-9)).all()
    assert (r.mse <= r.mse_init).all()
    again = fit_rows(X, Y, g, init={"a": np.ones(6), "b": np.full(6, 1 / scale), "c": np.zeros(6),
                                    "d": np.zeros(6)}, dg=dg)
    np.testing.assert_array_equal(again.a, r.a)  # deterministic
