"""How close the candidate's output stays to the original's, sample by sample.

Transformation: paired output tensors (original, candidate), batch by batch ->
per-sample cosine similarity (each sample's output flattened to one vector) and
its summary ``{cosine_mean, cosine_p5, cosine_min}``. The set-wide SQNR is kept by
``stats.OutputErrorAccumulator``; :func:`sqnr_db` states its formula.

Definitions:

- cosine of sample i: ``<x_i, y_i> / (|x_i|·|y_i|)`` with x the original's output,
  y the candidate's, in float64; clipped to [-1, 1] against rounding. Zero vectors,
  where the quotient is 0/0 (scipy's ``distance.cosine`` returns NaN there): both
  zero -> 1 (the same output), exactly one zero -> 0 (no shared direction). The same
  convention as ``stats.output_errors``' set-wide cosine. NaN in either stays NaN.
- ``cosine_p5``: the 5th percentile of the per-sample cosines, ``numpy.percentile``
  with its default ``linear`` method (Hyndman & Fan's definition 7), i.e. the floor
  that the best 95% of samples reach: the "worst 5%" figure.
- SQNR in dB: ``10·log10(Σx² / Σ(x − y)²)`` over every value, ``+inf`` when equal.
"""
from __future__ import annotations

import logging
import math

import numpy as np

logger = logging.getLogger(__name__)

WORST_PERCENT = 5.0


def cosine_per_sample(ref: np.ndarray, cand: np.ndarray) -> np.ndarray:
    """Cosine similarity of each sample's output (axis 0 = samples), float64; see the module docstring."""
    r = np.asarray(ref, dtype=np.float64)
    c = np.asarray(cand, dtype=np.float64)
    if r.shape != c.shape:
        raise ValueError(f"shapes differ: {r.shape} vs {c.shape}")
    if r.ndim == 0:
        raise ValueError("need a sample axis")
    r = r.reshape(r.shape[0], -1)
    c = c.reshape(c.shape[0], -1)
    dot = np.einsum("ij,ij->i", r, c)
    nr = np.sqrt(np.einsum("ij,ij->i", r, r))
    nc = np.sqrt(np.einsum("ij,ij->i", c, c))
    both_zero = (nr == 0.0) & (nc == 0.0)
    one_zero = (nr == 0.0) ^ (nc == 0.0)
    out = np.empty(r.shape[0], dtype=np.float64)
    regular = ~(both_zero | one_zero)
    with np.errstate(invalid="ignore", over="ignore"):
        out[regular] = np.clip(dot[regular] / (nr[regular] * nc[regular]), -1.0, 1.0)  # clip keeps NaN
    out[both_zero] = 1.0
    out[one_zero] = 0.0
    return out


def cosine_summary(cosines: np.ndarray) -> dict[str, float]:
    """``{cosine_mean, cosine_p5, cosine_min}`` of per-sample cosines (NaN anywhere makes each figure NaN)."""
    cos = np.asarray(cosines, dtype=np.float64).reshape(-1)
    if cos.size == 0:
        raise ValueError("no samples")
    if np.isnan(cos).any():
        nan = float("nan")
        return {"cosine_mean": nan, "cosine_p5": nan, "cosine_min": nan}
    return {"cosine_mean": float(np.mean(cos)),
            "cosine_p5": float(np.percentile(cos, WORST_PERCENT, method="linear")),
            "cosine_min": float(np.min(cos))}


def sqnr_db(ref: np.ndarray, cand: np.ndarray) -> float:
    """``10·log10(Σref² / Σ(ref − cand)²)`` in dB over every value; ``+inf`` when the two are equal."""
    r = np.asarray(ref, dtype=np.float64).ravel()
    e = r - np.asarray(cand, dtype=np.float64).ravel()
    noise = float(np.dot(e, e))
    if noise == 0.0:
        return math.inf
    signal = float(np.dot(r, r))
    return -math.inf if signal == 0.0 else 10.0 * math.log10(signal / noise)


class CosineAccumulator:
    """Per-sample cosines of one output, batch by batch (one float per sample is kept, never the outputs)."""

    def __init__(self) -> None:
        self._parts: list[np.ndarray] = []

    def update(self, ref: np.ndarray, cand: np.ndarray) -> None:
        self._parts.append(cosine_per_sample(ref, cand))

    def values(self) -> np.ndarray:
        return np.concatenate(self._parts) if self._parts else np.empty(0)

    def compute(self) -> dict[str, float]:
        return cosine_summary(self.values())
