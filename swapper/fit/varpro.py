"""Variable projection for one channel of y ≈ a·g(b·x + c) + d (the numerics behind swapper.fit.channel).

Transformation: for fixed (b, c), the linear (a, d) are the weighted least
squares regression of y on [g(b·x + c), 1] (:func:`outer_solve`); the
projected residual over (b, c) alone (Golub & Pereyra 1973), with Kaufman's
(1975) Jacobian, is minimised by ``scipy.optimize.least_squares`` in
standardised, boxed coordinates (:class:`Projected`). The safeguards and the
public API (never worse than the start, degenerate data) are in
:mod:`swapper.fit.channel`, whose docstring states the full method. The same problem
for all channels of a site at once is :mod:`swapper.fit.varpro_rows`.
The scale of the fitted parameters (exact rewrites on linear pieces of g) is
:mod:`swapper.fit.param_scale`.
"""
from __future__ import annotations

import logging
from dataclasses import dataclass

import numpy as np
from scipy.optimize import least_squares

from swapper.fit.common import apply_g

logger = logging.getLogger(__name__)

BOX = 1e3  # bound on |β| and |γ| (units of g's argument), widened to 2x the start if needed
DEGENERATE = 1e-6  # std below this fraction of the RMS = constant (float32 resolves ~1e-7)
A_FLOOR = 1e-6  # with positive_a (nonzero_a): a (|a|) >= A_FLOOR x the natural slope scale sqrt(var y / var z)
MAX_NFEV = 200  # per channel; converged fits take far fewer
BAD_RESIDUAL = 1e50  # residual returned where g overflows, so the optimiser backs off
# Fitted (b, c) keep BETA_MIN <= |β| = |b|·std(x): the cheap functions'
# kinks and curvature sit on a unit scale (±3, ±1, ±2.5, 0..6), so z spreading over < 0.1 of that
# only sees g as a line or a lone kink, reached by b -> 0 with |a| -> inf (measured on the demo
# models: |a| up to 4.5e3; the bounded search found lower mse there). Common practice, no source.
BETA_MIN = 0.1
# and |β| <= BETA_MAX: z spreading over 100 units per std of x sees g's curved part in < 1% of a std,
# a lone hinge reached by b -> inf with a -> 0 (measured: |β| at the 1e3 box edge on 5 of the 59 demo
# and scale-model sites). Common practice, no source.
BETA_MAX = 100.0


def y_stats(y, w):
    """Weighted mean of y, w·(y − mean) and the variance: fixed across a channel's iterations."""
    my = float(w @ y)
    wdy = w * (y - my)
    return my, wdy, float(wdy @ (y - my))


