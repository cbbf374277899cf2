"""Bias correction: cancel the mean shift a swapped site leaves at its linear consumers.

Transformation, per swapped site and per linear consumer (Conv / Gemm / MatMul
with a constant per-output-channel bias) reached from the site output through
pools and reshapes:

    shift = E[layer(steps(student)) − layer(steps(teacher))]    (bias cancelled)
    bias  <- bias − shift / beta                                 (Gemm: beta scales the bias)

so that, on the calibration samples, the consumer's output has the original
model's mean again. This is the bias correction of Nagel et al. 2019,
"Data-Free Quantization Through Weight Equalization and Bias Correction"
(its bias-correction section), used here *with* data: the expectation is
measured on the recorded student (swapped) and teacher (original) site
outputs instead of being derived from batch-norm statistics.

The layers are those of :func:`swapper.plan.layers.linear_layer` (Conv,
ConvTranspose, Gemm, MatMul), reached by the same walk placement uses.

A site output that also feeds residual Adds shifts their outputs by E[Δy];
that shift is cancelled in the Adds' other producers' biases
(:mod:`swapper.calibrate.add_shift`). :func:`covers_mean` says whether every
reader of a site output gets its mean back this way.

Two ways to the expectation. When every step and the layer are linear (no
max pool) E[L(Δ)] = L(E[Δ]): :class:`DeltaSum` collects Σ Δ while the student
output is computed, the steps run once on E[Δ] and the layer is applied in
float64 numpy (exact to float64, where a float32 Conv on every batch is not;
a ConvTranspose, whose border outputs gather fewer taps, runs in onnxruntime
with the steps). Otherwise (max pools, Gemm with transA, steps onnxruntime
cannot run on one sample) a small difference model runs batch by batch on
the cached student and teacher outputs.
"""
from __future__ import annotations

import logging
import math

import numpy as np
import onnx
from onnx import helper, numpy_helper
from onnxruntime.capi.onnxruntime_pybind11_state import Fail as OrtFail
from onnxruntime.capi.onnxruntime_pybind11_state import (
    InvalidArgument as OrtInvalidArgument,
)
from onnxruntime.capi.onnxruntime_pybind11_state import (
    RuntimeException as OrtRuntimeException,
)

from swapper.calibrate.add_shift import correct_through_adds
from swapper.core.conv import conv_geometry, tap_windows
from swapper.core.graph import GraphIndex, attr
from swapper.core.session import open_session
from swapper.core.slices import SliceRunner
from swapper.core.surgery import all_names, drop_unused, set_const_input
from swapper.plan.add_folds import add_readers, residual_readers
from swapper.plan.layers import Layer, Reach, linear_layer, reach_linear
from swapper.scan.sites import Site

logger = logging.getLogger(__name__)

_TMP = "swapper::bias_correction/"  # tensor names of the difference model (never a model's own)


