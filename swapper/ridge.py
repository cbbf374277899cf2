"""Ridge regression toward a prior from accumulated Grams, λ chosen by K-fold CV.

Transformation: per-fold sums XᵀX, XᵀY, YᵀY of rows [x, 1] -> y become

    θ(λ) = argmin ‖X·θ − Y‖² + λ·‖θ − prior‖²  =  (XᵀX + λI)⁻¹ (XᵀY + λ·prior)

with λ = f · mean(diag(XᵀX)) and f the grid factor whose fits on K − 1 folds
have the smallest error on the held-out fold. The solution on all folds is
kept only if its held-out error beats the current θ's (:func:`choose_ridge`).
Only the Grams are held, so memory depends on the row width, never on the
number of rows.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .observe import GramAccumulator

# λ / mean(diag XᵀX); the smallest is "almost plain least squares"
DEFAULT_FACTORS = (1e-8, 1e-6, 1e-4, 1e-3, 1e-2, 3e-2, 1e-1, 3e-1, 1.0, 10.0, 100.0)


class FoldedGram:
    """One GramAccumulator per cross-validation fold, over rows [x, 1] -> y."""

    def __init__(self, folds: int, inputs: int):
        self.dim = inputs + 1  # + the ones column of the bias
        self.parts = [GramAccumulator(self.dim) for _ in range(folds)]

    def update(self, X: np.ndarray, Y: np.ndarray, fold_of_row: np.ndarray) -> None:
        """Add rows ``X`` (n, inputs) with targets ``Y`` (n, outputs); ``fold_of_row`` (n,) ints."""
        Xa = np.empty((X.shape[0], self.dim))
        Xa[:, :-1] = X
        Xa[:, -1] = 1.0
        Y = np.asarray(Y, dtype=np.float64)
        for k, part in enumerate(self.parts):
            rows = np.nonzero(fold_of_row == k)[0]
            if rows.size:
                part.update(Xa[rows], Y[rows])

    def total(self, skip: int | None = None) -> GramAccumulator:
        """All folds merged (except ``skip``)."""
        acc = GramAccumulator(self.dim)
        for k, part in enumerate(self.parts):
            if k != skip:
                acc.merge(part)
        return acc

    def held_bytes(self) -> int:
        """Bytes of the arrays the accumulators hold (constant in the number of rows)."""
        return sum(p.xtx.nbytes + (0 if p.xty is None else p.xty.nbytes) + np.asarray(p.yty).nbytes
                   for p in self.parts)


def ridge_toward_prior(acc: GramAccumulator, lam: float, prior: np.ndarray) -> np.ndarray:
    """θ = argmin ‖Xθ − Y‖² + lam·‖θ − prior‖² from accumulated sums, all right-hand sides at once."""
    return acc.solve(lam, prior)


class RidgePath:
    """Many λ of the same ridge problem from one eigendecomposition XᵀX = QΛQᵀ.

    θ(λ) = Q·diag(1/(Λ + λ))·Qᵀ·(XᵀY + λ·prior): one O(p³) factorisation per
    Gram, then matrix products per λ (the CV grid tries every λ on every fold).
    """

    def __init__(self, acc: GramAccumulator):
        vals, self.vecs = np.linalg.eigh(acc.xtx)
        self.vals = np.clip(vals, 0.0, None)  # XᵀX is PSD; rounding can leave tiny negatives
        self.qty = self.vecs.T @ acc.xty

    def solve(self, lam: float, prior: np.ndarray) -> np.ndarray:
        """θ(lam) toward ``prior`` (inputs + 1, outputs); ``lam`` must be > 0."""
        if not lam > 0:
            raise ValueError(f"RidgePath needs lam > 0, got {lam}")
        return self.vecs @ ((self.qty + lam * (self.vecs.T @ prior)) / (self.vals + lam)[:, None])


def _scale(acc: GramAccumulator) -> float:
    s = float(np.trace(acc.xtx)) / acc.dim
    return s if s > 0 else 1.0


def _sse(acc: GramAccumulator, theta: np.ndarray) -> float:
    # The Gram form can dip below 0 by rounding when the fit is near perfect.
    return max(float(np.sum(acc.sse(theta))), 0.0)


@dataclass
class RidgeChoice:
    """The outcome of :func:`choose_ridge` for one layer."""

    factor: float  # chosen λ / mean(diag XᵀX)
    lam: float  # λ used for the final solve on all folds
    cv_mse: float  # held-out MSE of the chosen factor
    current_mse: float  # MSE of the current weights on the same rows
    accepted: bool
    theta: np.ndarray  # the refitted [W; bias] when accepted, else the current one
    rows: int


def choose_ridge(gram: FoldedGram, prior: np.ndarray, current: np.ndarray,
                 factors=DEFAULT_FACTORS) -> RidgeChoice:
    """Pick λ by K-fold CV (smallest held-out error) and solve on all folds; keep it only if it beats ``current``."""
    total = gram.total()
    outputs = current.shape[1]
    count = max(total.n * outputs, 1)
    current_mse = _sse(total, current) / count
    active = [k for k, p in enumerate(gram.parts) if p.n > 0]
    if len(active) < 2:
        return RidgeChoice(float("nan"), float("nan"), float("nan"), current_mse, False, current, total.n)
    trains = {k: gram.total(skip=k) for k in active}
    paths = {k: RidgePath(trains[k]) for k in active}
    best_f, best_err = None, math.inf
    for f in factors:  # grid order breaks ties toward the first (smallest) factor
        err = 0.0
        for k in active:
            theta = paths[k].solve(f * _scale(trains[k]), prior)
            err += _sse(gram.parts[k], theta)
        if err < best_err:
            best_f, best_err = f, err
    lam = best_f * _scale(total)
    cv_mse = best_err / count
    if not cv_mse < current_mse:
        return RidgeChoice(best_f, lam, cv_mse, current_mse, False, current, total.n)
    return RidgeChoice(best_f, lam, cv_mse, current_mse, True, ridge_toward_prior(total, lam, prior), total.n)
