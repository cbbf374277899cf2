"""Tests of swapper.fit.observe (streaming statistics) and swapper.fit (the fitters).

References: numpy / scikit-learn / scipy as independent implementations, the
ONNX operator spec for the cheap functions, and the published algorithms
(Chan, Golub & LeVeque 1979; Vitter 1985; Golub & Pereyra 1973).
"""
from __future__ import annotations

import itertools

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats
from sklearn.linear_model import LinearRegression
from testkit import (
    dhard_swish,
    dhard_tanh,
    drelu,
    hard_sigmoid,
    hard_swish,
    hard_tanh,
    held_arrays,
    relu,
    sigmoid,
    silu,
    wmse,
)

from swapper.errors import BadDataError
from swapper.fit.channel import fit_channel, outer_fit, starting_params
from swapper.fit.observe import ChannelObserver
from swapper.fit.site import fit_channels


def surrogate(g, p, x):
    a, b, c, d = p
    return a * g(b * x + c) + d


# -- closed-form outer fit ----------------------------------------------------
def test_outer_fit_matches_lstsq_and_sklearn():
    rng = np.random.default_rng(1)
    z = rng.normal(size=500)
    y = 2.5 * z - 0.7 + rng.normal(scale=0.3, size=500)
    w = rng.uniform(0.1, 2.0, size=500)
    a, d = outer_fit(z, y, free="ad")
    # source: reference implementation, numpy.linalg.lstsq on the design [z, 1]
    ref = np.linalg.lstsq(np.column_stack([z, np.ones_like(z)]), y, rcond=None)[0]
    np.testing.assert_allclose([a, d], ref, rtol=1e-10)
    # source: reference implementation, scikit-learn LinearRegression with sample_weight
    lr = LinearRegression().fit(z[:, None], y, sample_weight=w)
    a, d = outer_fit(z, y, free="ad", weights=w)
    np.testing.assert_allclose([a, d], [lr.coef_[0], lr.intercept_], rtol=1e-9)
    # a only, d held at 0.3: regression through the held offset
    lr = LinearRegression(fit_intercept=False).fit(z[:, None], y - 0.3, sample_weight=w)
    a, d = outer_fit(z, y, init=(1.0, 0.3), free="a", weights=w)
    assert d == 0.3
    np.testing.assert_allclose(a, lr.coef_[0], rtol=1e-9)
    # d only, a held at 2: weighted mean of y - 2z (numpy.average)
    a, d = outer_fit(z, y, init=(2.0, 0.0), free="d", weights=w)
    assert a == 2.0
    np.testing.assert_allclose(d, np.average(y - 2.0 * z, weights=w), rtol=1e-12)
    assert outer_fit(z, y, init=(0.5, 0.25), free="") == (0.5, 0.25)


def test_outer_fit_constant_z_falls_back_to_start_slope():
    y = np.random.default_rng(2).normal(size=100)
    z = np.full(100, 3.0)
    a, d = outer_fit(z, y, init=(1.5, 0.0), free="ad")
    # a not identified: keep the start, d absorbs the mean (documented fallback)
    assert a == 1.5
    np.testing.assert_allclose(d, y.mean() - 1.5 * 3.0, rtol=1e-12)


# -- recovery of known parameters --------------------------------------------
# Noise sigma = 0.01 on n = 4096 samples: the parameter standard errors are about
# sigma/sqrt(n) * condition ~ 1.6e-4 * condition; 0.02 leaves room for a
# condition of ~100 (kinks seen by only part of the data). Common practice, no source.
TOL = 0.02


@pytest.mark.parametrize("with_dg", [True, False])
@pytest.mark.parametrize(
    "g,dg,true",
    [
        (hard_swish, dhard_swish, (1.5, 0.7, 0.4, -0.2)),
        (hard_tanh, dhard_tanh, (2.0, 0.6, -0.3, 0.5)),
    ],
)
def test_fit_channel_recovers_known_parameters(g, dg, true, with_dg):
    rng = np.random.default_rng(3)
    x = rng.normal(scale=2.5, size=4096)
    y = surrogate(g, true, x) + rng.normal(scale=0.01, size=x.size)
    r = fit_channel(x, y, g, dg=dg if with_dg else None)
    got = np.array([r.a, r.b, r.c, r.d])
    if g is hard_tanh and got[1] < 0:  # clip is odd: (a, b, c) and (-a, -b, -c) are the same curve
        got[:3] *= -1
    np.testing.assert_allclose(got, true, atol=TOL, rtol=TOL)
    assert r.mse < 2 * 0.01**2  # down to the noise floor (expected mse = sigma^2)


