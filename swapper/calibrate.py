"""Calibration: refit every swapped site so the candidate reproduces the original.

A post-training, layer-wise distillation on unlabelled samples:

    for each depth level L of swapped sites (sites at one level are independent):
        x' = the level's site inputs, computed by the *partially swapped* model
             (sequential mode) or by the original model (local mode)
        y  = the original model's site outputs on the same samples
        fit a, b, c, d per channel so that a·g(b·x' + c) + d ≈ y
        optionally correct the mean shift at the site's linear consumers

Sequential mode never reruns the whole network per site: level L runs only the
segment of the original graph between the graph inputs / earlier swapped-site
outputs and the level's site inputs; swapped outputs are computed in numpy from
the cached inputs and fitted parameters and kept in an on-disk cache.
"""
from __future__ import annotations

import logging
import time
from dataclasses import dataclass, field

import numpy as np
import onnx
from onnx import helper, numpy_helper
from onnx.utils import Extractor

from . import functions
from .data import Dataset, batches
from .fit import fit_channels
from .consumers import Reach, reach_linear
from .observe import ChannelObserver
from .graph import GraphIndex, attr
from .plan import POSITIVE_A, Plan, SiteSwap
from .progress import Silent
from .record import TensorCache, expose, open_session
from .sites import Site

logger = logging.getLogger(__name__)

MODES = ("sequential", "local")
LINEAR_CONSUMERS = ("Conv", "Gemm", "MatMul")
_TMP = "swapper::bias_correction/"  # tensor names of the difference model (never a model's own)


@dataclass
class SiteCalibration:
    site_id: str
    level: int
    mse_start: float  # starting parameters on the recorded data
    mse_fit: float  # fitted parameters on the same data
    x_min: list[float] = field(default_factory=list)  # per channel, the recorded input range
    x_max: list[float] = field(default_factory=list)
    bias_corrected: list[str] = field(default_factory=list)  # consumer node names
    notes: list[str] = field(default_factory=list)


@dataclass
class CalibrationResult:
    plan: Plan
    model: onnx.ModelProto  # the original with consumer corrections; rewrite(plan) gives the candidate
    sites: list[SiteCalibration]
    timings: dict[str, float]  # seconds per phase
    samples: int

    def to_dict(self) -> dict:
        return {
            "samples": self.samples,
            "timings_s": {k: round(v, 4) for k, v in self.timings.items()},
            "sites": [s.__dict__ for s in self.sites],
        }


def site_levels(index: GraphIndex, sites: list[Site], swapped: set[str]) -> dict[str, int]:
    """Depth of each swapped site: 1 + the deepest swapped site upstream of its input."""
    by_output = {s.output: s for s in sites if s.id in swapped}
    depth: dict[str, int] = {}
    level: dict[str, int] = {}
    for node in index.graph.node:  # ONNX graphs are topologically sorted
        d = max((depth.get(t, 0) for t in node.input if t), default=0)
        for out in node.output:
            depth[out] = d
            site = by_output.get(out)
            if site is not None:
                level[site.id] = depth.get(site.input, 0) + 1
                depth[out] = level[site.id]
    return level


