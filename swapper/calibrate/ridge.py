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

ROWS = 4096  # rows widened to float64 at a time (4096 × 1537 columns: 50 MB)
# λ / mean(diag XᵀX); the smallest is "almost plain least squares"
DEFAULT_FACTORS = (1e-8, 1e-6, 1e-4, 1e-3, 1e-2, 3e-2, 1e-1, 3e-1, 1.0, 10.0, 100.0)


class FoldedGram:
    """One GramAccumulator per cross-validation fold, over rows [x, 1] -> y."""

    def __init__(self, folds: int, inputs: int):
        self.dim = inputs + 1  # + the ones column of the bias
        self.parts = [GramAccumulator(self.dim) for _ in range(folds)]

    def update(self, X: np.ndarray, Y: np.ndarray, fold_of_row: np.ndarray) -> None:
        """Add rows ``X`` (n, inputs) with targets ``Y`` (n, outputs); ``fold_of_row`` (n,) ints.

        Rows are widened to float64 ``ROWS`` at a time, fold by fold (one
        stable sort of the rows by fold), so a batch of many tokens never
        exists as one float64 copy: memory stays at a block, whatever the batch.
        """
        X, Y = np.asarray(X), np.asarray(Y)
        fold_of_row = np.asarray(fold_of_row)
        order = np.argsort(fold_of_row, kind="stable")
        bounds = np.searchsorted(fold_of_row[order], np.arange(len(self.parts) + 1))
        for k, part in enumerate(self.parts):
            rows = order[bounds[k]:bounds[k + 1]]
            for i in range(0, rows.size, ROWS):
                block = rows[i:i + ROWS]
                Xa = np.empty((block.size, self.dim))
                Xa[:, :-1] = X[block]
                Xa[:, -1] = 1.0
                part.update(Xa, np.asarray(Y[block], dtype=np.float64))

    def without(self, part: int) -> FoldedGram:
        """A view of the other parts (the same accumulators): the folds once ``part`` is held out."""
        view = FoldedGram.__new__(FoldedGram)
        view.dim, view.parts = self.dim, [p for k, p in enumerate(self.parts) if k != part]
        return view

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
        self._prior: tuple[np.ndarray, np.ndarray] | None = None  # (prior, Qᵀ·prior) of the last solve

    def _qtp(self, prior: np.ndarray) -> np.ndarray:
        # Qᵀ·prior does not depend on λ: computed once for the whole grid (the same prior every call)
        if self._prior is None or self._prior[0] is not prior:
            self._prior = (prior, self.vecs.T @ prior)
        return self._prior[1]

    def solve(self, lam: float, prior: np.ndarray) -> np.ndarray:
        """θ(lam) toward ``prior`` (inputs + 1, outputs); ``lam`` must be > 0."""
        return self.solve_many([lam], prior)[0]

    def solve_many(self, lams, prior: np.ndarray) -> np.ndarray:
        """θ(λ) for every λ of ``lams`` (each > 0), stacked on a first axis: one product with Q for all."""
        lams = np.asarray(lams, dtype=np.float64).reshape(-1)
        if not (lams > 0).all():
            raise ValueError(f"RidgePath needs lam > 0, got {lams}")
        qtp = self._qtp(prior)
        coords = np.concatenate([(self.qty + lam * qtp) / (self.vals + lam)[:, None] for lam in lams], axis=1)
        thetas = self.vecs @ coords  # (inputs + 1, len(lams) · outputs)
        return np.moveaxis(thetas.reshape(thetas.shape[0], lams.size, -1), 1, 0)


def _scale(acc: GramAccumulator) -> float:
    s = float(np.trace(acc.xtx)) / acc.dim
    return s if s > 0 else 1.0


def solve_on_all(gram: FoldedGram, factor: float, prior: np.ndarray) -> np.ndarray:
    """θ toward ``prior`` on every part of ``gram``, with λ = ``factor`` · mean(diag XᵀX) of all of them."""
    total = gram.total()
    return ridge_toward_prior(total, factor * _scale(total), prior)


def sse(acc: GramAccumulator, theta: np.ndarray) -> float:
    """‖X·θ − Y‖² over the rows of ``acc`` (0 when it has none)."""
    return _sse(acc, theta) if acc.xty is not None else 0.0


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
    errors = np.zeros(len(factors))
    for k in active:  # one fold at a time: its eigendecomposition, then every factor of the grid at once
        train = gram.total(skip=k)
        thetas = RidgePath(train).solve_many([f * _scale(train) for f in factors], prior)
        errors += [_sse(gram.parts[k], theta) for theta in thetas]
    best_f, best_err = None, math.inf
    for f, err in zip(factors, errors):  # grid order breaks ties toward the first (smallest) factor
        if err < best_err:
            best_f, best_err = f, float(err)
    lam = best_f * _scale(total)
    cv_mse = best_err / count
    if not cv_mse < current_mse:
        return RidgeChoice(best_f, lam, cv_mse, current_mse, False, current, total.n)
    return RidgeChoice(best_f, lam, cv_mse, current_mse, True, ridge_toward_prior(total, lam, prior), total.n)