def test_fit_channel_recovers_relu_up_to_its_scale_symmetry():
    # relu is positively homogeneous (ONNX Relu = max(0, x)): a*relu(b x + c) = (a b)*relu(x + c/b)
    # for b > 0, so only a*b, c/b and d are identified.
    rng = np.random.default_rng(4)
    a, b, c, d = 1.7, 0.8, -0.3, 0.2
    x = rng.normal(scale=2.0, size=4096)
    y = a * relu(b * x + c) + d + rng.normal(scale=0.01, size=x.size)
    for dg in (drelu, None):
        r = fit_channel(x, y, relu, dg=dg)
        np.testing.assert_allclose([r.a * r.b, r.c / r.b, r.d], [a * b, c / b, d], atol=TOL, rtol=TOL)
        # with b held at 1 the rest is identified
        r = fit_channel(x, y, relu, free="acd", dg=dg)
        assert r.b == 1.0
        np.testing.assert_allclose([r.a, r.c, r.d], [a * b, c / b, d], atol=TOL, rtol=TOL)


def test_fit_channels_per_channel_recovery_from_observer():
    rng = np.random.default_rng(5)
    C = 4
    true = {"a": np.array([1.0, 1.5, 0.7, 2.0]), "b": np.array([0.5, 1.0, 1.5, 0.8]),
            "c": np.array([0.0, 0.5, -0.5, 0.2]), "d": np.array([0.1, -0.3, 0.0, 0.4])}
    obs = ChannelObserver(C, channel_axis=1, reservoir=2048, seed=0)
    shape = (1, C, 1)
    for _ in range(6):
        x = rng.normal(scale=2.0, size=(16, C, 32))
        y = true["a"].reshape(shape) * hard_swish(true["b"].reshape(shape) * x + true["c"].reshape(shape))
        obs.update(x.astype(np.float32), (y + true["d"].reshape(shape)).astype(np.float32))
    r = fit_channels(obs, hard_swish, init={"a": 1.0}, dg=dhard_swish)
    for p in "abcd":
        # float32 storage (rel. error ~6e-8) is the only noise here; 1e-3 is generous
        np.testing.assert_allclose(getattr(r, p), true[p], atol=1e-3)
    assert (r.mse <= r.mse_init).all()
    with pytest.raises(BadDataError):
        fit_channels(ChannelObserver(2, 0), relu)
    with pytest.raises(ValueError):
        fit_channels(obs, relu, init={"a": np.ones(3)})


# -- never worse than the start ----------------------------------------------
G_CHOICES = [(relu, drelu), (hard_swish, dhard_swish), (hard_tanh, dhard_tanh), (np.tanh, None)]


@settings(max_examples=40, deadline=None)
@given(
    seed=st.integers(0, 2**31 - 1),
    gi=st.integers(0, len(G_CHOICES) - 1),
    init=st.tuples(
        st.floats(0.05, 5.0), st.floats(-5.0, 5.0), st.floats(-5.0, 5.0), st.floats(-5.0, 5.0)
    ),
    free=st.sampled_from(["abcd", "ad", "bc", "abc", "d", "c", "b", ""]),
    positive_a=st.booleans(),
    scale=st.sampled_from([1e-3, 1.0, 1e3]),
)
def test_never_worse_than_init(seed, gi, init, free, positive_a, scale):
    g, dg = G_CHOICES[gi]
    rng = np.random.default_rng(seed)
    n = int(rng.integers(5, 300))
    x = rng.standard_t(3, size=n) * scale
    y = rng.normal(size=n) * rng.uniform(0.01, 10) + np.sin(x / scale)
    w = rng.uniform(0, 1, size=n) if seed % 2 else None
    r = fit_channel(x, y, g, init=init, free=free, positive_a=positive_a, dg=dg, weights=w)
    # mse_init recomputed independently with numpy (weighted mean of squared residuals)
    assert r.mse_init == pytest.approx(wmse(y, surrogate(g, init, x), w), rel=1e-9, abs=1e-300)
    assert r.mse <= r.mse_init
    assert r.mse == pytest.approx(wmse(y, surrogate(g, (r.a, r.b, r.c, r.d), x), w), rel=1e-9, abs=1e-300)
    assert np.isfinite([r.a, r.b, r.c, r.d]).all()
    for i, p in enumerate("abcd"):
        if p not in free:
            assert getattr(r, p) == init[i]
    if positive_a:
        assert r.a > 0


