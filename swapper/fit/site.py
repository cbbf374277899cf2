"""Fit every channel of one site: the batched path, with the one-channel path as fallback."""
from __future__ import annotations

import logging

import numpy as np

from swapper.errors import BadDataError
from swapper.fit.common import Func, SiteFit, check_free
from swapper.fit.observe import ChannelObserver
from swapper.functions.params import NEUTRAL, PARAMS

logger = logging.getLogger(__name__)


def fit_channels(
    observer: ChannelObserver,
    g: Func,
    *,
    init: dict[str, np.ndarray] | None = None,
    free: str = "abcd",
    positive_a: bool = False,
    dg: Func | None = None,
    nonzero_a: bool = False,
    positive_b: bool = False,
) -> SiteFit:
    """Fit every channel of ``observer`` on its reservoir sample (all channels at once, :func:`fit_rows`).

    ``init`` maps "a".."d" to per-channel arrays (or scalars); missing keys
    start neutral (a = b = 1, c = d = 0). Raises ``BadDataError`` when the
    observer has seen no data. ``positive_a`` keeps a > 0, ``nonzero_a`` keeps
    a away from 0, ``positive_b`` keeps b > 0 (what the placement of the site
    asks for). b > 0 is kept by fitting again, with b held at its start, the
    channels whose best fit has b <= 0 (b through a residual Add scales an
    upstream activation, which only b > 0 can pass); the start must have b > 0.
    """
    check_free(free)
    C = observer.channels
    if observer.n == 0:
        raise BadDataError("no calibration data reached this site; nothing to fit")
    init = init or {}
    start = {}
    for p in PARAMS:
        v = np.asarray(init.get(p, NEUTRAL[p]), dtype=np.float64).reshape(-1)
        if v.size not in (1, C):
            raise ValueError(f"init[{p!r}] must be a scalar or have {C} values, got {v.size}")
        start[p] = np.broadcast_to(v, (C,))
    from swapper.fit.rows import (
        fit_rows,  # imported here: fit_batched builds on this module
    )

    if positive_b and "b" in free and (start["b"] <= 0).any():
        raise ValueError("positive_b needs a positive initial b on every channel")
    X, Y = observer.all_samples()
    out = fit_rows(X, Y, g, init=start, free=free, positive_a=positive_a, dg=dg, nonzero_a=nonzero_a)
    bad = np.flatnonzero(out.b <= 0) if positive_b and "b" in free else np.zeros(0, dtype=int)
    if bad.size:
        again = fit_rows(X[bad], Y[bad], g, init={p: v[bad] for p, v in start.items()}, free=free.replace("b", ""),
                         positive_a=positive_a, dg=dg, nonzero_a=nonzero_a)
        for p in ("a", "b", "c", "d", "mse"):
            getattr(out, p)[bad] = getattr(again, p)
        for i, k in enumerate(bad):
            out.notes[k] = f"b held at its start (the best b was <= 0), {again.notes[i]}"
    logger.debug(
        "fitted %d channels on %d samples each: mse %.3g -> %.3g",
        C, observer.held, float(out.mse_init.mean()), float(out.mse.mean()),
    )
    return out
