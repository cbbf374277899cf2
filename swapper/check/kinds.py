"""What each model output is, so the gate measures it with a figure that means something.

Transformation: (output name, the original model's output on one batch, the
per-sample size of the ``expected`` values if the data has them) -> :class:`OutputKind`, one
of ``scores``, ``embedding``, ``dense``, ``scalar``, ``regression`` or ``non-float``,
with the cue that decided it in words. Axis 0 is the sample axis.

Cues, tried in this order (the first that applies wins):

1. dtype: an output that is not a floating-point tensor is ``non-float`` (class
   ids from an ArgMax, counts, booleans, strings): no distance to measure on it.
2. expected values: when the data has an ``expected`` array and the output holds as many
   values per sample, it is ``regression`` (what ``expected`` is for, README "Data files").
3. shape: more than one axis of size > 1 besides the sample axis is a ``dense``
   map: detection heads [N, anchors, 4 + classes], sequence logits [N, T, C],
   segmentation maps [N, C, H, W]. One value per sample ([N] or [N, 1]) is ``scalar``.
4. values, over every row of the batch, for [N, C] outputs (inner axes of size 1 are
   dropped): rows that are non-negative and sum to 1 (within ``ROW_TOLERANCE``) are
   class probabilities, ``scores`` (a Softmax output, by the ONNX Softmax
   definition); rows of unit L2 length are an ``embedding`` (a final L2
   normalisation is how embeddings compared by cosine are usually exported; common
   practice, no source). Probabilities are tested first: a one-hot row has length 1 too.
5. name (case-insensitive substrings; common practice, no source): ``logit``,
   ``score``, ``prob``, ``class``, ``cls`` -> ``scores``; ``embed``, ``feat``,
   ``hidden``, ``pool``, ``vector``, ``latent``, ``encod`` -> ``embedding``.
6. otherwise an [N, C] float output is ``scores``: a classifier's last layer gives one
   score per class (the assumption swapper made before kinds existed; common practice,
   no source). ``--metric`` overrides the metric chosen from the kind.
"""
from __future__ import annotations

import logging
import math
from dataclasses import dataclass

import numpy as np

from swapper.errors import BadDataError

logger = logging.getLogger(__name__)

KINDS = ("scores", "embedding", "dense", "scalar", "regression", "non-float")
# float32 rounding of a softmax sum or an L2 norm is ~1e-6; 1e-3 also admits float16 outputs (our choice, no source)
ROW_TOLERANCE = 1e-3
SCORE_NAMES = ("logit", "score", "prob", "class", "cls")
EMBEDDING_NAMES = ("embed", "feat", "hidden", "pool", "vector", "latent", "encod")


@dataclass(frozen=True)
class OutputKind:
    """One model output: its name, what it is, why we think so, and its per-sample shape and dtype."""

    name: str
    kind: str
    cue: str
    sample_shape: tuple
    dtype: str

    @property
    def is_float(self) -> bool:
        return self.kind != "non-float"

    @property
    def values_per_sample(self) -> int:
        return math.prod(self.sample_shape)

    @property
    def has_class_view(self) -> bool:
        """True when argmax over one axis per sample is defined: [N, C] with C >= 2 after dropping size-1 axes."""
        return self.is_float and sum(d > 1 for d in self.sample_shape) == 1

    def describe(self) -> str:
        dims = ", ".join(str(d) for d in self.sample_shape)
        return f"{self.name!r} {self.dtype} [N, {dims}] is {_article(self.kind)} ({self.cue})" if dims else \
            f"{self.name!r} {self.dtype} [N] is {_article(self.kind)} ({self.cue})"

    def to_dict(self) -> dict:
        return {"kind": self.kind, "cue": self.cue, "sample_shape": list(self.sample_shape), "dtype": self.dtype}


def _article(kind: str) -> str:
    words = {"scores": "class-score output", "embedding": "embedding", "dense": "dense map",
             "scalar": "one-value-per-sample output", "regression": "regression output",
             "non-float": "non-float output"}
    word = words[kind]
    return ("an " if word[0] in "aeiou" else "a ") + word


def _rows(out: np.ndarray) -> np.ndarray:
    return np.asarray(out, dtype=np.float64).reshape(out.shape[0], -1)


def _is_probabilities(rows: np.ndarray) -> bool:
    return bool(np.all(rows >= 0.0) and np.all(np.abs(rows.sum(axis=1) - 1.0) <= ROW_TOLERANCE))


def _is_unit_length(rows: np.ndarray) -> bool:
    return bool(np.all(np.abs(np.linalg.norm(rows, axis=1) - 1.0) <= ROW_TOLERANCE))