def _difference_model(work: onnx.ModelProto, index: GraphIndex, site: Site, reach: Reach,
                      pair: bool, with_layer: bool, subtract: bool = False) -> onnx.ModelProto | None:
    """A model from a changed site output to the change at (or, ``with_layer``, after) a reached layer.

    Inputs "delta" (student − teacher; every step is linear) or, with ``pair``,
    "student" and "teacher" (a max pool is not linear: each goes through the
    steps and the difference is taken after them). With ``subtract`` the inputs
    are "student" and "teacher" and the model forms delta itself, in float64
    rounded once to the model's type (as ``np.subtract(s, t, dtype=float64)``).
    With ``with_layer`` the layer runs without its bias on the difference (its
    zero padding is linear too). Output "shift". None when a step reads a
    run-time tensor (a computed shape).
    """
    elem = index.dtypes.get(site.output, onnx.TensorProto.FLOAT)
    nodes, consts, ends = [], {}, []
    sides = [f"{_TMP}{side}" for side in (("student", "teacher") if pair else ("delta",))]
    model_inputs = [f"{_TMP}student", f"{_TMP}teacher"] if pair or subtract else sides
    if subtract and not pair:
        wide = [f"{_TMP}{side}::float64" for side in ("student", "teacher")]
        nodes += [helper.make_node("Cast", [n], [w], to=onnx.TensorProto.DOUBLE) for n, w in zip(model_inputs, wide)]
        nodes += [helper.make_node("Sub", wide, [f"{_TMP}delta::float64"]),
                  helper.make_node("Cast", [f"{_TMP}delta::float64"], sides, to=elem)]
    for side in sides:
        tensor = side
        for i, step in enumerate(reach.steps):
            inputs = [tensor]
            for name in list(step.node.input)[1:]:
                value = index.const(name) if name else None
                if name and value is None:
                    return None
                if name:
                    consts[name] = numpy_helper.from_array(value, name)
                inputs.append(name)
            copy = onnx.NodeProto()
            copy.CopyFrom(step.node)
            copy.name, tensor = f"{side}/{i}", f"{side}::{i}"
            copy.input[:], copy.output[:] = inputs, [tensor]
            nodes.append(copy)
        ends.append(tensor)
    diff = f"{_TMP}shift" if not with_layer else f"{_TMP}diff"
    nodes.append(helper.make_node("Sub", ends, [diff]) if pair else helper.make_node("Identity", ends, [diff]))
    if with_layer:  # the layer's linear part only: weight input, no bias
        layer = onnx.NodeProto()
        layer.CopyFrom(reach.node)
        layer.input[:], layer.output[:] = [diff, reach.node.input[1]], [f"{_TMP}shift"]
        consts[reach.node.input[1]] = numpy_helper.from_array(index.const(reach.node.input[1]), reach.node.input[1])
        nodes.append(layer)
    graph = helper.make_graph(nodes, "difference",
                              [helper.make_tensor_value_info(n, elem, None) for n in model_inputs],
                              [helper.make_tensor_value_info(f"{_TMP}shift", elem, None)],
                              initializer=list(consts.values()))
    return helper.make_model(graph, opset_imports=work.opset_import, ir_version=work.ir_version)


class DeltaSum:
    """Σ over samples of (student − teacher) site outputs, in float64, one sample's shape.

    Fed batch by batch while the student output is computed, so bias
    correction of linear paths needs no second pass over the recorded tensors:
    E[L(Δ)] = L(E[Δ]) for a linear L, so one run of L on the mean gives the shift.

    Given ``keep`` (a [batch, tokens] boolean of the token positions to count,
    for [batch, tokens, channels] outputs), it also sums Δ over those positions
    only: the mean over real tokens, which a layer reading the site output
    directly applies to (:meth:`token_mean`).
    """

    def __init__(self):
        self.total: np.ndarray | None = None
        self.n = 0
        self.dtype: np.dtype | None = None
        self.token_total: np.ndarray | None = None
        self.tokens = 0

    def add(self, student: np.ndarray, teacher: np.ndarray, keep: np.ndarray | None = None) -> None:
        if student.ndim == 0 or student.shape[0] == 0:
            return
        # Σ student − Σ teacher, each summed in float64 by the reduction itself (no float64 copy of the
        # batch); the float64 sums of float32 values are exact or nearly so, whatever their difference
        batch = np.add.reduce(student, axis=0, dtype=np.float64)
        batch -= np.add.reduce(teacher, axis=0, dtype=np.float64)
        if self.total is None:
            self.total, self.dtype = batch, student.dtype
        else:
            self.total += batch
        self.n += student.shape[0]
        if keep is not None:
            rows = np.add.reduce(student[keep], axis=0, dtype=np.float64)
            rows -= np.add.reduce(teacher[keep], axis=0, dtype=np.float64)
            self.token_total = rows if self.token_total is None else self.token_total + rows
            self.tokens += int(np.count_nonzero(keep))

    def mean(self) -> np.ndarray:
        """E[Δ] as one sample (leading axis of 1), float64."""
        return (self.total / max(self.n, 1))[None]

    def token_mean(self) -> np.ndarray | None:
        """E[Δ] over the kept token positions, shaped [1, 1, channels] (None: no positions were given)."""
        if self.token_total is None:
            return None
        return (self.token_total / max(self.tokens, 1))[None, None]


def _channel_sums(out: np.ndarray, axis: int) -> tuple[np.ndarray, int]:
    """Per-channel (along ``axis``) sums of ``out`` in float64, and how many values each sums."""
    axis %= out.ndim
    others = tuple(i for i in range(out.ndim) if i != axis)
    return out.sum(axis=others, dtype=np.float64), out.size // max(out.shape[axis], 1)


