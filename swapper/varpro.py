"""Variable projection for one channel of y ≈ a·g(b·x + c) + d (the numerics behind swapper.fit).

Transformation: for fixed (b, c), the linear (a, d) are the weighted least
squares regression of y on [g(b·x + c), 1] (:func:`outer_solve`); the
projected residual over (b, c) alone (Golub & Pereyra 1973), with Kaufman's
(1975) Jacobian, is minimised by ``scipy.optimize.least_squares`` in
standardised, boxed coordinates (:class:`Projected`). The safeguards and the
public API (never worse than the start, degenerate data) are in
:mod:`swapper.fit`, whose docstring states the full method. The same problem
for all channels of a site at once is :mod:`swapper.varpro_batched`.
"""
from __future__ import annotations

from typing import Callable

import numpy as np
from scipy.optimize import least_squares

Func = Callable[[np.ndarray], np.ndarray]

BOX = 1e3  # bound on |β| and |γ| (units of g's argument), widened to 2x the start if needed
DEGENERATE = 1e-6  # std below this fraction of the RMS = constant (float32 resolves ~1e-7)
A_FLOOR = 1e-6  # with positive_a: a >= A_FLOOR x the natural slope scale sqrt(var y / var z)
MAX_NFEV = 200  # per channel; converged fits take far fewer
BAD_RESIDUAL = 1e50  # residual returned where g overflows, so the optimiser backs off


def apply_g(g: Func, u: np.ndarray) -> np.ndarray:
    """g(u) as float64, overflow warnings silenced."""
    with np.errstate(all="ignore"):  # overflow is caught by the callers' finiteness checks
        return np.asarray(g(u), dtype=np.float64)


def y_stats(y, w):
    """Weighted mean of y, w·(y − mean) and the variance: fixed across a channel's iterations."""
    my = float(w @ y)
    wdy = w * (y - my)
    return my, wdy, float(wdy @ (y - my))


def outer_solve(z, y, w, a0, d0, fa, fd, positive_a, z_floor=0.0, ystats=None):
    """Weighted LS of y on [z, 1] over the free ones of (a, d). Returns (a, d, a_solved).

    z counts as constant (a not identified) when its spread is below 1e-6 of
    its RMS or below ``z_floor``: a tiny-but-varying z (e.g. b ≈ 0) would
    otherwise need an astronomically large a.
    """
    if not fa:
        d = float(w @ (y - a0 * z)) if fd else d0
        return a0, d, False
    if fd:
        my, wdy, syy = ystats if ystats is not None else y_stats(y, w)
        mz = float(w @ z)
        dz = z - mz
        szz, szy = float(w @ (dz * dz)), float(dz @ wdy)
        rms2 = szz + mz * mz
    else:  # regression through the held offset d0
        mz = my = 0.0
        szz, syy = float(w @ (z * z)), float(w @ ((y - d0) ** 2))
        szy = float(w @ (z * (y - d0)))
        rms2 = szz
    solved = szz > (DEGENERATE**2) * rms2 and szz > z_floor**2 and szz > 0
    a = szy / szz if solved else a0
    if positive_a:
        floor = A_FLOOR * (np.sqrt(syy / szz) if solved and syy > 0 else abs(a0))
        if a < floor:
            a, solved = floor, False  # active bound: a no longer moves with (b, c)
    d = my - a * mz if fd else d0
    return float(a), float(d), solved


