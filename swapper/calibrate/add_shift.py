"""Bias correction through residual Adds: cancel a site's mean change where it enters an Add.

Transformation: a swapped site output y that also feeds ``z = y + u`` (a
residual Add, :mod:`swapper.plan.add_folds`) shifts z by E[Δy] per channel
(Δy = swapped − original output), and no linear layer reads y there to take
the usual bias correction. The shift is cancelled where an offset d of y folds
exactly, in the bias of the exclusive linear producer P of u::

    (y + Δy) + (u − E[Δy]) = z + (Δy − E[Δy])     # E over samples and positions, per channel
    bias_P <- bias_P − E[Δy]_c                     # Gemm: − E[Δy]_c / beta (beta scales C)

so the Add's output has the original mean again, the way bias correction
gives the linear readers' outputs theirs (Nagel et al. 2019, bias correction,
here measured on data).
"""
from __future__ import annotations

import logging

import numpy as np
import onnx

from swapper.core.graph import GraphIndex, attr
from swapper.core.surgery import set_const_input
from swapper.plan.add_folds import add_readers
from swapper.scan.sites import Site

logger = logging.getLogger(__name__)


def channel_mean(sample: np.ndarray, site: Site) -> np.ndarray:
    """Per-channel mean of one sample (1, ...) along the site's channel axis (one value without one)."""
    if not site.channels or site.channels <= 1 or site.channel_axis is None:
        return np.atleast_1d(sample.mean())
    moved = np.moveaxis(sample, site.channel_axis % sample.ndim, 0)
    return moved.reshape(moved.shape[0], -1).mean(axis=1)


def correct_through_adds(work: onnx.ModelProto, index: GraphIndex, site: Site, mean: np.ndarray,
                         taken: set[str]) -> tuple[list[str], list[str]]:
    """Subtract E[Δy] (``mean``: one sample's shape) from each residual Add's other producer's bias, in ``work``.

    ``index`` is of ``work``; ``taken`` the tensor names new copies must avoid. Returns the corrected
    layers' names and notes on the Adds left as they were.
    """
    routes, why = add_readers(index, site)
    notes = [f"no bias correction through an add: {why}"] if why else []
    routes = [r for r in routes if r.producer is not None]
    if not routes:
        return [], notes or ["no bias correction through an add: no operand has a linear producer"]
    shift = channel_mean(mean, site)
    done = []
    for r in routes:
        pf = r.producer
        node, slot = pf.bias_node, pf.bias_slot
        name = node.input[slot] if len(node.input) > slot else ""
        value = index.const(name) if name else None
        if value is None or value.size != shift.size:
            notes.append(f"no bias correction through Add {r.add.name!r}: {node.name} has no constant bias "
                         f"of {shift.size} values")
            continue
        beta = float(attr(node, "beta", 1.0)) if pf.kind == "gemm" else 1.0
        new = value.astype(np.float64).reshape(-1) - shift / beta
        # a bias other nodes share gets a copy of its own, so their outputs stay as they were
        set_const_input(work, node, slot, new.reshape(value.shape), value.dtype, taken,
                        f"swapper/{site.id}/bias_correction", hint=node.name)
        done.append(node.name)
    logger.debug("site %s: mean change cancelled through adds in %s", site.id, done)
    return done, notes
