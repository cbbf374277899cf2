"""Compress each channel's (x, y) sample into bins of x, each kept as two weighted points.

Transformation: (X, Y) of shape (channels, n) -> :class:`BinnedSample` with
points (X₂, Y₂) and weights W of shape (channels, 2P) and a per-channel
constant R, such that for every (a, b, c, d)

    (1/n)·Σᵢ (yᵢ − a·g(b·xᵢ + c) − d)²  ≈  Σⱼ Wⱼ·(Y₂ⱼ − a·g(b·X₂ⱼ + c) − d)² + R

so the fitters (:func:`swapper.fit.rows.fit_rows`, per-row weights) search
on 2P points per channel (P ≈ 200 for the default 128 bins) instead of n.

Bins. Each channel's pairs are sorted by x and cut three ways, every cut
kept (:func:`rank_edges`, :func:`bin_starts`):

- ``bins`` equal-count bins of consecutive ranks: edges at the sample's own
  quantiles, so bins are narrow where the data are dense;
- towards both ends the bins shrink geometrically down to single pairs (a bin
  t ranks from its end holds max(1, ⌊t·TAIL_GROWTH⌋) pairs): equal-count bins
  are widest in the sparse tails, where the error below would gather;
- a cut wherever x passes one of ``spans`` − 1 equally spaced values across the
  channel's range: no bin is wider than range/spans, so no bin straddles a gap
  between clusters (a small cluster far from the bulk, seen on transformer
  MLP channels, otherwise shares a bin with the bulk's edge and two points
  cannot describe it).

Channels get different numbers of bins; rows are padded with zero-weight
points. Ties in x may fall on either side of a cut; that only moves a pair
between neighbouring bins with the same x, which changes nothing below.

Statistics per bin: the count nₖ, the means x̄, ȳ and the within-bin
(co)variances sₓₓ, sₓᵧ, sᵧᵧ (per-bin sums of pairs shifted by one value per
channel). The bin becomes two points of weight nₖ/(2n)

    x = x̄ ∓ √sₓₓ,    y = ȳ ∓ sₓᵧ/√sₓₓ      (y = ȳ for both when sₓₓ = 0)

which have the bin's count, mean x and y, variance of x and covariance of x
and y exactly; so the whole sample's mean, variance and covariance are kept
too (the degenerate-channel tests and the standardisation of the search see
the same numbers). The part of y's within-bin variance that x does not explain
linearly, sᵧᵧ − sₓᵧ²/sₓₓ ≥ 0, does not depend on the parameters: it is summed
(weighted) into R.

Approximation. Within bin k write x = x̄ + δ, z = g(b·x + c). The identity
holds exactly for every bin on which z is affine in x over the bin's pairs
and its two points (z = ζ + m·b·δ; then Σ (y − a·z − d)² over the bin depends
on the data only through nₖ, x̄, ȳ, sₓₓ, sₓᵧ, sᵧᵧ): for the piecewise-linear
surrogates (ReLU, hard-tanh, ReLU6, leaky ReLU) that is every bin clear of a
kink. Where z curves over a bin, the two points are the symmetric two-point
rule for the bin's first two moments: the mean of z is matched up to the
cubic term, (b³·g‴/6)·μ₃ + O(b⁴·g⁗·μ₄) with μⱼ the bin's central moments of
x (third order in the bin width; zero at third order for a symmetric bin),
and the cross term Σ y·z likewise. The error gathers in the one or two bins
straddling a kink of g. Measured at the fitted parameters on the 16 sites of
the scale model and the 6 GELU sites of a MiniLM sentence encoder (relu and
hard_swish surrogates, 4096 pairs per channel), the two sides differ by at
most 1.3% of the mse (99th percentile of channels 0.3%); the fitted mse on the
pairs is within 0.12% of the full-sample fit's, per site
(tests/fit/test_binned_fit.py holds binned fits to 1% of full ones).
"""
from __future__ import annotations

import logging
from dataclasses import dataclass

import numpy as np

logger = logging.getLogger(__name__)

