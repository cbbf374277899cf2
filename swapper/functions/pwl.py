"""The continuous piecewise-linear surrogate ``pwl``: evaluate, differentiate, emit, fit.

Transformation: knots t_1 < ... < t_k, slopes s_0..s_k and an intercept i_0
define

    g(x) = s_0·x + i_0 + Σ_i (s_i − s_{i−1})·max(x − t_i, 0)

(a sum of hinges, the ReLU basis); :func:`emit_pwl` writes it with
Relu/Mul/Add only, and :func:`fit_pwl` finds the slopes and intercept that
best approximate a registry function under N(0, 1) weighting on [-6, 6],
knots at the N(0, 1) quantiles. :mod:`swapper.functions.registry` registers these as
the ``pwl`` entry.
"""
from __future__ import annotations

import logging
from functools import lru_cache

import numpy as np

from swapper.core.emit import Emitter
from swapper.errors import UsageError

logger = logging.getLogger(__name__)

PWL_RANGE = 6.0
PWL_GRID = 4801
PWL_MAX_SEGMENTS = 8
PWL_DEFAULT_SEGMENTS = 6


def pwl_params(knots, slopes, intercept) -> tuple[np.ndarray, np.ndarray, float]:
    """Validated (knots, slopes, intercept) as float64; raises UsageError on a malformed set."""
    t, s = np.asarray(knots, dtype=np.float64).ravel(), np.asarray(slopes, dtype=np.float64).ravel()
    if len(s) != len(t) + 1 or len(s) > PWL_MAX_SEGMENTS:
        raise UsageError(f"pwl needs len(slopes) == len(knots) + 1 <= {PWL_MAX_SEGMENTS}; "
                         f"got {len(t)} knots, {len(s)} slopes")
    if np.any(np.diff(t) <= 0) or not (np.all(np.isfinite(t)) and np.all(np.isfinite(s))):
        raise UsageError("pwl knots must be finite and strictly increasing")
    return t, s, float(intercept)


def pwl_ref(x, knots=(0.0,), slopes=(0.0, 1.0), intercept=0.0):
    """g(x) in float64 (module docstring)."""
    t, s, i0 = pwl_params(knots, slopes, intercept)
    x = np.asarray(x, dtype=np.float64)
    y = s[0] * x + i0
    for ti, ds in zip(t, np.diff(s)):
        y = y + ds * np.maximum(x - ti, 0.0)
    return y


def pwl_grad(x, knots=(0.0,), slopes=(0.0, 1.0), intercept=0.0):
    """g'(x); at a knot, the slope of the segment on its left."""
    t, s, _ = pwl_params(knots, slopes, intercept)
    # Left slope at a knot: the segment index counts knots strictly below x.
    return s[np.searchsorted(t, np.asarray(x, dtype=np.float64), side="left")]


def emit_pwl(em: Emitter, x: str, y: str, params: dict) -> None:
    """y = s0·x + i0 + Σ (s_i − s_{i−1})·Relu(x − t_i), with Relu/Mul/Add only."""
    t, s, i0 = pwl_params(params.get("knots", (0.0,)), params.get("slopes", (0.0, 1.0)),
                          params.get("intercept", 0.0))
    terms: list[str] = []
    if s[0] != 0.0:
        terms.append(x if s[0] == 1.0 else em.mul_const(x, float(s[0])))
    for ti, ds in zip(t, np.diff(s)):
        if ds == 0.0:
            continue
        r = em.node("Relu", [x if ti == 0.0 else em.node("Add", [x, em.const(-ti, "knot")])])
        terms.append(r if ds == 1.0 else em.mul_const(r, float(ds)))
    if not terms:  # constant function: 0·x keeps x's shape
        terms.append(em.mul_const(x, 0.0))
    acc = terms[0]
    for term in terms[1:]:
        acc = em.node("Add", [acc, term])
    if i0 != 0.0 or acc == x:
        em.node("Add", [acc, em.const(i0, "intercept")], y)
    else:
        em.nodes[-1].output[0] = y  # the last node already computes g(x): rename its output


@lru_cache(maxsize=64)
def fit_pwl(source_ref, source_params: tuple = (), segments: int = PWL_DEFAULT_SEGMENTS, name: str = "") -> dict:
    """Least-squares pwl fit of the source function ``source_ref(x, **params)`` on [-6, 6], N(0, 1)-weighted.

    Knots sit at the N(0, 1) quantiles i/segments (i = 1..segments-1), so the
    result depends only on the source and ``segments`` (deterministic).
    """
    from scipy.stats import norm  # noqa: PLC0415  (scipy.stats is slow to import)

    if not 1 <= int(segments) <= PWL_MAX_SEGMENTS:
        raise UsageError(f"pwl segments must be in 1..{PWL_MAX_SEGMENTS}; got {segments}")
    k = int(segments)
    x = np.linspace(-PWL_RANGE, PWL_RANGE, PWL_GRID)
    w = np.sqrt(norm.pdf(x))
    target = source_ref(x, **dict(source_params))
    knots = norm.ppf(np.arange(1, k) / k)
    basis = np.column_stack([x, np.ones_like(x)] + [np.maximum(x - t, 0.0) for t in knots])
    coef, *_ = np.linalg.lstsq(basis * w[:, None], target * w, rcond=None)
    slopes = coef[0] + np.concatenate([[0.0], np.cumsum(coef[2:])])
    logger.debug("pwl fit of %s with %d segments: knots %s", name, k, knots)
    return {"knots": tuple(float(t) for t in knots), "slopes": tuple(float(s) for s in slopes),
            "intercept": float(coef[1])}
