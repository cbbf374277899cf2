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
is kept only if its cross-validated error is lower than the error of the
layer's current weights, and a site's consumers are refitted only if that
lowers their error on calibration samples held out from all of it
(:mod:`swapper.calibrate.refit_decision`); otherwise the current weights stay
(and a note says so). In the swap pipeline a layer whose output is a graph
output is not refitted (``outputs=False``): least squares on the model's own
outputs trades the margins between classes
for the mean error (demo_models/meter_mlp_tanh_sigmoid.onnx, Tanh and Sigmoid
-> ReLU, 1541 digits outside the calibration set; without refit the mean
squared logit error is 0.707 and top-1 agreement with the original 99.16%:
refitting the logits Gemm alone gives 0.500 and 98.77%, the hidden Gemm
alone 0.587 and 99.48%, both 0.432 and 98.83%).

Sites are processed level by level (depth in swapped sites, as in
calibration); after a level is refitted the working model is updated, so the
activations of deeper sites come from the refitted upstream layers. A deeper
site whose input changed that way first gets its a, b, c, d re-fitted (in the
refit's own copy of the plan, as calibration fits them) on its new inputs: sequential
calibration tuned them to the *un*-refitted inputs, and leaving them so undoes
the refit downstream (demo CNN, SiLU -> ReLU, final-logit MSE vs the original
on the validation set: 0.59 calibrated, 2.13 refitted without this step, 0.43
with it). ``rewrite`` later folds a and d into the refitted weights,
which is exact because the refit regressed on the full a·g(·) + d.

Data flow: a level runs only the part of each model it needs. The original
and the candidate (the working model with the swaps as nodes) are run by
:class:`~swapper.core.slices.SliceRunner` (one per model, as in calibration)
from the graph inputs and the site outputs recorded at earlier levels, which
live in a
:class:`~swapper.core.tensor_cache.TensorCache` (RAM up to its budget, disk beyond) until
the last level that starts from them. Over a whole refit each node of the
original then runs about once, and each node of the candidate once per pass
that needs it (site re-fit, accumulation), instead of the whole network per
pass and level (synthetic 16-block scale model, 256 samples: onnxruntime time
23.5 s -> 2.0 s, refit 35.7 s -> 14.4 s, same result). Starting there is exact: a
site's output never changes after its level (a refit writes only layers
downstream of its level's sites, and a site's a, b, c, d are final once its
level has re-fitted them).

