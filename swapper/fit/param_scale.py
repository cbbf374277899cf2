"""Exact rewrites that keep fitted parameters well scaled (used by :mod:`swapper.fit.channel`).

Scale of the parameters (:func:`linear_pieces`, :func:`affine_params`,
:func:`canonical_params`). Where g is affine, g(z) = m·z + k on a piece P, a
channel whose z = b·x + c stays in P computes the affine map
y = s·x + t with s = a·m·b, t = a·(m·c + k) + d: only s and t matter, and a
fit can drift to b → 0, |a| → ∞ with the same output. Every such channel is
rewritten, exactly on the recorded x range [x_lo, x_hi], as

    a = 1/|m|, |b| = |s|                   the slope goes to b (folded into the producer), the
                                           consumers' weights keep their size
    z range = [lo + μR, lo + (1+μ)R]   on P = [lo, ∞)  (mirrored for (−∞, hi])
              centred in P, |b| shrunk to fit (1+2μ)R ≤ width if needed, for bounded P

with R = |b|·(x_hi − x_lo) and the margin μ = ``MARGIN``. For positively
homogeneous g (g(k·z) = k·g(z), k > 0: ReLU, leaky ReLU, PReLU) the identity
a·g(b·x + c) = (a/k)·g(k·b·x + k·c) rebalances every other channel to |a| = |b|.
"""
from __future__ import annotations

import logging
from dataclasses import dataclass

import numpy as np

from swapper.fit.common import Func, apply_g

logger = logging.getLogger(__name__)

MARGIN = 0.25  # μ: canonical z ranges keep this fraction of their width clear of the piece's ends
PIECE_RANGE, PIECE_STEP = 64.0, 1.0 / 32  # grid on which g's linear pieces are found
PIECE_MIN = 8  # a piece spans at least this many grid steps (no isolated inflection points)


@dataclass(frozen=True)
class Piece:
    """An interval [lo, hi] (ends may be infinite) on which g(z) = slope·z + intercept."""

    lo: float
    hi: float
    slope: float
    intercept: float


def linear_pieces(g: Func) -> list[Piece]:
    """g's affine pieces, found numerically (sorted by position).

    A grid point is linear when g's second difference there is ~0 (1e-9
    relative); runs of at least ``PIECE_MIN`` steps are pieces, checked again
    at the midpoints between grid points. A run reaching the end of the grid
    [−64, 64] extends to infinity when g is still on its line 1e3x further out.
    """
    h = PIECE_STEP
    t = np.arange(-PIECE_RANGE, PIECE_RANGE + h / 2, h)
    v = apply_g(g, t)
    if not np.isfinite(v).all():
        return []
    d2 = np.abs(v[2:] - 2 * v[1:-1] + v[:-2])
    flat = np.r_[False, d2 <= 1e-9 * (1.0 + np.abs(v[1:-1])), False]
    pieces = []
    edges = np.flatnonzero(np.diff(flat.astype(np.int8)))  # run i spans edges[2i]+1 .. edges[2i+1]
    for i0, i1 in zip(edges[::2] + 1, edges[1::2]):
        lo_i, hi_i = i0 - 1, i1 + 1  # the stencil's end points lie on the line too
        if hi_i - lo_i < PIECE_MIN:
            continue
        slope = (v[hi_i] - v[lo_i]) / (t[hi_i] - t[lo_i])
        intercept = v[lo_i] - slope * t[lo_i]

        def on_line(u):
            gu = apply_g(g, u)
            return bool(np.all(np.abs(gu - (slope * u + intercept)) <= 1e-9 * (1.0 + np.abs(gu))))

        if not on_line(t[lo_i:hi_i] + h / 2):
            continue
        lo = -np.inf if lo_i == 0 and on_line(np.array([t[0] * 1e3])) else float(t[lo_i])
        hi = np.inf if hi_i == t.size - 1 and on_line(np.array([t[-1] * 1e3])) else float(t[hi_i])
        pieces.append(Piece(lo, hi, float(slope), float(intercept)))
    return pieces


def is_homogeneous(g: Func) -> bool:
    """True when g(k·z) = k·g(z) for k > 0 on a grid (1e-12 relative): ReLU, leaky ReLU, PReLU."""
    z = np.linspace(-8.0, 8.0, 161)
    gz = apply_g(g, z)
    if not np.isfinite(gz).all() or not np.any(gz):
        return False
    return all(np.allclose(apply_g(g, k * z), k * gz, rtol=1e-12, atol=1e-12 * np.abs(gz).max())
               for k in (0.5, 3.0))


