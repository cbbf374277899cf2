"""Statistics for comparing a candidate model with the original on the same samples.

Transformation: per-sample scores / outputs of two models -> accuracy figures,
a paired test (exact McNemar), a confidence interval for the accuracy
difference, and numeric error summaries between output tensors. Pure numpy and
scipy; nothing here knows about ONNX.

Conventions used throughout:

- correctness vectors are boolean, one entry per sample, original first;
- ``n01`` = samples the original got wrong (0) and the candidate right (1),
  ``n10`` = samples the original got right (1) and the candidate wrong (0);
  so the candidate's accuracy gain is ``(n01 - n10) / n``;
- accuracy differences are reported in percentage points (pp),
  ``delta = 100 · (acc_candidate − acc_original)``; a negative delta is a drop.
- ``sqnr_db`` is ``+inf`` when the two tensors are identical (no noise).
  It stays a Python ``float('inf')`` here so comparisons keep working; code that
  writes JSON converts non-finite floats with :func:`json_safe`, which writes
  ``null`` and records a note saying what the null stands for.
"""
from __future__ import annotations

import logging
import math
from dataclasses import dataclass

import numpy as np
from scipy import stats as sps

logger = logging.getLogger(__name__)

INTERVAL_METHODS = ("newcombe", "bootstrap")


