"""Variable projection for every channel of a site at once (the fast path behind swapper.fit.channel).

Transformation: the same per-channel problem as :mod:`swapper.fit.varpro`,

    min over (a, b, c, d) of  Σ w·(y − a·g(b·x + c) − d)²,

solved for all channels of a site together with row-wise numpy on (rows, n)
arrays instead of one ``scipy.optimize.least_squares`` call per channel:

- (a, d) are eliminated in closed form for every row (:func:`outer_solve_rows`,
  the row-wise twin of :func:`swapper.fit.varpro.outer_solve`): variable
  projection (Golub & Pereyra 1973).
- (b, c) are searched in the standardised coordinates of :mod:`swapper.fit.channel`
  (u = q₀·v + q₁ with v the standardised x) by Levenberg–Marquardt
  (Levenberg 1944; Marquardt 1963, with his diagonal scaling) on the
  projected residual, using Kaufman's (1975) Jacobian −P⊥·∂(a·g(u))/∂q, where
  P⊥ projects out the solved columns [z, 1] in the w-weighted inner product.
  With one or two free parameters the damped normal equations are 2×2 and are
  solved in closed form per row.
- A step is accepted per row only when it lowers that row's projected cost;
  λ shrinks ×0.3 after an accepted step and grows ×10 after a rejected one.
  A row stops when the relative decrease falls below ``FTOL``, the step below
  ``XTOL``, λ passes ``LAMBDA_MAX``, its Jacobian vanishes (e.g. a ReLU that
  never opens) or after ``MAX_ITER`` iterations; converged rows leave the
  working set, so late iterations cost only what is left.
- Trial points are clipped to the box of :mod:`swapper.fit.varpro` (``lo``, ``hi``).

This module only searches; the never-worse-than-start comparison, the
degenerate-data guards and the per-channel scipy fallback live in
:mod:`swapper.fit.channel`.
"""
from __future__ import annotations

import logging
from dataclasses import dataclass

import numpy as np

from swapper.fit.common import Func, apply_g
from swapper.fit.varpro import slope_rows

logger = logging.getLogger(__name__)

MAX_ITER = 40  # per row; the test models converge in 5-20 (measured on the demo and scale models)
FTOL = 1e-10  # relative cost decrease that counts as converged
XTOL = 1e-10  # relative step size that counts as converged
LAMBDA0, LAMBDA_MAX = 1e-3, 1e10  # Marquardt's damping: start, give up (a flat spot or a kink)
FD_STEP = 1e-6  # central-difference step (relative to max(1, |u|)) when g' is not given

# status codes of LMResult.status
CONVERGED, FLAT, CAPPED, BAD_START = 0, 1, 2, 3


def wsum(A: np.ndarray, w: np.ndarray) -> np.ndarray:
    """Row-wise weighted sums of A (rows, n): Σⱼ A[i, j]·w[j] for shared weights (n,), Σⱼ A[i, j]·w[i, j] for (rows, n)."""
    return A @ w if w.ndim == 1 else _dot(A, w)


def row_weights(w: np.ndarray, rows) -> np.ndarray:
    """The weights of ``rows``: shared weights (n,) as they are, per-row weights (rows, n) indexed."""
    return w if w.ndim == 1 else w[rows]


def outer_solve_rows(Z, Y, w, a0, d0, fa: bool, fd: bool, positive_a: bool, z_floor: float = 0.0,
                     nonzero_a: bool = False):
    """Row-wise weighted LS of Y on [Z, 1] over the free ones of (a, d). Returns (a, d, solved), each (rows,).

    The rules for a are :func:`swapper.fit.varpro.slope_rows`: a is kept at ``a0``
    where z is constant (spread below 1e-6 of its RMS or below ``z_floor``);
    with ``positive_a`` (``nonzero_a``) a (|a|) is clamped to its floor (then counted as not solved).
    """
    rows = Z.shape[0]
    if not fa:
        d = wsum(Y - a0[:, None] * Z, w) if fd else d0.copy()
        return a0.copy(), d, np.zeros(rows, dtype=bool)
    with np.errstate(all="ignore"):  # constant or overflowing rows are caught by `solved`/finiteness
        if fd:
            my, mz = wsum(Y, w), wsum(Z, w)
            dy = Y - my[:, None]
            dz = Z - mz[:, None]
            wdz = dz * w
            szz, szy, syy = (wdz * dz).sum(axis=1), (wdz * dy).sum(axis=1), wsum(dy * dy, w)
            rms2 = szz + mz * mz
        else:  # regression through the held offset d0
            my = mz = np.zeros(rows)
            yd = Y - d0[:, None]
            wz = Z * w
            szz, szy, syy = (wz * Z).sum(axis=1), (wz * yd).sum(axis=1), wsum(yd * yd, w)
            rms2 = szz
        a, solved = slope_rows(szz, szy, syy, rms2, a0, positive_a, z_floor, nonzero_a)
        d = my - a * mz if fd else d0.copy()
    return a, d, solved


