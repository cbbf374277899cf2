"""Checks of swapper.check.stats against reference implementations and published formulas."""
from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import example, given, settings
from hypothesis import strategies as st
from scipy.stats import binomtest, norm
from sklearn.metrics import (
    accuracy_score,
    mean_absolute_error,
    mean_squared_error,
    top_k_accuracy_score,
)
from statsmodels.stats.contingency_tables import mcnemar
from statsmodels.stats.proportion import confint_proportions_2indep, proportion_confint

from swapper.check import stats


def _paired(n_both: int, n01: int, n10: int, n_neither: int, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Correctness vectors (original, candidate) realising a 2x2 table, shuffled."""
    orig = np.array([1] * n_both + [0] * n01 + [1] * n10 + [0] * n_neither, dtype=bool)
    cand = np.array([1] * n_both + [1] * n01 + [0] * n10 + [0] * n_neither, dtype=bool)
    perm = np.random.default_rng(seed).permutation(orig.size)
    return orig[perm], cand[perm]


# ----------------------------------------------------------------------------- accuracy


@settings(max_examples=40, deadline=None)
@given(seed=st.integers(0, 2**31 - 1), n=st.integers(1, 60), classes=st.integers(2, 15))
def test_top1_matches_sklearn(seed, n, classes):
    rng = np.random.default_rng(seed)
    scores = rng.normal(size=(n, classes)).astype(np.float32)
    labels = rng.integers(0, classes, size=n)
    correct = stats.top1_correct(scores, labels)
    # source: scikit-learn accuracy_score on argmax predictions
    assert stats.accuracy(correct) == pytest.approx(accuracy_score(labels, scores.argmax(axis=1)))


@settings(max_examples=40, deadline=None)
@given(seed=st.integers(0, 2**31 - 1), n=st.integers(1, 60), classes=st.integers(3, 15), k=st.integers(1, 5))
def test_topk_matches_sklearn(seed, n, classes, k):
    k = min(k, classes - 1)  # sklearn warns (and is trivially 1) when k >= n_classes
    rng = np.random.default_rng(seed)
    scores = rng.normal(size=(n, classes))  # continuous: ties have probability 0
    labels = rng.integers(0, classes, size=n)
    # source: scikit-learn top_k_accuracy_score
    expected = top_k_accuracy_score(labels, scores, k=k, labels=np.arange(classes))
    assert stats.topk_accuracy(scores, labels, k) == pytest.approx(expected)


def test_topk_ties_follow_argmax_order():
    # all-equal scores: argmax picks class 0 (numpy documents "first occurrence"), so
    # top-1 must count only label 0 as correct, and top-2 labels 0 and 1.
    scores = np.zeros((4, 4))
    labels = np.array([0, 1, 2, 3])
    assert stats.top1_correct(scores, labels).tolist() == [True, False, False, False]
    assert stats.topk_correct(scores, labels, 1).tolist() == [True, False, False, False]
    assert stats.topk_correct(scores, labels, 2).tolist() == [True, True, False, False]


def test_accuracy_input_checks():
    with pytest.raises(ValueError):
        stats.accuracy(np.array([], dtype=bool))
    with pytest.raises(ValueError):
        stats.top1_correct(np.zeros((3, 2)), np.array([0, 1, 2]))  # label 2 out of range
    with pytest.raises(ValueError):
        stats.top1_correct(np.zeros((3, 2)), np.array([0, 1]))


# ----------------------------------------------------------------------------- McNemar


@settings(max_examples=60, deadline=None)
@given(n01=st.integers(0, 80), n10=st.integers(0, 80))
def test_mcnemar_matches_scipy_and_statsmodels(n01, n10):
    p = stats.mcnemar_exact(n01, n10)
    if n01 + n10 == 0:
        assert p == 1.0  # no discordant pairs: no evidence (definition in McNemar 1947)
        return
    # source: scipy.stats.binomtest two-sided exact test on the discordant pairs
    assert p == pytest.approx(binomtest(n01, n01 + n10, 0.5).pvalue, rel=1e-9, abs=1e-12)
    # source: statsmodels mcnemar(exact=True); the concordant cells do not enter the test
    table = [[17, n10], [n01, 5]]
    assert p == pytest.approx(mcnemar(table, exact=True).pvalue, rel=1e-9, abs=1e-12)


def test_mcnemar_worked_example():
    # Derived by hand: n01=1, n10=9 -> 10 discordant pairs, min count 1,
    # P(X <= 1 | Binom(10, 1/2)) = (C(10,0) + C(10,1)) / 2^10 = 11/1024,
    # two-sided p = 2 * 11/1024 = 0.021484375.
    assert stats.mcnemar_exact(1, 9) == pytest.approx(0.021484375, rel=1e-12)
    assert stats.mcnemar_exact(9, 1) == pytest.approx(0.021484375, rel=1e-12)
    # Derived by hand: n01=0, n10=5 -> p = 2 * (1/2)^5 = 0.0625
    assert stats.mcnemar_exact(0, 5) == pytest.approx(0.0625, rel=1e-12)
    # equal counts: P(X <= k | Binom(2k, 1/2)) >= 1/2, so the two-sided p is capped at 1
    assert stats.mcnemar_exact(7, 7) == 1.0
    with pytest.raises(ValueError):
        stats.mcnemar_exact(-1, 3)


# ----------------------------------------------------------------------------- intervals


@settings(max_examples=40, deadline=None)
@given(x=st.integers(0, 200), extra=st.integers(0, 200), level=st.sampled_from([0.9, 0.95, 0.99]))
def test_wilson_matches_statsmodels(x, extra, level):
    n = x + extra
    if n == 0:
        return
    lo, hi = stats.wilson_interval(x, n, level)
    # source: statsmodels proportion_confint(method="wilson") (Wilson 1927 score interval)
    ref_lo, ref_hi = proportion_confint(x, n, alpha=1 - level, method="wilson")
    assert lo == pytest.approx(ref_lo, abs=1e-10)
    assert hi == pytest.approx(ref_hi, abs=1e-10)


@settings(max_examples=60, deadline=None)
@given(both=st.integers(0, 60), n01=st.integers(0, 30), n10=st.integers(0, 30), neither=st.integers(0, 60))
def test_newcombe_contains_delta_and_stays_in_range(both, n01, n10, neither):
    if both + n01 + n10 + neither == 0:
        return
    orig, cand = _paired(both, n01, n10, neither)
    iv = stats.paired_accuracy_difference(orig, cand)
    n = orig.size
    # definition: delta = 100 * (acc_cand - acc_orig) = 100 * (n01 - n10) / n
    assert iv.delta == pytest.approx(100.0 * (n01 - n10) / n)
    assert -100.0 <= iv.lo <= iv.delta + 1e-9 <= iv.hi + 2e-9 <= 100.0 + 3e-9
    # swapping the models mirrors the interval (the method 10 formula is symmetric in p1, p2)
    mirrored = stats.paired_accuracy_difference(cand, orig)
    assert mirrored.lo == pytest.approx(-iv.hi, abs=1e-9)
    assert mirrored.hi == pytest.approx(-iv.lo, abs=1e-9)


@settings(max_examples=60, deadline=None)
@given(both=st.integers(0, 40), n01=st.integers(0, 20), n10=st.integers(0, 20), neither=st.integers(0, 40))
@example(both=10, n01=3, n10=3, neither=1)  # eh - fg = 1, inside (0, n/2]: the corrected phi is 0
@example(both=20, n01=2, n10=7, neither=1)  # eh - fg = 6 <= n/2 = 15
@example(both=0, n01=5, n10=9, neither=3)  # eh - fg < 0 is excluded; a zero margin case follows
@example(both=0, n01=0, n10=9, neither=3)  # a margin (e+f) is 0: phi defined as 0
def test_newcombe_without_correlation_term_is_the_independent_hybrid(both, n01, n10, neither):
    n = both + n01 + n10 + neither
    cross = both * neither - n01 * n10
    if n == 0 or not 0 <= cross <= n / 2:
        return  # only tables where Newcombe's corrected phi is exactly 0
    orig, cand = _paired(both, n01, n10, neither)
    iv = stats.paired_accuracy_difference(orig, cand)
    # source: Newcombe 1998 method 10 with phi = 0 reduces to the square-and-add Wilson hybrid
    # for two proportions, which statsmodels implements as confint_proportions_2indep("newcomb").
    lo, hi = confint_proportions_2indep(both + n01, n, both + n10, n, method="newcomb", compare="diff")
    assert iv.lo == pytest.approx(100 * lo, abs=1e-8)
    assert iv.hi == pytest.approx(100 * hi, abs=1e-8)


def test_newcombe_with_correlation_matches_a_published_worked_example():
    # Source: the paired 2x2 table of Cavo et al. (2012), complete response before (columns) and after
    # (rows) consolidation therapy, [[59, 6], [16, 80]], n = 161, worked in Fagerland, Lydersen & Laake,
    # "Statistical Analysis of Contingency Tables" (2017), ch. 8, with Newcombe's (1998) square-and-add
    # interval for paired data: estimate -0.0621, 95% CI -0.1186 to -0.0046 (four decimals, as printed
    # there and asserted by the R package contingencytables, tests/testthat/test-ch8.R).
    # Here eh - fg = 59*80 - 6*16 = 4624 > n/2, so the correlation term phi is non-zero: the path real
    # validation data takes (two models right and wrong on mostly the same samples).
    # Rows are our candidate, columns our original: 59 both right, 6 candidate-only, 16 original-only.
    orig, cand = _paired(n_both=59, n01=6, n10=16, n_neither=80)
    iv = stats.paired_accuracy_difference(orig, cand)
    assert round(iv.delta / 100, 4) == -0.0621
    assert round(iv.lo / 100, 4) == -0.1186
    assert round(iv.hi / 100, 4) == -0.0046
    # without the phi term (the independent-samples hybrid, statsmodels) the interval is wider:
    # the published values are only reached through the correlation correction
    lo, hi = confint_proportions_2indep(65, 161, 75, 161, method="newcomb", compare="diff")
    assert round(lo, 4) != -0.1186 and hi - lo > (iv.hi - iv.lo) / 100


def test_newcombe_positive_correlation_narrows_the_interval():
    # Two models right and wrong on mostly the same samples: the paired interval must be
    # narrower than the independent-samples one (that is the point of the phi term, Newcombe 1998).
    both, n01, n10, neither = 150, 8, 14, 28
    n = both + n01 + n10 + neither
    orig, cand = _paired(both, n01, n10, neither)
    iv = stats.paired_accuracy_difference(orig, cand)
    lo, hi = confint_proportions_2indep(both + n01, n, both + n10, n, method="newcomb", compare="diff")
    assert iv.hi - iv.lo < 0.8 * 100 * (hi - lo)


def test_newcombe_narrows_as_n_grows():
    widths = []
    for scale in (1, 4, 16, 64):
        orig, cand = _paired(80 * scale, 6 * scale, 10 * scale, 4 * scale)
        iv = stats.paired_accuracy_difference(orig, cand)
        widths.append(iv.hi - iv.lo)
    # interval width shrinks roughly like 1/sqrt(n) (common practice, no source for the exact rate)
    assert all(a > b for a, b in zip(widths, widths[1:]))
    assert widths[-1] < widths[0] / 4


def test_newcombe_agrees_with_wald_on_large_samples():
    # Large n: the score interval converges to the asymptotic (Wald) one,
    # Newcombe 1998 method 1: theta ± z * sqrt(b + c - (b - c)^2 / n) / n.
    both, n01, n10, neither = 15000, 900, 1100, 3000
    orig, cand = _paired(both, n01, n10, neither)
    n = orig.size
    z = norm.ppf(0.975)
    theta = (n01 - n10) / n
    half = z * math.sqrt(n01 + n10 - (n01 - n10) ** 2 / n) / n
    iv = stats.paired_accuracy_difference(orig, cand)
    assert iv.lo == pytest.approx(100 * (theta - half), abs=0.02)
    assert iv.hi == pytest.approx(100 * (theta + half), abs=0.02)


def test_newcombe_no_discordant_pairs_still_has_width():
    # Wald collapses to [0, 0] without discordant pairs (Newcombe 1998 lists this as its
    # aberration); method 10 must not.
    orig, cand = _paired(90, 0, 0, 10)
    iv = stats.paired_accuracy_difference(orig, cand)
    assert iv.delta == 0.0
    assert iv.lo < 0.0 < iv.hi


def test_newcombe_coverage_near_nominal():
    # Monte Carlo: a 95% interval should cover the true difference about 95% of the time
    # (Newcombe 1998 reports method 10 close to nominal; the tolerance is ~3 binomial SEs
    # over 400 repetitions, common practice, no source).
    rng = np.random.default_rng(123)
    probs = np.array([0.80, 0.06, 0.09, 0.05])  # both right, only cand right, only orig right, neither
    true_delta = 100 * (probs[1] - probs[2])
    covered = 0
    reps, n = 400, 250
    for _ in range(reps):
        cell = rng.choice(4, size=n, p=probs)
        orig = (cell == 0) | (cell == 2)
        cand = (cell == 0) | (cell == 1)
        iv = stats.paired_accuracy_difference(orig, cand)
        covered += iv.lo <= true_delta <= iv.hi
    assert 0.92 <= covered / reps <= 0.98


def test_bootstrap_deterministic_and_close_to_newcombe():
    orig, cand = _paired(3500, 300, 420, 780, seed=5)
    a = stats.paired_accuracy_difference(orig, cand, method="bootstrap", seed=7, n_boot=2000)
    b = stats.paired_accuracy_difference(orig, cand, method="bootstrap", seed=7, n_boot=2000)
    c = stats.paired_accuracy_difference(orig, cand, method="bootstrap", seed=8, n_boot=2000)
    assert (a.lo, a.hi) == (b.lo, b.hi)  # same seed, same numbers
    assert (a.lo, a.hi) != (c.lo, c.hi)  # the seed is actually used
    ref = stats.paired_accuracy_difference(orig, cand, method="newcombe")
    assert a.delta == ref.delta
    # both estimate the same sampling distribution; at n=5000 they agree to a few tenths of a point
    # (common practice, no source for the tolerance)
    assert a.lo == pytest.approx(ref.lo, abs=0.3)
    assert a.hi == pytest.approx(ref.hi, abs=0.3)
    assert a.lo <= a.delta <= a.hi


def test_interval_argument_checks():
    orig, cand = _paired(5, 1, 1, 1)
    with pytest.raises(ValueError):
        stats.paired_accuracy_difference(orig, cand, method="wald")
    with pytest.raises(ValueError):
        stats.paired_accuracy_difference(orig, cand, level=1.5)
    with pytest.raises(ValueError):
        stats.paired_accuracy_difference(orig, cand[:-1])


# ----------------------------------------------------------------------------- output errors


def _reference_errors(ref: np.ndarray, cand: np.ndarray) -> dict:
    """The four figures written out directly with numpy (independent of the accumulator)."""
    r, c = ref.astype(np.float64).ravel(), cand.astype(np.float64).ravel()
    e = r - c
    return {
        "max_abs": np.abs(e).max(),
        "rmse": np.sqrt(np.mean(e**2)),
        "cosine": np.dot(r, c) / (np.linalg.norm(r) * np.linalg.norm(c)),
        "sqnr_db": 10 * np.log10(np.sum(r**2) / np.sum(e**2)),
    }


@settings(max_examples=40, deadline=None)
@given(seed=st.integers(0, 2**31 - 1), rows=st.integers(1, 40), cols=st.integers(1, 9),
       noise=st.floats(1e-4, 1.0))
def test_output_errors_match_numpy_and_stream(seed, rows, cols, noise):
    rng = np.random.default_rng(seed)
    ref = rng.normal(size=(rows, cols)).astype(np.float32)
    cand = (ref + noise * rng.normal(size=ref.shape)).astype(np.float32)
    got = stats.output_errors(ref, cand)
    want = _reference_errors(ref, cand)
    for key in want:
        # source: textbook definitions (max norm, RMS, cosine similarity, SQNR in dB)
        assert got[key] == pytest.approx(want[key], rel=1e-9, abs=1e-12), key
    # streaming over random batch splits == one shot on the concatenation
    acc = stats.OutputErrorAccumulator()
    cuts = np.sort(rng.integers(0, rows + 1, size=3))
    for lo, hi in zip(np.r_[0, cuts], np.r_[cuts, rows]):
        acc.update(ref[lo:hi], cand[lo:hi])
    streamed = acc.compute()
    for key in want:
        assert streamed[key] == pytest.approx(got[key], rel=1e-9, abs=1e-12), key


def test_output_errors_edge_cases():
    x = np.array([[1.0, -2.0, 3.0]])
    same = stats.output_errors(x, x)
    assert same["max_abs"] == 0.0 and same["rmse"] == 0.0
    assert same["cosine"] == pytest.approx(1.0)
    assert same["sqnr_db"] == math.inf  # Σ(ref−cand)² = 0: infinite signal-to-noise by definition
    flipped = stats.output_errors(x, -x)
    assert flipped["cosine"] == pytest.approx(-1.0)
    # Σref² / Σ(2x)² = 1/4 -> 10·log10(0.25) ≈ -6.0206 dB
    assert flipped["sqnr_db"] == pytest.approx(10 * math.log10(0.25))
    # IEEE 754: an infinite candidate value makes the noise infinite, so SQNR -> -inf, RMSE -> inf
    inf = stats.output_errors(x, np.array([[1.0, np.inf, 3.0]]))
    assert inf["sqnr_db"] == -math.inf and inf["rmse"] == math.inf
    nan = stats.output_errors(x, np.array([[1.0, np.nan, 3.0]]))
    assert math.isnan(nan["max_abs"]) and math.isnan(nan["rmse"])
    with pytest.raises(ValueError):
        stats.output_errors(x, x.T)


@settings(max_examples=30, deadline=None)
@given(seed=st.integers(0, 2**31 - 1), n=st.integers(1, 50), split=st.integers(0, 50))
def test_regression_errors_match_sklearn(seed, n, split):
    rng = np.random.default_rng(seed)
    pred = rng.normal(size=(n, 2))
    targ = rng.normal(size=(n, 2))
    got = stats.regression_errors(pred, targ)
    # source: scikit-learn mean_absolute_error / mean_squared_error (uniform average over outputs)
    assert got["mae"] == pytest.approx(mean_absolute_error(targ, pred))
    assert got["rmse"] == pytest.approx(math.sqrt(mean_squared_error(targ, pred)))
    split = min(split, n)
    acc = stats.RegressionAccumulator()
    acc.update(pred[:split], targ[:split])
    acc.update(pred[split:], targ[split:])
    assert acc.compute()["rmse"] == pytest.approx(got["rmse"])