TAIL_GROWTH = 0.5  # tail bins grow by half the ranks already covered from their end


@dataclass(frozen=True)
class BinnedSample:
    """Two points per bin of every channel (see the module docstring); rows padded with zero-weight points."""

    x: np.ndarray  # (channels, 2P) the points' x
    y: np.ndarray  # (channels, 2P) the points' y
    weights: np.ndarray  # (channels, 2P) each row summing to 1 (padding: 0)
    residual: np.ndarray  # (channels,) R: the within-bin variance of y the points leave out
    x_lo: np.ndarray  # (channels,) the sample's x range
    x_hi: np.ndarray
    n: int  # pairs per channel that were binned
    bins: np.ndarray  # (channels,) bins actually used


def rank_edges(n: int, bins: int) -> np.ndarray:
    """First rank of each bin of n sorted pairs: ``bins`` equal-count bins, graded down to single pairs at both ends.

    A central bin holds about m = n/bins pairs; towards each end the sizes
    shrink geometrically (a bin at rank distance t from its end holds
    max(1, ⌊t·TAIL_GROWTH⌋) pairs) so the sparse tails, where equal-count
    bins would be widest, are kept nearly pair by pair.
    """
    if n < 1 or bins < 1:
        raise ValueError(f"need n >= 1 and bins >= 1, got {n}, {bins}")
    m = n / bins
    tail = [0]  # first ranks of the tail bins of one end
    while True:
        size = max(1, int(tail[-1] * TAIL_GROWTH))
        if size >= m or 2 * (tail[-1] + size) > n:
            break
        tail.append(tail[-1] + size)
    t = tail[-1]  # ranks covered by each end's tail bins
    k = max(1, round((n - 2 * t) / m)) if n > 2 * t else 0
    middle = t + (np.arange(k, dtype=np.int64) * (n - 2 * t)) // max(k, 1)
    upper = n - np.array(tail[::-1], dtype=np.int64)[:-1]  # mirror image of the lower tail's bin starts
    return np.unique(np.r_[np.array(tail[:-1], dtype=np.int64), middle, upper])


def sorted_counts(Xs: np.ndarray, values: np.ndarray) -> np.ndarray:
    """Per row, how many of the sorted ``Xs`` (rows, n) lie below each of ``values`` (rows, q).

    ``np.searchsorted(Xs[i], values[i])`` for every row at once: a bisection over
    all rows and values together, ⌈log2(n + 1)⌉ small gathers instead of a
    Python loop over rows or a pass over all of ``Xs``.
    """
    n = Xs.shape[1]
    lo = np.zeros(values.shape, dtype=np.int64)
    hi = np.full(values.shape, n, dtype=np.int64)
    for _ in range(int(n).bit_length()):
        mid = (lo + hi) // 2
        below = (mid < n) & (np.take_along_axis(Xs, np.minimum(mid, n - 1), axis=1) < values)
        lo = np.where(below, mid + 1, lo)
        hi = np.where(below, hi, mid)
    return lo


def bin_starts(Xs: np.ndarray, ranks: np.ndarray, spans: int) -> tuple[np.ndarray, np.ndarray]:
    """Bins of sorted rows ``Xs`` (channels, n): the shared ``ranks`` cut again wherever x passes one of
    ``spans`` - 1 equally spaced values across the row's range (so no bin is wider than range/spans).

    Returns the first flat index (into ``Xs.reshape(-1)``) of every bin, channel by channel, and
    the number of bins of each channel.
    """
    C, n = Xs.shape
    lo, width = Xs[:, 0], Xs[:, -1] - Xs[:, 0]
    values = lo[:, None] + width[:, None] * (np.arange(1, spans) / spans)  # (C, spans - 1)
    cuts = sorted_counts(Xs, values)
    edges = np.sort(np.concatenate([np.broadcast_to(ranks, (C, ranks.size)), cuts], axis=1), axis=1)
    keep = edges < n
    keep[:, 1:] &= edges[:, 1:] != edges[:, :-1]
    starts = (edges + n * np.arange(C)[:, None])[keep]  # row-major: channel by channel, ascending
    return starts, keep.sum(axis=1)