Parts: :mod:`swapper.plan.layers` (which layers, their θ), :mod:`swapper.core.conv`
(Conv rows), :mod:`swapper.calibrate.ridge` (per-fold Grams, λ by CV, the solve); this
module streams the data and runs them level by level.
"""
from __future__ import annotations

import copy
import logging
import math
import time
from contextlib import nullcontext
from dataclasses import dataclass, field, replace

import numpy as np
import onnx

from swapper.calibrate.loop import (
    CANDIDATE,
    ORIGINAL,
    CalibrationResult,
    observer_for,
    site_levels,
)
from swapper.calibrate.refit_decision import HOLDOUT, RefitDecision, decide_site, split_samples

# Moved to swapper.ridge; re-exported so imports from swapper.calibrate.refit keep working.
from swapper.calibrate.ridge import (  # noqa: F401
    DEFAULT_FACTORS,
    FoldedGram,
    RidgeChoice,
    RidgePath,
    choose_ridge,
    ridge_toward_prior,
)
from swapper.calibrate.site_fit import fit_rules, fit_swap
from swapper.calibrate.tokens import is_token_site, observe, token_selection
from swapper.core.conv import conv_geometry, im2col, patches_at
from swapper.core.graph import GraphIndex
from swapper.core.slices import LastReads, SliceRunner, boundary_reads
from swapper.core.surgery import all_names, copy_model, drop_unused, used_names
from swapper.core.tensor_cache import MEMORY_BUDGET, TensorCache
from swapper.data.dataset import Dataset, input_batches
from swapper.data.token_mask import AUTO, TOKEN_CAP, TokenSelection, token_rows
from swapper.plan.layers import Consumer, find_consumers, theta_of
from swapper.plan.plan import Plan
from swapper.progress import Silent
from swapper.rewrite.apply import rewrite
from swapper.scan.sites import Site

logger = logging.getLogger(__name__)

DEFAULT_FOLDS = 4
CHUNK_ELEMENTS = 1 << 21  # float64 elements of one im2col chunk (16 MB): bounds memory per batch
# Conv consumers: at most this many patch rows per layer over the calibration set; beyond it each sample gives a
# seeded uniform choice of ROW_CAP // samples of its output positions. The Gram update costs rows·(C·k²)²: the
# 16-block scale model (256 samples of 32x32) has 262 144 rows per layer, which took 18 of its 34 s of refit.
# 65 536 rows are still over 200 per unknown of a 32-channel 3x3 layer (common practice, no source).
ROW_CAP = 1 << 16
RESERVOIR = 4096  # (x, y) pairs per channel for a site re-fit, as calibration's default


@dataclass
class RefitResult:
    """What a consumer refit gives back; the models and the plan it was handed stay as they were."""

    model: onnx.ModelProto  # a copy of the base model with the refitted consumers
    plan: Plan  # a new plan: the swaps, re-fitted where a refit changed their inputs
    notes: list[tuple[str, str]] = field(default_factory=list)  # (site id, note), in the order they arose
    timings: dict[str, float] = field(default_factory=dict)  # {"refit_s": seconds}
    decisions: dict[str, RefitDecision] = field(default_factory=dict)  # site id -> its refit, taken or not

    def apply_to(self, calibration: CalibrationResult) -> CalibrationResult:
        """A new calibration result as the refit leaves it: its model and plan, its notes after each
        site's own, each site's refit decision, its timings added (``calibration`` is not changed)."""
        sites = [replace(s, notes=s.notes + [text for sid, text in self.notes if sid == s.site_id],
                         refit=self.decisions[s.site_id].to_dict() if s.site_id in self.decisions else None)
                 for s in calibration.sites]
        return replace(calibration, model=self.model, plan=self.plan, sites=sites,
                       timings={**calibration.timings, **self.timings})


# -------------------------------------------------------------- schedule
@dataclass
class _Level:
    """One depth level of swapped sites, worked out before any data flows."""

    number: int
    sites: list[Site]  # in graph order
    consumers: list[Consumer] = field(default_factory=list)  # in graph order
    notes: list[tuple[str, str]] = field(default_factory=list)  # (site id, why a reader is no consumer)
    keep: list[str] = field(default_factory=list)  # its site outputs that later levels start from
    done: list[str] = field(default_factory=list)  # recorded tensors no later level starts from


def _schedule(index: GraphIndex, sites: list[Site], swapped: set[str], outputs: bool = True) -> list[_Level]:
    """Levels in order with their sites and consumers, and which site outputs to record for how long.

    Refits change weights and swaps, never which nodes are where, so the
    consumers found on ``index`` hold for the whole refit.
    """
    by_id = {s.id: s for s in sites}
    # node names are unique per graph: a site inside an If/Loop/Scan body blocks nothing here
    blocked = {name for sid in swapped if not by_id[sid].body for name in by_id[sid].nodes}
    levels = site_levels(index, sites, swapped)
    schedule = []
    for number in sorted(set(levels.values())):
        group = sorted((by_id[sid] for sid, lv in levels.items() if lv == number),
                       key=lambda s: index.node_position.get(s.nodes[0], 0))
        level = _Level(number, group)
        for site in group:
            found, notes = find_consumers(index, site, blocked)
            if not outputs:  # the model's own output: see the module docstring
                notes += [f"no refit of {c.node!r}: its output is a graph output" for c in found
                          if index.is_graph_output(c.output)]
                found = [c for c in found if not index.is_graph_output(c.output)]
            level.consumers.extend(found)
            level.notes.extend((site.id, text) for text in notes)
        level.consumers.sort(key=lambda c: index.node_position[c.node])
        schedule.append(level)
    # the earlier site outputs each level's tensors are computed from (the nearest on every path)
    last = LastReads()
    for i, level in enumerate(schedule):
        earlier = {s.output for lv in schedule[:i] for s in lv.sites}
        targets = [t for s in level.sites for t in (s.input, s.output)] + [c.output for c in level.consumers]
        for t in boundary_reads(index, earlier, targets):
            last.read_at(t, i)
    for i, level in enumerate(schedule):
        level.keep = [s.output for s in level.sites if last.get(s.output, i) > i]
        level.done = last.done(i)
    return schedule


# -------------------------------------------------------------- accumulation
def accumulate(gram: FoldedGram, c: Consumer, conv: onnx.NodeProto | None, kernel: tuple[int, ...],
               x: np.ndarray, y: np.ndarray, fold_of_sample: np.ndarray, keep: np.ndarray | None = None,
               positions: int | None = None, rng: np.random.Generator | None = None) -> None:
    """Add one batch: ``x`` the candidate site output, ``y`` the original consumer output.

    ``keep`` ([batch, tokens] booleans, token-shaped sites only): the rows of
    the kept token positions alone enter the Grams. ``positions`` (Conv
    consumers): at most this many output positions per sample, drawn by
    ``rng`` without replacement, each sample its own (None: every position).
    """
    nb = x.shape[0]
    if keep is not None and c.kind != "conv":
        rows = np.nonzero(keep)[0]  # the sample each kept row comes from
        gram.update(token_rows(x, keep, f"input of {c.node}"), token_rows(y, keep, f"output of {c.node}"),
                    fold_of_sample[rows])
        return
    if c.kind == "conv":
        begin, end, strides, dilations, out = conv_geometry(conv, kernel, tuple(x.shape[2:]))
        per_sample = math.prod(out)
        if positions is not None and positions < per_sample:
            chosen = np.stack([rng.choice(per_sample, positions, replace=False) for _ in range(nb)])  # (nb, k)
            chosen.sort(axis=1)
            samples = np.repeat(np.arange(nb), positions)
            rows = patches_at(x, kernel, strides, dilations, begin, end, out, samples, chosen.reshape(-1))
            coords = np.unravel_index(chosen.reshape(-1), tuple(out))
            targets = y[(samples, slice(None)) + coords]  # advanced indices first: (rows, outputs)
            gram.update(rows, targets, fold_of_sample[samples])
            return
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
        swap.placement = {p: ("fixed" if w == "fixed" else "nodes") for p, w in swap.placement.items()}
    return out


def _note(notes: list[tuple[str, str]], site_id: str, text: str) -> None:
    logger.info("site %s: %s", site_id, text)
    notes.append((site_id, text))


# ------------------------------------------------------------ site re-fit
def _downstream(model: onnx.ModelProto, tensors: set[str]) -> set[str]:
    """Every tensor computed from ``tensors`` (graph order is topological)."""
    dirty = set(tensors)
    for node in model.graph.node:
        if any(t in dirty for t in node.input):
            dirty.update(t for t in node.output if t)
    return dirty


def _refit_sites(work, original, sites, group: list[Site], plan: Plan, seed: int, progress, notes: list,
                 cand: SliceRunner, orig: SliceRunner, n: int, batch_size: int, keep: list[str],
                 tokens: TokenSelection | None = None) -> None:
    """Re-fit a, b, c, d of ``group`` (in ``plan``, refit's own copy) on their inputs in ``work``, as calibration
    fits them. The original's outputs in ``keep`` are recorded on the way (later levels start from them).
    """
    swaps = plan.by_site()
    index = GraphIndex.of(work)
    model = rewrite(work, sites, _nodes_plan(plan)).model
    ins = [s.input for s in group]
    outs = [s.output for s in group]
    masked = {s.id: tokens is not None and is_token_site(s) for s in group}
    observers = {s.id: observer_for(swaps[s.id], seed, RESERVOIR, rows=masked[s.id]) for s in group}
    label = f"re-fitting {len(group)} site(s) on refitted layers"
    with progress.task(label, -(-n // batch_size)) as advance:
        for (batch, xs), (_, ys) in zip(cand.stream(model, ins), orig.stream(original, outs, store=keep)):
            rows = None if tokens is None else tokens.keep(batch.start, batch.stop)
            for s in group:
                observe(observers[s.id], xs[s.input], ys[s.output], rows if masked[s.id] else None)
            advance(1)
    for s in group:
        # calibration's own fit, same rules (bias correction ran there: a held d's mean is the readers')
        mse_start, mse_fit, _ = fit_swap(swaps[s.id], observers[s.id], fit_rules(index, s, swaps[s.id], True))
        _note(notes, s.id, f"a, b, c, d re-fitted on the refitted upstream layers: MSE "
                            f"{mse_start:.4g} -> {mse_fit:.4g}")


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
    folds: int = DEFAULT_FOLDS,
    factors: tuple[float, ...] = DEFAULT_FACTORS,
    cache_bytes: int = MEMORY_BUDGET,
    holdout: float = HOLDOUT,
    outputs: bool = True,
    mask_input: str = AUTO,
    token_cap: int = TOKEN_CAP,
) -> RefitResult:
    """Refit the linear consumers of swapped sites in a copy of ``base`` (module docstring).

    ``original`` gives the target outputs and the prior weights; ``base`` (the
    original plus calibration's bias corrections) gives the current weights;
    ``plan`` the calibrated swaps. Returns the refitted model, a new plan (the
    swaps of sites downstream of a refitted layer re-fitted), the notes per
    site and the time taken. ``cache_bytes``: recorded site outputs kept in RAM
    up to this size, on disk beyond it. ``holdout``: the share of samples that
    judges each site's refit (:mod:`swapper.calibrate.refit_decision`; 0: each
    consumer is judged by its cross-validation alone). ``outputs``: also refit
    layers whose output is a graph output (the swap pipeline passes False,
    module docstring). ``mask_input`` / ``token_cap``: the token positions
    token-shaped sites' Grams and re-fits read, as in calibration
    (:func:`swapper.calibrate.tokens.token_selection`). Neither model nor the
    plan is mutated; node names are kept.
    """
    progress = progress or Silent()
    t_start = time.perf_counter()
    work = copy_model(base)
    plan = copy.deepcopy(plan)  # re-fitted swaps go here
    notes: list[tuple[str, str]] = []
    schedule = _schedule(GraphIndex.of(work), sites, set(plan.by_site()), outputs)
    swapped = [s for s in sites if s.id in set(plan.by_site())]
    tokens, tokens_note = token_selection(original, swapped, dataset, mask_input, seed, token_cap)
    logger.info("refit: %s", tokens_note)
    k = max(1, min(int(folds), dataset.n))
    fold_of, held, held_samples = split_samples(dataset.n, k, holdout, seed)  # part of each sample index
    parts = k + (held is not None)
    decisions: dict[str, RefitDecision] = {}
    orig_index = GraphIndex.of(original)
    taken = all_names(work)  # names fresh weight copies must avoid; write_theta adds the ones it takes
    read_before = used_names(work)
    changed: set[str] = set()  # outputs of the consumers refitted so far

    with TensorCache(memory_budget=cache_bytes) as cache:
        source = input_batches(dataset, batch_size)
        cand = SliceRunner(cache, source, prefix=CANDIDATE, threads=threads)
        orig = SliceRunner(cache, source, prefix=ORIGINAL, threads=threads)
        for level in schedule:
            dirty = _downstream(work, changed) if changed else set()
            moved = [s for s in level.sites if s.input in dirty]
            if moved:
                _refit_sites(work, original, sites, moved, plan, seed, progress, notes, cand, orig, dataset.n,
                             batch_size, level.keep, tokens)
            for site_id, text in level.notes:
                _note(notes, site_id, text)
            if level.consumers or level.keep:
                index = GraphIndex.of(work)
                grams = accumulate_level(work, original, sites, plan, level.consumers, dataset, parts, fold_of,
                                         batch_size, threads, progress, f"refit level {level.number}",
                                         index=index, cache=cache, keep=level.keep, tokens=tokens, seed=seed)
                for site in level.sites:
                    mine = [c for c in level.consumers if c.site_id == site.id]
                    if not mine:
                        continue
                    decision, texts = decide_site(work, index, taken, orig_index, site.id, mine, grams, held,
                                                  held_samples, factors)
                    decisions[site.id] = decision
                    for text in texts:
                        _note(notes, site.id, text)
                    changed.update(c.output for c in mine if c.node in decision.consumers)
            cand.discard(level.done)
            orig.discard(level.done)
    # a weight held by a Constant node is rewritten as a fresh initializer: the Constant goes when nothing reads it
    drop_unused(work, read_before)
    return RefitResult(model=work, plan=plan, notes=notes, timings={"refit_s": time.perf_counter() - t_start},
                       decisions=decisions)


def accumulate_level(work, original, sites, plan, consumers: list[Consumer], dataset: Dataset, k: int,
                     fold_of: np.ndarray, batch_size: int, threads: int, progress, label: str, *,
                     index: GraphIndex | None = None, cache: TensorCache | None = None, keep=(),
                     tokens: TokenSelection | None = None, seed: int = 0,
                     row_cap: int = ROW_CAP) -> dict[str, FoldedGram]:
    """Per-fold Grams of every consumer: candidate site outputs (X) against original consumer outputs (Y).

    ``index``: of ``work``, if at hand. ``cache``: site outputs recorded at
    earlier levels, where both models start (without one they run from the
    graph inputs); the site outputs in ``keep`` are recorded in it, of both models.
    ``tokens``: consumers of token-shaped sites read only these token positions.
    ``row_cap``: Conv consumers' patch rows over the set (:data:`ROW_CAP`), drawn with ``seed``.
    """
    positions = max(1, row_cap // max(dataset.n, 1))
    token_sites = {s.id for s in sites if is_token_site(s)} if tokens is not None else set()
    index = GraphIndex.of(work) if index is None else index
    cand = rewrite(work, sites, _nodes_plan(plan)).model
    grams, kernels, convs = {}, {}, {}
    for c in consumers:
        node = index.nodes_by_name[c.node]
        kernels[c.node] = tuple(index.const(node.input[1]).shape[2:]) if c.kind == "conv" else ()
        convs[c.node] = node if c.kind == "conv" else None
        grams[c.node] = FoldedGram(k, theta_of(index, c).shape[0] - 1)
    with nullcontext(cache) if cache is not None else TensorCache() as store:
        source = input_batches(dataset, batch_size)
        xs_all = SliceRunner(store, source, prefix=CANDIDATE, threads=threads).stream(
            cand, [c.data for c in consumers], store=keep)
        ys_all = SliceRunner(store, source, prefix=ORIGINAL, threads=threads).stream(
            original, [c.output for c in consumers], store=keep)
        with progress.task(f"{label}: {len(consumers)} consumer(s)", -(-dataset.n // batch_size)) as advance:
            for (batch, xs), (_, ys) in zip(xs_all, ys_all):
                f = fold_of[batch.start:batch.stop]
                rows = tokens.keep(batch.start, batch.stop) if token_sites else None
                for number, c in enumerate(consumers):
                    rng = np.random.default_rng([seed, number, batch.start])  # the same draw for the same batch
                    accumulate(grams[c.node], c, convs[c.node], kernels[c.node], xs[c.data], ys[c.output], f,
                               rows if c.site_id in token_sites else None, positions, rng)
                advance(1)
    return grams
