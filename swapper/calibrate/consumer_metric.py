"""How much each pair of a site's channels matters to the layers that read it: the Gram matrix M.

Transformation: the linear readers of a site output y (reached as bias
correction reaches them: directly or behind pools and channel-keeping
reshapes) and the residual Adds reading it become one (C, C) matrix

    M = Σ_Conv Σ_taps W_tapᵀ·W_tap / ∏strides  +  Σ_Gemm/MatMul Wᵀ·W  +  (number of residual Adds)·I

(W_tap: the (out, C) slice of a Conv weight at one kernel tap, group by group;
a Gemm's W taken as alpha·B'), so that E[‖W·e‖²] summed over readers is
E[eᵀ·M·e] for an error e that is uncorrelated across positions. A reader whose
output is added straight back to y (z = L(y) + y) is weighed together with that
Add: ‖L(e) + e‖² brings the cross term L₀ + L₀ᵀ of the part of L that maps a
position onto itself (:func:`_merge_term`). A strided
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

from swapper.core.conv import conv_geometry
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
        metric = metric + gram + _merge_term(index, site, reach, layer, w, adds)
        weighed += 1
    if not weighed:
        return None, "no reader whose weights weigh the channels"
    return metric, f"{weighed} reader(s) weigh the channels"


def _merge_term(index: GraphIndex, site: Site, reach, layer, w: np.ndarray, adds: frozenset) -> np.ndarray:
    """The cross term when the reader's output is added straight back to the site output (u = L(y), z = u + y).

    Then z's error is L(e) + e, and ‖L(e) + e‖² = ‖L(e)‖² + ‖e‖² + 2·eᵀ·L₀·e, where L₀ is the part of L that
    maps a position onto itself: a Gemm/MatMul's W, a stride-1 Conv's zero-offset tap. Returns L₀ + L₀ᵀ (C, C),
    zeros when the reader's output goes elsewhere or L₀ is not square.
    """
    channels = site.channels
    none = np.zeros((channels, channels))
    out = (layer.bias_node if layer.kind == "matmul" and layer.bias_node is not None else layer.node).output[0]
    users = index.users(out)
    if reach.steps or len(users) != 1 or users[0].name not in adds or index.is_graph_output(out):
        return none
    if layer.kind == "conv":
        node, shape = layer.node, index.shape(reach.tensor)
        if int(attr(node, "group", 1)) != 1 or w.shape[0] != channels or shape is None \
                or not all(isinstance(v, int) for v in shape[2:]):
            return none
        kernel = w.shape[2:]
        begin, _, strides, dilations, _ = conv_geometry(node, kernel, tuple(shape[2:]))
        if any(st != 1 for st in strides) or any(b % dl or b // dl >= k for b, dl, k in zip(begin, dilations, kernel)):
            return none
        center = w[(slice(None), slice(None)) + tuple(b // dl for b, dl in zip(begin, dilations))]  # (out, in)
        return center + center.T
    if layer.kind == "gemm":
        bt = float(attr(layer.node, "alpha", 1.0)) * (w.T if attr(layer.node, "transB", 0) else w)
    else:
        bt = w
    return bt + bt.T if bt.shape == (channels, channels) else none
