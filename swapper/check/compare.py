"""Compare a candidate model with the original on a validation set, then judge it.

Transformation: (original model, candidate model, dataset) -> :class:`Comparison`
(what each output is, accuracy, paired test, interval, agreement, per-output
errors with per-sample cosine, signature check); ``swapper.check.gate`` turns it
into a verdict.

Both models run batch by batch in onnxruntime on the CPU with fixed threading.
The kind of every output (:mod:`swapper.check.kinds`) is read from the
original's first batch. Top-1 figures come from the first class-score output
(an embedding stands in when there is none, so ``--metric agreement`` can still
be asked for); regression figures from the output matching ``expected``; error
figures and per-sample cosines from every numeric output. Only per-sample
vectors (predictions, correctness, cosines) are kept; output tensors are folded
into streaming accumulators and dropped. To judge several candidates
against one original, :func:`reference` runs the original once and keeps its
outputs; ``compare`` takes that :class:`Reference` in place of the model.
"""
from __future__ import annotations

import logging
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
import onnx
import onnxruntime as ort

from swapper.check import stats
from swapper.check.kinds import (
    OutputKind,
    check_expected_fit,
    class_output,
    default_metric,
    detect_kinds,
    regression_output,
)
from swapper.check.similarity import CosineAccumulator
from swapper.core.jsonable import json_safe
from swapper.core.session import ORT_ERRORS, open_session
from swapper.data.dataset import Batch, Dataset, batches
from swapper.errors import BadDataError, UsageError, first_line
from swapper.progress import Silent

logger = logging.getLogger(__name__)

TOPK_MIN_CLASSES = 10  # top-5 is only informative with clearly more than 5 classes (common practice, no source)


@dataclass
class Comparison:
    """Everything measured when running both models on the same samples.

    Accuracies and agreement are fractions in [0, 1]; ``delta_pp`` and the
    interval are in percentage points (candidate − original); people read the
    drop (original − candidate, :meth:`drop`), the one sign every page shows.
    """

    n: int
    # "classification" (labels), "agreement" (class scores, no labels), "regression" (expected),
    # "similarity" (embeddings, dense maps, one value per sample), "outputs" (no float output)
    task: str
    top1_original: float | None = None
    top1_candidate: float | None = None
    top5_original: float | None = None
    top5_candidate: float | None = None
    delta_pp: float | None = None
    n01: int | None = None  # original wrong, candidate right
    n10: int | None = None  # original right, candidate wrong
    mcnemar_p: float | None = None
    interval: stats.Interval | None = None
    agreement: float | None = None  # fraction of samples with the same top-1 class
    changed: dict | None = None  # the samples whose top-1 class changed (stats.changed_samples)
    regression: dict | None = None  # {"original": {mae, rmse}, "candidate": {mae, rmse}}
    # output name -> {max_abs, rmse, cosine, sqnr_db} and, for float outputs with >= 2 values per sample,
    # the per-sample cosine summary {cosine_mean, cosine_p5, cosine_min} (swapper.check.similarity)
    output_errors: dict = field(default_factory=dict)
    output_kinds: list[OutputKind] = field(default_factory=list)  # every output, in the model's order
    class_output: str | None = None  # the output top-1 figures were read from
    has_labels: bool = False
    has_expected: bool = False
    has_nonfinite: bool = False
    signature_changed: bool = False
    signature_reason: str = ""
    notes: list[str] = field(default_factory=list)

    def drop(self) -> tuple[float, float | None, float | None] | None:
        """The top-1 drop (original − candidate, points) and its interval (lo, hi); None without labels."""
        if self.delta_pp is None:
            return None
        if self.interval is None:
            return 0.0 - self.delta_pp, None, None
        return 0.0 - self.delta_pp, 0.0 - self.interval.hi, 0.0 - self.interval.lo  # 0.0 - x: never -0.0

    def to_dict(self) -> dict:
        """Plain-JSON view: no numpy types; non-finite floats become null with a note."""
        notes = list(self.notes)
        drop = self.drop()
        raw = {
            "n": self.n,
            "task": self.task,
            "top1_original": self.top1_original,
            "top1_candidate": self.top1_candidate,
            "top5_original": self.top5_original,
            "top5_candidate": self.top5_candidate,
            "delta_pp": self.delta_pp,
            "drop_pp": None if drop is None else drop[0],
            "drop_interval_pp": None if drop is None or drop[1] is None else [drop[1], drop[2]],
            "n01": self.n01,
            "n10": self.n10,
            "mcnemar_p": self.mcnemar_p,
            "interval": self.interval.to_dict() if self.interval else None,
            "agreement": self.agreement,
            "changed": self.changed,
            "regression": self.regression,
            "output_errors": self.output_errors,
            "output_kinds": {k.name: k.to_dict() for k in self.output_kinds},
            "class_output": self.class_output,
            "has_nonfinite": self.has_nonfinite,
            "signature_changed": self.signature_changed,
            "signature_reason": self.signature_reason,
        }
        out = json_safe(raw, notes, "comparison")
        out["notes"] = notes
        return out


