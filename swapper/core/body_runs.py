"""Running If/Loop/Scan bodies the way their nodes run them, one body run at a time.

Transformation: the main-graph values of one batch -> every run of the chosen
bodies on that batch, each as ``{tensor name: value}`` (the run's feeds and the
body tensors asked for). A body runs as a model of its own
(:func:`swapper.core.bodies.standalone_body`) in onnxruntime; its node's
semantics are replayed around it (ONNX operator spec, If / Loop / Scan):

- If: the branch the condition names runs once; the other does not run.
- Loop(M, cond, v...): body(i, c, v...) -> (c', v'..., scan outputs) runs while
  (M is absent or i < M) and c, where c starts as cond (true when absent) and is
  then the body's first output. onnxruntime ends a loop on a false body
  condition even when the cond input is absent, and so do we (checked against
  onnxruntime in tests/core/test_body_runs.py).
- Scan(states..., xs...): body(states..., x_t...) -> (states'..., y_t...), t
  along each scan input's axis (``scan_input_axes``, default 0), backwards
  where ``scan_input_directions`` is 1.

Data-dependent trip counts are reproduced, not guessed: each run's own outputs
decide whether the next one happens. A body nested in a body runs once per run
of its parent. At most :data:`MAX_RUNS` runs of one body are followed per
execution of its node (``stopped`` counts the executions cut short).
"""
from __future__ import annotations

import logging
from collections import Counter
from collections.abc import Iterable, Iterator

import numpy as np
import onnx

from swapper.core.bodies import BodyPath, describe, find_body, outer_reads, standalone_body
from swapper.core.graph import GraphIndex, attr
from swapper.core.session import ORT_ERRORS, open_session
from swapper.errors import BadModelError, first_line

logger = logging.getLogger(__name__)

MAX_RUNS = 10_000  # runs of one body per execution of its node (a bound on work, common practice, no source)


def _first(value) -> object:
    return np.asarray(value).reshape(-1)[0]


def _as_declared(value: np.ndarray, info: onnx.ValueInfoProto) -> np.ndarray:
    """A scalar counter or condition shaped as the body declares it ([] or [1])."""
    t = info.type.tensor_type
    return value.reshape(1) if t.HasField("shape") and len(t.shape.dim) == 1 else value.reshape(())