def score_rows(X, Y, w, g: Func, a, b, c, d) -> np.ndarray:
    """Weighted mse of a·g(b·x + c) + d per row; inf where anything overflows."""
    with np.errstate(all="ignore"):
        Z = apply_g(g, b[:, None] * X + c[:, None])
        R = Y - a[:, None] * Z - d[:, None]
        m = wsum(R * R, w)
    return np.where(np.isfinite(m), m, np.inf)


@dataclass
class LMResult:
    """Final standardised parameters q (rows, 2), projected cost and status code per row."""

    q: np.ndarray
    cost: np.ndarray
    status: np.ndarray


def _dot(A: np.ndarray, B: np.ndarray) -> np.ndarray:
    """Row-wise Σ A·B of (rows, n) arrays (batched matmul: one pass, no temporary)."""
    return (A[:, None, :] @ B[:, :, None])[:, 0, 0]


class _Problem:
    """Fixed data of the rows being searched, and the projected cost and Kaufman pieces at any q.

    The search works from weighted moments of z = g(u) against the fixed,
    centred targets (no residual array is formed): with ŷ = y − mean(y) when d
    is solved (else y − d₀), Szz, Szy and Syy give (a, d) as in
    :func:`outer_solve_rows` and the cost Syy − 2a·Szy + a²·Szz. Candidates
    are re-scored exactly by the caller, so the rounding of these sums can
    only steer the search, never the reported mse.
    """

    def __init__(self, V, Y, w, g, dg, a0, d0, fa, fd, positive_a, z_floor, nonzero_a=False):
        self.V, self.g, self.dg = V, g, dg
        self.a0, self.d0 = a0, d0
        self.fa, self.fd, self.positive_a, self.z_floor = fa, fd, positive_a, z_floor
        self.nonzero_a = nonzero_a
        # uniform weights (every calibration fit) need no weighting pass at all
        self.w = w
        self.uniform = w.ndim == 1 and bool(np.all(w == w[0]))
        self.rowwise = w.ndim == 2  # per-row weights: each left operand is weighted once, then reused
        self.my = wsum(Y, w)
        self.Yc = Y - (self.my if fd else d0)[:, None]
        self.syy = self.mean(self.Yc * self.Yc) if not self.uniform else _dot(self.Yc, self.Yc) * w[0]
        self.ones = None

    def take(self, keep: np.ndarray) -> "_Problem":
        out = object.__new__(_Problem)
        out.__dict__.update(self.__dict__)
        for k in ("V", "a0", "d0", "my", "Yc", "syy"):
            setattr(out, k, getattr(self, k)[keep])
        out.w = row_weights(self.w, keep)
        return out

    def mean(self, A: np.ndarray) -> np.ndarray:
        return wsum(A, self.w)

    def wdot(self, A: np.ndarray, B: np.ndarray) -> np.ndarray:
        return _dot(A, B) * self.w[0] if self.uniform else _dot(A * self.w, B)

    def weighted(self, A: np.ndarray):
        """A made ready as the left operand of :meth:`dot` (weighted once when weights are per row)."""
        return A * self.w if self.rowwise else A

    def dot(self, Aw: np.ndarray, B: np.ndarray) -> np.ndarray:
        """Weighted row-wise Σ A·B from ``Aw`` = :meth:`weighted` (A)."""
        return _dot(Aw, B) if self.rowwise else self.wdot(Aw, B)

    def total(self, Aw: np.ndarray) -> np.ndarray:
        """Weighted row sums of A from ``Aw`` = :meth:`weighted` (A)."""
        return Aw.sum(axis=1) if self.rowwise else self.mean(Aw)

    def evaluate(self, q):
        """Projected cost, (a, d, solved) and the Kaufman normal equations (H, grad) at q."""
        with np.errstate(all="ignore"):
            U = q[:, :1] * self.V + q[:, 1:]
            Z = apply_g(self.g, U)
            Zw = self.weighted(Z)
            mz = self.total(Zw) if self.fd else np.zeros(Z.shape[0])
            zz = self.dot(Zw, Z)
            szy = self.dot(Zw, self.Yc)  # the targets are centred when d is solved
            szz = zz - mz * mz if self.fd else zz
            if self.fa:
                a, solved = slope_rows(szz, szy, self.syy, zz, self.a0, self.positive_a, self.z_floor,
                                       self.nonzero_a)
            else:
                a, solved = self.a0, np.zeros(Z.shape[0], dtype=bool)
            cost = np.maximum(self.syy - 2 * a * szy + a * a * szz, 0.0)
            finite = np.isfinite(cost) & np.isfinite(zz)
            cost = np.where(finite, cost, np.inf)
            H, grad = self._kaufman(U, Z, a, solved, mz, szz, szy)
        return cost, H, grad

    def _kaufman(self, U, Z, a, solved, mz, szz, szy):
        # D = a·g'(u)·[v, 1] = ∂(a·g(u))/∂q; the residual is r = ŷ − a·(z − mz) and
        # Kaufman's Jacobian is −P⊥D, P⊥ removing 1 (d solved) and the centred z (a solved)
        if self.dg is not None:
            gp = apply_g(self.dg, U)
        else:
            h = FD_STEP * np.maximum(1.0, np.abs(U))
            gp = (apply_g(self.g, U + h) - apply_g(self.g, U - h)) / (2.0 * h)
        G = a[:, None] * gp
        GV = G * self.V
        GVw, Gw = self.weighted(GV), self.weighted(G)
        H = np.empty((U.shape[0], 2, 2))
        H[:, 0, 0] = self.dot(GVw, GV)
        H[:, 0, 1] = H[:, 1, 0] = self.dot(GVw, G)
        H[:, 1, 1] = self.dot(Gw, G)
        dz = np.stack([self.dot(GVw, Z), self.dot(Gw, Z)], axis=1)  # <D_j, z>
        dy = np.stack([self.dot(GVw, self.Yc), self.dot(Gw, self.Yc)], axis=1)  # <D_j, ŷ>
        d1 = np.stack([self.total(GVw), self.total(Gw)], axis=1) if self.fd else np.zeros_like(dz)  # <D_j, 1>
        dzc = dz - mz[:, None] * d1  # <D_j, z − mz>
        grad = dy - a[:, None] * dzc  # <D_j, r>
        if self.fd:  # <1, r> = 0: only H loses the direction 1
            H -= d1[:, :, None] * d1[:, None, :]
        use = solved & (szz > 0)
        sz = np.sqrt(np.where(use, szz, 1.0))
        e = np.where(use[:, None], dzc / sz[:, None], 0.0)  # <D_j, e> for e the unit centred z
        er = np.where(use, (szy - a * szz) / sz, 0.0)  # <e, r>
        H -= e[:, :, None] * e[:, None, :]
        grad -= e * er[:, None]
        bad = ~(np.isfinite(H).all(axis=(1, 2)) & np.isfinite(grad).all(axis=1) & (np.abs(H).max(axis=(1, 2)) < 1e100))
        H[bad] = 0.0  # overflowing Jacobian: report a flat spot, the best so far stays
        grad[bad] = 0.0
        return H, grad