# -- degenerate channels ------------------------------------------------------
def _degenerate_cases():
    rng = np.random.default_rng(6)
    n = 1000
    x = rng.normal(size=n)
    return {
        "constant x": (np.full(n, 0.7), rng.normal(size=n)),
        "dead (all-zero y)": (x, np.zeros(n)),
        "all-negative x": (-np.abs(x) - 0.1, rng.normal(size=n)),
        "tiny variance": (1.0 + 1e-9 * x, 1.0 + 1e-9 * rng.normal(size=n)),
        "huge scale": (1e6 * x, 1e6 * relu(x)),
        "small scale": (1e-6 * x, 1e-6 * silu(x)),
        "constant y": (x, np.full(n, 5.0)),
    }


@pytest.mark.parametrize("case", sorted(_degenerate_cases()))
@pytest.mark.parametrize("positive_a", [False, True])
def test_degenerate_channels_stay_finite(case, positive_a):
    x, y = _degenerate_cases()[case]
    for g, dg in ((relu, drelu), (relu, None), (hard_swish, dhard_swish)):
        r = fit_channel(x, y, g, dg=dg, positive_a=positive_a)
        vals = np.array([r.a, r.b, r.c, r.d])
        assert np.isfinite(vals).all() and np.isfinite(r.mse)
        assert r.mse <= r.mse_init
        # "moderate": b, c scaled to the data stay within the documented box (1e3) plus slack;
        # a is bounded by the natural slope scale std(y)/std(z) times the box
        assert abs(r.b) * max(np.std(x), 1e-300) <= 2e3 or r.b == 1.0
        assert abs(r.a) <= 1e7 * max(np.std(y), 1.0)
        if positive_a:
            assert r.a > 0


def test_scales_are_learned_not_clipped():
    # huge/small input scales are absorbed by b (standardised search): the fit
    # must reach the exact optimum, not stop at a box edge
    rng = np.random.default_rng(7)
    # scale 2 so that both kinks of hard-swish (at -3 and 3) are seen: on [-3, 3] alone it is
    # a plain quadratic and (a, b, c, d) would not be identified
    x = rng.normal(scale=2.0, size=2000)
    for s in (1e-6, 1e6):
        r = fit_channel(x * s, hard_swish(0.9 * x + 0.3), hard_swish, dg=dhard_swish)
        np.testing.assert_allclose([r.a, r.b * s, r.c, r.d], [1.0, 0.9, 0.3, 0.0], atol=1e-6)


# -- holds and positivity -----------------------------------------------------
@pytest.mark.parametrize("free", ["".join(c) for k in range(5) for c in itertools.combinations("abcd", k)])
def test_holds_keep_neutral_values_exactly(free):
    rng = np.random.default_rng(8)
    x = rng.normal(size=800)
    y = 1.3 * hard_tanh(0.7 * x + 0.2) - 0.4 + 0.01 * rng.normal(size=800)
    neutral = (1.0, 1.0, 0.0, 0.0)  # source: swapper/plan/plan.py NEUTRAL ("fixed" placement)
    r = fit_channel(x, y, hard_tanh, init=neutral, free=free, dg=dhard_tanh)
    for i, p in enumerate("abcd"):
        if p not in free:
            assert getattr(r, p) == neutral[i]
    if free:
        assert r.mse < r.mse_init  # every single free parameter can improve this fit
    else:
        assert r.mse == r.mse_init


def test_positive_a_is_respected():
    rng = np.random.default_rng(9)
    x = rng.normal(size=1000)
    y = -2.0 * relu(x) + 0.1 * rng.normal(size=1000)  # best unconstrained a is negative
    free_fit = fit_channel(x, y, relu, free="ad")
    assert free_fit.a < 0
    for free in ("ad", "a", "abcd", "acd"):
        r = fit_channel(x, y, relu, free=free, positive_a=True, dg=drelu)
        assert r.a > 0 and r.mse <= r.mse_init
    with pytest.raises(ValueError):
        fit_channel(x, y, relu, init=(-1.0, 1.0, 0.0, 0.0), positive_a=True)