def _layer_shift(index: GraphIndex, node: onnx.NodeProto, mean: np.ndarray, in_numpy: bool) -> np.ndarray:
    """The layer's bias-free part applied to the mean change at its input (numpy layers) or as is."""
    if not in_numpy:
        return mean
    w = index.const(node.input[1]).astype(np.float64)
    if node.op_type == "Gemm":  # Y = alpha·A'·B' + beta·C
        return float(attr(node, "alpha", 1.0)) * (mean @ (w.T if attr(node, "transB", 0) else w))
    return mean @ w


def _per_batch(work, index, site, reach, cached: SliceRunner, student, teacher, axis, in_numpy, pair):
    """The layer-input (numpy layers) or layer-output mean change, one batch at a time from the cache."""
    node = reach.node
    model = None
    if reach.steps or not in_numpy:
        model = _difference_model(work, index, site, reach, pair, with_layer=not in_numpy, subtract=True)
        if model is None:
            return None
    keys = {f"{_TMP}student": student, f"{_TMP}teacher": teacher}
    if model is None:
        runs = (np.subtract(v[f"{_TMP}student"], v[f"{_TMP}teacher"], dtype=np.float64)
                for _, v in cached.stream(None, list(keys), keys=keys))
    else:
        runs = (v[f"{_TMP}shift"] for _, v in cached.stream(model, [f"{_TMP}shift"], keys=keys, whole=True))
    total, count = None, 0
    for out in runs:
        if in_numpy and node.op_type == "Gemm" and int(attr(node, "transA", 0)):
            out = out.T
        sums, k = _channel_sums(out, -1 if in_numpy else axis)
        total = sums if total is None else total + sums
        count += k
    return total / max(count, 1)


def _conv_mean(node: onnx.NodeProto, w: np.ndarray, x: np.ndarray) -> np.ndarray:
    """Per output channel, the mean over output positions of Conv(x) without bias, in float64.

    ``x`` is one sample (1, C, spatial...). Each output channel's sum over
    positions is Σ_c,tap W[o, c, tap] · (sum of the zero-padded input over
    the positions that tap visits): one strided window sum per kernel tap,
    never a patch matrix (ONNX operator spec, Conv: pads, strides,
    dilations, auto_pad via ``conv_geometry``; group splits C and M evenly).
    """
    kernel = tuple(w.shape[2:])
    pads_begin, pads_end, strides, dilations, out = conv_geometry(node, kernel, tuple(x.shape[2:]))
    xp = np.pad(x[0], [(0, 0)] + list(zip(pads_begin, pads_end)))
    taps = np.empty((x.shape[1], math.prod(kernel)))
    spatial_axes = tuple(range(1, xp.ndim))
    for j, window in enumerate(tap_windows(kernel, strides, dilations, out)):
        taps[:, j] = xp[(slice(None),) + window].sum(axis=spatial_axes)
    group = int(attr(node, "group", 1))
    m_g, c_g = w.shape[0] // group, w.shape[1]
    sums = [w[g * m_g:(g + 1) * m_g].reshape(m_g, -1) @ taps[g * c_g:(g + 1) * c_g].reshape(-1) for g in range(group)]
    return np.concatenate(sums) / max(math.prod(out), 1)


