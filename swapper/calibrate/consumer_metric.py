"""How much each pair of a site's channels matters to the layers that read it: the Gram matrix M.

Transformation: the linear readers of a site output y (reached as bias
correction reaches them: directly or behind pools and channel-keeping
reshapes) and the residual Adds reading it become one (C, C) matrix

    M = Σ_Conv Σ_taps W_tapᵀ·W_tap / ∏strides  +  Σ_Gemm/MatMul Wᵀ·W  +  (number of residual Adds)·I

(W_tap: the (out, C) slice of a Conv weight at one kernel tap, group by group;
a Gemm's W taken as alpha·B'), so that E[‖W·e‖²] summed over readers is
E[eᵀ·M·e] for an error e that is uncorrelated across positions. A strided
Conv has fewer outputs per input position, hence the 1/∏strides. A residual
Add passes e on unweighted, into the pre-activation of what reads the sum, as
a Conv passes W·e into its own: both count per position, one to one
(rule of thumb, no source). :mod:`swapper.fit.joint` solves a site's slopes
against M.
"""
from __future__ import annotations

import logging
import math

import numpy as np

from swapper.core.graph import GraphIndex, attr
from swapper.plan.add_folds import residual_readers
from swapper.plan.fold_targets import per_channel, site_rank
from swapper.plan.layers import linear_layer, norm_axis, reach_linear
from swapper.scan.sites import Site

logger = logging.getLogger(__name__)


def _conv_gram(w: np.ndarray, group: int) -> np.ndarray:
    """Σ_taps W_tapᵀ·W_tap of a Conv weight [M, C/group, k...], block-diagonal over groups: (C, C)."""
    m, cg = w.shape[0], w.shape[1]
    taps = w.reshape(m, cg, -1)
    out = np.zeros((cg * group, cg * group))
    mg = m // group
    for k in range(group):
        block = taps[k * mg:(k + 1) * mg]
        out[k * cg:(k + 1) * cg, k * cg:(k + 1) * cg] = np.einsum("oct,odt->cd", block, block)
    return out


def consumer_metric(index: GraphIndex, site: Site) -> tuple[np.ndarray | None, str]:
    """M of ``site`` (module docstring), or None and why there is none: one channel, or a reader
    that is not weighed (a non-linear op, a gate, a reshape that mixes channels into a wider layer)."""
    if not per_channel(site):
        return None, "one parameter set: nothing to weigh across channels"
    channels = site.channels
    rank = site_rank(index, site)
    adds = residual_readers(index, site)
    reached, dead_ends = reach_linear(index, site.output, norm_axis(site.channel_axis, rank), rank, channels,
                                      gates=False, skip=adds)
    if dead_ends:  # a reader whose sensitivity is unknown: weighing the others alone would mislead
        return None, dead_ends[0]
    metric = len(adds) * np.eye(channels)
    weighed = len(adds)
    for reach in reached:
        layer, _ = linear_layer(index, reach.node, reach.tensor)
        if layer is None or layer.widths()[0] != channels:
            return None, f"{reach.node.op_type} {reach.node.name!r} does not read the channels one by one"
        w, node = layer.weight.astype(np.float64), layer.node
        if layer.kind == "conv" and (reach.axis in (1, None) or not reach.steps):
            gram = _conv_gram(w, int(attr(node, "group", 1))) / math.prod(attr(node, "strides", None) or [1])
        elif layer.kind == "gemm" and not int(attr(node, "transA", 0)):
            bt = float(attr(node, "alpha", 1.0)) * (w.T if attr(node, "transB", 0) else w)  # (K, N)
            gram = bt @ bt.T
        elif layer.kind == "matmul" and w.ndim == 2:
            gram = w @ w.T
        else:
            return None, f"{node.op_type} {node.name!r} reads the channels in a way not weighed here"
        metric = metric + gram
        weighed += 1
    if not weighed:
        return None, "no reader whose weights weigh the channels"
    return metric, f"{weighed} reader(s) weigh the channels"