class Projected:
    """The variable-projection problem of one channel over its free (b, c)."""

    def __init__(self, x, y, w, g, dg, init, free, positive_a, mx, sx, z_floor):
        self.y, self.w, self.sw, self.g, self.dg = y, w, np.sqrt(w), g, dg
        self.z_floor = z_floor
        self.a0, self.b0, self.c0, self.d0 = init
        self.fa, self.fd, self.positive_a = "a" in free, "d" in free, positive_a
        b0, c0 = self.b0, self.c0
        # standardised parameters: the argument u = b·x + c written as p·v + offset
        if "b" in free and "c" in free:
            xs = (x - mx) / sx
            self.p0 = np.array([b0 * sx, c0 + b0 * mx])
            self.dirs = np.stack([xs, np.ones_like(x)], axis=1)
            self._u = lambda p: p[0] * xs + p[1]
            self.to_bc = lambda p: (p[0] / sx, p[1] - p[0] * mx / sx)
        elif "b" in free:
            xr = x / sx
            self.p0 = np.array([b0 * sx])
            self.dirs = xr[:, None]
            self._u = lambda p: p[0] * xr + c0
            self.to_bc = lambda p: (p[0] / sx, c0)
        else:
            self.p0 = np.array([c0 + b0 * mx])
            self.dirs = np.ones((x.size, 1))
            self._u = lambda p: b0 * x + (p[0] - b0 * mx)
            self.to_bc = lambda p: (b0, p[0] - b0 * mx)
        # second start: the initial shape applied to the standardised data (the
        # start values are fitted for roughly unit-scale inputs, see starting_params);
        # solve() descends from both and fit_channel keeps the better
        self.p1 = {2: np.array([b0, c0]), 1: np.array([b0])}.get(self.p0.size) if "b" in free else None
        if self.p1 is not None and np.allclose(self.p1, self.p0, rtol=0.5, atol=0.5):
            self.p1 = None  # data already about unit scale: one start is enough
        half = np.maximum(BOX, 2 * np.abs(self.p0))
        if self.p1 is not None:
            half = np.maximum(half, 2 * np.abs(self.p1))
        self.bounds = (-half, half)
        self._key, self._val = None, None
        self.nfev = 0
        self.ystats = y_stats(y, w)

    def _eval(self, p):
        key = p.tobytes()
        if key != self._key:
            with np.errstate(all="ignore"):
                u = self._u(p)
                z = apply_g(self.g, u)
            self._val = (u, None, 0.0, 0.0, False)  # g overflowed: a point to back off from
            if np.isfinite(z).all():
                with np.errstate(all="ignore"):
                    a, d, solved = outer_solve(
                        z, self.y, self.w, self.a0, self.d0, self.fa, self.fd, self.positive_a,
                        self.z_floor, self.ystats,
                    )
                if np.isfinite([a, d]).all():
                    self._val = (u, z, a, d, solved)
            self._key = key
        return self._val

    def residual(self, p):
        u, z, a, d, _ = self._eval(p)
        if z is not None:
            with np.errstate(all="ignore"):
                r = self.sw * (self.y - a * z - d)
                ok = np.isfinite(r @ r)  # the cost must be finite too, not just each residual
            if ok:
                return r
        return np.full(u.size, BAD_RESIDUAL)

    def jacobian(self, p):
        # Kaufman's simplification of the Golub–Pereyra derivative: −P⊥·∂(Φα)/∂p,
        # with P⊥ projecting out the columns of Φ = [z, 1] that were solved for
        u, z, a, d, solved = self._eval(p)
        zero = np.zeros_like(self.dirs)
        if z is None:
            return zero
        with np.errstate(all="ignore"):
            J = (-a * self.sw * apply_g(self.dg, u))[:, None] * self.dirs
        if not np.abs(J).max() < 1e100:  # also false for NaN
            return zero  # JᵀJ would overflow: report a flat spot, the best so far stays
        # project out the solved columns, orthonormalised by hand (at most two;
        # sw has unit norm because the weights sum to 1)
        if self.fd:
            J -= np.outer(self.sw, self.sw @ J)
        if solved:
            q = self.sw * z
            if self.fd:
                q -= self.sw * (self.sw @ q)
            norm = np.sqrt(q @ q)
            if norm > 1e-12:
                q /= norm
                J -= np.outer(q, q @ J)
        return J

    def solve(self) -> list[tuple[float, float]]:
        """Optimised (b, c) from each start (a better-looking start can still be the wrong basin)."""
        found = []
        for p0 in [self.p0] + ([self.p1] if self.p1 is not None else []):
            # trf sizes its first trust region by |p0|: snap near-zero starts to 0
            # (then it uses 1) so a start like b = 1e-100 does not crawl or overflow
            p0 = np.where(np.abs(p0) < 1e-6, 0.0, p0)
            # near-overflowing g (exp-like) can overflow inside trf's own products;
            # those points are rejected by the cost check, so silence the noise
            with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
                res = least_squares(
                    self.residual,
                    p0,
                    jac=self.jacobian if self.dg is not None else "2-point",
                    bounds=self.bounds,
                    method="trf",
                    max_nfev=MAX_NFEV,
                )
            found.append(self.to_bc(res.x))
            self.nfev += res.nfev
        return found