class BodyRunner:
    """Runs the bodies at the paths of ``wanted`` (and the bodies around them) over main-graph values.

    ``wanted[path]``: the body tensors each run of that body must hand out.
    :meth:`main_needs` names the main-graph run-time values to compute per
    batch; :meth:`runs` yields ``(path, values)`` per body run. Sessions are
    built on first use from that run's feeds. ``threads``: onnxruntime intra-op threads.
    """

    def __init__(self, model: onnx.ModelProto, wanted: dict[BodyPath, Iterable[str]], *, threads: int = 1):
        self.model = model
        self.threads = threads
        self.wanted = {p: list(dict.fromkeys(w)) for p, w in wanted.items()}
        paths = {p[:k] for p in self.wanted for k in range(1, len(p) + 1)}
        self.order = sorted(paths, key=lambda p: (len(p), p))  # parents first
        self.places = {p: find_body(model, p) for p in self.order}
        self.reads = {p: outer_reads(self.places[p]) for p in self.order}
        self.children: dict[BodyPath, list[BodyPath]] = {}
        for p in self.order:
            self.children.setdefault(p[:-1], []).append(p)
        self.indexes = {(): GraphIndex.of(model)}
        self.indexes.update({p: GraphIndex.of_graph(self.places[p].body, {}) for p in self.order})
        self.outputs = {p: self._outputs(p) for p in self.order}
        self.sessions: dict[BodyPath, object] = {}
        self.stopped: Counter = Counter()

    # ---------------------------------------------------------------- set-up
    def _needs_of(self, parent: BodyPath) -> list[str]:
        """What a run of ``parent`` must hand its child bodies: their node's inputs and outer run-time reads."""
        names: list[str] = []
        for child in self.children.get(parent, []):
            names += [n for n in self.places[child].owner.input if n] + self.reads[child].dynamic
        return list(dict.fromkeys(names))

    def _outputs(self, path: BodyPath) -> list[str]:
        """The tensors a run of ``path`` computes for us: wanted ones, carried state, what its children read."""
        place = self.places[path]
        carried = [o.name for o in place.body.output] if place.owner.op_type in ("Loop", "Scan") else []
        produced = self.indexes[path].producer
        names = self.wanted.get(path, []) + carried + self._needs_of(path)
        return [n for n in dict.fromkeys(names) if n in produced]

    def main_needs(self) -> list[str]:
        """The main-graph run-time values (graph inputs or node outputs) the bodies need, per batch."""
        index = self.indexes[()]
        return [n for n in self._needs_of(()) if index.is_dynamic(n)]

    # ------------------------------------------------------------------ runs
    def runs(self, values: dict[str, np.ndarray]) -> Iterator[tuple[BodyPath, dict[str, np.ndarray]]]:
        """Every run of the bodies on one batch whose main-graph values (:meth:`main_needs`) are ``values``."""
        yield from self._children((), values)

    def _children(self, parent: BodyPath, values: dict) -> Iterator[tuple[BodyPath, dict]]:
        for child in self.children.get(parent, []):
            for run in self._runs_of(child, parent, values):
                yield child, run
                yield from self._children(child, run)

    def _value(self, scope: BodyPath, name: str, values: dict) -> np.ndarray:
        """``name`` as seen in ``scope``: a value of the run, else a constant of the scope or around it."""
        if name in values:
            return values[name]
        value = self.indexes[scope].const(name)
        if value is None and scope:
            tensor = self.reads[scope].constants.get(name)
            value = None if tensor is None else onnx.numpy_helper.to_array(tensor)
        if value is None:
            raise BadModelError(f"no value for {name!r} while running bodies inside the graph {scope or 'main'}")
        return value

    def _runs_of(self, path: BodyPath, parent: BodyPath, values: dict) -> Iterator[dict]:
        place = self.places[path]
        node, body = place.owner, place.body
        args = [self._value(parent, n, values) if n else None for n in node.input]
        outer = {n: values[n] for n in self.reads[path].dynamic}
        if node.op_type == "If":
            if (place.attribute == "then_branch") == bool(_first(args[0])):
                yield self._run(path, outer)
            return
        if node.op_type == "Loop":
            yield from self._loop(path, args, outer)
            return
        yield from self._scan(path, node, body, args, outer)

    def _loop(self, path: BodyPath, args: list, outer: dict) -> Iterator[dict]:
        body = self.places[path].body
        trips = None if args[0] is None else int(_first(args[0]))
        going = True if len(args) < 2 or args[1] is None else bool(_first(args[1]))
        carried = args[2:]
        i = 0
        while (trips is None or i < trips) and going:
            if i >= MAX_RUNS:
                self.stopped[path] += 1
                break
            feeds = {body.input[0].name: _as_declared(np.array(i, dtype=np.int64), body.input[0]),
                     body.input[1].name: _as_declared(np.array(going, dtype=bool), body.input[1])}
            feeds.update({v.name: a for v, a in zip(body.input[2:], carried)})
            run = self._run(path, {**feeds, **outer})
            yield run
            going = bool(_first(self._value(path, body.output[0].name, run)))
            carried = [self._value(path, o.name, run) for o in body.output[1:1 + len(carried)]]
            i += 1

    def _scan(self, path: BodyPath, node: onnx.NodeProto, body: onnx.GraphProto, args: list,
              outer: dict) -> Iterator[dict]:
        k = int(attr(node, "num_scan_inputs"))
        states, xs = args[:len(args) - k], args[len(args) - k:]
        axes = [a % x.ndim for a, x in zip(attr(node, "scan_input_axes", None) or [0] * k, xs)]
        backwards = attr(node, "scan_input_directions", None) or [0] * k
        n_states = len(states)
        steps = xs[0].shape[axes[0]] if xs else 0
        for t in range(steps):
            if t >= MAX_RUNS:
                self.stopped[path] += 1
                break
            feeds = {v.name: a for v, a in zip(body.input[:n_states], states)}
            for v, x, axis, back in zip(body.input[n_states:], xs, axes, backwards):
                feeds[v.name] = np.take(x, steps - 1 - t if back else t, axis=axis)
            run = self._run(path, {**feeds, **outer})
            yield run
            states = [self._value(path, o.name, run) for o in body.output[:n_states]]

    def _run(self, path: BodyPath, feeds: dict) -> dict:
        session = self.sessions.get(path)
        names = self.outputs[path]
        where = describe(self.places[path].owner, self.places[path].attribute)
        try:
            if session is None:
                model = standalone_body(self.model, path, names, feeds)
                session = self.sessions[path] = open_session(model, threads=self.threads, what=where)
            values = dict(feeds)
            if names:
                values.update(zip(names, session.run(names, feeds)))
        except ORT_ERRORS as exc:
            raise BadModelError(f"cannot run {where} on its own: {first_line(exc)}") from None
        return values