def _from_mean(work, index, site, reach, delta: DeltaSum, in_numpy):
    """The same mean change from E[Δ]: the linear steps once on one mean sample, the layer in float64 numpy.

    Returns the mean change at the layer input (numpy layers: Gemm, 2-D MatMul)
    or at its output (Conv, ConvTranspose, batched MatMul); None when a step reads a run-time
    tensor, NotImplemented when onnxruntime cannot run the steps on one sample.
    """
    node = reach.node
    in_ort = node.op_type == "ConvTranspose"  # no numpy twin here: onnxruntime runs it with the steps
    tokens = delta.token_mean()
    # the layer reads the site output itself, row by row: its mean input over real tokens is the token mean
    # (through reshapes or pools the rows would move, so the mean over every position is used there)
    x = tokens if tokens is not None and in_numpy and not reach.steps else delta.mean()
    if reach.steps or in_ort:
        model = _difference_model(work, index, site, reach, False, with_layer=in_ort)
        if model is None:
            return None
        # E[Δ] in float64 as two samples of the model's dtype, hi + lo (hi rounded, lo the rest):
        # the steps are linear, so their outputs add up to the steps applied to E[Δ] itself
        hi = x.astype(delta.dtype)
        pair = np.concatenate([hi, (x - hi.astype(np.float64)).astype(delta.dtype)])
        try:
            out = open_session(model).run(None, {f"{_TMP}delta": pair})[0].astype(np.float64)
        except (OrtFail, OrtInvalidArgument, OrtRuntimeException) as exc:  # e.g. a Reshape to a fixed batch
            logger.debug("bias correction of %s from the mean failed (%s); batch by batch", site.id, exc)
            return NotImplemented
        x = out[:1] + out[1:]
    if in_ort:  # the mean change at the layer output, over its output positions
        sums, k = _channel_sums(x, 1)
        return sums / max(k, 1)
    w = index.const(node.input[1]).astype(np.float64)
    if in_numpy:
        sums, k = _channel_sums(x, -1)
        return sums / max(k, 1)
    if node.op_type == "Conv":
        return _conv_mean(node, w, x)
    sums, k = _channel_sums(x @ w, -1)  # batched MatMul: Y = X·W, broadcast per ONNX (numpy) rules
    return sums / max(k, 1)


def _mean_shift(work: onnx.ModelProto, index: GraphIndex, site: Site, reach: Reach, cached: SliceRunner,
                student: str, teacher: str, axis: int, delta: DeltaSum | None = None) -> np.ndarray | None:
    """E[layer(student path) − layer(teacher path)] per output channel, bias cancelled (None: cannot run).

    The layer is linear: Gemm and 2-D MatMul get W·mean(Δ) in numpy, Conv,
    ConvTranspose (and batched MatMul) run on Δ, not on both inputs. With ``delta`` (and no max
    pool on the way, no transA) the linear path runs once, on E[Δ]; otherwise
    batch by batch from the cached student and teacher outputs.
    """
    node = reach.node
    w = index.const(node.input[1])
    in_numpy = node.op_type == "Gemm" or (node.op_type == "MatMul" and w.ndim == 2)
    pair = any(s.kind == "max" for s in reach.steps)  # max is not linear: both paths, per sample
    mean = NotImplemented
    if delta is not None and delta.n and not pair and not (node.op_type == "Gemm" and attr(node, "transA", 0)):
        mean = _from_mean(work, index, site, reach, delta, in_numpy)
    if mean is NotImplemented:
        mean = _per_batch(work, index, site, reach, cached, student, teacher, axis, in_numpy, pair)
    return None if mean is None else _layer_shift(index, node, mean, in_numpy)


def correct_bias(work: onnx.ModelProto, site: Site, cached: SliceRunner, student: str, teacher: str,
                 delta: DeltaSum | None = None) -> tuple[list[str], list[str]]:
    """Fold the negative mean shift of each linear consumer's output into its bias (Nagel et al. 2019).

    ``student`` and ``teacher`` are the cache keys of the site's swapped and
    original outputs, read batch by batch through ``cached`` (a runner over
    the calibration cache, with no prefix) when the shift cannot come from
    ``delta``. ``work`` is updated in place. The consumers may sit behind pools
    and reshapes (``reach_linear`` without gates: a gate's other operand is not
    recorded).
    """
    index = GraphIndex.of(work)
    taken = all_names(work)
    corrected, replaced = [], set()
    adds = residual_readers(index, site)
    reached, dead_ends = reach_linear(index, site.output, None, None, 1, gates=False, skip=adds)
    notes = [f"no bias correction: {why}" for why in dead_ends]
    if adds:
        done, more = _through_adds(work, index, site, cached, student, teacher, delta, taken)
        corrected += done
        notes += more
    for reach in reached:
        node = reach.node
        layer, why = linear_layer(index, node, reach.tensor)
        why = f"{node.name} {why}" if layer is None else _no_correction(index, layer)
        if why:
            notes.append(f"no bias correction: {why}")
            continue
        beta = float(attr(node, "beta", 1.0)) if node.op_type == "Gemm" else 1.0
        axis = 1 if layer.axis == "first" else -1  # where the output channels run
        shift = _mean_shift(work, index, site, reach, cached, student, teacher, axis, delta)
        if shift is None:
            notes.append(f"no bias correction: the way to {node.name} reads a run-time tensor")
            continue
        shift = shift / beta  # Gemm: Y = alpha·A·B + beta·C, the bias enters scaled by beta
        bias = layer.bias.astype(np.float64)
        if bias.size not in (1, shift.size):
            notes.append(f"no bias correction: bias of {node.name} has unexpected size {bias.size}")
            continue
        shape = bias.shape if bias.size == shift.size else np.broadcast_shapes(bias.shape, shift.shape)
        # a bias other nodes share gets a copy of its own, so their outputs stay as they were
        before = layer.bias_name()
        after = set_const_input(work, layer.bias_node, layer.bias_slot, (bias - shift).reshape(shape),
                                layer.bias.dtype, taken, f"swapper/{site.id}/bias_correction", hint=node.name)
        if after != before:
            replaced.add(before)
        corrected.append(node.name)
    if replaced:  # Constant nodes nothing reads any more go (a shared one stays); after the loop, which holds nodes
        drop_unused(work, replaced)
    return corrected, notes


