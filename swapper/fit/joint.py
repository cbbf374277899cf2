"""The slopes a of every channel of a site solved together, against the error its readers see.

A site's error e = ŷ − y (per channel c: e_c = a_c·g(b_c·x_c + c_c) + d_c − y_c)
reaches its readers as W·e: a Conv sums W_tap·e over its kernel taps, a
Gemm/MatMul applies W, a residual Add passes e on. With the readers' weights
summarised per site by the Gram matrix M = Σ_readers Σ_taps W_tapᵀ·W_tap
(channels × channels; a residual Add adds the identity), the objective is

    J(a) = E[(e − E e)ᵀ · M · (e − E e)]

(the mean is left out: d takes it, or bias correction cancels it at the
readers). Fitted channel by channel, M's diagonal scales each channel's
error and changes no argmin; only the cross terms M_cc' do. For fixed b, c
(z_c = g(b_c·x_c + c_c), centred) J is a quadratic in a:

    J(a) = aᵀ (M ∘ S_zz) a − 2 aᵀ diag(S_zy · M) + const,   S_zz = cov(z, z), S_zy = cov(z, y)

so the joint a solves (M ∘ S_zz) a = diag(S_zy · M) (∘: elementwise
product; a positive semi-definite system as the Hadamard product of two PSD
matrices, Schur product theorem). The covariances come from a site's
observer reservoir, which holds the same positions for every channel
(:class:`swapper.fit.observe.ChannelObserver`), so cross-channel moments are
moments of real samples. The answer is used only if it keeps to what the
placement asks of a (a > 0 or a ≠ 0) and lowers J; else the per-channel
a stays.
"""
from __future__ import annotations

import logging
import math
from dataclasses import dataclass

import numpy as np

from swapper.fit.common import Func, apply_g

logger = logging.getLogger(__name__)

RIDGE = 1e-9  # relative to the mean diagonal: keeps a singular system (dead channels) solvable
ROWS_PER_CHANNEL = 20  # samples per channel below which C x C covariances are not trusted (rule of thumb)


@dataclass
class JointSlopes:
    """Per-channel slopes solved together, and the objective J before and after (module docstring)."""

    a: np.ndarray  # the joint a, or the given a when it was not taken
    d: np.ndarray  # d = mean(y) − a·mean(z) per channel, for these a
    j_before: float
    j_after: float
    taken: bool
    why: str = ""  # why the joint a was not taken


def centred_moments(X: np.ndarray, Y: np.ndarray, g: Func, b: np.ndarray, c: np.ndarray):
    """(z mean, y mean, S_zz, S_zy) of z = g(b·x + c) over the rows (channels) of ``X``, ``Y`` (C, n)."""
    Z = apply_g(g, b[:, None] * X + c[:, None])
    mz, my = Z.mean(axis=1), Y.mean(axis=1)
    Zc, Yc = Z - mz[:, None], Y - my[:, None]
    n = max(X.shape[1], 1)
    return mz, my, Zc @ Zc.T / n, Zc @ Yc.T / n, Yc @ Yc.T / n


def objective(a: np.ndarray, metric: np.ndarray, szz: np.ndarray, szy: np.ndarray, syy: np.ndarray) -> float:
    """J(a) of the module docstring from the centred moments.

    diag(S_zy·M) and tr(M·S_yy) are taken entry by entry (O(C²)), not through the (C, C) products (O(C³)).
    """
    return float(a @ (metric * szz) @ a - 2 * a @ _cross(szy, metric) + np.sum(metric * syy.T))


def _cross(szy: np.ndarray, metric: np.ndarray) -> np.ndarray:
    """diag(S_zy·M): Σ_j S_zy[i, j]·M[j, i] per channel i."""
    return np.einsum("ij,ji->i", szy, metric)


