"""Slices of a graph: the part that computes some tensors from others, and running it from cached tensors.

Transformation: (model, tensors wanted, tensors recorded earlier) -> the
model cut so that it starts at the graph inputs and the recorded tensors and
ends at the wanted ones (``segment_model``), run batch by batch over a data
set with its recorded inputs read back from a
:class:`~swapper.core.tensor_cache.TensorCache` (``SliceRunner``). Nothing
upstream of a recorded tensor runs again.
"""
from __future__ import annotations

import logging
from collections.abc import Callable, Collection, Iterable, Iterator
from dataclasses import dataclass, field

import numpy as np
import onnx
from onnx.utils import Extractor

from swapper.core.graph import GraphIndex
from swapper.core.session import expose, open_session, run_session
from swapper.core.tensor_cache import TensorCache

logger = logging.getLogger(__name__)


def segment_model(model: onnx.ModelProto, inputs: list[str], outputs: list[str]) -> onnx.ModelProto:
    """The part of ``model`` that computes ``outputs`` from ``inputs`` (graph inputs always allowed).

    Extraction needs a type for every tensor on the cut's edges: an input
    without one is left out (the segment then starts further up, same values),
    an output without one is typed as :func:`~swapper.core.session.expose` types it.
    """
    index = GraphIndex.of(model)
    untyped = [t for t in outputs if t not in index.dtypes]
    if untyped:
        model = expose(model, untyped)
    starts = list(dict.fromkeys(index.graph_inputs + [t for t in inputs if t in index.dtypes]))
    seg = Extractor(model).extract_model(starts, outputs)
    # keep only the inputs the segment really reads, so we feed no more than needed
    used = {t for n in seg.graph.node for t in n.input} | set(outputs)
    kept = [v for v in seg.graph.input if v.name in used]
    del seg.graph.input[:]
    seg.graph.input.extend(kept)
    return seg


def boundary_reads(index: GraphIndex, boundary: set[str], outputs: list[str]) -> list[str]:
    """The ``boundary`` tensors that computing ``outputs`` reads (a backward walk stopping at the boundary)."""
    reads, seen, stack = set(), set(), list(outputs)
    while stack:
        name = stack.pop()
        if not name or name in seen:
            continue
        seen.add(name)
        if name in boundary:
            reads.add(name)
            continue
        node = index.producer.get(name)
        if node is not None:
            stack.extend(node.input)
    return sorted(reads)


class LastReads(dict):
    """Cache key -> the last step (e.g. level) that reads it, so each key is discarded right after that step."""

    def read_at(self, key: str, step: int) -> None:
        self[key] = max(self.get(key, step), step)

    def done(self, step: int) -> list[str]:
        """The keys no step after ``step`` reads, sorted."""
        return sorted(k for k, last in self.items() if last == step)


def row_spans(n: int, batch_size: int) -> Callable[[Collection[str]], Iterator[Span]]:
    """A batch source of rows ``start:stop``, ``batch_size`` at a time, with no feeds (every input is cached)."""

    def source(names: Collection[str]) -> Iterator[Span]:
        for start in range(0, n, batch_size):
            yield Span(start, min(start + batch_size, n))

    return source


@dataclass(frozen=True)
class Span:
    """Rows ``start:stop`` of the data set, without data (every input comes from the cache)."""

    start: int
    stop: int
    feeds: dict = field(default_factory=dict)


class SliceRunner:
    """Runs slices of models over a data set batch by batch, starting from tensors recorded earlier.

    The runner owns one namespace of a :class:`~swapper.core.tensor_cache.TensorCache`:
    tensor ``t`` of the models it runs is recorded under ``prefix + t`` (two
    models sharing tensor names, e.g. an original and its candidate, each get a
    runner with their own prefix on one cache). ``source(names)`` yields the
    data set's batches (objects with ``start``, ``stop`` and ``feeds``, the
    graph inputs by name) holding at least the graph inputs in ``names``.
    ``threads``: onnxruntime intra-op threads.
    """

    def __init__(self, cache: TensorCache, source: Callable[[Collection[str]], Iterable], *, prefix: str = "",
                 threads: int = 1):
        self.cache = cache
        self.source = source
        self.prefix = prefix
        self.threads = threads

    def key(self, name: str) -> str:
        """The cache key of tensor ``name``."""
        return self.prefix + name

    def has(self, name: str) -> bool:
        return self.key(name) in self.cache

    def recorded(self) -> list[str]:
        """The tensors recorded under this runner's prefix, in the order they were first recorded."""
        return [k[len(self.prefix):] for k in self.cache.names() if k.startswith(self.prefix)]

    def read(self, name: str, start: int, stop: int) -> np.ndarray:
        return self.cache.read(self.key(name), start, stop)

    def discard(self, names: Iterable[str]) -> None:
        """Free the recorded tensors ``names`` (after their last reader)."""
        for name in names:
            self.cache.discard(self.key(name))

    def stream(self, model: onnx.ModelProto | None, wanted: Iterable[str] = (), *, store: Iterable[str] = (),
               starts: Iterable[str] | None = None, keys: dict[str, str] | None = None,
               whole: bool = False) -> Iterator[tuple[object, dict[str, np.ndarray]]]:
        """Yield ``(batch, {name: value})`` for every tensor of ``wanted``, batch by batch.

        Tensors of ``wanted`` and ``store`` that are neither graph inputs nor
        recorded are computed by one onnxruntime session of the slice of
        ``model`` from the graph inputs and ``starts`` (default: every tensor
        recorded under the prefix) to them; recorded ones are read back, graph
        inputs come from the batch. Tensors of ``store`` not recorded yet are
        recorded (appended batch by batch). ``whole``: ``model`` is the slice
        already and runs as it is (its inputs from the batch or the cache).
        ``keys``: the cache key of a name whose key is not ``prefix + name``.
        """
        keys = keys or {}
        wanted = list(dict.fromkeys(wanted))
        store = [t for t in dict.fromkeys(store) if not self.has(t)]
        graph_inputs = set() if model is None else \
            {v.name for v in model.graph.input} - {t.name for t in model.graph.initializer}
        compute = [t for t in dict.fromkeys(wanted + store)
                   if t not in graph_inputs and t not in keys and not self.has(t)]
        session, feeds = None, []
        if compute:
            if not whole:
                model = segment_model(model, self.recorded() if starts is None else list(starts), compute)
            session = open_session(model, threads=self.threads)
            feeds = [i.name for i in session.get_inputs()]
        for batch in self.source(set(feeds) | set(store) | set(wanted)):
            values = dict(batch.feeds)
            if session is not None:
                inputs = {n: values[n] if n in values else self._read(n, keys, batch) for n in feeds}
                values.update(zip(compute, run_session(session, compute, inputs, data="the calibration data")))
            for t in store:
                self.cache.append(self.key(t), values[t], owned=True)  # a fresh array of this batch: no copy
            yield batch, {t: values[t] if t in values else self._read(t, keys, batch) for t in wanted}

    def record(self, model: onnx.ModelProto, store: Iterable[str], *, starts: Iterable[str] | None = None,
               advance: Callable[[int], None] | None = None) -> None:
        """Record ``store`` over the whole data set (:meth:`stream` without readers); ``advance(1)`` per batch."""
        for _ in self.stream(model, store=store, starts=starts):
            if advance is not None:
                advance(1)

    def _read(self, name: str, keys: dict[str, str], batch) -> np.ndarray:
        return self.cache.read(keys.get(name, self.key(name)), batch.start, batch.stop)
