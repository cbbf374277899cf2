"""Fit every channel of one site from its observer: on quantile bins of the sample (default) or on every pair.

``method="binned"`` (:mod:`swapper.fit.binned`) searches on K quantile bins of
each channel's reservoir and checks the result on the reservoir; it is used
when the reservoir holds more than ``4·K`` pairs (below that, bins would save
little and the full path is as fast). ``method="full"`` runs
:func:`swapper.fit.rows.fit_rows` on every reservoir pair, the reference the
binned path is tested against. Both are never worse than the start on the
reservoir and report the mse on it.
"""
from __future__ import annotations

import logging

import numpy as np

from swapper.errors import BadDataError
from swapper.fit.binned import BINS, fit_rows_binned
from swapper.fit.common import Func, SiteFit, check_free
from swapper.fit.observe import ChannelObserver
from swapper.fit.rows import fit_rows
from swapper.functions.params import NEUTRAL, PARAMS

logger = logging.getLogger(__name__)

METHODS = ("binned", "full")


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
    method: str = "binned",
    bins: int = BINS,
) -> SiteFit:
    """Fit every channel of ``observer`` on its reservoir sample (all channels at once).

    ``init`` maps "a".."d" to per-channel arrays (or scalars); missing keys
    start neutral (a = b = 1, c = d = 0). ``method`` is "binned" (``bins``
    quantile bins per channel) or "full" (see the module docstring). Raises
    ``BadDataError`` when the observer has seen no data. ``positive_a`` keeps
    a > 0, ``nonzero_a`` keeps a away from 0, ``positive_b`` keeps b > 0 (what
    the placement of the site asks for). b > 0 is kept by fitting again, with b
    fixed at its start, the channels whose best fit has b <= 0 (b through a
    residual Add scales an upstream activation, which only b > 0 can pass); the
    start must have b > 0.
    """
    check_free(free)
    if method not in METHODS:
        raise ValueError(f"method must be one of {', '.join(METHODS)}, got {method!r}")
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
    if positive_b and "b" in free and (start["b"] <= 0).any():
        raise ValueError("positive_b needs a positive initial b on every channel")
    binned = method == "binned" and observer.held > 4 * bins
    X, Y = observer.all_samples(dtype=None if binned else np.float64)
    if binned:  # stored precision: bins are sorted as stored and summed in float64

        def fit(X, Y, init, free):
            return fit_rows_binned(X, Y, g, init=init, free=free, positive_a=positive_a, dg=dg, bins=bins,
                                   nonzero_a=nonzero_a)
    else:
        def fit(X, Y, init, free):
            return fit_rows(X, Y, g, init=init, free=free, positive_a=positive_a, dg=dg, nonzero_a=nonzero_a)
    out = fit(X, Y, start, free)
    bad = np.flatnonzero(out.b <= 0) if positive_b and "b" in free else np.zeros(0, dtype=int)
    if bad.size:
        again = fit(X[bad], Y[bad], {p: v[bad] for p, v in start.items()}, free.replace("b", ""))
        for p in ("a", "b", "c", "d", "mse"):
            getattr(out, p)[bad] = getattr(again, p)
        for i, k in enumerate(bad):
            out.notes[k] = f"b fixed at its start (the best b was <= 0), {again.notes[i]}"
    logger.debug(
        "fitted %d channels on %d samples each (%s): mse %.3g -> %.3g",
        C, observer.held, "binned" if binned else "full", float(out.mse_init.mean()), float(out.mse.mean()),
    )
    return out