Model = onnx.ModelProto | bytes | ort.InferenceSession
Outputs = Callable[[Batch], list[np.ndarray]]


def _session(model: Model, role: str, threads: int) -> ort.InferenceSession:
    if isinstance(model, ort.InferenceSession):
        return model  # opened by the caller, who also times it: one session per model
    return open_session(model, threads=threads, what=f"the {role} model")


def _runner(sess: ort.InferenceSession, role: str) -> Outputs:
    """Batch -> the session's outputs on it; the input names are looked up once, not per batch."""
    names = [i.name for i in sess.get_inputs()]

    def run(batch: Batch) -> list[np.ndarray]:
        missing = [n for n in names if n not in batch.feeds]
        if missing:
            raise BadDataError(f"the dataset has no array for {role} model input {missing[0]!r}")
        try:
            return sess.run(None, {n: batch.feeds[n] for n in names})
        except ORT_ERRORS as exc:
            raise BadDataError(f"onnxruntime failed running the {role} model on the data: {first_line(exc)}") \
                from None

    return run


@dataclass(frozen=True)
class Reference:
    """The original model's outputs over one dataset, computed once by :func:`reference`.

    Passed to :func:`compare` in place of the original, it stands in for running
    the original again, so N candidates cost N + 1 passes instead of 2N. It holds
    every output of every batch in RAM: meant for class scores and other small
    outputs (a model with image-sized outputs over a large set is better compared
    with the model itself, which streams).
    """

    session: ort.InferenceSession  # the original's session: its output signature is what candidates must keep
    dataset: Dataset
    batch_size: int
    outputs: dict[int, list[np.ndarray]]  # first sample of each batch -> the original's outputs on it

    def outputs_for(self, batch: Batch) -> list[np.ndarray]:
        return self.outputs[batch.start]


def reference(original: Model, dataset: Dataset, *, batch_size: int = 64, threads: int = 1) -> Reference:
    """Run ``original`` over ``dataset`` once and keep its outputs, to compare several candidates with."""
    if batch_size < 1:
        raise UsageError(f"batch size must be >= 1, got {batch_size}")
    sess = _session(original, "original", threads)
    run = _runner(sess, "original")
    return Reference(session=sess, dataset=dataset, batch_size=batch_size,
                     outputs={batch.start: run(batch) for batch in batches(dataset, batch_size)})


def _signature(sess) -> list[tuple[str, str, list]]:
    return [(o.name, o.type, list(o.shape)) for o in sess.get_outputs()]


def signature_difference(sess_orig, sess_cand) -> str:
    """Empty string when outputs agree in count, names, dtypes and static dims; else the first difference."""
    a, b = _signature(sess_orig), _signature(sess_cand)
    if len(a) != len(b):
        return f"the original has {len(a)} outputs, the candidate {len(b)}"
    for (na, ta, sa), (nb, tb, sb) in zip(a, b):
        if na != nb:
            return f"output name {na!r} became {nb!r}"
        if ta != tb:
            return f"output {na!r} dtype {ta} became {tb}"
        if len(sa) != len(sb):
            return f"output {na!r} rank {len(sa)} became {len(sb)}"
        # only dims static (int) on both sides are compared; symbolic dims (batch) may be renamed
        for i, (da, db) in enumerate(zip(sa, sb)):
            if isinstance(da, int) and isinstance(db, int) and da != db:
                return f"output {na!r} dim {i} was {da}, is {db}"
    return ""


def _class_view(out: np.ndarray) -> np.ndarray:
    """(batch, classes) view of an output whose kind has a class view ([N, C] after dropping size-1 axes)."""
    return out.reshape(out.shape[0], -1)


def _nonfinite(outputs: list[np.ndarray]) -> bool:
    return any(np.issubdtype(np.asarray(o).dtype, np.floating) and not np.isfinite(o).all() for o in outputs)


def _is_numeric(out) -> bool:
    dtype = np.asarray(out).dtype
    return bool(np.issubdtype(dtype, np.number) or dtype == np.bool_)


def probe(original: Model | Reference, dataset: Dataset, *, batch_size: int = 64, threads: int = 1) \
        -> list[OutputKind]:
    """The kind of every output of ``original``, read from its outputs on the first batch of ``dataset``.

    Costs one batch: run it before the expensive work, to learn whether the data can judge the model.
    """
    if isinstance(original, Reference):
        sess, run = original.session, original.outputs_for
    else:
        sess = _session(original, "original", threads)
        run = _runner(sess, "original")
    batch = next(batches(dataset, batch_size), None)
    if batch is None:
        raise BadDataError("the validation set has no samples")
    return detect_kinds([o.name for o in sess.get_outputs()], run(batch), expected=dataset.expected)