def outer_solve(z, y, w, a0, d0, fa, fd, positive_a, z_floor=0.0, ystats=None, nonzero_a=False):
    """Weighted LS of y on [z, 1] over the free ones of (a, d). Returns (a, d, a_solved).

    The one-row case of :func:`slope_rows` (which states the rules for a);
    the moments are summed here in this path's own order.
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
    a, solved = slope_rows(szz, szy, syy, rms2, a0, positive_a, z_floor, nonzero_a)
    a = float(a)
    d = my - a * mz if fd else d0
    return a, float(d), bool(solved)


def slope_rows(szz, szy, syy, rms2, a0, positive_a: bool, z_floor: float, nonzero_a: bool = False):
    """The slope a of the weighted LS of y on [z, 1] from its moments, per row, and whether it was solved.

    ``szz``, ``szy``, ``syy`` are the weighted (co)variances of z and y
    (about their means when d is free, else about 0 and d₀), ``rms2`` the
    weighted mean square of z. z counts as constant, and a keeps ``a0``, when
    its spread is below ``DEGENERATE`` of its RMS or below ``z_floor``: a
    tiny-but-varying z (e.g. b ≈ 0) would otherwise need an astronomically
    large a. With ``positive_a`` a is clamped to ``A_FLOOR`` × the natural
    slope scale sqrt(syy / szz) (× |a0| where that is undefined); with
    ``nonzero_a`` |a| is, to the one of ±floor nearer the unconstrained slope
    (the sign of a0 when that is 0): the mse is a parabola in a about that
    slope, so the nearer bound is the constrained optimum. A clamped a counts
    as not solved (active bound: a no longer moves with (b, c)).
    """
    with np.errstate(all="ignore"):  # constant or overflowing rows are caught by `solved`/finiteness
        solved = (szz > (DEGENERATE**2) * rms2) & (szz > z_floor**2) & (szz > 0)
        a = np.where(solved, szy / np.where(solved, szz, 1.0), a0)
        if positive_a or nonzero_a:
            ok = solved & (syy > 0)
            floor = A_FLOOR * np.where(ok, np.sqrt(np.where(ok, syy / np.where(ok, szz, 1.0), 0.0)), np.abs(a0))
            if positive_a:
                low = a < floor
                a = np.where(low, floor, a)
            else:
                low = np.abs(a) < floor
                a = np.where(low, np.where(a != 0, np.sign(a), np.sign(a0)) * floor, a)
            solved = solved & ~low
    return a, solved


class Projected:
    """The variable-projection problem of one channel over its free (b, c)."""

    def __init__(self, x, y, w, g, dg, init, free, positive_a, mx, sx, z_floor, nonzero_a=False):
        self.y, self.w, self.sw, self.g, self.dg = y, w, np.sqrt(w), g, dg
        self.z_floor = z_floor
        self.a0, self.b0, self.c0, self.d0 = init
        self.fa, self.fd, self.positive_a, self.nonzero_a = "a" in free, "d" in free, positive_a, nonzero_a
        self.free_b = "b" in free  # then p[0] is β
        b0, c0 = self.b0, self.c0
        # p: the free ones of the standardised (β, γ); solve() descends from
        # both starts and fit_channel keeps the better
        self.std = standardise(x[None, :], *(np.array([v]) for v in (b0, c0, mx, sx)), self.free_b, "c" in free)
        self.fm = np.array([self.free_b, "c" in free])
        self.p0 = self.std.q0[0, self.fm]
        self.p1 = self.std.q1[0, self.fm] if self.std.second[0] else None
        half = self.std.half[0, self.fm]
        if self.free_b and self.p1 is None and not np.isfinite(self.p0).all():
            # an infinite p0 (b0·std(x) past float64) is close to p1 by the shared rule, but
            # not by np.allclose, this path's test before: kept, so its starts do not change
            self.p1 = self.std.q1[0, self.fm]
            half = np.maximum(half, 2 * np.abs(self.p1))
        self.bounds = (-half, half)
        # the argument u = b·x + c as p·v + offset; dirs = ∂u/∂p, C-ordered (the
        # Jacobian's products are summed in the order that layout gives)
        v = self.std.V[0]
        if self.fm.all():
            self.dirs = np.stack([v, np.ones_like(x)], axis=1)
            self._u = lambda p: p[0] * v + p[1]
        elif self.free_b:
            self.dirs = v[:, None]
            self._u = lambda p: p[0] * v + c0
        else:  # γ alone: this path's own order of operations, u = b0·x + (γ − b0·mx)
            self.dirs = np.ones((x.size, 1))
            self._u = lambda p: b0 * x + (p[0] - b0 * mx)
        self._key, self._val = None, None
        self.nfev = 0
        self.ystats = y_stats(y, w)

    def to_bc(self, p):
        """(b, c) of the free standardised parameters p."""
        q = self.std.q0.copy()
        q[0, self.fm] = p
        b, c = self.std.to_bc(q)
        return b[0], c[0]

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
                        self.z_floor, self.ystats, self.nonzero_a,
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

    def _least_squares(self, p0, lo, hi):
        # trf sizes its first trust region by |p0|: snap near-zero starts to 0
        # (then it uses 1) so a start like b = 1e-100 does not crawl or overflow
        p0 = np.clip(np.where(np.abs(p0) < 1e-6, 0.0, p0), lo, hi)
        # near-overflowing g (exp-like) can overflow inside trf's own products;
        # those points are rejected by the cost check, so silence the noise
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            res = least_squares(
                self.residual,
                p0,
                jac=self.jacobian if self.dg is not None else "2-point",
                bounds=(lo, hi),
                method="trf",
                max_nfev=MAX_NFEV,
            )
        self.nfev += res.nfev
        return res

    def solve(self) -> list[tuple[float, float]]:
        """Optimised (b, c) from each start (a better-looking start can still be the wrong basin).

        With b free, an optimum whose |β| left [BETA_MIN, BETA_MAX] is not
        returned; the search goes on from :func:`band_starts` inside the band.
        """
        found = []
        for p0 in [self.p0] + ([self.p1] if self.p1 is not None else []):
            res = self._least_squares(p0, *self.bounds)
            if not self.free_b or in_band(res.x[0]):
                found.append(self.to_bc(res.x))
                continue
            k = res.x.size  # 1 when only b is free (no γ)
            for q in band_starts(np.r_[res.x, 0.0][None, :2])[0]:
                lo, hi = band_box(q[None, :], np.r_[self.bounds[1], 0.0][None, :2])
                end = self._least_squares(q[:k], lo[0, :k], hi[0, :k])
                found.append(self.to_bc(end.x))
        return found


@dataclass(frozen=True)
class Standard:
    """Standardised coordinates of u = b·x + c for rows of x: u = q₀·V + q₁ (see :func:`standardise`)."""

    V: np.ndarray  # (rows, n) standardised x
    q0: np.ndarray  # (rows, 2) the start (β, γ); a held column holds b0 or c0
    q1: np.ndarray  # (rows, 2) the second start
    second: np.ndarray  # (rows,) whether q1 is worth a descent of its own
    half: np.ndarray  # (rows, 2) half-widths of the box on q (inf on a held column)
    b0: np.ndarray
    c0: np.ndarray
    mx: np.ndarray
    sx: np.ndarray
    fb: bool
    fc: bool

    def to_bc(self, q: np.ndarray, i=slice(None)) -> tuple[np.ndarray, np.ndarray]:
        """(b, c) of standardised rows q (rows ``i`` of this set)."""
        mx, sx = self.mx[i], self.sx[i]
        if self.fb and self.fc:
            return q[:, 0] / sx, q[:, 1] - q[:, 0] * mx / sx
        if self.fb:
            return q[:, 0] / sx, self.c0[i].copy()
        return self.b0[i].copy(), q[:, 1] - self.b0[i] * mx


def standardise(X, b0, c0, mx, sx, fb: bool, fc: bool) -> Standard:
    """The search coordinates of u = b·x + c for rows of X with weighted mean mx and std sx > 0.

    With b free, β = b·sx and V = x/sx (centred, γ = c + b·mx, when c is free
    too); with c alone, V = x − mx and γ = c + b·mx, b held. The second start
    is the start shape applied to the standardised data (the start values are
    fitted for roughly unit-scale inputs, see swapper.fit.starting_params),
    used only with b free and where some free coordinate is not within
    0.5 + 0.5·|q0| of the start (data already about unit scale: one start is
    enough). The box is ±``BOX``, widened to twice either start.
    """
    fm = np.array([fb, fc])
    if fb and fc:
        V = (X - mx[:, None]) / sx[:, None]
        q0 = np.stack([b0 * sx, c0 + b0 * mx], axis=1)
    elif fb:
        V = X / sx[:, None]
        q0 = np.stack([b0 * sx, c0], axis=1)
    else:
        V = X - mx[:, None]
        q0 = np.stack([b0, c0 + b0 * mx], axis=1)
    q1 = np.where(fm[None, :], np.stack([b0, c0], axis=1), q0)
    close = np.abs(q1 - q0) <= 0.5 + 0.5 * np.abs(q0)
    second = ~close[:, fm].all(axis=1) if fb else np.zeros(len(q0), dtype=bool)
    half = np.maximum(BOX, 2 * np.abs(q0))
    half = np.where(second[:, None], np.maximum(half, 2 * np.abs(q1)), half)
    half = np.where(fm[None, :], half, np.inf)
    return Standard(V, q0, q1, second, half, b0, c0, mx, sx, fb, fc)


def in_band(beta) -> np.ndarray:
    """|β| within [BETA_MIN, BETA_MAX] (the standardised scale of b, see the module docstring)."""
    return (np.abs(beta) >= BETA_MIN) & (np.abs(beta) <= BETA_MAX)


def band_starts(q: np.ndarray) -> list[np.ndarray]:
    """Restarts inside the band for points q = (β, γ) (rows, 2) outside it: one (k, 2) array per row.

    |β| < BETA_MIN: (±BETA_MIN, γ + {0, ±BETA_MIN}) on both sides of 0 (a
    drift to b -> 0 next to a kink of g continues on either side, measured on
    the demo models the better one is often across 0; γ shifted by a standard
    deviation too, as a start right on the kink can step away into a worse
    basin) and q scaled onto |β| = BETA_MIN (the same kink position in x,
    exact for positively homogeneous g). |β| > BETA_MAX:
    q scaled onto |β| = BETA_MAX.
    """
    out = []
    for beta, gamma in np.asarray(q, dtype=np.float64):
        s = 1.0 if beta >= 0 else -1.0
        if abs(beta) > BETA_MAX:
            out.append(np.array([[s * BETA_MAX, gamma * BETA_MAX / abs(beta)]]))
        else:
            scaled = gamma * BETA_MIN / abs(beta) if beta != 0 else gamma
            near = [[sb * BETA_MIN, gamma + dg * BETA_MIN] for sb in (1.0, -1.0) for dg in (0.0, -1.0, 1.0)]
            out.append(np.array(near + [[s * BETA_MIN, scaled]]))
    return out


def band_box(q: np.ndarray, half: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per-row bounds (lo, hi): β within the band on q's side of 0, γ within ±half."""
    lo, hi = -np.array(half, dtype=np.float64), np.array(half, dtype=np.float64)
    pos = q[:, 0] >= 0
    lo[:, 0] = np.where(pos, BETA_MIN, -BETA_MAX)
    hi[:, 0] = np.where(pos, BETA_MAX, -BETA_MIN)
    return lo, hi