def detect_kind(name: str, out: np.ndarray, *, targets_per_sample: int | None = None) -> OutputKind:
    """The kind of output ``name`` from the original's values ``out`` on one batch (see the module docstring)."""
    out = np.asarray(out)
    sample_shape = tuple(int(d) for d in out.shape[1:])
    dtype = str(out.dtype)

    def kind(k: str, cue: str) -> OutputKind:
        return OutputKind(name=name, kind=k, cue=cue, sample_shape=sample_shape, dtype=dtype)

    if out.ndim == 0 or not np.issubdtype(out.dtype, np.floating):
        return kind("non-float", f"dtype {dtype}" if out.ndim else "a scalar with no sample axis")
    per_sample = math.prod(sample_shape)
    if targets_per_sample is not None and per_sample == targets_per_sample:
        return kind("regression", f"{per_sample} value(s) per sample, as many as 'expected' has")
    wide = sum(d > 1 for d in sample_shape)
    if wide > 1:
        return kind("dense", f"{wide} axes of size > 1 besides the sample axis")
    if per_sample <= 1:
        return kind("scalar", "one value per sample")
    if out.shape[0] > 0 and np.isfinite(out).all():
        rows = _rows(out)
        if _is_probabilities(rows):
            return kind("scores", "rows are non-negative and sum to 1")
        if _is_unit_length(rows):
            return kind("embedding", "rows have unit L2 length")
    lowered = name.lower()
    for cue_words, k in ((SCORE_NAMES, "scores"), (EMBEDDING_NAMES, "embedding")):
        hit = next((w for w in cue_words if w in lowered), None)
        if hit:
            return kind(k, f"its name contains {hit!r}")
    return kind("scores", f"{per_sample} values per sample, read as one score per class")


def detect_kinds(names: list[str], outputs: list[np.ndarray], *, expected: np.ndarray | None = None) \
        -> list[OutputKind]:
    """:func:`detect_kind` for every output, in the model's output order."""
    per_sample = None if expected is None or np.ndim(expected) == 0 else math.prod(np.shape(expected)[1:])
    kinds = [detect_kind(n, o, targets_per_sample=per_sample) for n, o in zip(names, outputs)]
    for k in kinds:
        logger.info("output %s", k.describe())
    return kinds


def check_expected_fit(kinds: list[OutputKind], expected: np.ndarray | None, path) -> None:
    """BadDataError (naming ``path``) when ``expected`` values are given but no float output has their size per sample.

    ``expected`` holds what one output should produce (README "Data files"): when none
    can, the file does not fit the model, as labels beyond the class count do not.
    """
    if expected is None or regression_output(kinds) is not None:
        return
    per_sample = 1 if np.ndim(expected) <= 1 else math.prod(np.shape(expected)[1:])
    outputs = ", ".join(f"{k.name} {k.values_per_sample}" for k in kinds if k.is_float) or "none"
    raise BadDataError(f"'expected' has {per_sample} value(s) per sample, but no float output of the model has "
                       f"as many (values per sample: {outputs}); 'expected' holds what one output should produce", path)


def class_output(kinds: list[OutputKind], *, any_view: bool = False) -> OutputKind | None:
    """The output read as class scores: the first of kind ``scores``; with ``any_view`` else the first embedding.

    An embedding is [N, D] like class scores; reading it as classes is only right when the user
    asks for it (``--metric top1|agreement``). Regression outputs and dense maps are never read so.
    """
    first = next((k for k in kinds if k.kind == "scores"), None)
    if first is None and any_view:
        first = next((k for k in kinds if k.kind == "embedding" and k.has_class_view), None)
    return first


def regression_output(kinds: list[OutputKind]) -> OutputKind | None:
    """The output compared with ``expected``: the first of kind ``regression``."""
    return next((k for k in kinds if k.kind == "regression"), None)


# The metric each kind is judged by when no --metric is given (README "The gate").
METRIC_FOR_KIND = {"scores": "agreement", "embedding": "cosine", "dense": "cosine", "scalar": "sqnr",
                   "regression": "rmse"}


def default_metric(kinds: list[OutputKind], *, has_labels: bool, has_expected: bool) -> tuple[str | None, list[str]]:
    """The metric the gate uses without ``--metric``, and notes on data it leaves unused.

    With labels and a class-score output: ``top1``. With expected values and an output that
    matches them: ``rmse``. Otherwise the kind of the first float output decides (an
    exporter lists the main output first; common practice, no source): scores ->
    ``agreement``, embedding or dense map -> ``cosine``, one value per sample ->
    ``sqnr``. ``None`` when no output is a float tensor.
    """
    notes: list[str] = []
    floats = [k for k in kinds if k.is_float]
    if not floats:
        return None, notes
    if has_labels:
        if class_output(kinds) is not None:
            return "top1", notes
        notes.append("labels not used: no output holds class scores [batch, classes]")
    if has_expected:
        if regression_output(kinds) is not None:
            return "rmse", notes
        notes.append("'expected' not used: no float output has as many values per sample as 'expected'")
    primary = next(k for k in floats if k.kind != "regression")  # a regression kind implies expected values, handled above
    return METRIC_FOR_KIND[primary.kind], notes
