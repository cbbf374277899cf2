"""The arithmetic of folding surrogate parameters into linear layers' weights and biases.

Also the price of an inexact fold: :func:`border_error` measures what folding an
input offset d into a zero-padded Conv's bias (W·d) gets wrong at the borders,
where the Conv reads padding zeros instead of d (ONNX operator spec, Conv).
"""
from __future__ import annotations

import logging

import numpy as np
import onnx

from swapper.core.conv import conv_geometry, tap_windows
from swapper.core.graph import GraphIndex, attr

logger = logging.getLogger(__name__)

# ----------------------------------------------------------- fold arithmetic
def _along(v: np.ndarray, axis: int, ndim: int) -> np.ndarray:
    """``v`` (length C or 1) shaped to broadcast along ``axis`` of an ``ndim`` array."""
    shape = [1] * ndim
    shape[axis] = v.size
    return v.reshape(shape)


def _grouped(v: np.ndarray, out_ch: int, in_per_group: int, group: int) -> np.ndarray:
    """[out_ch, in_per_group]: v of the input channel each (output row, in-group column) reads."""
    if v.size == 1:
        return np.full((out_ch, in_per_group), float(v[0]))
    g = np.arange(out_ch) // (out_ch // group)
    return v[g[:, None] * in_per_group + np.arange(in_per_group)[None, :]]


def scale_shift_output(kind: str, node: onnx.NodeProto, w: np.ndarray, bias: np.ndarray | None,
                       b: np.ndarray, c: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """New (weight, bias) so the layer outputs b·out + c per output channel.

    For batchnorm ``w`` is its scale; for gemm ``bias`` is C (divided by beta
    on the way in, so beta·C_new = b·beta·C + c); a missing bias counts as 0.
    """
    width = None  # channel-first layers: the bias must have one entry per output channel
    if kind == "conv":
        w, width = w * _along(b, 0, w.ndim), w.shape[0]
    elif kind == "convtranspose":
        group, m = int(attr(node, "group", 1)), w.shape[1]
        grouped = w.reshape((group, w.shape[0] // group) + w.shape[1:])
        bg = np.broadcast_to(b, (group * m,)).reshape(group, 1, m, *([1] * (w.ndim - 2)))
        w, width = (grouped * bg).reshape(w.shape), group * m
    elif kind == "gemm":
        w = w * (_along(b, 0, 2) if attr(node, "transB", 0) else _along(b, 1, 2))
    elif kind in ("matmul", "matmul_add"):
        w = w * _along(b, w.ndim - 1, w.ndim)
    elif kind == "batchnorm":
        w, width = w * b, w.shape[0]
    else:
        raise ValueError(f"unknown producer kind {kind}")
    base = np.zeros(1) if bias is None else bias
    if width is not None:
        base = np.broadcast_to(base, (width,))
    if kind == "gemm":
        return w, base * b + c / float(attr(node, "beta", 1.0))
    return w, base * b + c


def input_scale(kind: str, node: onnx.NodeProto, w: np.ndarray, a: np.ndarray) -> np.ndarray:
    """New weight of a consumer layer that reads a·y instead of y (per input channel)."""
    if kind == "conv":
        group = int(attr(node, "group", 1))
        s = _grouped(a, w.shape[0], w.shape[1], group)
        return w * s.reshape(s.shape + (1,) * (w.ndim - 2))
    if kind == "convtranspose":
        return w * _along(a, 0, w.ndim)
    if kind == "gemm":
        return w * (_along(a, 1, 2) if attr(node, "transB", 0) else _along(a, 0, 2))
    if kind == "matmul":
        return w * (a if w.ndim == 1 else _along(a, w.ndim - 2, w.ndim))
    raise ValueError(f"unknown consumer kind {kind}")


def input_offset(kind: str, node: onnx.NodeProto, w: np.ndarray, d: np.ndarray) -> np.ndarray:
    """What a consumer adds to its output when it reads y + d: W·d per output channel.

    Conv: Σ_{j,k} W[o, j, k]·d[group(o)·C/g + j]; Gemm: alpha·(d·B'); MatMul: d·B.
    """
    if kind == "conv":
        group = int(attr(node, "group", 1))
        dd = _grouped(d, w.shape[0], w.shape[1], group)
        return (w.reshape(w.shape[0], w.shape[1], -1).sum(axis=2) * dd).sum(axis=1)
    if kind == "gemm":
        bt = w.T if attr(node, "transB", 0) else w
        row = np.broadcast_to(d, (bt.shape[0],))
        return float(attr(node, "alpha", 1.0)) * (row @ bt)
    if kind == "matmul":
        return np.broadcast_to(d, (w.shape[0],)) @ w
    raise ValueError(f"no offset fold for consumer kind {kind}")


def border_error(node: onnx.NodeProto, w: np.ndarray, d: np.ndarray, spatial: tuple[int, ...]) -> np.ndarray:
    """Conv(pad0(y + d)) − (Conv(pad0(y)) + W·d) per output channel and position: (M, out...).

    The Conv is linear, so this is Conv of the constant map d (zero padded) minus
    W·d, whatever y is: zero where a window lies inside the input, −Σ W·d over
    the taps that read padding elsewhere. ``spatial``: the input's spatial size.
    """
    kernel = tuple(w.shape[2:])
    begin, end, strides, dilations, out = conv_geometry(node, kernel, tuple(spatial))
    group = int(attr(node, "group", 1))
    m, c_g = w.shape[0], w.shape[1]
    const = np.broadcast_to(np.asarray(d, dtype=np.float64).reshape(-1, *([1] * len(spatial))),
                            (c_g * group,) + tuple(spatial))
    xp = np.pad(const, [(0, 0)] + list(zip(begin, end)))
    outs = np.zeros((m,) + tuple(out))
    wf = w.astype(np.float64).reshape(m, c_g, -1)
    ch = _grouped(np.arange(c_g * group, dtype=np.float64), m, c_g, group).astype(int)  # input channel per (o, j)
    for t, window in enumerate(tap_windows(kernel, strides, dilations, out)):
        taps = xp[(slice(None),) + window]  # (C, out...)
        outs += np.einsum("oj,oj...->o...", wf[:, :, t], taps[ch])
    return outs - input_offset("conv", node, w.astype(np.float64), d).reshape((m,) + (1,) * len(out))


def border_note(index: GraphIndex, fold, d: np.ndarray) -> str:
    """One line on what folding d into the zero-padded Conv of ``fold`` (a ConsumerFold) gets wrong."""
    node = fold.layer.node
    shape = index.shape(fold.reach.tensor)
    if shape is None or not all(isinstance(v, int) for v in shape[2:]):
        return f"d approx into Conv {node.name!r}: border error unknown (input shape unknown)"
    err = np.abs(border_error(node, fold.layer.weight, np.broadcast_to(d, (fold.layer.widths()[0],)), shape[2:]))
    ref = np.abs(input_offset("conv", node, fold.layer.weight.astype(np.float64),
                              np.broadcast_to(d, (fold.layer.widths()[0],))))
    hit = err.max(axis=0) > 1e-12 * max(float(ref.max(initial=0.0)), 1e-30)
    return (f"d approx into Conv {node.name!r}: border error up to {float(err.max(initial=0.0)):.3g} "
            f"(mean {float(err.mean()):.3g}) on {int(hit.sum())} of {hit.size} output positions, "
            f"against |W·d| up to {float(ref.max(initial=0.0)):.3g}")