def joint_slopes(X: np.ndarray, Y: np.ndarray, g: Func, a: np.ndarray, b: np.ndarray, c: np.ndarray,
                 metric: np.ndarray, *, positive_a: bool = False, nonzero_a: bool = False,
                 folds: int = 0) -> JointSlopes:
    """The slopes a minimising J (module docstring) for the given b, c; ``X``, ``Y`` (C, n) aligned samples.

    ``a`` is the per-channel answer, kept when the joint one breaks ``positive_a`` / ``nonzero_a``,
    is not finite, or does not lower J.
    """
    a = np.asarray(a, dtype=np.float64)
    if X.shape[1] < ROWS_PER_CHANNEL * len(a):  # asked first: the moments of many channels cost C²·n
        my = np.asarray(Y, dtype=np.float64).mean(axis=1)
        mz = apply_g(g, np.asarray(b, dtype=np.float64)[:, None] * np.asarray(X, dtype=np.float64)
                     + np.asarray(c, dtype=np.float64)[:, None]).mean(axis=1)
        return JointSlopes(a, my - a * mz, math.nan, math.nan, False,
                           f"{X.shape[1]} samples are too few for {len(a)} channels' cross-covariances")
    mz, my, szz, szy, syy = centred_moments(np.asarray(X, dtype=np.float64), np.asarray(Y, dtype=np.float64),
                                            g, np.asarray(b, dtype=np.float64), np.asarray(c, dtype=np.float64))
    metric = (np.asarray(metric, dtype=np.float64) + np.asarray(metric, dtype=np.float64).T) / 2
    before = objective(a, metric, szz, szy, syy)

    def keep(why: str) -> JointSlopes:
        return JointSlopes(a, my - a * mz, before, before, False, why)

    system = metric * szz
    scale = float(np.trace(system)) / max(len(system), 1)
    if not np.isfinite(scale) or scale <= 0:
        return keep("no spread to solve on")
    try:
        joint = np.linalg.solve(system + RIDGE * scale * np.eye(len(system)), _cross(szy, metric))
    except np.linalg.LinAlgError:
        return keep("singular system")
    if not np.all(np.isfinite(joint)):
        return keep("not finite")
    if positive_a and np.any(joint <= 0):
        return keep("the joint a breaks a > 0")
    if nonzero_a and np.any(joint == 0):
        return keep("the joint a breaks a != 0")
    after = objective(joint, metric, szz, szy, syy)
    if not after < before:
        return keep("no lower than the per-channel a")
    if folds:
        held_out = _held_out_gain(X, Y, g, b, c, metric, folds)
        if held_out is not None and not held_out < 0:
            return keep(f"no lower on held-out samples ({folds}-fold, {held_out:+.3g} of the per-channel error)")
    return JointSlopes(joint, my - joint * mz, before, after, True)


def _held_out_gain(X, Y, g, b, c, metric, folds: int) -> float | None:
    """Relative change of J on held-out samples, joint vs per-channel slopes, both fitted on the other folds."""
    n = X.shape[1]
    if folds < 2 or n < 2 * folds:
        return None
    fold_of = np.arange(n) % folds
    joint_err = plain_err = 0.0
    for k in range(folds):
        train, test = fold_of != k, fold_of == k
        _, _, szz, szy, _ = centred_moments(X[:, train], Y[:, train], g, b, c)
        plain = np.diag(szy) / np.where(np.diag(szz) > 0, np.diag(szz), 1.0)
        system = metric * szz
        scale = float(np.trace(system)) / max(len(system), 1)
        try:
            joint = np.linalg.solve(system + RIDGE * max(scale, 1e-300) * np.eye(len(system)), _cross(szy, metric))
        except np.linalg.LinAlgError:
            return None
        moments = centred_moments(X[:, test], Y[:, test], g, b, c)[2:]
        joint_err += objective(joint, metric, *moments)
        plain_err += objective(plain, metric, *moments)
    return (joint_err - plain_err) / plain_err if plain_err > 0 else None
