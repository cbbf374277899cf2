"""Slopes solved across channels against the readers' weights (swapper.fit.joint).

References: the objective J(a) = E[(e − Ee)ᵀ·M·(e − Ee)] written out on the samples and minimised by
scipy.optimize.minimize (BFGS), which knows nothing of the closed form; with a diagonal M the answer is
each channel's own least-squares slope, numpy.polyfit's; Relu is the written-out max(z, 0) (testkit).
"""
from __future__ import annotations

import numpy as np
from scipy.optimize import minimize
from testkit import relu

from swapper.fit.joint import joint_slopes


def _data(seed=0, channels=4, n=2000):
    """Correlated channels: y_c = silu-like response of a shared factor plus channel noise."""
    rng = np.random.default_rng(seed)
    shared = rng.normal(size=n)
    X = 0.8 * shared[None, :] + 0.6 * rng.normal(size=(channels, n))
    Y = X / (1 + np.exp(-X)) + 0.05 * rng.normal(size=(channels, n))
    return X, Y


def _objective(a, X, Y, b, c, metric):
    e = a[:, None] * relu(b[:, None] * X + c[:, None]) - Y
    e = e - e.mean(axis=1, keepdims=True)
    return float(np.mean(np.einsum("in,ij,jn->n", e, metric, e)))


def test_joint_slopes_minimise_the_weighted_objective():
    X, Y = _data()
    C = X.shape[0]
    rng = np.random.default_rng(1)
    W = rng.normal(size=(3, C))
    metric = W.T @ W + 0.1 * np.eye(C)  # a reader's Gram: strong cross terms
    b, c = np.full(C, 1.1), np.full(C, -0.1)
    a0 = np.ones(C)
    out = joint_slopes(X, Y, relu, a0, b, c, metric)
    assert out.taken
    # source: scipy's BFGS on the objective as written, from the per-channel start
    ref = minimize(_objective, a0, args=(X, Y, b, c, metric), method="BFGS", options={"gtol": 1e-10})
    np.testing.assert_allclose(out.a, ref.x, rtol=1e-4, atol=1e-6)
    np.testing.assert_allclose(out.j_after, _objective(out.a, X, Y, b, c, metric), rtol=1e-9)
    assert out.j_after <= out.j_before
    # d takes the mean: E[a·z + d − y] = 0 per channel
    z = relu(b[:, None] * X + c[:, None])
    np.testing.assert_allclose((out.a[:, None] * z + out.d[:, None] - Y).mean(axis=1), 0, atol=1e-10)


def test_a_diagonal_metric_gives_each_channels_own_slope():
    X, Y = _data(seed=2)
    C = X.shape[0]
    b, c = np.ones(C), np.zeros(C)
    out = joint_slopes(X, Y, relu, np.ones(C), b, c, np.diag([1.0, 4.0, 0.5, 2.0]))
    z = relu(X)
    # source: numpy.polyfit (degree 1) of y on z, channel by channel
    want = np.array([np.polyfit(z[k], Y[k], 1)[0] for k in range(C)])
    np.testing.assert_allclose(out.a, want, rtol=1e-6)


def test_the_placement_rule_and_too_few_samples_keep_the_given_slopes():
    X, Y = _data(seed=3)
    C = X.shape[0]
    b, c = np.ones(C), np.zeros(C)
    Y = Y.copy()
    Y[0] = -Y[0]  # the best slope of channel 0 is negative
    given = np.full(C, 0.7)
    out = joint_slopes(X, Y, relu, given, b, c, np.eye(C) + 0.5, positive_a=True)
    assert not out.taken and "a > 0" in out.why and np.array_equal(out.a, given)
    few = joint_slopes(X[:, :40], Y[:, :40], relu, given, b, c, np.eye(C) + 0.5)
    assert not few.taken and "too few" in few.why
