"""Tests of swapper.calibrate.ridge: streamed Gram sums and the ridge-toward-prior solve the consumer refit uses.

References: scikit-learn's Ridge is the reference ridge solver (a prior-centred
penalty is plain ridge on y − X·prior); numpy.linalg.lstsq and solve for least
squares and the normal equations; the ridge objective's limits (λ → ∞ gives
the prior, λ → 0 least squares).
"""
from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn.linear_model import Ridge

from swapper.calibrate.ridge import (
    FoldedGram,
    GramAccumulator,
    RidgePath,
    choose_ridge,
    ridge_toward_prior,
)


# ------------------------------------------------------------------ the Gram accumulator
def test_gram_solve_matches_ridge_and_lstsq():
    rng = np.random.default_rng(12)
    X = rng.normal(size=(300, 4))
    y = X @ np.array([1.0, -2.0, 0.5, 3.0]) + rng.normal(scale=0.1, size=300)
    acc = GramAccumulator(4)
    for part in np.array_split(np.arange(300), 7):
        acc.update(X[part], y[part])
    assert acc.n == 300
    # source: reference implementation, numpy.linalg.lstsq
    np.testing.assert_allclose(acc.solve(), np.linalg.lstsq(X, y, rcond=None)[0], rtol=1e-9)
    prior = np.array([0.5, -1.0, 0.0, 2.0])
    for lam in (0.1, 10.0, 1000.0):
        # source: scikit-learn Ridge: argmin ||y' - X v||^2 + alpha ||v||^2 on y' = y - X prior, beta = v + prior
        ridge = Ridge(alpha=lam, fit_intercept=False, solver="svd").fit(X, y - X @ prior)
        np.testing.assert_allclose(acc.solve(lam, prior), ridge.coef_ + prior, rtol=1e-8, atol=1e-10)
    beta = acc.solve()
    np.testing.assert_allclose(acc.sse(beta), np.sum((X @ beta - y) ** 2), rtol=1e-8)


def test_gram_rank_deficient_multi_output_and_weights():
    rng = np.random.default_rng(13)
    Z = rng.normal(size=(200, 2))
    X = np.column_stack([Z, Z[:, 0] + Z[:, 1]])  # rank 2 of 3
    Y = rng.normal(size=(200, 3))
    w = rng.uniform(0.5, 2.0, size=200)
    acc = GramAccumulator(3)
    acc.update(X[:120], Y[:120], weights=w[:120])
    other = GramAccumulator(3)
    other.update(X[120:], Y[120:], weights=w[120:])
    acc.merge(other)
    sw = np.sqrt(w)[:, None]
    # source: numpy.linalg.lstsq returns the minimum-norm solution of the weighted problem
    np.testing.assert_allclose(acc.solve(), np.linalg.lstsq(X * sw, Y * sw, rcond=None)[0], atol=1e-8)
    assert np.isfinite(acc.solve()).all()


# ------------------------------------------------------------------ the solve (vs sklearn)
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
