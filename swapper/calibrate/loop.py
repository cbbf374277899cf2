"""Calibration: refit every swapped site so the candidate reproduces the original.

A post-training, layer-wise distillation on unlabelled samples:

    for each depth level L of swapped sites (sites at one level are independent):
        x' = the level's site inputs, computed by the *partially swapped* model
             (sequential mode) or by the original model (local mode)
        y  = the original model's site outputs on the same samples
        fit a, b, c, d per channel so that a·g(b·x' + c) + d ≈ y
        optionally correct the mean shift at the site's linear consumers

Nothing reruns the whole network per site: level L runs only the segments of
the graph between the graph inputs / earlier swapped-site outputs and the
level's site outputs (the original model: the targets y) and site inputs (the
partially swapped model, sequential mode), each run by a
:class:`~swapper.core.slices.SliceRunner`; swapped outputs are computed in
numpy from the cached inputs and fitted parameters. Recorded tensors live in a
:class:`~swapper.core.tensor_cache.TensorCache` (RAM up to its budget, disk beyond) and
are discarded after the last level that reads them, so what is held at once
is a few levels' tensors, not the whole network's.

The fitted parameters come back in a new Plan (``CalibrationResult.plan``);
the plan handed in is not changed.
"""
from __future__ import annotations

import copy
import logging
import time
from dataclasses import dataclass, field

import numpy as np
import onnx

from swapper import functions
from swapper.calibrate.bias_correction import DeltaSum, correct_bias
from swapper.calibrate.bodies import observe_bodies
from swapper.calibrate.site_fit import FitRules, fit_rules, fit_swap
from swapper.calibrate.tokens import is_token_site, observe, token_selection
from swapper.core.graph import GraphIndex
from swapper.core.slices import LastReads, SliceRunner, boundary_reads, row_spans
from swapper.core.surgery import copy_model
from swapper.core.tensor_cache import MEMORY_BUDGET, TensorCache
from swapper.data.dataset import Dataset, input_batches
from swapper.data.token_mask import AUTO, TOKEN_CAP, TokenSelection
from swapper.fit.observe import ChannelObserver
from swapper.options import MODES, check_mode  # noqa: F401 (MODES: re-exported for callers of this module)
from swapper.plan.plan import Plan, SiteSwap
from swapper.progress import Silent
from swapper.scan.sites import Site

logger = logging.getLogger(__name__)

# cache key prefixes: the original's tensors, and the partially swapped model's (with the swapped site outputs)
ORIGINAL, CANDIDATE = "original::", "candidate::"


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
    refit: dict | None = None  # the consumer refit's decision (swapper.calibrate.refit_decision), when one ran


