"""Per-sample cosine, its worst-5% figure and SQNR, against references outside swapper.

Oracles: ``scipy.spatial.distance.cosine`` (cosine distance, 1 − similarity);
``numpy.percentile`` with ``method="linear"`` and, written out here, Hyndman &
Fan (1996) definition 7 (the same interpolation); the SQNR formula
``10·log10(Σx² / Σ(x − x̂)²)`` in dB (signal power over error power, the usual
decibel power ratio), computed directly with numpy.
"""
from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
from scipy.spatial.distance import cosine as scipy_cosine_distance

from swapper.check.similarity import CosineAccumulator, cosine_per_sample, cosine_summary, sqnr_db


def scipy_cosines(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """1 − scipy's cosine distance, one sample (row of the flattened output) at a time."""
    a = a.reshape(len(a), -1).astype(np.float64)
    b = b.reshape(len(b), -1).astype(np.float64)
    return np.array([1.0 - scipy_cosine_distance(u, v) for u, v in zip(a, b)])


def hyndman_fan_7(values: np.ndarray, q: float) -> float:
    """Sample quantile, Hyndman & Fan (1996) definition 7: h = (n − 1)·q on the sorted values, linear between."""
    x = np.sort(values)
    h = (len(x) - 1) * q
    lo = math.floor(h)
    hi = min(lo + 1, len(x) - 1)
    return float(x[lo] + (h - lo) * (x[hi] - x[lo]))


@pytest.mark.parametrize("shape", [(200, 32), (50, 3, 4, 4), (40, 7, 5)])
def test_per_sample_cosine_matches_scipy(shape):
    rng = np.random.default_rng(7)
    ref = rng.normal(size=shape).astype(np.float32)
    cand = (ref + rng.normal(scale=0.3, size=shape)).astype(np.float32)
    got = cosine_per_sample(ref, cand)
    np.testing.assert_allclose(got, scipy_cosines(ref, cand), rtol=0, atol=1e-12)
    assert got.min() < 0.99  # the noise is large enough that the figures are not all 1


def test_zero_vectors_follow_the_stated_convention_where_scipy_has_none():
    ref = np.array([[0.0, 0.0, 0.0], [0.0, 0.0, 0.0], [1.0, 2.0, 3.0], [1.0, 0.0, 0.0]])
    cand = np.array([[0.0, 0.0, 0.0], [0.0, 1e-3, 0.0], [0.0, 0.0, 0.0], [-2.0, 0.0, 0.0]])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        reference = scipy_cosines(ref, cand)
    # scipy's 1 - u.v/(|u||v|) is 0/0 for a zero vector: NaN, so swapper must define these rows itself
    assert np.isnan(reference[:3]).all()
    # swapper/check/similarity.py: both zero -> 1, one zero -> 0; the last row is an ordinary cosine (-1)
    np.testing.assert_array_equal(cosine_per_sample(ref, cand), [1.0, 0.0, 0.0, reference[3]])
    assert reference[3] == pytest.approx(-1.0)


def test_nan_stays_nan_and_makes_every_summary_figure_nan():
    ref = np.ones((4, 3))
    cand = ref.copy()
    cand[2, 1] = np.nan
    cos = cosine_per_sample(ref, cand)
    assert np.isnan(cos[2]) and not np.isnan(cos[[0, 1, 3]]).any()
    assert all(math.isnan(v) for v in cosine_summary(cos).values())


def test_worst_five_percent_is_the_linear_fifth_percentile():
    rng = np.random.default_rng(11)
    ref = rng.normal(size=(137, 16))
    cand = ref + rng.normal(scale=rng.uniform(0.01, 0.8, size=(137, 1)), size=(137, 16))
    expected = scipy_cosines(ref, cand)
    summary = cosine_summary(cosine_per_sample(ref, cand))
    # source: numpy.percentile, method="linear"; and the same quantile written out (Hyndman & Fan, definition 7)
    assert summary["cosine_p5"] == pytest.approx(np.percentile(expected, 5, method="linear"), abs=1e-12)
    assert summary["cosine_p5"] == pytest.approx(hyndman_fan_7(expected, 0.05), abs=1e-12)
    assert summary["cosine_mean"] == pytest.approx(expected.mean(), abs=1e-12)
    assert summary["cosine_min"] == pytest.approx(expected.min(), abs=1e-12)
    assert summary["cosine_min"] < summary["cosine_p5"] < summary["cosine_mean"]  # spread noise: all three differ


def test_streaming_over_batches_equals_one_pass():
    rng = np.random.default_rng(3)
    ref = rng.normal(size=(101, 9))
    cand = ref + rng.normal(scale=0.2, size=ref.shape)
    acc = CosineAccumulator()
    for start in range(0, 101, 17):
        acc.update(ref[start:start + 17], cand[start:start + 17])
    np.testing.assert_allclose(acc.values(), scipy_cosines(ref, cand), atol=1e-12)


def test_sqnr_is_signal_power_over_error_power_in_decibels():
    rng = np.random.default_rng(5)
    x = rng.normal(size=(64, 10))
    x_hat = x + rng.normal(scale=0.05, size=x.shape)
    # formula: SQNR = 10·log10(Σx² / Σ(x − x̂)²)
    assert sqnr_db(x, x_hat) == pytest.approx(10 * np.log10(np.sum(x ** 2) / np.sum((x - x_hat) ** 2)), abs=1e-9)
    assert sqnr_db(x, x) == math.inf  # no error: infinite ratio
    # a tenfold error amplitude costs 20 dB (power ratio 100)
    assert sqnr_db(x, x + 10 * (x_hat - x)) == pytest.approx(sqnr_db(x, x_hat) - 20.0, abs=1e-9)
