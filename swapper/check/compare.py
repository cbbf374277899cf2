"""Compare a candidate model with the original on a validation set, then judge it.

Transformation: (original model, candidate model, dataset) -> :class:`Comparison`
(accuracy, paired test, interval, agreement, output errors, signature check),
and (Comparison, :class:`Budget`) -> :class:`Verdict` (approve / reject, with
the rule in plain words and the figure that decided).

Both models run batch by batch in onnxruntime on the CPU with fixed threading.
Only per-sample vectors (predictions, correctness) are kept; output tensors are
folded into streaming accumulators and dropped. To judge several candidates
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
    interval are in percentage points (candidate − original).
    """

    n: int
    task: str  # "classification" (labels), "agreement" (class scores, no labels), "regression" (targets), "outputs"
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
    regression: dict | None = None  # {"original": {mae, rmse}, "candidate": {mae, rmse}}
    output_errors: dict = field(default_factory=dict)  # output name -> {max_abs, rmse, cosine, sqnr_db}
    has_nonfinite: bool = False
    signature_changed: bool = False
    signature_reason: str = ""
    notes: list[str] = field(default_factory=list)

    def to_dict(self) -> dict:
        """Plain-JSON view: no numpy types; non-finite floats become null with a note."""
        notes = list(self.notes)
        raw = {
            "n": self.n,
            "task": self.task,
            "top1_original": self.top1_original,
            "top1_candidate": self.top1_candidate,
            "top5_original": self.top5_original,
            "top5_candidate": self.top5_candidate,
            "delta_pp": self.delta_pp,
            "n01": self.n01,
            "n10": self.n10,
            "mcnemar_p": self.mcnemar_p,
            "interval": self.interval.to_dict() if self.interval else None,
            "agreement": self.agreement,
            "regression": self.regression,
            "output_errors": self.output_errors,
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


def _as_scores(out: np.ndarray) -> np.ndarray | None:
    """(batch, classes) view of a class-score output, or None if it is not one."""
    if out.ndim < 2 or not np.issubdtype(out.dtype, np.floating):
        return None
    if int(np.prod(out.shape[1:-1], dtype=np.int64)) != 1:
        return None  # e.g. (batch, H, W, C): per-pixel scores, not one class per sample
    return out.reshape(out.shape[0], out.shape[-1])


def _nonfinite(outputs: list[np.ndarray]) -> bool:
    return any(np.issubdtype(o.dtype, np.floating) and not np.isfinite(o).all() for o in outputs)


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
    out_names = [o.name for o in sess_o.get_outputs()]
    labels_given = dataset.labels is not None
    targets_given = dataset.targets is not None

    acc = {name: stats.OutputErrorAccumulator() for name in out_names}
    reg = {"original": stats.RegressionAccumulator(), "candidate": stats.RegressionAccumulator()}
    preds: dict[str, list[np.ndarray]] = {"original": [], "candidate": []}
    top5: dict[str, list[np.ndarray]] = {"original": [], "candidate": []}
    labels_seen: list[np.ndarray] = []
    task = None
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
            for name, ro, rc in zip(out_names, outs_o, outs_c):
                if ro.shape != rc.shape:
                    if not reason:
                        reason = f"output {name!r} has shape {ro.shape} in the original, {rc.shape} in the candidate"
                    acc.pop(name, None)
                elif name in acc:
                    acc[name].update(ro, rc)
            so, sc = _as_scores(outs_o[0]), _as_scores(outs_c[0])
            if task is None:
                task = _pick_task(so, outs_o[0], labels_given, targets_given)
            if task in ("classification", "agreement") and sc is not None and so is not None \
                    and sc.shape == so.shape:
                preds["original"].append(np.argmax(so, axis=1))
                preds["candidate"].append(np.argmax(sc, axis=1))
                if task == "classification":
                    lab = np.asarray(batch.labels).reshape(-1).astype(np.int64, copy=False)  # batches give int64
                    if lab.size != so.shape[0] or lab.min() < 0 or lab.max() >= so.shape[1]:
                        raise BadDataError(
                            f"labels of samples {batch.start}..{batch.stop - 1} do not fit "
                            f"{so.shape[1]} classes (need integers in [0, {so.shape[1]}))")
                    labels_seen.append(lab)
                    if so.shape[1] >= TOPK_MIN_CLASSES:
                        top5["original"].append(stats.topk_correct(so, lab, 5))
                        top5["candidate"].append(stats.topk_correct(sc, lab, 5))
            elif task == "regression":
                reg["original"].update(outs_o[0], batch.targets)
                reg["candidate"].update(outs_c[0], batch.targets)
            n += batch.stop - batch.start
            advance(batch.stop - batch.start)

    if n == 0:
        raise BadDataError("the validation set has no samples")
    comp = Comparison(n=n, task=task or "outputs", has_nonfinite=bool(has_nonfinite),
                      signature_changed=bool(reason), signature_reason=reason)
    comp.output_errors = {name: a.compute() for name, a in sorted(acc.items())}
    if orig_nonfinite:
        comp.notes.append("the original model itself produced NaN/Inf on some samples")
    if task == "regression":
        comp.regression = {role: r.compute() for role, r in sorted(reg.items())}
    if preds["original"] and sum(p.size for p in preds["original"]) == n:
        _fill_classification(comp, preds, labels_seen, top5, level, interval_method, seed)
    elif task in ("classification", "agreement"):
        comp.notes.append("class scores changed shape in the candidate; no accuracy computed")
    logger.info("compared %d samples (%s): %s", n, comp.task,
                f"delta {comp.delta_pp:+.2f} pp" if comp.delta_pp is not None else "no labels")
    return comp


def _pick_task(scores: np.ndarray | None, first: np.ndarray, labels: bool, targets: bool) -> str:
    if labels:
        if scores is None or scores.shape[1] < 2:
            raise BadDataError(
                f"labels were given but the first output has shape {tuple(first.shape)}; "
                "need class scores shaped (batch, classes)")
        return "classification"
    if targets:
        return "regression"
    if scores is not None and scores.shape[1] > 1:
        return "agreement"
    return "outputs"


def _fill_classification(comp: Comparison, preds, labels_seen, top5, level, method, seed) -> None:
    po = np.concatenate(preds["original"])
    pc = np.concatenate(preds["candidate"])
    comp.agreement = stats.accuracy(po == pc)
    if comp.task != "classification":
        return
    labels = np.concatenate(labels_seen)
    co, cc = po == labels, pc == labels
    comp.top1_original, comp.top1_candidate = stats.accuracy(co), stats.accuracy(cc)
    if top5["original"]:
        comp.top5_original = stats.accuracy(np.concatenate(top5["original"]))
        comp.top5_candidate = stats.accuracy(np.concatenate(top5["candidate"]))
    comp.n01, comp.n10 = stats.discordant_counts(co, cc)
    comp.mcnemar_p = stats.mcnemar_exact(comp.n01, comp.n10)
    comp.interval = stats.paired_accuracy_difference(co, cc, level=level, method=method, seed=seed)
    comp.delta_pp = comp.interval.delta