def test_bad_inputs_raise():
    x = np.arange(5.0)
    with pytest.raises(ValueError):
        fit_channel(x, x[:4], relu)
    with pytest.raises(ValueError):
        fit_channel(np.array([1.0, np.nan]), np.ones(2), relu)
    with pytest.raises(ValueError):
        fit_channel(x, x, relu, free="abx")
    with pytest.raises(ValueError):
        fit_channel(x, x, relu, weights=-np.ones(5))


# -- observer: moments --------------------------------------------------------
@settings(max_examples=25, deadline=None)
@given(
    seed=st.integers(0, 2**31 - 1),
    axis=st.sampled_from([0, 1, -1, None]),
    nbatches=st.integers(1, 6),
    offset=st.sampled_from([0.0, 1e4]),
)
def test_observer_moments_match_numpy(seed, axis, nbatches, offset):
    rng = np.random.default_rng(seed)
    shape = (3, 4, 5)
    C = 1 if axis is None else shape[axis]
    obs = ChannelObserver(C, axis, reservoir=16, seed=seed)
    xs, ys = [], []
    for _ in range(nbatches):
        k = int(rng.integers(1, 4))  # batches of different sizes along axis 0 (or 1 for axis 0)
        bshape = list(shape)
        bshape[1 if axis == 0 else 0] = k
        x = offset + rng.normal(size=bshape) * 3
        y = np.tanh(x - offset) + rng.normal(size=bshape)
        obs.update(x, y)
        xs.append(x)
        ys.append(y)
    cat = 1 if axis == 0 else 0
    X, Y = np.concatenate(xs, axis=cat), np.concatenate(ys, axis=cat)
    if axis is None:
        Xc, Yc = X.reshape(1, -1), Y.reshape(1, -1)
    else:
        Xc = np.moveaxis(X, axis, 0).reshape(C, -1)
        Yc = np.moveaxis(Y, axis, 0).reshape(C, -1)
    s = obs.compute()
    # source: reference implementation, numpy mean/var (ddof=0) on the concatenated data
    assert (s.count == Xc.shape[1]).all()
    np.testing.assert_allclose(s.mean_x, Xc.mean(axis=1), rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(s.var_x, Xc.var(axis=1), rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(s.mean_y, Yc.mean(axis=1), rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(s.var_y, Yc.var(axis=1), rtol=1e-9, atol=1e-12)
    cov = [np.cov(Xc[i], Yc[i], ddof=0)[0, 1] for i in range(C)]
    np.testing.assert_allclose(s.cov_xy, cov, rtol=1e-9, atol=1e-9)
    np.testing.assert_array_equal(s.min_x, Xc.min(axis=1))
    np.testing.assert_array_equal(s.max_x, Xc.max(axis=1))


def test_observer_rejects_bad_batches_and_resets():
    obs = ChannelObserver(4, 1)
    with pytest.raises(BadDataError):
        obs.update(np.zeros((2, 3)), np.zeros((2, 3)))  # 3 channels, not 4
    with pytest.raises(BadDataError):
        obs.update(np.zeros((2, 4)), np.zeros((2, 5)))
    with pytest.raises(BadDataError):
        obs.update(np.full((2, 4), np.nan), np.zeros((2, 4)))
    obs.update(np.ones((2, 4)), np.ones((2, 4)))
    obs.reset()
    assert obs.n == 0 and obs.held == 0 and np.isnan(obs.compute().mean_x).all()


# -- observer: reservoir ------------------------------------------------------
@settings(max_examples=20, deadline=None)
@given(sizes=st.lists(st.integers(0, 300), min_size=1, max_size=30), R=st.integers(1, 64))
def test_reservoir_never_exceeds_its_size(sizes, R):
    obs = ChannelObserver(2, 0, reservoir=R, seed=1)
    total = 0
    for m in sizes:
        x = np.arange(2 * total, 2 * (total + m), dtype=np.float64).reshape(m, 2).T  # all distinct
        obs.update(x, -x)
        total += m
        xs, ys = obs.samples(1)
        assert obs.held == min(R, total) and [a.shape for a in obs.all_samples()] == [(2, min(R, total))] * 2
        assert max(a.size for a in held_arrays(obs)) <= 2 * 2 * R  # nothing kept grows past the reservoir
        assert xs.shape == ys.shape == (min(R, total),)
        np.testing.assert_array_equal(ys, -xs)  # pairs stay together
        assert len(np.unique(xs)) == xs.size  # sampling without replacement


def test_reservoir_holds_everything_when_small_and_is_deterministic():
    rng = np.random.default_rng(10)
    batches = [rng.normal(size=(3, k)).astype(np.float32) for k in (5, 17, 1, 9)]
    obs = ChannelObserver(3, 0, reservoir=32)
    for b in batches:
        obs.update(b, 2 * b)
    allx = np.concatenate(batches, axis=1)
    for ch in range(3):
        xs, ys = obs.samples(ch)
        np.testing.assert_array_equal(xs, allx[ch].astype(np.float64))
        np.testing.assert_array_equal(ys, 2 * allx[ch].astype(np.float64))

    def run(seed):
        o = ChannelObserver(3, 0, reservoir=8, seed=seed)
        for b in batches:
            o.update(b, b)
        return o.samples(2)[0]

    np.testing.assert_array_equal(run(3), run(3))
    assert not np.array_equal(run(3), run(4))


def test_reservoir_is_uniform():
    # source: Vitter 1985, Algorithm R: after N items each one is held with probability R/N.
    # Over many seeds, per-item inclusion counts are Binomial(trials, R/N); chi-square goodness
    # of fit (scipy.stats.chisquare) at a 1e-3 level.
    # small N so an off-by-one in the draw (j ~ U{0..t-1}) moves late items' odds by ~10%
    N, R, trials = 12, 4, 4000
    counts = np.zeros(N)
    sizes = [2, 5, 1, 4]
    for seed in range(trials):
        obs = ChannelObserver(1, None, reservoir=R, seed=seed)
        start = 0
        for m in sizes:
            v = np.arange(start, start + m, dtype=np.float64)
            obs.update(v, v)
            start += m
        counts[obs.samples(0)[0].astype(int)] += 1
    expected = np.full(N, trials * R / N)
    assert stats.chisquare(counts, expected).pvalue > 1e-3


def test_observer_merge_equals_single_stream():
    rng = np.random.default_rng(11)
    a, b = ChannelObserver(2, 0, reservoir=50, seed=1), ChannelObserver(2, 0, reservoir=50, seed=2)
    xa, xb = rng.normal(size=(2, 70)), 5 + rng.normal(size=(2, 30))
    a.update(xa, xa**2)
    b.update(xb, xb**2)
    a.merge(b)
    X = np.concatenate([xa, xb], axis=1)
    s = a.compute()
    np.testing.assert_allclose(s.mean_x, X.mean(axis=1), rtol=1e-12)
    np.testing.assert_allclose(s.var_x, X.var(axis=1), rtol=1e-10)
    np.testing.assert_allclose(s.mean_y, (X**2).mean(axis=1), rtol=1e-12)
    assert a.n == 100 and a.held == 50
    xs, ys = a.samples(0)
    assert np.isin(xs.astype(np.float32), X[0].astype(np.float32)).all()
    np.testing.assert_allclose(ys, xs**2, rtol=1e-6)


# -- starting values ----------------------------------------------------------
@pytest.mark.parametrize(
    "f,g,dg",
    [(silu, relu, drelu), (silu, relu, None), (sigmoid, hard_sigmoid, None), (silu, hard_swish, dhard_swish)],
)
def test_starting_params_beat_identity(f, g, dg):
    x = np.linspace(-6, 6, 2001)
    w = stats.norm.pdf(x)  # source: scipy.stats.norm, standard normal density weighting
    p = starting_params(f, g, dg=dg)
    fitted = wmse(f(x), surrogate(g, p, x), w)
    identity = wmse(f(x), surrogate(g, (1.0, 1.0, 0.0, 0.0), x), w)
    assert fitted < identity
    # with a positive a (needed to move a inside a homogeneous g) it still beats identity
    p = starting_params(f, g, dg=dg, positive_a=True)
    assert p[0] > 0 and wmse(f(x), surrogate(g, p, x), w) < identity