class _Tally:
    """The running figures of one comparison; ``start`` sets it up from the original's first batch."""

    def __init__(self, dataset: Dataset, names: list[str]) -> None:
        self.names = names
        self.path = dataset.path
        self.labels_given = dataset.labels is not None
        self.expected_given = dataset.expected is not None
        self.kinds: list[OutputKind] = []
        self.errors: dict[str, stats.OutputErrorAccumulator] = {}
        self.cosines: dict[str, CosineAccumulator] = {}
        self.reg = {"original": stats.RegressionAccumulator(), "candidate": stats.RegressionAccumulator()}
        self.preds: dict[str, list[np.ndarray]] = {"original": [], "candidate": []}
        self.top5: dict[str, list[np.ndarray]] = {"original": [], "candidate": []}
        self.labels_seen: list[np.ndarray] = []
        self.cls: OutputKind | None = None
        self.cls_index = self.reg_index = None
        self.use_labels = False
        self.notes: list[str] = []

    def start(self, outs_o: list[np.ndarray], expected, path=None) -> None:
        self.kinds = detect_kinds(self.names, outs_o, expected=expected)
        check_expected_fit(self.kinds, expected, path)
        self.errors = {k.name: stats.OutputErrorAccumulator() for k, o in zip(self.kinds, outs_o) if _is_numeric(o)}
        self.cosines = {k.name: CosineAccumulator() for k in self.kinds if k.is_float and k.values_per_sample >= 2}
        self.cls = class_output(self.kinds, any_view=True)
        self.cls_index = self.names.index(self.cls.name) if self.cls is not None else None
        reg = regression_output(self.kinds)
        self.reg_index = self.names.index(reg.name) if reg is not None and self.expected_given else None
        self.use_labels = self.labels_given and self.cls is not None
        if self.labels_given and self.cls is None:
            self.notes.append("labels not used: no output holds class scores [batch, classes]")

    def update(self, batch: Batch, outs_o: list[np.ndarray], outs_c: list[np.ndarray]) -> str:
        """Fold one batch in; return the first shape difference between the two models' outputs, or ''."""
        reason = ""
        for name, ro, rc in zip(self.names, outs_o, outs_c):
            if np.shape(ro) != np.shape(rc):
                reason = reason or f"output {name!r} has shape {np.shape(ro)} in the original, {np.shape(rc)} " \
                                   "in the candidate"
                self.errors.pop(name, None)
                self.cosines.pop(name, None)
                continue
            if name in self.errors:
                self.errors[name].update(ro, rc)
            if name in self.cosines:
                self.cosines[name].update(ro, rc)
        if self.cls_index is not None and not reason:
            self._classes(batch, _class_view(outs_o[self.cls_index]), _class_view(outs_c[self.cls_index]))
        if self.reg_index is not None:
            self.reg["original"].update(outs_o[self.reg_index], batch.expected)
            self.reg["candidate"].update(outs_c[self.reg_index], batch.expected)
        return reason

    def _classes(self, batch: Batch, so: np.ndarray, sc: np.ndarray) -> None:
        self.preds["original"].append(np.argmax(so, axis=1))
        self.preds["candidate"].append(np.argmax(sc, axis=1))
        if not self.use_labels:
            return
        lab = np.asarray(batch.labels).reshape(-1).astype(np.int64, copy=False)  # batches give int64
        if lab.size != so.shape[0] or lab.min() < 0 or lab.max() >= so.shape[1]:
            if self.cls.kind == "scores":
                raise BadDataError(
                    f"labels of samples {batch.start}..{batch.stop - 1} do not fit output {self.cls.name!r} with "
                    f"{so.shape[1]} classes (need integers in [0, {so.shape[1]}))", self.path)
            self.use_labels = False  # an embedding read as classes: its width need not match the label range
            self.labels_seen.clear()
            self.top5 = {"original": [], "candidate": []}
            self.notes.append(f"labels not used: they do not fit the {so.shape[1]} values of {self.cls.name!r}")
            return
        self.labels_seen.append(lab)
        if so.shape[1] >= TOPK_MIN_CLASSES:
            self.top5["original"].append(stats.topk_correct(so, lab, 5))
            self.top5["candidate"].append(stats.topk_correct(sc, lab, 5))