def lm_projected(V, Y, w, g: Func, dg: Func | None, q0, free: tuple[bool, bool], lo, hi, a0, d0, *,
                 fa: bool, fd: bool, positive_a: bool, z_floor: float, nonzero_a: bool = False,
                 max_iter: int = MAX_ITER,
                 lam0: float | np.ndarray = LAMBDA0, ftol: float = FTOL) -> LMResult:
    """Levenberg–Marquardt on the projected residual of every row of u = q₀·V + q₁.

    ``V``, ``Y`` are (rows, n); ``w`` (n,) weights summing to 1 (or (rows, n), each row summing to 1); ``q0``,
    ``lo``, ``hi`` (rows, 2); ``free`` says which of (q₀, q₁) move (held ones
    stay at ``q0``); ``a0``, ``d0`` (rows,) are the held/fallback values of the
    linear parameters. ``dg`` is g's derivative (central differences when None).
    ``lam0`` is the initial damping, one value or one per row; ``ftol`` the
    relative cost decrease below which a row counts as converged.
    """
    rows = V.shape[0]
    fm = np.array(free, dtype=bool)
    both = fm[:, None] & fm[None, :]
    q = np.array(q0, dtype=np.float64)
    lo, hi = np.asarray(lo, dtype=np.float64), np.asarray(hi, dtype=np.float64)
    lam = np.array(np.broadcast_to(np.asarray(lam0, dtype=np.float64), (rows,)))
    status = np.full(rows, CAPPED)
    prob = _Problem(V, Y, w, g, dg, np.asarray(a0, float), np.asarray(d0, float), fa, fd, positive_a, z_floor,
                    nonzero_a)
    cost, H, grad = prob.evaluate(q)
    status[~np.isfinite(cost)] = BAD_START  # g overflows at the start: left to the scipy path
    active = np.isfinite(cost)
    idx = np.arange(rows)  # rows of the working set (compacted as rows finish)
    wq, wlo, whi, wlam, wcost, wH, wgrad = q, lo, hi, lam, cost, H, grad
    wact = active.copy()
    for _ in range(max_iter):
        if not wact.any():
            break
        if wact.sum() < 0.75 * wact.size:  # drop finished rows once they are a quarter of the work
            keep = wact
            prob, idx = prob.take(keep), idx[keep]
            wq, wlo, whi, wlam, wcost, wH, wgrad = (x[keep] for x in (wq, wlo, whi, wlam, wcost, wH, wgrad))
            wact = wact[keep]
        Hm = np.where(both[None], wH, 0.0)
        gm = np.where(fm[None, :], wgrad, 0.0)
        flat = ~(np.abs(Hm).max(axis=(1, 2)) > 0)  # also true for NaN
        step = _damped_step(Hm, gm, wlam, fm)
        q_try = np.where(fm[None, :], np.clip(wq + step, wlo, whi), wq)
        cost_t, H_t, grad_t = prob.evaluate(q_try)
        acc = wact & (cost_t < wcost) & ~flat
        small_drop = acc & (wcost - cost_t <= ftol * wcost)
        dq = np.abs(q_try - wq).max(axis=1)
        small_step = acc & (dq <= XTOL * (XTOL + np.abs(wq).max(axis=1)))
        wq = np.where(acc[:, None], q_try, wq)
        wcost = np.where(acc, cost_t, wcost)
        wH = np.where(acc[:, None, None], H_t, wH)
        wgrad = np.where(acc[:, None], grad_t, wgrad)
        wlam = np.where(acc, np.maximum(wlam * 0.3, 1e-12), np.where(wact, wlam * 10.0, wlam))
        done = wact & (flat | small_drop | small_step | (wlam > LAMBDA_MAX) | (wcost == 0))
        status[idx[done]] = np.where(flat[done], FLAT, CONVERGED)
        q[idx] = wq
        cost[idx] = wcost
        wact = wact & ~done
    return LMResult(q=q, cost=cost, status=status)


def _damped_step(H, grad, lam, fm: np.ndarray) -> np.ndarray:
    """Solve (H + λ·diag(H))·δ = grad per row in closed form (1 or 2 free parameters)."""
    diag = np.stack([H[:, 0, 0], H[:, 1, 1]], axis=1)
    # Marquardt scaling by diag(H); a floor keeps a vanishing diagonal entry solvable
    scale = np.maximum(diag, 1e-12 * diag.max(axis=1, keepdims=True) + 1e-300)
    A00 = H[:, 0, 0] + lam * scale[:, 0]
    A11 = H[:, 1, 1] + lam * scale[:, 1]
    A01 = H[:, 0, 1]
    step = np.zeros_like(grad)
    with np.errstate(all="ignore"):
        if fm.all():
            det = A00 * A11 - A01 * A01
            step[:, 0] = (A11 * grad[:, 0] - A01 * grad[:, 1]) / det
            step[:, 1] = (A00 * grad[:, 1] - A01 * grad[:, 0]) / det
        elif fm[0]:
            step[:, 0] = grad[:, 0] / A00
        elif fm[1]:
            step[:, 1] = grad[:, 1] / A11
    return np.where(np.isfinite(step), step, 0.0)