def affine_params(s, t, x_lo, x_hi, piece: Piece):
    """Well-scaled (a, b, c, d) with a·g(b·x + c) + d = s·x + t on [x_lo, x_hi], z kept in ``piece``.

    Vectorised over rows. a = 1/|m| (so g's piece has unit slope after the outer
    scale: a folded into the consumers leaves their weights as they were) and
    the whole slope s goes to b, which folds into the producer row; when a bounded piece is too narrow for that z range, |b| shrinks and a
    grows. Units matter here: balancing |a| = |b| instead would depend on the
    scale of x (x in millivolts vs volts), this form does not.
    Rows with s = 0 or x_lo = x_hi get NaN (no such form is needed there).
    """
    s, t = np.asarray(s, dtype=np.float64), np.asarray(t, dtype=np.float64)
    m, k = piece.slope, piece.intercept
    xr = np.asarray(x_hi, dtype=np.float64) - x_lo
    with np.errstate(all="ignore"):
        mag = np.abs(s)  # |b| when a = 1/|m|: |a·m·b| = |s|
        width = piece.hi - piece.lo
        if np.isfinite(width):
            mag = np.minimum(mag, width / ((1 + 2 * MARGIN) * xr))
        R = mag * xr
        if np.isfinite(piece.lo) and np.isfinite(piece.hi):
            z_lo = 0.5 * (piece.lo + piece.hi) - 0.5 * R
        elif np.isfinite(piece.lo):
            z_lo = piece.lo + MARGIN * R
        elif np.isfinite(piece.hi):
            z_lo = piece.hi - (1 + MARGIN) * R
        else:
            z_lo = -0.5 * R
        b = np.sign(s / m) * mag  # a > 0: the sign of the slope goes to b
        c = z_lo - np.minimum(b * x_lo, b * x_hi)
        a = s / (m * b)
        d = t - a * (m * c + k)
    bad = ~(np.isfinite(a) & np.isfinite(b) & np.isfinite(c) & np.isfinite(d) & (s != 0) & (xr > 0))
    return tuple(np.where(bad, np.nan, v) for v in (a, b, c, d))


def canonical_params(a, b, c, d, x_lo, x_hi, pieces: list[Piece], homogeneous: bool, free: str):
    """Well-scaled parameters computing the same output on [x_lo, x_hi] (vectorised over rows).

    Rows whose z range lies in one sloped piece of g get :func:`affine_params`
    (needs all of a, b, c, d free); otherwise, for positively homogeneous g
    (needs a, b, c free), (a/k, k·b, k·c, d) with k = sqrt(|a/b|). Returns the
    new (a, b, c, d) and the mask of rows that changed.
    """
    a, b, c, d = (np.array(v, dtype=np.float64) for v in (a, b, c, d))
    out = [a.copy(), b.copy(), c.copy(), d.copy()]
    changed = np.zeros(a.shape, dtype=bool)
    if {"a", "b", "c", "d"} <= set(free):
        z1, z2 = b * x_lo + c, b * x_hi + c
        z_lo, z_hi = np.minimum(z1, z2), np.maximum(z1, z2)
        for piece in pieces:
            if piece.slope == 0:
                continue  # a flat piece: a is not identified and keeps its start (swapper.fit)
            inside = ~changed & (z_lo >= piece.lo) & (z_hi <= piece.hi)
            if not inside.any():
                continue
            s = a * piece.slope * b
            t = a * (piece.slope * c + piece.intercept) + d
            new = affine_params(s, t, x_lo, x_hi, piece)
            ok = inside & np.isfinite(new[0])
            for o, v in zip(out, new):
                o[ok] = v[ok]
            changed |= ok
    if homogeneous and {"a", "b", "c"} <= set(free):
        rows = ~changed & (a != 0) & (b != 0)
        with np.errstate(all="ignore"):
            k = np.sqrt(np.abs(a / np.where(rows, b, 1.0)))
        rows &= np.isfinite(k) & (k > 0) & (np.abs(np.log(np.where(rows, k, 1.0))) > 1e-12)
        out[0][rows], out[1][rows], out[2][rows] = a[rows] / k[rows], b[rows] * k[rows], c[rows] * k[rows]
        changed |= rows
    return tuple(out), changed