class GramAccumulator:
    """Running XᵀX, Xᵀy, yᵀy and n of rows (X, y) fed in batches.

    ``y`` may be a vector or an (n, k) matrix (k right-hand sides); the first
    update fixes which.
    """

    def __init__(self, dim: int):
        if dim < 1:
            raise ValueError(f"dim must be >= 1, got {dim}")
        self.dim = int(dim)
        self.reset()

    def reset(self) -> None:
        """Back to no rows."""
        self.xtx = np.zeros((self.dim, self.dim))
        self.xty: np.ndarray | None = None
        self.yty: np.ndarray | float = 0.0
        self.n = 0

    def update(self, X: np.ndarray, y: np.ndarray, weights: np.ndarray | None = None) -> None:
        """Add rows ``X`` (n, dim) with targets ``y`` (n,) or (n, k), optionally weighted per row."""
        X = np.asarray(X, dtype=np.float64)
        y = np.asarray(y, dtype=np.float64)
        if X.ndim != 2 or X.shape[1] != self.dim:
            raise ValueError(f"X must be (n, {self.dim}), got {X.shape}")
        if y.shape[0] != X.shape[0] or y.ndim not in (1, 2):
            raise ValueError(f"y must be (n,) or (n, k) with n = {X.shape[0]}, got {y.shape}")
        if self.xty is not None and self.xty.shape[1:] != y.shape[1:]:
            raise ValueError(f"y shape {y.shape[1:]} differs from earlier batches {self.xty.shape[1:]}")
        if weights is not None:
            w = np.asarray(weights, dtype=np.float64).reshape(-1)
            Xw = X * w[:, None]
            yw = y * (w[:, None] if y.ndim == 2 else w)
        else:
            Xw, yw = X, y
        self.xtx += Xw.T @ X
        xty = Xw.T @ y
        self.xty = xty if self.xty is None else self.xty + xty
        self.yty = self.yty + np.einsum("n...,n...->...", yw, y)
        self.n += X.shape[0]

    def merge(self, other: "GramAccumulator") -> None:
        """Add the rows ``other`` has seen."""
        if other.dim != self.dim:
            raise ValueError("can only merge accumulators of the same dim")
        if other.xty is None:
            return
        if self.xty is not None and self.xty.shape != other.xty.shape:
            raise ValueError("accumulators disagree on the shape of y")
        self.xtx = self.xtx + other.xtx
        self.xty = other.xty.copy() if self.xty is None else self.xty + other.xty
        self.yty = self.yty + other.yty
        self.n += other.n

    def solve(self, ridge: float = 0.0, prior: np.ndarray | None = None) -> np.ndarray:
        """β = argmin ‖Xβ − y‖² + ridge·‖β − prior‖² (prior defaults to 0).

        With ridge = 0 this is the minimum-norm least-squares solution (via
        lstsq on the normal equations: pinv(XᵀX)·Xᵀy = pinv(X)·y), so a
        rank-deficient X gives a finite answer. Note the normal equations square
        the condition number of X; fine for the small, standardised designs
        swapper builds.
        """
        if self.xty is None:
            raise ValueError("no rows accumulated")
        if ridge < 0:
            raise ValueError(f"ridge must be >= 0, got {ridge}")
        p = np.zeros(self.xty.shape) if prior is None else np.asarray(prior, dtype=np.float64)
        if p.ndim == 1 and self.xty.ndim == 2:
            p = p[:, None]  # one prior shared by every right-hand side
        p = np.broadcast_to(p, self.xty.shape)
        A = self.xtx + ridge * np.eye(self.dim)
        rhs = self.xty + ridge * p
        if ridge > 0:
            try:
                return np.linalg.solve(A, rhs)
            except np.linalg.LinAlgError:
                pass  # numerically singular despite the ridge: fall through to lstsq
        return np.linalg.lstsq(A, rhs, rcond=None)[0]

    def sse(self, beta: np.ndarray) -> np.ndarray | float:
        """Sum of squared residuals ‖Xβ − y‖² of ``beta``, from the accumulated sums."""
        if self.xty is None:
            raise ValueError("no rows accumulated")
        beta = np.asarray(beta, dtype=np.float64)
        # βᵀ(XᵀX)β per column as one matmul and a column sum: the three-operand einsum
        # it replaces took ~8x longer on a (289, 32) β (2.0 ms vs 0.24 ms; same values to 2e-14)
        quad = np.sum(beta * (self.xtx @ beta), axis=0)
        return self.yty - 2 * np.einsum("i...,i...->...", beta, self.xty) + quad