def compare(
    original: Model | Reference,
    candidate: Model,
    dataset: Dataset,
    *,
    batch_size: int = 64,
    threads: int = 1,
    progress=None,
    level: float = 0.95,
    interval_method: str = "newcombe",
    seed: int = 0,
) -> Comparison:
    """Run both models over ``dataset`` (a ``swapper.data.dataset.Dataset``) and measure the difference.

    ``progress`` is a reporter with ``task(description, total)`` (see
    ``swapper.progress``); silent by default. ``level``/``interval_method``/``seed``
    configure the accuracy-difference interval (see ``stats.paired_accuracy_difference``).
    Either model may be an open onnxruntime session (``threads`` then does not
    apply to it); ``original`` may be a :class:`Reference` made on the same
    dataset object with the same batch size, whose stored outputs are used.
    """
    if batch_size < 1:
        raise UsageError(f"batch size must be >= 1, got {batch_size}")
    if isinstance(original, Reference):
        if original.dataset is not dataset or original.batch_size != batch_size:
            raise UsageError("a Reference compares only on the dataset and batch size it was made with")
        sess_o, run_o = original.session, original.outputs_for
    else:
        sess_o = _session(original, "original", threads)
        run_o = _runner(sess_o, "original")
    sess_c = _session(candidate, "candidate", threads)
    run_c = _runner(sess_c, "candidate")
    reason = signature_difference(sess_o, sess_c)
    tally = _Tally(dataset, [o.name for o in sess_o.get_outputs()])
    n = 0
    has_nonfinite = False
    orig_nonfinite = False
    reporter = progress or Silent()

    with reporter.task("comparing models", dataset.n) as advance:
        for batch in batches(dataset, batch_size):
            outs_o = run_o(batch)
            outs_c = run_c(batch)
            has_nonfinite |= _nonfinite(outs_c)
            orig_nonfinite |= _nonfinite(outs_o)
            if n == 0:
                tally.start(outs_o, dataset.expected, dataset.path)
            shape_change = tally.update(batch, outs_o, outs_c)  # always folds the batch in
            reason = reason or shape_change
            n += batch.stop - batch.start
            advance(batch.stop - batch.start)

    if n == 0:
        raise BadDataError("the validation set has no samples")
    metric, notes = default_metric(tally.kinds, has_labels=tally.use_labels, has_expected=tally.expected_given)
    task = {"top1": "classification", "rmse": "regression", "agreement": "agreement", "cosine": "similarity",
            "sqnr": "similarity"}.get(metric, "outputs")
    comp = Comparison(n=n, task=task, has_nonfinite=bool(has_nonfinite), signature_changed=bool(reason),
                      signature_reason=reason, output_kinds=tally.kinds, has_labels=tally.use_labels,
                      has_expected=tally.expected_given, class_output=tally.cls.name if tally.cls else None)
    comp.notes += tally.notes + [x for x in notes if x not in tally.notes]
    comp.output_errors = {name: a.compute() for name, a in sorted(tally.errors.items())}
    for name, acc in tally.cosines.items():
        if name in comp.output_errors:
            comp.output_errors[name].update(acc.compute())
    if orig_nonfinite:
        comp.notes.append("the original model itself produced NaN/Inf on some samples")
    if tally.reg_index is not None:
        comp.regression = {role: r.compute() for role, r in sorted(tally.reg.items())}
    if tally.preds["original"] and sum(p.size for p in tally.preds["original"]) == n:
        _fill_classification(comp, tally.preds, tally.labels_seen if tally.use_labels else [], tally.top5,
                             level, interval_method, seed)
    elif tally.cls is not None:
        comp.notes.append("class scores changed shape in the candidate; no accuracy computed")
    logger.info("compared %d samples (%s): %s", n, comp.task,
                f"drop {0.0 - comp.delta_pp:.2f} pp" if comp.delta_pp is not None else "no labels")
    return comp


def _fill_classification(comp: Comparison, preds, labels_seen, top5, level, method, seed) -> None:
    po = np.concatenate(preds["original"])
    pc = np.concatenate(preds["candidate"])
    comp.agreement = stats.accuracy(po == pc)
    labels = np.concatenate(labels_seen) if labels_seen else None
    comp.changed = stats.changed_samples(po, pc, labels)
    if labels is None:
        return
    co, cc = po == labels, pc == labels
    comp.top1_original, comp.top1_candidate = stats.accuracy(co), stats.accuracy(cc)
    if top5["original"]:
        comp.top5_original = stats.accuracy(np.concatenate(top5["original"]))
        comp.top5_candidate = stats.accuracy(np.concatenate(top5["candidate"]))
    comp.n01, comp.n10 = stats.discordant_counts(co, cc)
    comp.mcnemar_p = stats.mcnemar_exact(comp.n01, comp.n10)
    comp.interval = stats.paired_accuracy_difference(co, cc, level=level, method=method, seed=seed)
    comp.delta_pp = comp.interval.delta