def sorted_pairs(X: np.ndarray, Y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Every row's pairs sorted by x, as float64 (sorted in the stored precision: float32 sorts faster)."""
    X = np.asarray(X)
    Y = np.asarray(Y)
    if X.ndim != 2 or X.shape != Y.shape or X.size == 0:
        raise ValueError(f"X and Y must be non-empty (channels, n) arrays of one shape, got {X.shape}, {Y.shape}")
    order = np.argsort(X, axis=1)
    return (np.take_along_axis(X, order, axis=1).astype(np.float64, copy=False),
            np.take_along_axis(Y, order, axis=1).astype(np.float64, copy=False))


def bin_sample(X: np.ndarray, Y: np.ndarray, bins: int, spans: int | None = None) -> BinnedSample:
    """Summarise every row of ``X``, ``Y`` (channels, n): ``bins`` quantile bins of x cut at ``spans`` value steps.

    ``spans`` defaults to ``bins // 2`` (see the module docstring).
    """
    return bin_sorted(*sorted_pairs(X, Y), bins, spans)


def bin_sorted(Xs: np.ndarray, Ys: np.ndarray, bins: int, spans: int | None = None) -> BinnedSample:
    """:func:`bin_sample` of pairs already sorted by x (:func:`sorted_pairs`)."""
    C, n = Xs.shape
    spans = max(1, bins // 2) if spans is None else spans
    starts, nb = bin_starts(Xs, rank_edges(n, bins), spans)
    counts = np.diff(np.r_[starts, C * n])
    # per-bin moments from sums about one value per channel (its median pair): the shift keeps the
    # within-bin variances' cancellation at eps·(distance/width)² relative, far below float32 data noise
    x0, y0 = Xs[:, n // 2], Ys[:, n // 2]
    xc = (Xs - x0[:, None]).reshape(-1)
    yc = (Ys - y0[:, None]).reshape(-1)

    def per_bin(A: np.ndarray) -> np.ndarray:
        return np.add.reduceat(A, starts) / counts

    mxc, myc = per_bin(xc), per_bin(yc)
    sxx = np.maximum(per_bin(xc * xc) - mxc * mxc, 0.0)
    sxy = per_bin(xc * yc) - mxc * myc
    syy = np.maximum(per_bin(yc * yc) - myc * myc, 0.0)
    row = np.repeat(np.arange(C), nb)
    mx, my = mxc + x0[row], myc + y0[row]
    sd = np.sqrt(sxx)
    with np.errstate(divide="ignore", invalid="ignore"):
        ty = np.where(sd > 0, sxy / np.where(sd > 0, sd, 1.0), 0.0)
    # padded (C, P) layout; padding: zero weight at the channel's mean (finite, harmless)
    P = int(nb.max())
    col = np.arange(row.size) - np.repeat(np.cumsum(nb) - nb, nb)
    share = counts / n

    def padded(v: np.ndarray, fill: np.ndarray) -> np.ndarray:
        out = np.repeat(fill[:, None], P, axis=1)
        out[row, col] = v
        return out

    x_mean = np.bincount(row, share * mx, minlength=C)
    y_mean = np.bincount(row, share * my, minlength=C)
    x2 = np.stack([padded(mx - sd, x_mean), padded(mx + sd, x_mean)], axis=2).reshape(C, -1)
    y2 = np.stack([padded(my - ty, y_mean), padded(my + ty, y_mean)], axis=2).reshape(C, -1)
    half = padded(share / 2, np.zeros(C))
    weights = np.stack([half, half], axis=2).reshape(C, -1)
    residual = np.bincount(row, share * np.maximum(syy - ty * ty, 0.0), minlength=C)
    return BinnedSample(x=x2, y=y2, weights=weights, residual=residual, x_lo=Xs[:, 0].copy(),
                        x_hi=Xs[:, -1].copy(), n=n, bins=nb)