def _check_scores(scores: np.ndarray, labels: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    scores = np.asarray(scores)
    labels = np.asarray(labels)
    if scores.ndim != 2:
        raise ValueError(f"scores must be 2-D (samples, classes), got shape {scores.shape}")
    labels = labels.reshape(-1)
    if labels.shape[0] != scores.shape[0]:
        raise ValueError(f"{scores.shape[0]} score rows but {labels.shape[0]} labels")
    if labels.size and (labels.min() < 0 or labels.max() >= scores.shape[1]):
        raise ValueError(f"labels must lie in [0, {scores.shape[1]}), got {labels.min()}..{labels.max()}")
    return scores, labels.astype(np.int64)


def top1_correct(scores: np.ndarray, labels: np.ndarray) -> np.ndarray:
    """Boolean vector: ``argmax(scores[i]) == labels[i]`` (ties go to the lowest class index)."""
    scores, labels = _check_scores(scores, labels)
    return np.argmax(scores, axis=1) == labels


def topk_correct(scores: np.ndarray, labels: np.ndarray, k: int) -> np.ndarray:
    """Boolean vector: the true class is among the ``k`` best-scored classes.

    Classes are ranked by score, ties broken by lower class index first, which is
    the order ``argmax`` uses, so ``k=1`` agrees with :func:`top1_correct`.
    """
    scores, labels = _check_scores(scores, labels)
    if k < 1:
        raise ValueError(f"k must be >= 1, got {k}")
    rows = np.arange(scores.shape[0])
    own = scores[rows, labels][:, None]
    cls = np.arange(scores.shape[1])[None, :]
    # rank of the true class = classes strictly better + tied classes with a lower index
    rank = np.sum(scores > own, axis=1) + np.sum((scores == own) & (cls < labels[:, None]), axis=1)
    return rank < k


def topk_accuracy(scores: np.ndarray, labels: np.ndarray, k: int) -> float:
    """Fraction of samples whose true class is among the ``k`` best-scored classes."""
    return accuracy(topk_correct(scores, labels, k))


def accuracy(correct: np.ndarray) -> float:
    """Fraction of ``True`` entries; raises on an empty vector (accuracy of nothing is undefined)."""
    correct = np.asarray(correct, dtype=bool).reshape(-1)
    if correct.size == 0:
        raise ValueError("accuracy of an empty set is undefined")
    return float(np.count_nonzero(correct)) / correct.size


def discordant_counts(correct_orig: np.ndarray, correct_cand: np.ndarray) -> tuple[int, int]:
    """``(n01, n10)``: candidate-only correct, original-only correct."""
    a, b = _paired(correct_orig, correct_cand)
    return int(np.count_nonzero(~a & b)), int(np.count_nonzero(a & ~b))


CHANGED_SHOWN = 100  # changed samples listed in a report: enough to look at, a page a person reads (our choice)


def changed_samples(pred_orig: np.ndarray, pred_cand: np.ndarray, labels: np.ndarray | None = None,
                    cap: int = CHANGED_SHOWN) -> dict:
    """The samples whose top-1 class changed, by index: the discordant pairs behind McNemar's test and more.

    Returns ``{"count", "discordant", "shown", "samples"}``: ``count`` samples changed class,
    ``discordant`` of them (``n01 + n10``, None without labels) changed from right to wrong or back,
    and ``samples`` lists the first ``cap`` by sample index as ``{"index", "original", "candidate",
    "label"}`` (``label`` None without labels). A changed sample both models got wrong is not
    discordant: McNemar's test does not count it.
    """
    po = np.asarray(pred_orig).reshape(-1)
    pc = np.asarray(pred_cand).reshape(-1)
    lab = None if labels is None else np.asarray(labels).reshape(-1)
    where = np.flatnonzero(po != pc)
    discordant = None if lab is None else int(np.count_nonzero((po == lab) != (pc == lab)))
    rows = [{"index": int(i), "original": int(po[i]), "candidate": int(pc[i]),
             "label": None if lab is None else int(lab[i])} for i in where[:cap]]
    return {"count": int(where.size), "discordant": discordant, "shown": len(rows), "samples": rows}


def mcnemar_exact(n01: int, n10: int) -> float:
    """Two-sided exact McNemar p-value from the discordant counts.

    McNemar (1947), exact (binomial) form: under H0 each discordant pair is
    equally likely to fall either way, so ``min(n01, n10) ~ Binom(n01+n10, 1/2)``
    and ``p = min(1, 2 · BinomCDF(min(n01, n10); n01 + n10, 1/2))``.
    Returns 1.0 when there are no discordant pairs (no evidence of a difference).
    """
    n01, n10 = int(n01), int(n10)
    if n01 < 0 or n10 < 0:
        raise ValueError(f"discordant counts must be >= 0, got {n01}, {n10}")
    n = n01 + n10
    if n == 0:
        return 1.0
    return float(min(1.0, 2.0 * sps.binom.cdf(min(n01, n10), n, 0.5)))


@dataclass
class Interval:
    """A confidence interval for ``acc_candidate − acc_original``, in percentage points."""

    delta: float
    lo: float
    hi: float
    method: str
    level: float = 0.95

    def to_dict(self) -> dict:
        return {"delta_pp": self.delta, "lo_pp": self.lo, "hi_pp": self.hi,
                "method": self.method, "level": self.level}


def _paired(correct_orig: np.ndarray, correct_cand: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    a = np.asarray(correct_orig, dtype=bool).reshape(-1)
    b = np.asarray(correct_cand, dtype=bool).reshape(-1)
    if a.shape != b.shape:
        raise ValueError(f"paired vectors differ in length: {a.size} vs {b.size}")
    if a.size == 0:
        raise ValueError("no samples to compare")
    return a, b


def wilson_interval(successes: int, n: int, level: float = 0.95) -> tuple[float, float]:
    """Wilson (1927) score interval for a single proportion ``successes / n``.

    ``(p + z²/2n ± z·sqrt(p(1−p)/n + z²/4n²)) / (1 + z²/n)`` with ``z`` the
    two-sided normal quantile for ``level``.
    """
    if n <= 0:
        raise ValueError("n must be positive")
    z = float(sps.norm.ppf(0.5 + level / 2.0))
    p = successes / n
    denom = 1.0 + z * z / n
    centre = (p + z * z / (2 * n)) / denom
    half = z * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / denom
    return max(0.0, centre - half), min(1.0, centre + half)


def _newcombe_paired(a: np.ndarray, b: np.ndarray, level: float) -> tuple[float, float]:
    """Newcombe (1998) method 10 interval for p_cand − p_orig (as fractions).

    Source: R. G. Newcombe, "Improved confidence intervals for the difference
    between binomial proportions based on paired data", Statistics in Medicine
    17:2635-2650 (1998), method 10 (the Wilson-score "square-and-add" hybrid with
    a correlation correction). With the 2x2 table (first = candidate,
    second = original): ``e`` both right, ``f`` candidate-only right (= n01),
    ``g`` original-only right (= n10), ``h`` both wrong, and
    ``p1 = (e+f)/n``, ``p2 = (e+g)/n``, ``θ = p1 − p2``; ``(l1,u1)``,
    ``(l2,u2)`` the Wilson intervals of p1, p2;
    ``φ = C / sqrt((e+f)(g+h)(e+g)(f+h))`` where ``C = eh − fg − n/2`` if
    ``eh − fg > n/2``, ``0`` if ``0 <= eh − fg <= n/2``, ``eh − fg`` if negative,
    and ``φ = 0`` when any marginal total is 0. Then

        L = θ − sqrt((p1−l1)² − 2φ(p1−l1)(u2−p2) + (u2−p2)²)
        U = θ + sqrt((u1−p1)² − 2φ(u1−p1)(p2−l2) + (p2−l2)²)
    """
    n = a.size
    e = int(np.count_nonzero(b & a))
    f = int(np.count_nonzero(b & ~a))
    g = int(np.count_nonzero(~b & a))
    h = n - e - f - g
    p1, p2 = (e + f) / n, (e + g) / n
    l1, u1 = wilson_interval(e + f, n, level)
    l2, u2 = wilson_interval(e + g, n, level)
    margins = float(e + f) * float(g + h) * float(e + g) * float(f + h)
    phi = 0.0
    if margins > 0:
        cross = float(e) * h - float(f) * g
        if cross > n / 2:
            num = cross - n / 2
        elif cross >= 0:
            num = 0.0
        else:
            num = cross
        phi = num / math.sqrt(margins)
    theta = p1 - p2
    # max(0, .) guards against tiny negative round-off under the square root
    lo = theta - math.sqrt(max(0.0, (p1 - l1) ** 2 - 2 * phi * (p1 - l1) * (u2 - p2) + (u2 - p2) ** 2))
    hi = theta + math.sqrt(max(0.0, (u1 - p1) ** 2 - 2 * phi * (u1 - p1) * (p2 - l2) + (p2 - l2) ** 2))
    return max(-1.0, lo), min(1.0, hi)


def _bootstrap_paired(a: np.ndarray, b: np.ndarray, level: float, seed: int, n_boot: int) -> tuple[float, float]:
    """Percentile interval of the paired bootstrap (Efron & Tibshirani 1993, ch. 13).

    Samples are resampled as pairs, so the correlation between the two models'
    correctness is kept. Deterministic for a given ``seed``.
    """
    rng = np.random.default_rng(seed)
    diff = b.astype(np.int8) - a.astype(np.int8)  # +1 candidate-only right, -1 original-only right
    n = diff.size
    stats_ = np.empty(n_boot, dtype=np.float64)
    chunk = max(1, min(n_boot, 2_000_000 // max(n, 1)))  # bound memory of the index matrix
    for start in range(0, n_boot, chunk):
        stop = min(n_boot, start + chunk)
        idx = rng.integers(0, n, size=(stop - start, n))
        stats_[start:stop] = diff[idx].mean(axis=1)
    tail = (1.0 - level) / 2.0
    lo, hi = np.quantile(stats_, [tail, 1.0 - tail])
    return float(lo), float(hi)


def paired_accuracy_difference(
    correct_orig: np.ndarray,
    correct_cand: np.ndarray,
    *,
    level: float = 0.95,
    method: str = "newcombe",
    seed: int = 0,
    n_boot: int = 2000,
) -> Interval:
    """Accuracy difference (candidate − original, pp) with a ``level`` confidence interval.

    ``method="newcombe"`` (default): Newcombe (1998) method 10 score interval for
    the difference of paired proportions (see :func:`_newcombe_paired` for the
    formula); it stays inside [−100, 100] and behaves with few or no discordant
    pairs, where the Wald interval collapses to zero width.
    ``method="bootstrap"``: seeded paired percentile bootstrap with ``n_boot`` draws.
    """
    if not 0.0 < level < 1.0:
        raise ValueError(f"level must be in (0, 1), got {level}")
    if method not in INTERVAL_METHODS:
        raise ValueError(f"unknown interval method {method!r}; choose from {', '.join(INTERVAL_METHODS)}")
    a, b = _paired(correct_orig, correct_cand)
    delta = (np.count_nonzero(b) - np.count_nonzero(a)) / a.size
    if method == "newcombe":
        lo, hi = _newcombe_paired(a, b, level)
    else:
        if n_boot < 1:
            raise ValueError(f"n_boot must be >= 1, got {n_boot}")
        lo, hi = _bootstrap_paired(a, b, level, seed, n_boot)
    return Interval(delta=100.0 * float(delta), lo=100.0 * lo, hi=100.0 * hi, method=method, level=level)


class OutputErrorAccumulator:
    """Streaming version of :func:`output_errors`: feed batches, read the totals.

    Keeps float64 running sums of ref², cand², ref·cand and (ref−cand)², the
    element count and the running max |ref − cand|, which is all the four
    figures need; ``compute()`` equals ``output_errors`` on the concatenation
    up to float rounding.
    """

    def __init__(self) -> None:
        self.count = 0
        self.max_abs = 0.0
        self.sum_ref2 = 0.0
        self.sum_cand2 = 0.0
        self.sum_cross = 0.0
        self.sum_err2 = 0.0

    def update(self, ref: np.ndarray, cand: np.ndarray) -> None:
        """Add one batch; ``ref`` and ``cand`` must have the same shape."""
        r = np.asarray(ref, dtype=np.float64)
        c = np.asarray(cand, dtype=np.float64)
        if r.shape != c.shape:
            raise ValueError(f"shapes differ: {r.shape} vs {c.shape}")
        if r.size == 0:
            return
        r, c = r.ravel(), c.ravel()
        err = r - c
        batch_max = float(np.max(np.abs(err)))  # np.max propagates NaN
        if math.isnan(batch_max) or math.isnan(self.max_abs):
            self.max_abs = float("nan")  # a NaN anywhere makes the whole figure NaN
        else:
            self.max_abs = max(self.max_abs, batch_max)
        self.count += r.size
        self.sum_ref2 += float(np.dot(r, r))
        self.sum_cand2 += float(np.dot(c, c))
        self.sum_cross += float(np.dot(r, c))
        self.sum_err2 += float(np.dot(err, err))

    def compute(self) -> dict[str, float]:
        """``{max_abs, rmse, cosine, sqnr_db}`` over everything seen so far."""
        if self.count == 0:
            raise ValueError("no values accumulated")
        rmse = math.sqrt(self.sum_err2 / self.count) if not math.isnan(self.sum_err2) else float("nan")
        norms = self.sum_ref2 * self.sum_cand2
        if math.isnan(norms) or math.isnan(self.sum_cross):
            cosine = float("nan")
        elif self.sum_ref2 == 0.0 and self.sum_cand2 == 0.0:
            cosine = 1.0  # both all-zero: identical directions by convention
        elif norms == 0.0:
            cosine = 0.0  # one all-zero, the other not: no shared direction
        else:
            cosine = max(-1.0, min(1.0, self.sum_cross / math.sqrt(norms)))
        if math.isnan(self.sum_err2) or math.isnan(self.sum_ref2):
            sqnr = float("nan")
        elif self.sum_err2 == 0.0:
            sqnr = math.inf  # no noise at all
        else:
            ratio = self.sum_ref2 / self.sum_err2  # inf/inf is NaN, x/inf is 0
            if math.isnan(ratio):
                sqnr = float("nan")
            elif ratio == 0.0:
                sqnr = -math.inf  # silent signal, or infinite noise
            else:
                sqnr = 10.0 * math.log10(ratio)  # log10(inf) is inf
        return {"max_abs": float(self.max_abs), "rmse": rmse, "cosine": cosine, "sqnr_db": sqnr}


def output_errors(ref: np.ndarray, cand: np.ndarray) -> dict[str, float]:
    """Error figures of ``cand`` against ``ref`` (same shape), over all elements.

    ``max_abs = max|ref−cand|``, ``rmse = sqrt(mean((ref−cand)²))``,
    ``cosine = <ref,cand> / (|ref|·|cand|)`` (1 if both are zero, 0 if only one is),
    ``sqnr_db = 10·log10(Σref² / Σ(ref−cand)²)``, ``+inf`` when identical.
    """
    acc = OutputErrorAccumulator()
    acc.update(ref, cand)
    return acc.compute()


class RegressionAccumulator:
    """Streaming MAE / RMSE of predictions against expected."""

    def __init__(self) -> None:
        self.count = 0
        self.sum_abs = 0.0
        self.sum_sq = 0.0

    def update(self, pred: np.ndarray, expected: np.ndarray) -> None:
        """Add one batch; ``pred`` and ``expected`` must hold the same number of values."""
        p = np.asarray(pred, dtype=np.float64)
        t = np.asarray(expected, dtype=np.float64)
        if p.size != t.size:
            raise ValueError(f"{p.size} predictions but {t.size} expected values")
        err = p.ravel() - t.ravel()
        self.count += err.size
        self.sum_abs += float(np.sum(np.abs(err)))
        self.sum_sq += float(np.dot(err, err))

    def compute(self) -> dict[str, float]:
        """``{mae, rmse}`` over everything seen so far."""
        if self.count == 0:
            raise ValueError("no values accumulated")
        return {"mae": self.sum_abs / self.count, "rmse": math.sqrt(self.sum_sq / self.count)}


def regression_errors(pred: np.ndarray, expected: np.ndarray) -> dict[str, float]:
    """``mae = mean|pred−expected|`` and ``rmse = sqrt(mean((pred−expected)²))`` over all values."""
    acc = RegressionAccumulator()
    acc.update(pred, expected)
    return acc.compute()