@dataclass
class CalibrationResult:
    plan: Plan  # a new plan holding the fitted swaps (the plan handed in is left as it was)
    model: onnx.ModelProto  # the original with consumer corrections; rewrite(model, sites, plan) gives the candidate
    sites: list[SiteCalibration]
    timings: dict[str, float]  # seconds per phase
    samples: int
    cache: dict = field(default_factory=dict)  # bytes the tensor cache wrote to disk and held in RAM
    tokens: str = ""  # which attention mask the statistics of token-shaped sites honoured, and how many tokens

    def to_dict(self) -> dict:
        return {
            "samples": self.samples,
            "tokens": self.tokens,
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

    Computed a few samples (axis 0) at a time in one reused float64 buffer so
    the temporaries stay cache-sized: whole-batch float64 copies cost more in
    allocation and page faults than in arithmetic. x is widened exactly and the
    result rounded once on the final store, so the values are bit-equal to
    ``(a * g(b * x.astype(float64) + c) + d).astype(x.dtype)``.
    """
    fn = functions.get(swap.surrogate)
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
    buf = np.empty((min(step, x.shape[0]),) + x.shape[1:], dtype=np.float64)
    for i in range(0, x.shape[0], step):
        s = slice(i, i + step)
        pa, pb, pc, pd = (v[s] if axis == 0 else v for v in (a, b, c, d))
        z = buf[: x[s].shape[0]]
        np.copyto(z, x[s])  # one widening copy, then same-dtype ufuncs (mixed dtypes go through slow buffers)
        np.multiply(z, pb, out=z)
        np.add(z, pc, out=z)
        g = np.asarray(fn.ref(z, **swap.surrogate_params), dtype=np.float64)
        np.multiply(g, pa, out=z)
        np.add(z, pd, out=z)
        np.copyto(out[s], z, casting="same_kind")
    return out


def observer_for(swap: SiteSwap, seed: int, reservoir: int, rows: bool = False) -> ChannelObserver:
    """An empty observer shaped for ``swap``'s channels (count, x range and reservoir: what the fit reads);
    ``rows``: it is fed [tokens, channels] rows."""
    axis = (-1 if rows else swap.channel_axis) if swap.channels > 1 else None
    return ChannelObserver(swap.channels, axis, reservoir=reservoir, seed=seed, moments=False)


@dataclass
class _Segment:
    """One run of a model over the data set: which tensors it records, from which it may start."""

    starts: list[str]  # graph inputs + the earlier site outputs it may start from
    outputs: list[str]  # tensors it computes
    store: list[str]  # tensors it records under its model's prefix (outputs and graph inputs)
    feed: dict[str, str]  # recorded start tensor it reads -> its cache key


@dataclass
class _Schedule:
    """What each level computes and reads, worked out before any data flows.

    Per level: a segment of the original (the targets y; at level 1 also the
    site inputs) and, at deeper levels, a segment of the partially swapped
    model (the site inputs x'). The original's tensors are cached under
    ORIGINAL, the partially swapped model's (and the swapped site outputs)
    under CANDIDATE. ``last`` maps every cache key to the last level that
    reads it, so each key is discarded as soon as that level is done.
    """

    groups: dict[int, list[str]]  # level -> site ids, in site order
    inputs: dict[str, str]  # site id -> cache key of its input (the original's at level 1, else x')
    teacher: dict[str, str]  # site id -> cache key of the original output
    student: dict[str, str]  # site id -> cache key of the swapped output
    original: dict[int, _Segment] = field(default_factory=dict)
    swapped: dict[int, _Segment] = field(default_factory=dict)
    last: LastReads = field(default_factory=LastReads)


def _site_order(sid: str) -> int:
    return int(sid[1:]) if sid[1:].isdigit() else 0


def _batch_major(index: GraphIndex) -> set[str]:
    """Computed tensors whose first axis is the samples axis, by its symbolic name (the graph inputs' first one).

    Only these may be recorded as rows; with a fixed batch size the samples axis cannot be told by name,
    and nothing is.
    """
    names = {sh[0] for t in index.graph_inputs if (sh := index.shape(t)) and isinstance(sh[0], str) and sh[0]}
    return {t for t in index.dtypes
            if index.is_dynamic(t) and (sh := index.shape(t)) and isinstance(sh[0], str) and sh[0] in names}


def _cut(index: GraphIndex, starts: set[str], outputs: list[str]) -> set[str]:
    """Tensors the slice from ``starts`` to ``outputs`` computes that a node outside the slice reads."""
    inside, produced, stack = set(), set(), list(outputs)
    while stack:
        name = stack.pop()
        node = index.producer.get(name) if name and name not in starts else None
        if node is None or node.name in inside:
            continue
        inside.add(node.name)
        produced.update(t for t in node.output if t)
        stack.extend(node.input)
    return {t for t in produced if any(u.name not in inside for u in index.users(t))}


def _schedule(index: GraphIndex, by_id: dict[str, Site], levels: dict[str, int]) -> _Schedule:
    """Each level's segments (module docstring) and when every recorded tensor is last read.

    A segment also records its *frontier*: the tensors it computes that a later segment of the same model
    reads (a residual stream running past the sites, a mask derived from an input), so that segment starts
    there instead of running the model again from the graph inputs. Without it, level L re-runs every layer
    before it (measured on a 6-layer sentence encoder: recording took 3.5 plain passes of the original, the
    swapped model's segments 3.3). Only batch-major tensors (:func:`_batch_major`) are recorded so.
    """
    graph_inputs = list(index.graph_inputs)
    order = sorted(set(levels.values()))
    groups = {lv: sorted((s for s, l in levels.items() if l == lv), key=_site_order) for lv in order}
    sched = _Schedule(groups=groups, inputs={}, teacher={s: ORIGINAL + by_id[s].output for s in levels},
                      student={s: CANDIDATE + by_id[s].output for s in levels})
    cached: set[str] = set()
    rows = _batch_major(index)
    frontier: dict[str, dict[str, _Segment]] = {ORIGINAL: {}, CANDIDATE: {}}  # tensor -> the segment computing it

    def segment(level: int, prefix: str, store: list[str]) -> _Segment:
        sites_before = [by_id[s].output for s, lv in levels.items() if lv < level]
        starts = list(dict.fromkeys(graph_inputs + sites_before + list(frontier[prefix])))
        outputs = [t for t in store if t not in graph_inputs]
        feed = {t: prefix + t for t in boundary_reads(index, set(starts), outputs) if t not in graph_inputs}
        for t, key in feed.items():
            sched.last.read_at(key, level)
            maker = frontier[prefix].get(t)
            if maker is not None and t not in maker.store:  # first read: the earlier segment records it
                maker.store.append(t)
                cached.add(key)
        cached.update(prefix + t for t in store)
        seg = _Segment(starts, outputs, store, feed)
        for t in _cut(index, set(starts), outputs) & rows:
            frontier[prefix].setdefault(t, seg)
        return seg

    for level in order:
        group = groups[level]
        # the original: this level's targets, and at the first level the site inputs (the original's values)
        first = level == order[0]
        for sid in group:
            sched.inputs[sid] = (ORIGINAL if first else CANDIDATE) + by_id[sid].input
        store = [by_id[sid].output for sid in group] + ([by_id[sid].input for sid in group] if first else [])
        sched.original[level] = segment(level, ORIGINAL, list(dict.fromkeys(store)))
        # the partially swapped model: this level's site inputs not cached yet (an earlier swapped output is)
        needed = list(dict.fromkeys(by_id[s].input for s in group if sched.inputs[s] not in cached))
        if needed:
            sched.swapped[level] = segment(level, CANDIDATE, needed)
        for sid in group:
            cached.add(sched.student[sid])
            for key in (sched.inputs[sid], sched.teacher[sid], sched.student[sid]):
                sched.last.read_at(key, level)
    return sched


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
    cache_bytes: int = MEMORY_BUDGET,
    mask_input: str = AUTO,
    token_cap: int = TOKEN_CAP,
) -> CalibrationResult:
    """Fit every swap of ``plan`` on ``dataset``; the fitted swaps come back as ``result.plan``, a new Plan.

    Neither ``original`` nor ``plan`` is mutated. ``cache_bytes``: recorded
    tensors kept in RAM up to this size, on disk beyond it. ``mask_input``:
    "auto", "none" or the attention-mask input whose zero positions token-shaped
    sites' statistics leave out (:mod:`swapper.data.token_mask`); ``token_cap``:
    at most this many token positions are read, a seeded uniform sample beyond.
    """
    check_mode(mode)
    progress = progress or Silent()
    timings = {"record_s": 0.0, "segments_s": 0.0, "fit_s": 0.0, "bias_correction_s": 0.0}
    fitted = copy.deepcopy(plan)  # the swaps fitted here; the caller's plan stays as it was
    swaps = fitted.by_site()
    by_id = {s.id: s for s in sites}
    work = copy_model(original)  # bias corrections go here; the original stays the teacher
    index = GraphIndex.of(work)
    inner = [sid for sid in swaps if by_id[sid].body]  # inside If/Loop/Scan bodies: fitted below, locally
    levels = site_levels(index, sites, set(swaps) - set(inner))
    if mode == "local":
        levels = {k: 1 for k in levels}
    sched = _schedule(index, by_id, levels)
    tokens, tokens_note = token_selection(original, [by_id[sid] for sid in swaps], dataset, mask_input, seed,
                                          token_cap)
    logger.info("%s", tokens_note)
    results: dict[str, SiteCalibration] = {}
    n_batches = -(-dataset.n // batch_size)
    rules = {sid: fit_rules(index, by_id[sid], swaps[sid], bias_correction) for sid in levels}

    with TensorCache(memory_budget=cache_bytes) as cache:
        source = input_batches(dataset, batch_size)
        teacher = SliceRunner(cache, source, prefix=ORIGINAL, threads=threads)
        student = SliceRunner(cache, source, prefix=CANDIDATE, threads=threads)
        # bias correction reads cached tensors by full key, batch_size rows at a time, on one thread
        recorded = SliceRunner(cache, row_spans(dataset.n, batch_size))
        for level, group in sched.groups.items():
            # the original's targets (and level-1 inputs), then the swapped model's inputs of this level
            t0 = time.perf_counter()
            seg = sched.original[level]
            with progress.task(f"level {level}: recording original", n_batches) as advance:
                teacher.record(original, seg.store, starts=seg.starts, advance=advance)
            timings["record_s"] += time.perf_counter() - t0
            if level in sched.swapped:
                t0 = time.perf_counter()
                seg = sched.swapped[level]
                with progress.task(f"level {level}: running segment", n_batches) as advance:
                    student.record(work, seg.store, starts=seg.starts, advance=advance)
                timings["segments_s"] += time.perf_counter() - t0

            # observe (x', y) pairs, fit, record the swapped output (and its shift for bias correction)
            shifts = {}
            with progress.task(f"level {level}: fitting {len(group)} site(s)", len(group)) as advance:
                for sid in group:
                    site = by_id[sid]
                    shifts[sid] = _fit_site(site, swaps[sid], level, sched, cache, dataset.n, batch_size, seed,
                                            reservoir, bias_correction, results, timings, rules[sid],
                                            tokens if is_token_site(site) else None)
                    advance(1)

            if bias_correction:
                t0 = time.perf_counter()
                for sid in group:
                    done, notes = correct_bias(work, by_id[sid], recorded, sched.student[sid], sched.teacher[sid],
                                               shifts[sid])
                    results[sid].bias_corrected = done
                    results[sid].notes += notes
                timings["bias_correction_s"] += time.perf_counter() - t0
            for key in sched.last.done(level):
                cache.discard(key)  # no later level reads it
        stats = {"bytes_written": cache.bytes_written, "peak_bytes_in_memory": cache.peak_bytes_held,
                 "memory_budget": cache.memory_budget}
    if inner:  # ---- sites inside If/Loop/Scan bodies, on the original's own values (swapper.calibrate.bodies)
        t0 = time.perf_counter()
        seen = observe_bodies(original, [by_id[sid] for sid in inner], swaps, dataset, batch_size=batch_size,
                              seed=seed, reservoir=reservoir, threads=threads, progress=progress)
        for sid in inner:
            results[sid] = _fit_observed(sid, swaps[sid], seen.observers[sid], seen.notes[sid])
        timings["fit_s"] += time.perf_counter() - t0
    logger.info("calibration cache: %s", stats)
    ordered = [results[sid] for sid in swaps if sid in results]  # plan order
    return CalibrationResult(plan=fitted, model=work, sites=ordered, timings=timings, samples=dataset.n,
                             cache=stats, tokens=tokens_note)


def _fit_observed(sid: str, swap: SiteSwap, observer: ChannelObserver, notes: list[str]) -> SiteCalibration:
    """Fit a body site on what it was observed to see (level 1, as in local mode); an empty observer fits nothing."""
    if observer.n == 0:
        return SiteCalibration(sid, 1, float("nan"), float("nan"), notes=list(notes))
    mse_start, mse_fit, fit_notes = fit_swap(swap, observer)  # plain rules: the body's readers are not weighed
    seen = observer.compute()
    return SiteCalibration(sid, 1, mse_start, mse_fit, x_min=[float(v) for v in seen.min_x],
                           x_max=[float(v) for v in seen.max_x], notes=list(notes) + fit_notes)


def _fit_site(site: Site, swap: SiteSwap, level: int, sched: _Schedule, cache: TensorCache, n: int,
              batch_size: int, seed: int, reservoir: int, shift: bool, results: dict, timings: dict,
              rules: FitRules, tokens: TokenSelection | None = None):
    """Observe, fit and record one site's swapped output; returns its output shift sum (or None).

    With ``tokens`` the observer and the shift read only the selected token positions.
    """
    t0 = time.perf_counter()
    sid, x, teacher, student = site.id, sched.inputs[site.id], sched.teacher[site.id], sched.student[site.id]
    observer = observer_for(swap, seed, reservoir, rows=tokens is not None)
    for start in range(0, n, batch_size):
        stop = min(start + batch_size, n)
        keep = None if tokens is None else tokens.keep(start, stop)
        observe(observer, cache.read(x, start, stop), cache.read(teacher, start, stop), keep)
    mse_start, mse_fit, notes = fit_swap(swap, observer, rules)
    seen = observer.compute()
    results[sid] = SiteCalibration(sid, level, mse_start, mse_fit,
                                   x_min=[float(v) for v in seen.min_x], x_max=[float(v) for v in seen.max_x],
                                   notes=notes)
    # the swapped output feeds the next levels' segments (and the bias correction below)
    delta = DeltaSum() if shift else None
    t_shift = 0.0
    needed = shift or sched.last.get(student, level) > level
    for start in range(0, n if needed else 0, batch_size):
        stop = min(start + batch_size, n)
        out = surrogate_output(swap, cache.read(x, start, stop))
        cache.append(student, out, owned=True)
        if delta is not None:
            t1 = time.perf_counter()
            delta.add(out, cache.read(teacher, start, stop), None if tokens is None else tokens.keep(start, stop))
            t_shift += time.perf_counter() - t1
    timings["fit_s"] += time.perf_counter() - t0 - t_shift
    timings["bias_correction_s"] += t_shift
    return delta
