"""What the per-channel fitters share: result records, argument checks, the scale of g."""
from __future__ import annotations

import logging
from dataclasses import dataclass, field
from typing import Callable

import numpy as np

from swapper.functions.params import PARAMS

logger = logging.getLogger(__name__)

Func = Callable[[np.ndarray], np.ndarray]
Z_FLOOR = 1e-12  # z with std below this fraction of g's own output scale = constant too
SAME_MSE = 1e-9  # a rescaled fit may score this much (relative) above the one it replaces: rounding only


def apply_g(g: Func, u: np.ndarray) -> np.ndarray:
    """g(u) as float64, overflow warnings silenced."""
    with np.errstate(all="ignore"):  # overflow is caught by the callers' finiteness checks
        return np.asarray(g(u), dtype=np.float64)


@dataclass
class ChannelFit:
    """Fitted parameters of one channel and the weighted mse before and after."""

    a: float
    b: float
    c: float
    d: float
    mse_init: float
    mse: float
    note: str = ""  # "init kept", "outer only", "constant x", "projected" ...


@dataclass
class SiteFit:
    """Per-channel results of one site, arrays of shape (channels,)."""

    a: np.ndarray
    b: np.ndarray
    c: np.ndarray
    d: np.ndarray
    mse_init: np.ndarray
    mse: np.ndarray
    notes: list[str] = field(default_factory=list)

    def params(self) -> dict[str, np.ndarray]:
        return {p: getattr(self, p) for p in PARAMS}


def check_free(free: str) -> None:
    if not set(free) <= set(PARAMS):
        raise ValueError(f"free must be made of the letters {''.join(PARAMS)}, got {free!r}")


def normalised_weights(weights, n: int) -> np.ndarray:
    """Weights normalised to sum 1 (uniform when None).

    ``weights`` of shape (n,) are shared by every row; a (rows, n) array gives
    each row its own weights (the binned fit's), each row normalised.
    """
    if weights is None:
        return np.full(n, 1.0 / n)
    if np.ndim(weights) == 2:
        w = np.asarray(weights, dtype=np.float64)
        if w.shape[1] != n or not np.isfinite(w).all() or (w < 0).any() or not (w.sum(axis=1) > 0).all():
            raise ValueError("per-row weights must be (rows, n) finite non-negative numbers, each row with a positive sum")
        return w / w.sum(axis=1, keepdims=True)
    w = np.asarray(weights, dtype=np.float64).reshape(-1)
    if w.shape[0] != n or not np.isfinite(w).all() or (w < 0).any() or w.sum() <= 0:
        raise ValueError("weights must be n finite non-negative numbers with a positive sum")
    return w / w.sum()


def g_scale(g: Func) -> float:
    """Spread of g's output over arguments in [-4, 4], the unit z is measured against."""
    s = float(np.std(apply_g(g, np.linspace(-4.0, 4.0, 257))))
    return s if np.isfinite(s) and s > 0 else 1.0