def surrogate_output(swap: SiteSwap, x: np.ndarray) -> np.ndarray:
    """a·g(b·x + c) + d per channel, in float64, returned in x's dtype.

    Computed a few samples (axis 0) at a time so the float64 temporaries stay
    cache-sized: whole-batch float64 copies cost more in allocation and page
    faults than in arithmetic. Elementwise, so the values equal one big pass.
    """
    fn = functions.get(swap.target)
    x = np.asarray(x)
    if x.ndim == 0:
        return surrogate_output(swap, x.reshape(1)).reshape(())
    shape = [1] * x.ndim
    axis = swap.channel_axis if swap.channel_axis is not None and swap.channels > 1 else None
    if axis is not None:
        shape[axis] = swap.channels
        axis %= x.ndim
    a, b, c, d = (np.asarray(getattr(swap, p), dtype=np.float64).reshape(shape) for p in "abcd")
    out = np.empty(x.shape, dtype=x.dtype)
    step = max(1, (1 << 16) // max(1, x[0].size))
    for i in range(0, x.shape[0], step):
        s = slice(i, i + step)
        pa, pb, pc, pd = (v[s] if axis == 0 else v for v in (a, b, c, d))
        out[s] = pa * fn.ref(pb * x[s].astype(np.float64) + pc, **swap.target_params) + pd
    return out


def _observer(swap: SiteSwap, seed: int, reservoir: int) -> ChannelObserver:
    axis = swap.channel_axis if swap.channels > 1 else None
    return ChannelObserver(swap.channels, axis, reservoir=reservoir, seed=seed)


def _fit(swap: SiteSwap, observer: ChannelObserver) -> tuple[float, float]:
    fn = functions.get(swap.target)
    params = swap.target_params

    def g(z):
        return fn.ref(z, **params)

    dg = (lambda z: fn.grad(z, **params)) if fn.grad is not None else None
    fitted = fit_channels(
        observer,
        g,
        init=swap.params(),
        free="".join(swap.free()),
        positive_a=swap.placement.get("a") == "inner"
        or (swap.placement.get("a") in POSITIVE_A and bool(np.all(np.asarray(swap.a) > 0))),
        dg=dg,
    )
    swap.set_params(a=fitted.a, b=fitted.b, c=fitted.c, d=fitted.d)
    return float(np.mean(fitted.mse_init)), float(np.mean(fitted.mse))


def _feeds_for(session, batch, cache: TensorCache) -> dict[str, np.ndarray]:
    feeds = {}
    for inp in session.get_inputs():
        if inp.name in batch.feeds:
            feeds[inp.name] = batch.feeds[inp.name]
        else:
            feeds[inp.name] = cache.read(inp.name, batch.start, batch.stop)
    return feeds


def _segment(model: onnx.ModelProto, inputs: list[str], outputs: list[str]) -> onnx.ModelProto:
    """The part of ``model`` that computes ``outputs`` from ``inputs`` (graph inputs always allowed)."""
    extractor = Extractor(model)
    seg = extractor.extract_model(inputs, outputs)
    # keep only the inputs the segment really reads, so we feed no more than needed
    used = {t for n in seg.graph.node for t in n.input} | set(outputs)
    kept = [v for v in seg.graph.input if v.name in used]
    del seg.graph.input[:]
    seg.graph.input.extend(kept)
    return seg


def _consumer_bias_slot(index: GraphIndex, node: onnx.NodeProto) -> tuple[str | None, int | None]:
    """Where a linear consumer's per-output-channel bias lives: (initializer name, output channel axis)."""
    if node.op_type == "Conv" and len(node.input) > 2 and node.input[2] in index.initializers:
        return node.input[2], 1
    if node.op_type == "Gemm" and len(node.input) > 2 and node.input[2] in index.initializers:
        return node.input[2], -1
    if node.op_type == "MatMul":
        users = index.users(node.output[0])
        if len(users) == 1 and users[0].op_type == "Add":
            other = [t for t in users[0].input if t != node.output[0]]
            if other and other[0] in index.initializers:
                return other[0], -1
    return None, None


def _difference_model(work: onnx.ModelProto, index: GraphIndex, site: Site, reach: Reach,
                      pair: bool, with_layer: bool) -> onnx.ModelProto | None:
    """A model from a changed site output to the change at (or, ``with_layer``, after) a reached layer.

    Inputs "delta" (student − teacher; every step is linear) or, with ``pair``,
    "student" and "teacher" (a max pool is not linear: each goes through the
    steps and the difference is taken after them). With ``with_layer`` the layer
    runs without its bias on the difference (its zero padding is linear too).
    Output "shift". None when a step reads a run-time tensor (a computed shape).
    """
    elem = index.dtypes.get(site.output, onnx.TensorProto.FLOAT)
    nodes, consts, ends = [], {}, []
    sides = [f"{_TMP}{side}" for side in (("student", "teacher") if pair else ("delta",))]
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
        consts[reach.node.input[1]] = index.initializers[reach.node.input[1]]
        nodes.append(layer)
    graph = helper.make_graph(nodes, "difference",
                              [helper.make_tensor_value_info(n, elem, None) for n in sides],
                              [helper.make_tensor_value_info(f"{_TMP}shift", elem, None)],
                              initializer=list(consts.values()))
    return helper.make_model(graph, opset_imports=work.opset_import, ir_version=work.ir_version)


def _mean_shift(work: onnx.ModelProto, index: GraphIndex, site: Site, reach: Reach, cache: TensorCache,
                student: str, teacher: str, ds: Dataset, batch_size: int, axis: int) -> np.ndarray | None:
    """E[layer(student path) − layer(teacher path)] per output channel, bias cancelled (None: cannot run).

    The layer is linear: Gemm and 2-D MatMul get W·mean(Δ) in numpy, Conv (and
    batched MatMul) runs once on Δ, not on both inputs.
    """
    node = reach.node
    w = index.const(node.input[1]).astype(np.float64)
    in_numpy = node.op_type == "Gemm" or (node.op_type == "MatMul" and w.ndim == 2)
    pair = any(s.kind == "max" for s in reach.steps)
    model = None
    if reach.steps or not in_numpy:
        model = _difference_model(work, index, site, reach, pair, with_layer=not in_numpy)
        if model is None:
            return None
    sess = open_session(model) if model is not None else None
    total, count = None, 0
    for start in range(0, ds.n, batch_size):
        stop = min(start + batch_size, ds.n)
        s, t = cache.read(student, start, stop), cache.read(teacher, start, stop)
        if sess is None:
            out = s.astype(np.float64) - t.astype(np.float64)
        elif pair:
            out = sess.run(None, {f"{_TMP}student": s, f"{_TMP}teacher": t})[0]
        else:
            out = sess.run(None, {f"{_TMP}delta": (s.astype(np.float64) - t.astype(np.float64)).astype(s.dtype)})[0]
        if in_numpy and node.op_type == "Gemm" and int(attr(node, "transA", 0)):
            out = out.T
        ax = -1 if in_numpy else axis
        rows = np.moveaxis(out.astype(np.float64), ax, 0).reshape(out.shape[ax], -1)
        total = rows.sum(axis=1) if total is None else total + rows.sum(axis=1)
        count += rows.shape[1]
    mean = total / max(count, 1)
    if not in_numpy:
        return mean
    if node.op_type == "Gemm":  # Y = alpha·A'·B' + beta·C
        return float(attr(node, "alpha", 1.0)) * (mean @ (w.T if attr(node, "transB", 0) else w))
    return mean @ w


def _correct_bias(work: onnx.ModelProto, site: Site, cache: TensorCache, student: str, teacher: str, ds: Dataset,
                  batch_size: int) -> tuple[list[str], list[str]]:
    """Fold the negative mean shift of each linear consumer's output into its bias (Nagel et al. 2019).

    The consumers may sit behind pools and reshapes (``reach_linear`` without
    gates: a gate's other operand is not recorded).
    """
    index = GraphIndex.of(work)
    corrected = []
    reached, dead_ends = reach_linear(index, site.output, None, None, 1, gates=False)
    notes = [f"no bias correction: {why}" for why in dead_ends]
    for reach in reached:
        node = reach.node
        if node.op_type not in LINEAR_CONSUMERS:
            notes.append(f"no bias correction through {node.op_type} {node.name}")
            continue
        if node.input[0] != reach.tensor or reach.tensor in node.input[1:] \
                or not all(t in index.initializers for t in node.input[1:] if t):
            notes.append(f"no bias correction: {node.name} does not read the site as its data input")
            continue
        bias_name, axis = _consumer_bias_slot(index, node)
        if bias_name is None:
            notes.append(f"no bias correction: {node.name} has no constant bias")
            continue
        beta = float(attr(node, "beta", 1.0)) if node.op_type == "Gemm" else 1.0
        if beta == 0.0:
            notes.append(f"no bias correction: {node.name} has beta = 0")
            continue
        shift = _mean_shift(work, index, site, reach, cache, student, teacher, ds, batch_size, axis)
        if shift is None:
            notes.append(f"no bias correction: the way to {node.name} reads a run-time tensor")
            continue
        shift = shift / beta  # Gemm: Y = alpha·A·B + beta·C, the bias enters scaled by beta
        init = index.initializers[bias_name]
        bias = numpy_helper.to_array(init).astype(np.float64)
        if bias.size not in (1, shift.size):
            notes.append(f"no bias correction: bias of {node.name} has unexpected size {bias.size}")
            continue
        users = sum(1 for n in work.graph.node for t in n.input if t == bias_name)
        new = numpy_helper.from_array((bias - shift).astype(numpy_helper.to_array(init).dtype).reshape(
            np.broadcast_shapes(bias.shape, shift.shape) if bias.size == 1 else bias.shape), bias_name)
        if users > 1:  # shared bias: give this consumer its own copy
            new.name = f"swapper/{site.id}/bias_correction/{node.name}"
            work.graph.initializer.append(new)
            for n in work.graph.node:
                if n.name == node.name or (node.op_type == "MatMul" and bias_name in n.input and
                                           node.output[0] in n.input):
                    n.input[:] = [new.name if t == bias_name else t for t in n.input]
        else:
            init.CopyFrom(new)
        corrected.append(node.name)
    return corrected, notes


def calibrate(
    original: onnx.ModelProto,
    sites: list[Site],
    plan: Plan,
    dataset: Dataset,
    *,
    mode: str = "sequential",
    bias_correction: bool = True,
    batch_size: int = 64,
    seed: int = 0,
    reservoir: int = 4096,
    threads: int = 1,
    progress=None,
) -> CalibrationResult:
    """Fit every swap in ``plan`` (updated in place) on ``dataset``; never mutates ``original``."""
    if mode not in MODES:
        raise ValueError(f"mode must be one of {MODES}")
    progress = progress or Silent()
    timings = {"record_s": 0.0, "segments_s": 0.0, "fit_s": 0.0, "bias_correction_s": 0.0}
    swaps = plan.by_site()
    by_id = {s.id: s for s in sites}
    work = onnx.ModelProto()
    work.CopyFrom(original)
    index = GraphIndex.of(work)
    levels = site_levels(index, sites, set(swaps))
    if mode == "local":
        levels = {k: 1 for k in levels}
    results: dict[str, SiteCalibration] = {}
    teacher = {sid: f"teacher::{by_id[sid].output}" for sid in swaps}  # cache keys of original outputs
    student: dict[str, str] = {}  # cache keys of swapped outputs
    n_batches = -(-dataset.n // batch_size)

    with TensorCache() as cache:
        # 1. one pass of the original: every swapped site's output (the targets), level-1 inputs
        first = [sid for sid, lv in levels.items() if lv == 1]
        graph_inputs = set(index.graph_inputs)
        names = [by_id[s].output for s in swaps] + [by_id[s].input for s in first if by_id[s].input not in graph_inputs]
        t0 = time.perf_counter()
        session = open_session(expose(original, names), threads=threads)
        out_names = [o.name for o in session.get_outputs()]
        with progress.task("recording original", n_batches) as advance:
            for batch in batches(dataset, batch_size):
                values = dict(zip(out_names, session.run(None, batch.feeds)))
                for sid in swaps:
                    cache.append(teacher[sid], values[by_id[sid].output])
                for sid in first:
                    name = by_id[sid].input
                    if name not in cache or cache.rows(name) < batch.stop:  # two sites may share an input
                        cache.append(name, batch.feeds[name] if name in graph_inputs else values[name])
                advance(1)
        timings["record_s"] += time.perf_counter() - t0

        for level in sorted(set(levels.values())):
            group = sorted((sid for sid, lv in levels.items() if lv == level), key=lambda s: int(s[1:]) if s[1:].isdigit() else 0)
            needed = list(dict.fromkeys(by_id[s].input for s in group if by_id[s].input not in cache))
            if level > 1 and needed:
                # 2. inputs of this level from the partially swapped model, segment only
                t0 = time.perf_counter()
                earlier = [by_id[s].output for s, lv in levels.items() if lv < level]
                seg = _segment(work, list(GraphIndex.of(work).graph_inputs) + earlier, needed)
                seg_session = open_session(seg, threads=threads)
                seg_outs = [o.name for o in seg_session.get_outputs()]
                with progress.task(f"level {level}: running segment", n_batches) as advance:
                    for batch in batches(dataset, batch_size):
                        values = seg_session.run(None, _feeds_for(seg_session, batch, cache))
                        for name, value in zip(seg_outs, values):
                            cache.append(name, value)
                        advance(1)
                timings["segments_s"] += time.perf_counter() - t0

            # 3. observe (x', y) pairs and fit
            t0 = time.perf_counter()
            with progress.task(f"level {level}: fitting {len(group)} site(s)", len(group)) as advance:
                for sid in group:
                    site, swap = by_id[sid], swaps[sid]
                    observer = _observer(swap, seed, reservoir)
                    for start in range(0, dataset.n, batch_size):
                        stop = min(start + batch_size, dataset.n)
                        observer.update(cache.read(site.input, start, stop), cache.read(teacher[sid], start, stop))
                    mse_start, mse_fit = _fit(swap, observer)
                    seen = observer.compute()
                    results[sid] = SiteCalibration(sid, level, mse_start, mse_fit,
                                                   x_min=[float(v) for v in seen.min_x],
                                                   x_max=[float(v) for v in seen.max_x])
                    # the swapped output feeds the next levels' segments; in local mode the
                    # original value of this tensor may already be cached as another site's
                    # input, so the swapped one goes under its own key (no duplicated rows)
                    student[sid] = site.output if site.output not in cache else f"student::{site.output}"
                    for start in range(0, dataset.n, batch_size):
                        stop = min(start + batch_size, dataset.n)
                        cache.append(student[sid], surrogate_output(swap, cache.read(site.input, start, stop)))
                    advance(1)
            timings["fit_s"] += time.perf_counter() - t0

            if bias_correction:
                t0 = time.perf_counter()
                for sid in group:
                    done, notes = _correct_bias(work, by_id[sid], cache, student[sid], teacher[sid], dataset, batch_size)
                    results[sid].bias_corrected, results[sid].notes = done, notes
                timings["bias_correction_s"] += time.perf_counter() - t0

    ordered = [results[sid] for sid in sorted(results, key=lambda s: list(swaps).index(s))]
    return CalibrationResult(plan=plan, model=work, sites=ordered, timings=timings, samples=dataset.n)
