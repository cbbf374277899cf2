"""Consumer refit: re-solve the linear layers that read swapped activations.

Transformation: for every swapped site and every *linear consumer* L of its
output (Gemm with constant B/C; MatMul with a constant 2-D B followed by a
constant bias Add; Conv with constant weights, group = 1, any pads / strides /
dilations, via im2col), replace L's weights and bias θ = [W; bias] by

    θ* = argmin ‖X·θ − Y‖² + λ·‖θ − θ_orig‖²  =  (XᵀX + λI)⁻¹ (XᵀY + λ·θ_orig)

where the rows of X are the consumer's input rows (im2col patches for a Conv)
taken from the *candidate* site output a·g(b·x' + c) + d, with a ones column
for the bias, and Y holds the *original* model's consumer output, one column
per output channel. The penalty pulls toward the original layer, not toward
zero: the original weights are what the layer knew, and the data only need to
correct them for the surrogate's error.

λ = f · mean(diag(XᵀX)) with f chosen from a log grid by K-fold
cross-validation over calibration *samples* (folds by seeded sample
permutation). XᵀX, XᵀY, YᵀY are accumulated per fold, batch by batch, so
memory depends on the layer width, never on the calibration-set size. A refit
is kept only if its held-out error is lower than the error of the layer's
current weights; otherwise the current weights stay (and a note says so).

Sites are processed level by level (depth in swapped sites, as in
calibration); after a level is refitted the working model is updated, so the
activations of deeper sites come from the refitted upstream layers. A deeper
site whose input changed that way first gets its a, b, c, d re-fitted (in the
plan, in place, as calibration does) on its new inputs: sequential
calibration tuned them to the *un*-refitted inputs, and leaving them so undoes
the refit downstream (demo CNN, SiLU -> ReLU, final-logit MSE vs the original
on the validation set: 0.59 calibrated, 2.13 refitted without this step, 0.43
with it). ``rewrite`` later folds a and d into the refitted weights,
which is exact because the refit regressed on the full a·g(·) + d.
"""
from __future__ import annotations

import copy
import itertools
import logging
import math
import time
from dataclasses import dataclass

import numpy as np
import onnx
from onnx import helper, numpy_helper

from . import functions
from .calibrate import site_levels
from .data import Dataset, batches
from .graph import GraphIndex, attr
from .fit import fit_channels
from .observe import ChannelObserver, GramAccumulator
from .plan import Plan
from .progress import Silent
from .record import expose, open_session
from .rewrite import rewrite
from .sites import Site

logger = logging.getLogger(__name__)

# λ / mean(diag XᵀX); the smallest is "almost plain least squares"
DEFAULT_FACTORS = (1e-8, 1e-6, 1e-4, 1e-3, 1e-2, 3e-2, 1e-1, 3e-1, 1.0, 10.0, 100.0)
DEFAULT_FOLDS = 4
CHUNK_ELEMENTS = 1 << 21  # float64 elements of one im2col chunk (16 MB): bounds memory per batch
RESERVOIR = 4096  # (x, y) pairs per channel for a site re-fit, as calibration's default
_DEFAULT = ("", "ai.onnx")