def covers_mean(index: GraphIndex, site: Site) -> tuple[bool, str]:
    """Whether :func:`correct_bias` cancels the mean of every change of ``site.output`` wherever it is read.

    True when each reader is a linear layer with a correctable bias (directly or behind pools and
    reshapes) or a residual Add whose other operand's producer has a constant bias; else False and why.
    Calibration then fits a fixed d as if it were free: its mean is cancelled downstream either way.
    """
    if index.is_graph_output(site.output):
        return False, f"{site.output!r} is a graph output"
    adds = residual_readers(index, site)
    reached, dead_ends = reach_linear(index, site.output, None, None, 1, gates=False, skip=adds)
    if dead_ends:
        return False, dead_ends[0]
    for reach in reached:
        layer, why = linear_layer(index, reach.node, reach.tensor)
        why = f"{reach.node.name} {why}" if layer is None else _no_correction(index, layer)
        if why:
            return False, why
    routes, why = add_readers(index, site) if adds else ([], "")
    for r in routes:
        pf = r.producer
        name = pf.bias_node.input[pf.bias_slot] if pf is not None and len(pf.bias_node.input) > pf.bias_slot else ""
        if not name or index.const(name) is None:
            return False, f"Add {r.add.name!r}: no operand's producer has a constant bias"
    return (False, why) if why else (True, "")


def _no_correction(index: GraphIndex, layer: Layer) -> str:
    """Why a linear layer's bias is not corrected (no bias, not constant, beta = 0), or "".

    Weights and biases held by Constant nodes (as some exporters write every
    parameter) are corrected like initializers: the difference model copies
    the weight's value, and the corrected bias goes to a fresh initializer
    (``set_const_input`` rewires the slot and leaves the Constant node as it was).
    """
    name = layer.node.name
    if not layer.bias_name():
        return f"{name} has no constant bias"
    if any(index.const(t) is None for t in (layer.node.input[1], layer.bias_name())):
        return f"{name} computes its weight or bias at run time"
    if layer.kind == "gemm" and float(attr(layer.node, "beta", 1.0)) == 0.0:
        return f"{name} has beta = 0"
    return ""


def _through_adds(work: onnx.ModelProto, index: GraphIndex, site: Site, cached: SliceRunner, student: str,
                  teacher: str, delta: DeltaSum | None, taken: set[str]) -> tuple[list[str], list[str]]:
    """E[Δy] as one sample (from ``delta``, else one pass over the cache), cancelled through residual Adds."""
    if delta is not None and delta.n:
        mean = delta.mean()
    else:  # Σ (student − teacher) over the cached outputs, one sample's shape
        total, count = None, 0
        for _, v in cached.stream(None, [student, teacher]):
            part = np.subtract(v[student], v[teacher], dtype=np.float64).sum(axis=0, keepdims=True)
            total = part if total is None else total + part
            count += v[student].shape[0]
        mean = total / max(count, 1)
    return correct_through_adds(work, index, site, mean, taken)
