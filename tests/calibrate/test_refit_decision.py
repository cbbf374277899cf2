"""Each site's consumer refit, judged on calibration samples held out from it (swapper.calibrate.refit_decision).

References: least squares written out in numpy (the held-out mean squared error ‖X_h·θ − Y_h‖² / (n·outputs)
of the rows the ridge never saw); the split is a seeded permutation, checked by set arithmetic.
"""
from __future__ import annotations

import numpy as np
import pytest

from swapper.calibrate.refit_decision import split_samples, weigh
from swapper.calibrate.ridge import DEFAULT_FACTORS, FoldedGram


def test_split_holds_out_a_quarter_and_folds_the_rest():
    part, held, count = split_samples(200, 4, 0.25, seed=3)
    assert held == 4 and count == 50 and np.sum(part == held) == 50
    assert sorted(np.bincount(part[part != held])) == [37, 37, 38, 38]
    again, _, _ = split_samples(200, 4, 0.25, seed=3)
    assert np.array_equal(part, again)  # seeded: the same split for the same seed
    part, held, count = split_samples(5, 4, 0.25, seed=0)  # one held-out sample would leave 4 for 4 folds
    assert held == 4 and count == 1
    part, held, count = split_samples(4, 4, 0.25, seed=0)  # nothing left for the held-out part
    assert held is None and count == 0 and sorted(part) == [0, 1, 2, 3]


def _grams(rng, theta_true, n=400, noise=0.5, spoil_held=False):
    """Rows x -> y = [x, 1]·θ + noise in 4 folds and a held-out part; the raw held-out rows too."""
    k = theta_true.shape[0] - 1
    X = rng.normal(size=(n, k))
    Y = np.hstack([X, np.ones((n, 1))]) @ theta_true + noise * rng.normal(size=(n, theta_true.shape[1]))
    part, held, _ = split_samples(n, 4, 0.25, seed=1)
    gram = FoldedGram(5, k)
    gram.update(X, Y, part)
    return gram, held, X[part == held], Y[part == held]


def _held_mse(X, Y, theta):
    return float(np.mean((np.hstack([X, np.ones((len(X), 1))]) @ theta - Y) ** 2))


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_a_spoiled_layer_is_refitted_and_a_true_one_kept(seed):
    rng = np.random.default_rng(seed)
    theta = rng.normal(size=(6, 3))
    gram, held, Xh, Yh = _grams(rng, theta)
    spoiled = theta * 1.4 + 0.3
    # the prior is the true layer (as the original model is the oracle); the current one is spoiled: refit
    w = weigh([gram], [theta], [spoiled], held, DEFAULT_FACTORS)
    assert w.take and w.mse_refit < w.mse_current
    # source: the held-out error written out on the held-out rows
    np.testing.assert_allclose(w.mse_current, _held_mse(Xh, Yh, spoiled), rtol=1e-9)
    np.testing.assert_allclose(w.mse_refit, _held_mse(Xh, Yh, w.choices[0].theta), rtol=1e-9)
    # current = the true layer: noise is all a refit can chase, the held-out part says no
    kept = weigh([gram], [theta], [theta], held, DEFAULT_FACTORS)
    assert not kept.take
    np.testing.assert_allclose(kept.mse_current, _held_mse(Xh, Yh, theta), rtol=1e-9)
