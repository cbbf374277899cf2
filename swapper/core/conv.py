"""Conv input patches as matrix rows, so a Conv is one matrix product.

Transformation: an (N, C, spatial...) tensor and a Conv's kernel / pads /
strides / dilations become the (N·∏out, C·∏kernel) matrix whose rows are the
receptive fields of the Conv's output positions, in the column order of
``W.reshape(M, -1)``; then ``im2col(x) @ W.reshape(M, -1).T`` equals the Conv
(group = 1, without bias); :func:`patches_at` gives those rows for chosen
output positions only. :func:`conv_geometry` reads that geometry from a
Conv node per the ONNX operator spec (explicit pads or auto_pad);
:func:`tap_windows` gives the input slices each kernel tap visits, and
:func:`pads_input` tells whether a Conv or pool pads its input at all.
"""
from __future__ import annotations

import itertools
import math

import numpy as np
import onnx

from swapper.core.graph import attr


def auto_pad(node: onnx.NodeProto) -> str:
    """The node's auto_pad attribute as text ("NOTSET" when absent; Conv and pools, ONNX operator spec)."""
    value = attr(node, "auto_pad", b"NOTSET")
    return value.decode() if isinstance(value, bytes) else str(value)


def pads_input(node: onnx.NodeProto) -> bool:
    """True when the node may pad its input: non-zero explicit pads, or a SAME_* auto_pad."""
    return any(p != 0 for p in (attr(node, "pads", None) or [])) or auto_pad(node) not in ("NOTSET", "VALID")


def _out_size(spatial, begin, end, kernel, strides, dilations) -> list[int]:
    """Output positions per spatial axis (ONNX operator spec, Conv, floor rounding)."""
    return [(spatial[i] + begin[i] + end[i] - dilations[i] * (kernel[i] - 1) - 1) // strides[i] + 1
            for i in range(len(kernel))]


def conv_geometry(node: onnx.NodeProto, kernel: tuple[int, ...], spatial: tuple[int, ...]):
    """(pads_begin, pads_end, strides, dilations, out_spatial) of a Conv per the ONNX operator spec."""
    d = len(kernel)
    strides = list(attr(node, "strides", None) or [1] * d)
    dilations = list(attr(node, "dilations", None) or [1] * d)
    mode = auto_pad(node)
    if mode in ("SAME_UPPER", "SAME_LOWER"):
        begin, end = [], []
        for i in range(d):
            out = -(-spatial[i] // strides[i])  # ceil(in / stride)
            need = max(0, (out - 1) * strides[i] + (kernel[i] - 1) * dilations[i] + 1 - spatial[i])
            small = need // 2
            begin.append(small if mode == "SAME_UPPER" else need - small)
            end.append(need - begin[-1])
    elif mode == "VALID":
        begin, end = [0] * d, [0] * d
    else:
        pads = list(attr(node, "pads", None) or [0] * (2 * d))
        begin, end = pads[:d], pads[d:]
    return begin, end, strides, dilations, _out_size(spatial, begin, end, kernel, strides, dilations)


def tap_windows(kernel, strides, dilations, out):
    """Per kernel tap, in row-major order (W's layout): the strided slices of the padded input it visits."""
    for offs in itertools.product(*[range(k) for k in kernel]):
        yield tuple(slice(o * dl, o * dl + s * (m - 1) + 1, s) for o, dl, s, m in zip(offs, dilations, strides, out))


def im2col(x: np.ndarray, kernel, strides, dilations, pads_begin, pads_end, out=None) -> np.ndarray:
    """Conv patches as rows (N·∏out, C·∏kernel).

    Row order (n, out...); column order (c, k...), the layout of W.reshape(M, -1).
    ``out``: the output spatial size when the caller has it (``conv_geometry``).
    """
    n, c = x.shape[:2]
    spatial = x.shape[2:]
    d = len(spatial)
    xp = np.pad(x, [(0, 0), (0, 0)] + [(pads_begin[i], pads_end[i]) for i in range(d)])
    if out is None:
        out = _out_size(spatial, pads_begin, pads_end, kernel, strides, dilations)
    if min(out, default=1) < 1:
        raise ValueError(f"Conv output would be empty for input {tuple(spatial)} and kernel {tuple(kernel)}")
    taps = math.prod(kernel)
    cols = np.empty((n, c, taps) + tuple(out), dtype=x.dtype)
    for j, window in enumerate(tap_windows(kernel, strides, dilations, out)):
        cols[:, :, j] = xp[(slice(None), slice(None)) + window]
    cols = cols.reshape((n, c * taps) + tuple(out))
    return np.moveaxis(cols, 1, -1).reshape(-1, c * taps)


def patches_at(x: np.ndarray, kernel, strides, dilations, pads_begin, pads_end, out, samples: np.ndarray,
               positions: np.ndarray) -> np.ndarray:
    """The rows of :func:`im2col` for chosen output positions only: (len(samples), C·∏kernel).

    Row r is the receptive field of output position ``positions[r]`` (flat, row-major over ``out``) of sample
    ``samples[r]``; columns in the order of ``W.reshape(M, -1)``, as in :func:`im2col`.
    """
    d = len(kernel)
    xp = np.pad(x, [(0, 0), (0, 0)] + [(pads_begin[i], pads_end[i]) for i in range(d)])
    coords = np.unravel_index(np.asarray(positions), tuple(out))
    cols = np.empty((len(samples), x.shape[1], math.prod(kernel)), dtype=x.dtype)
    for j, offs in enumerate(itertools.product(*[range(k) for k in kernel])):
        at = tuple(coords[i] * strides[i] + offs[i] * dilations[i] for i in range(d))
        cols[:, :, j] = xp[(samples, slice(None)) + at]  # advanced indices first: (rows, C)
    return cols.reshape(len(samples), -1)