# ------------------------------------------------------------------ im2col
def conv_geometry(node: onnx.NodeProto, kernel: tuple[int, ...], spatial: tuple[int, ...]):
    """(pads_begin, pads_end, strides, dilations, out_spatial) of a Conv per the ONNX operator spec."""
    d = len(kernel)
    strides = list(attr(node, "strides", None) or [1] * d)
    dilations = list(attr(node, "dilations", None) or [1] * d)
    auto_pad = attr(node, "auto_pad", b"NOTSET")
    auto_pad = auto_pad.decode() if isinstance(auto_pad, bytes) else str(auto_pad)
    if auto_pad in ("SAME_UPPER", "SAME_LOWER"):
        begin, end = [], []
        for i in range(d):
            out = -(-spatial[i] // strides[i])  # ceil(in / stride)
            need = max(0, (out - 1) * strides[i] + (kernel[i] - 1) * dilations[i] + 1 - spatial[i])
            small = need // 2
            begin.append(small if auto_pad == "SAME_UPPER" else need - small)
            end.append(need - begin[-1])
    elif auto_pad == "VALID":
        begin, end = [0] * d, [0] * d
    else:
        pads = list(attr(node, "pads", None) or [0] * (2 * d))
        begin, end = pads[:d], pads[d:]
    out = [(spatial[i] + begin[i] + end[i] - dilations[i] * (kernel[i] - 1) - 1) // strides[i] + 1
           for i in range(d)]
    return begin, end, strides, dilations, out


def im2col(x: np.ndarray, kernel, strides, dilations, pads_begin, pads_end) -> np.ndarray:
    """Conv patches as rows (N·∏out, C·∏kernel).

    Row order (n, out...); column order (c, k...), the layout of W.reshape(M, -1).
    """
    n, c = x.shape[:2]
    spatial = x.shape[2:]
    d = len(spatial)
    xp = np.pad(x, [(0, 0), (0, 0)] + [(pads_begin[i], pads_end[i]) for i in range(d)])
    out = [(spatial[i] + pads_begin[i] + pads_end[i] - dilations[i] * (kernel[i] - 1) - 1) // strides[i] + 1
           for i in range(d)]
    if min(out, default=1) < 1:
        raise ValueError(f"Conv output would be empty for input {tuple(spatial)} and kernel {tuple(kernel)}")
    taps = math.prod(kernel)
    cols = np.empty((n, c, taps) + tuple(out), dtype=x.dtype)
    for j, offs in enumerate(itertools.product(*[range(k) for k in kernel])):  # row-major = W's layout
        window = tuple(slice(o * dl, o * dl + s * (m - 1) + 1, s)
                       for o, dl, s, m in zip(offs, dilations, strides, out))
        cols[:, :, j] = xp[(slice(None), slice(None)) + window]
    cols = cols.reshape((n, c * taps) + tuple(out))
    return np.moveaxis(cols, 1, -1).reshape(-1, c * taps)


# ------------------------------------------------------- Grams and the solve
class FoldedGram:
    """One GramAccumulator per cross-validation fold, over rows [x, 1] -> y."""

    def __init__(self, folds: int, inputs: int):
        self.dim = inputs + 1  # + the ones column of the bias
        self.parts = [GramAccumulator(self.dim) for _ in range(folds)]

    def update(self, X: np.ndarray, Y: np.ndarray, fold_of_row: np.ndarray) -> None:
        """Add rows ``X`` (n, inputs) with targets ``Y`` (n, outputs); ``fold_of_row`` (n,) ints."""
        Xa = np.empty((X.shape[0], self.dim))
        Xa[:, :-1] = X
        Xa[:, -1] = 1.0
        Y = np.asarray(Y, dtype=np.float64)
        for k, part in enumerate(self.parts):
            rows = np.nonzero(fold_of_row == k)[0]
            if rows.size:
                part.update(Xa[rows], Y[rows])

    def total(self, skip: int | None = None) -> GramAccumulator:
        """All folds merged (except ``skip``)."""
        acc = GramAccumulator(self.dim)
        for k, part in enumerate(self.parts):
            if k != skip:
                acc.merge(part)
        return acc

    def held_bytes(self) -> int:
        """Bytes of the arrays the accumulators hold (constant in the number of rows)."""
        return sum(p.xtx.nbytes + (0 if p.xty is None else p.xty.nbytes) + np.asarray(p.yty).nbytes
                   for p in self.parts)


def ridge_toward_prior(acc: GramAccumulator, lam: float, prior: np.ndarray) -> np.ndarray:
    """θ = argmin ‖Xθ − Y‖² + lam·‖θ − prior‖² from accumulated sums, all right-hand sides at once."""
    return acc.solve(lam, prior)


class RidgePath:
    """Many λ of the same ridge problem from one eigendecomposition XᵀX = QΛQᵀ.

    θ(λ) = Q·diag(1/(Λ + λ))·Qᵀ·(XᵀY + λ·prior): one O(p³) factorisation per
    Gram, then matrix products per λ (the CV grid tries every λ on every fold).
    """

    def __init__(self, acc: GramAccumulator):
        vals, self.vecs = np.linalg.eigh(acc.xtx)
        self.vals = np.clip(vals, 0.0, None)  # XᵀX is PSD; rounding can leave tiny negatives
        self.qty = self.vecs.T @ acc.xty

    def solve(self, lam: float, prior: np.ndarray) -> np.ndarray:
        if not lam > 0:
            raise ValueError(f"RidgePath needs lam > 0, got {lam}")
        return self.vecs @ ((self.qty + lam * (self.vecs.T @ prior)) / (self.vals + lam)[:, None])


def _scale(acc: GramAccumulator) -> float:
    s = float(np.trace(acc.xtx)) / acc.dim
    return s if s > 0 else 1.0


def _sse(acc: GramAccumulator, theta: np.ndarray) -> float:
    # The Gram form can dip below 0 by rounding when the fit is near perfect.
    return max(float(np.sum(acc.sse(theta))), 0.0)


@dataclass
class RidgeChoice:
    factor: float  # chosen λ / mean(diag XᵀX)
    lam: float  # λ used for the final solve on all folds
    cv_mse: float  # held-out MSE of the chosen factor
    current_mse: float  # MSE of the current weights on the same rows
    accepted: bool
    theta: np.ndarray  # the refitted [W; bias] when accepted, else the current one
    rows: int


def choose_ridge(gram: FoldedGram, prior: np.ndarray, current: np.ndarray,
                 factors=DEFAULT_FACTORS) -> RidgeChoice:
    """Pick λ by K-fold CV (smallest held-out error) and solve on all folds; keep it only if it beats ``current``."""
    total = gram.total()
    outputs = current.shape[1]
    count = max(total.n * outputs, 1)
    current_mse = _sse(total, current) / count
    active = [k for k, p in enumerate(gram.parts) if p.n > 0]
    if len(active) < 2:
        return RidgeChoice(float("nan"), float("nan"), float("nan"), current_mse, False, current, total.n)
    trains = {k: gram.total(skip=k) for k in active}
    paths = {k: RidgePath(trains[k]) for k in active}
    best_f, best_err = None, math.inf
    for f in factors:  # grid order breaks ties toward the first (smallest) factor
        err = 0.0
        for k in active:
            theta = paths[k].solve(f * _scale(trains[k]), prior)
            err += _sse(gram.parts[k], theta)
        if err < best_err:
            best_f, best_err = f, err
    lam = best_f * _scale(total)
    cv_mse = best_err / count
    if not cv_mse < current_mse:
        return RidgeChoice(best_f, lam, cv_mse, current_mse, False, current, total.n)
    return RidgeChoice(best_f, lam, cv_mse, current_mse, True, ridge_toward_prior(total, lam, prior), total.n)


# ------------------------------------------------------------ the consumers
@dataclass
class Consumer:
    """A linear layer reading a site output, by node names (valid in every copy of the graph)."""

    site_id: str
    kind: str  # "conv" | "gemm" | "matmul"
    node: str  # the layer holding the weight
    bias_node: str  # the node holding the bias (the Add of a MatMul), == node otherwise
    bias_slot: int  # input slot of the bias in bias_node (may not exist yet: Conv/Gemm without bias)
    data: str  # the site output it reads
    output: str  # the tensor the regression targets (the Add output for MatMul)


def _float_const(index: GraphIndex, name: str) -> np.ndarray | None:
    value = index.const(name) if name else None
    return value if value is not None and value.dtype.kind == "f" else None


def _along_last(value: np.ndarray, width: int) -> bool:
    """A bias that broadcasts along the last axis only: shape (), (1,), (W,), (1, W), ..."""
    return value.size in (1, width) and (value.ndim == 0 or value.shape[-1] == value.size)


def find_consumers(index: GraphIndex, site: Site, blocked: set[str]) -> tuple[list[Consumer], list[str]]:
    """The refittable linear consumers of ``site.output`` in graph order, and notes on the others."""
    found, notes = [], []
    users = sorted({n.name: n for n in index.users(site.output)}.values(),
                   key=lambda n: index.node_position[n.name])
    for node in users:
        label = f"no refit of {node.op_type} {node.name!r}"
        if node.name in blocked:
            notes.append(f"{label}: it is part of a swapped site")
            continue
        if node.domain not in _DEFAULT or node.op_type not in ("Conv", "Gemm", "MatMul"):
            notes.append(f"{label}: not a linear layer")
            continue
        if [t for t in node.input].count(site.output) != 1 or node.input[0] != site.output:
            notes.append(f"{label}: does not read the site as its data input only")
            continue
        w = _float_const(index, node.input[1])
        bias_name = node.input[2] if len(node.input) > 2 else ""
        bias = _float_const(index, bias_name) if bias_name else None
        if w is None or (bias_name and bias is None):
            notes.append(f"{label}: weights are not constant")
            continue
        if node.op_type == "Conv":
            if int(attr(node, "group", 1)) != 1:
                notes.append(f"{label}: grouped Conv (group={attr(node, 'group', 1)})")
                continue
            found.append(Consumer(site.id, "conv", node.name, node.name, 2, site.output, node.output[0]))
        elif node.op_type == "Gemm":
            width = w.shape[0] if attr(node, "transB", 0) else w.shape[1]
            if int(attr(node, "transA", 0)) or float(attr(node, "alpha", 1.0)) == 0.0 \
                    or float(attr(node, "beta", 1.0)) == 0.0:
                notes.append(f"{label}: transA=1, alpha=0 or beta=0")
                continue
            if bias is not None and not _along_last(bias, width):
                notes.append(f"{label}: C is not a per-output-channel bias")
                continue
            found.append(Consumer(site.id, "gemm", node.name, node.name, 2, site.output, node.output[0]))
        else:
            add = _bias_add(index, node, blocked)
            if w.ndim != 2 or add is None:
                notes.append(f"{label}: needs a 2-D constant weight and a constant bias Add")
                continue
            slot = 1 if add.input[0] == node.output[0] else 0
            if not _along_last(_float_const(index, add.input[slot]), w.shape[1]):
                notes.append(f"{label}: its bias does not run along the output channels")
                continue
            found.append(Consumer(site.id, "matmul", node.name, add.name, slot, site.output, add.output[0]))
    return found, notes


def _bias_add(index: GraphIndex, mm: onnx.NodeProto, blocked: set[str]) -> onnx.NodeProto | None:
    out = mm.output[0]
    users = index.users(out)
    if index.is_graph_output(out) or len(users) != 1 or users[0].op_type != "Add" or users[0].name in blocked:
        return None
    add = users[0]
    if list(add.input).count(out) != 1:
        return None
    other = add.input[1] if add.input[0] == out else add.input[0]
    return add if _float_const(index, other) is not None else None


def _bias_name(index: GraphIndex, c: Consumer) -> str:
    node = index.nodes_by_name[c.bias_node]
    return node.input[c.bias_slot] if c.bias_slot < len(node.input) else ""


def theta_of(index: GraphIndex, c: Consumer) -> np.ndarray:
    """[W_eff; bias_eff] (inputs + 1, outputs) of the consumer so that output = [x, 1]·θ."""
    node = index.nodes_by_name[c.node]
    w = index.const(node.input[1]).astype(np.float64)
    name = _bias_name(index, c)
    bias = index.const(name).astype(np.float64).ravel() if name else np.zeros(1)
    if c.kind == "conv":
        w_eff = w.reshape(w.shape[0], -1).T
    elif c.kind == "gemm":
        w_eff = float(attr(node, "alpha", 1.0)) * (w.T if attr(node, "transB", 0) else w)
        bias = float(attr(node, "beta", 1.0)) * bias
    else:
        w_eff = w
    return np.vstack([w_eff, np.broadcast_to(bias, (w_eff.shape[1],))[None, :]])


# ---------------------------------------------------------------- writing
def _references(model: onnx.ModelProto, name: str) -> int:
    def count(nodes) -> int:
        total = 0
        for n in nodes:
            total += sum(1 for t in n.input if t == name)
            for a in n.attribute:
                for g in ([a.g] if a.type == onnx.AttributeProto.GRAPH else list(a.graphs)):
                    total += count(g.node)
        return total
    return count(model.graph.node) + sum(1 for o in model.graph.output if o.name == name)


def _put(model: onnx.ModelProto, index: GraphIndex, node: onnx.NodeProto, slot: int, value: np.ndarray,
         dtype: np.dtype) -> None:
    """Set ``node`` input ``slot`` to ``value``: in place if only it reads the initializer, else a fresh copy."""
    name = node.input[slot] if slot < len(node.input) else ""
    tensor = numpy_helper.from_array(np.asarray(value).astype(dtype), name)
    init = index.initializers.get(name) if name else None
    if init is not None and list(init.dims) == list(tensor.dims) and _references(model, name) == 1:
        init.CopyFrom(tensor)
        return
    taken = {t.name for t in model.graph.initializer} | {t for n in model.graph.node for t in
                                                         list(n.input) + list(n.output)}
    base = f"swapper/refit/{node.name}/in{slot}"
    fresh, k = base, 0
    while fresh in taken:
        k += 1
        fresh = f"{base}_{k}"
    tensor.name = fresh
    model.graph.initializer.append(tensor)
    if model.ir_version < 4:  # old IR: initializers are also graph inputs
        model.graph.input.append(helper.make_tensor_value_info(fresh, tensor.data_type, list(tensor.dims)))
    while len(node.input) <= slot:
        node.input.append("")
    node.input[slot] = fresh


def write_theta(model: onnx.ModelProto, c: Consumer, theta: np.ndarray) -> None:
    """Store ``theta`` (as from :func:`theta_of`) back into the consumer's weight and bias, in their dtypes."""
    index = GraphIndex.of(model)
    node, bias_node = index.nodes_by_name[c.node], index.nodes_by_name[c.bias_node]
    w = index.const(node.input[1])
    old_bias_name = _bias_name(index, c)
    old_bias = index.const(old_bias_name) if old_bias_name else None
    w_eff, bias = theta[:-1], theta[-1]
    if c.kind == "conv":
        new_w = w_eff.T.reshape(w.shape)
    elif c.kind == "gemm":
        new_w = w_eff / float(attr(node, "alpha", 1.0))
        new_w = new_w.T if attr(node, "transB", 0) else new_w
        bias = bias / float(attr(node, "beta", 1.0))
    else:
        new_w = w_eff
    if old_bias is not None and old_bias.size == bias.size:
        bias = bias.reshape(old_bias.shape)  # keep the layout the model had
    _put(model, index, node, 1, new_w, w.dtype)
    _put(model, index, bias_node, c.bias_slot, bias, old_bias.dtype if old_bias is not None else w.dtype)


# -------------------------------------------------------------- accumulation
def accumulate(gram: FoldedGram, c: Consumer, conv: onnx.NodeProto | None, kernel: tuple[int, ...],
               x: np.ndarray, y: np.ndarray, fold_of_sample: np.ndarray) -> None:
    """Add one batch: ``x`` the candidate site output, ``y`` the original consumer output."""
    nb = x.shape[0]
    if c.kind == "conv":
        begin, end, strides, dilations, out = conv_geometry(conv, kernel, tuple(x.shape[2:]))
        per_sample = math.prod(out)
        step = max(1, CHUNK_ELEMENTS // max(1, per_sample * gram.dim))
        for s in range(0, nb, step):
            rows = im2col(x[s:s + step], kernel, strides, dilations, begin, end)
            part = y[s:s + step]
            targets = np.moveaxis(part, 1, -1).reshape(-1, part.shape[1])
            gram.update(rows, targets, np.repeat(fold_of_sample[s:s + step], per_sample))
        return
    X = x.reshape(-1, x.shape[-1])
    Y = y.reshape(-1, y.shape[-1])
    # rows are sample-major; map each row to the sample it comes from
    gram.update(X, Y, fold_of_sample[np.arange(X.shape[0]) * nb // X.shape[0]])


def _nodes_plan(plan: Plan) -> Plan:
    """A copy of ``plan`` that emits every moved parameter as a node: site output = a·g(b·x + c) + d."""
    out = copy.deepcopy(plan)
    for swap in out.swaps:
        swap.placement = {p: ("held" if w == "held" else "nodes") for p, w in swap.placement.items()}
    return out


def _note(result, site_id: str, text: str) -> None:
    logger.info("site %s: %s", site_id, text)
    if result is None:
        return
    for entry in result.sites:
        if entry.site_id == site_id:
            entry.notes.append(text)


# ------------------------------------------------------------ site re-fit
def _downstream(model: onnx.ModelProto, tensors: set[str]) -> set[str]:
    """Every tensor computed from ``tensors`` (graph order is topological)."""
    dirty = set(tensors)
    for node in model.graph.node:
        if any(t in dirty for t in node.input):
            dirty.update(t for t in node.output if t)
    return dirty


def _refit_sites(work, original, sites, group: list[Site], plan: Plan, dataset: Dataset, batch_size: int,
                 seed: int, threads: int, progress, result) -> None:
    """Re-fit a, b, c, d of ``group`` (in ``plan``) on their inputs in ``work``, as calibration fits them."""
    swaps = plan.by_site()
    cand = rewrite(work, sites, _nodes_plan(plan)).model
    ins = list(dict.fromkeys(s.input for s in group))
    outs = list(dict.fromkeys(s.output for s in group))
    graph_inputs = set(GraphIndex.of(cand).graph_inputs)
    inner = [t for t in ins if t not in graph_inputs]
    cand_sess = open_session(expose(cand, inner), threads=threads) if inner else None
    orig_sess = open_session(expose(original, outs), threads=threads)
    observers = {}
    for s in group:
        sw = swaps[s.id]
        observers[s.id] = ChannelObserver(sw.channels, sw.channel_axis if sw.channels > 1 else None,
                                          reservoir=RESERVOIR, seed=seed)
    label = f"re-fitting {len(group)} site(s) on refitted layers"
    with progress.task(label, -(-dataset.n // batch_size)) as advance:
        for batch in batches(dataset, batch_size):
            xs = dict(batch.feeds)
            if cand_sess is not None:
                xs.update(zip(inner, cand_sess.run(inner, batch.feeds)))
            ys = dict(zip(outs, orig_sess.run(outs, batch.feeds)))
            for s in group:
                observers[s.id].update(xs[s.input], ys[s.output])
            advance(1)
    for s in group:
        sw = swaps[s.id]
        fn = functions.get(sw.target)
        params = dict(sw.target_params)
        fitted = fit_channels(
            observers[s.id], lambda z: fn.ref(z, **params), init=sw.params(), free="".join(sw.free()),
            positive_a=sw.placement.get("a") == "inner",
            dg=(lambda z: fn.grad(z, **params)) if fn.grad is not None else None)
        sw.set_params(a=fitted.a, b=fitted.b, c=fitted.c, d=fitted.d)
        _note(result, s.id, f"a, b, c, d re-fitted on the refitted upstream layers: MSE "
                            f"{float(np.mean(fitted.mse_init)):.4g} -> {float(np.mean(fitted.mse)):.4g}")


# ------------------------------------------------------------------- public
def refit_consumers(
    original: onnx.ModelProto,
    base: onnx.ModelProto,
    sites: list[Site],
    plan: Plan,
    dataset: Dataset,
    *,
    batch_size: int = 64,
    seed: int = 0,
    threads: int = 1,
    progress=None,
    result=None,
    folds: int = DEFAULT_FOLDS,
    factors: tuple[float, ...] = DEFAULT_FACTORS,
    refit_sites: bool = True,
) -> onnx.ModelProto:
    """A copy of ``base`` whose linear consumers of swapped sites are refitted (module docstring).

    ``original`` gives the target outputs and the prior weights; ``base`` (the
    original plus calibration's bias corrections) gives the current weights.
    With ``refit_sites`` the swaps of sites downstream of a refitted layer are
    re-fitted in ``plan`` (in place). ``result`` (a CalibrationResult) receives
    the notes. Neither model is mutated; node names are kept.
    """
    progress = progress or Silent()
    t_start = time.perf_counter()
    work = onnx.ModelProto()
    work.CopyFrom(base)
    swaps = plan.by_site()
    by_id = {s.id: s for s in sites}
    blocked = {name for sid in swaps for name in by_id[sid].nodes}
    levels = site_levels(GraphIndex.of(work), sites, set(swaps))
    k = max(1, min(int(folds), dataset.n))
    fold_of = np.random.default_rng(seed).permutation(dataset.n) % k  # fold of each sample index
    orig_index = GraphIndex.of(original)
    changed: set[str] = set()  # outputs of the consumers refitted so far

    for level in sorted(set(levels.values())):
        index = GraphIndex.of(work)
        group = sorted((by_id[sid] for sid, lv in levels.items() if lv == level),
                       key=lambda s: index.node_position.get(s.nodes[0], 0))
        if refit_sites and changed:
            dirty = _downstream(work, changed)
            moved = [s for s in group if s.input in dirty]
            if moved:
                _refit_sites(work, original, sites, moved, plan, dataset, batch_size, seed, threads, progress,
                             result)
        consumers: list[Consumer] = []
        for site in group:
            found, notes = find_consumers(index, site, blocked)
            consumers.extend(found)
            for text in notes:
                _note(result, site.id, text)
        if not consumers:
            continue
        consumers.sort(key=lambda c: index.node_position[c.node])
        grams = accumulate_level(work, original, sites, plan, consumers, dataset, k, fold_of, batch_size,
                                  threads, progress, f"refit level {level}")
        for c in consumers:
            choice = choose_ridge(grams[c.node], theta_of(orig_index, c), theta_of(index, c), factors)
            op = index.nodes_by_name[c.node].op_type
            if choice.accepted:
                write_theta(work, c, choice.theta)
                changed.add(c.output)
                _note(result, c.site_id,
                      f"refit {op} {c.node!r}: lambda = {choice.factor:g} x mean diag(XtX) = {choice.lam:.4g} "
                      f"({k}-fold CV over samples); held-out MSE {choice.cv_mse:.4g} vs current "
                      f"{choice.current_mse:.4g}")
            elif math.isnan(choice.cv_mse):
                _note(result, c.site_id, f"no refit of {op} {c.node!r}: too few samples for {k}-fold CV")
            else:
                _note(result, c.site_id,
                      f"kept current weights of {op} {c.node!r}: best held-out MSE {choice.cv_mse:.4g} "
                      f"(lambda = {choice.factor:g} x mean diag) is not below current {choice.current_mse:.4g}")
    if result is not None:
        result.timings["refit_s"] = time.perf_counter() - t_start
    return work


def accumulate_level(work, original, sites, plan, consumers: list[Consumer], dataset: Dataset, k: int,
                      fold_of: np.ndarray, batch_size: int, threads: int, progress, label: str
                      ) -> dict[str, FoldedGram]:
    """Per-fold Grams of every consumer: candidate site outputs (X) against original consumer outputs (Y)."""
    index = GraphIndex.of(work)
    cand = rewrite(work, sites, _nodes_plan(plan)).model
    data_names = list(dict.fromkeys(c.data for c in consumers))
    out_names = list(dict.fromkeys(c.output for c in consumers))
    cand_sess = open_session(expose(cand, data_names), threads=threads)
    orig_sess = open_session(expose(original, out_names), threads=threads)
    grams, kernels, convs = {}, {}, {}
    for c in consumers:
        node = index.nodes_by_name[c.node]
        kernels[c.node] = tuple(index.const(node.input[1]).shape[2:]) if c.kind == "conv" else ()
        convs[c.node] = node if c.kind == "conv" else None
        grams[c.node] = FoldedGram(k, theta_of(index, c).shape[0] - 1)
    with progress.task(f"{label}: {len(consumers)} consumer(s)", -(-dataset.n // batch_size)) as advance:
        for batch in batches(dataset, batch_size):
            xs = dict(zip(data_names, cand_sess.run(data_names, batch.feeds)))
            ys = dict(zip(out_names, orig_sess.run(out_names, batch.feeds)))
            f = fold_of[batch.start:batch.stop]
            for c in consumers:
                accumulate(grams[c.node], c, convs[c.node], kernels[c.node], xs[c.data], ys[c.output], f)
            advance(1)
    return grams
