"""Calibration and validation data: open, validate against the model, batch.

Transformation: a ``.npz`` archive, a folder of ``.npy`` files (or one ``.npy``
for a single-input model) or a folder of images (:mod:`swapper.data.images`;
a folder is read as images when it holds PNG/JPEG files and no ``.npy``)
becomes a :class:`Dataset` whose arrays line up with the model's inputs, then
a stream of :class:`Batch` feeds in the model's dtypes.

A :class:`~swapper.data.layout.DataLayout` says which axis of an input counts
samples (0 by default) and which inputs take one constant value in every
batch. Arrays are held samples-first (a view with the batch axis moved to the
front) and each batch puts the axis back where the model wants it.

Symbolic dimensions are not compared across arrays: when arrays disagree on a
shared symbol (e.g. height and width both ``?``), the first sample is run
through onnxruntime and the data is accepted if the model runs on it.

Arrays are never unpickled and are memory-mapped where the format allows
(:mod:`swapper.data.npy_files`); replicated sets are lazy views
(:mod:`swapper.data.lazy_array`). Dtype casts happen per batch, so validating or
batching never holds more than one chunk/batch in memory.
"""
from __future__ import annotations

import logging
import os
import stat
from collections.abc import Callable, Collection
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Iterator

import numpy as np
import onnx

from swapper.core.files import os_reason, path_problem
from swapper.core.session import ORT_ERRORS, open_session
from swapper.data.images import ImagePrep, holds_images, read_image_folder
from swapper.data.layout import ConstantFeed, DataLayout
from swapper.data.lazy_array import CycledArray, cycle, head  # noqa: F401  (CycledArray: re-exported, it lived here)
from swapper.data.npy_files import read_folder, read_npz
from swapper.data.values import check_expected, check_labels, scan_values
from swapper.errors import BadDataError, BadModelError, first_line

logger = logging.getLogger(__name__)

SCORED = ("labels", "expected")  # class ids; the values one output should produce (regression)
RESERVED = SCORED + ("targets",)  # "targets": the older name of "expected", still read


@dataclass
class InputSpec:
    """A model input: name, numpy dtype, shape (int, or None/str for dynamic; None = unknown rank)."""

    name: str
    dtype: np.dtype
    shape: tuple | None


def input_specs(model: onnx.ModelProto) -> list[InputSpec]:
    """The graph inputs a caller must feed (initializers excluded), in graph order."""
    initializers = {t.name for t in model.graph.initializer}
    specs = []
    for vi in model.graph.input:
        if vi.name in initializers:
            continue
        kind = vi.type.WhichOneof("value")
        if kind != "tensor_type":
            raise BadModelError(f"input {vi.name!r} is a {kind}, only tensor inputs can be fed")
        tt = vi.type.tensor_type
        if tt.elem_type == onnx.TensorProto.UNDEFINED:
            raise BadModelError(f"input {vi.name!r} has no element type")
        dtype = np.dtype(onnx.helper.tensor_dtype_to_np_dtype(tt.elem_type))
        shape = None
        if tt.HasField("shape"):
            shape = tuple(
                d.dim_value if d.HasField("dim_value") else (d.dim_param or None) for d in tt.shape.dim
            )
        specs.append(InputSpec(vi.name, dtype, shape))
    return specs


def fixed_batch_size(specs: list[InputSpec], axes: dict[str, int] | None = None) -> int | None:
    """The static batch dimension the model insists on (e.g. 1), or None when it is dynamic.

    ``axes`` gives an input's batch axis when it is not 0.
    """
    axes = axes or {}
    sizes = set()
    for s in specs:
        axis = axes.get(s.name, 0)
        if s.shape and len(s.shape) > axis and isinstance(s.shape[axis], int) and s.shape[axis] > 0:
            sizes.add(s.shape[axis])
    return min(sizes) if sizes else None


@dataclass
class Dataset:
    """Validated samples. ``arrays`` keyed by model input name; may be memmaps or CycledArrays."""

    path: Path
    arrays: dict[str, np.ndarray]
    labels: np.ndarray | None
    expected: np.ndarray | None
    n: int
    dtypes: dict[str, np.dtype] = field(default_factory=dict)  # model dtype per input, applied per batch
    max_batch: int | None = None  # the model's static batch dimension (e.g. 1): batches never exceed it
    notes: list[str] = field(default_factory=list)  # what loading left out (arrays the model does not read)
    batch_axes: dict[str, int] = field(default_factory=dict)  # input -> its batch axis, where not 0
    constants: dict[str, ConstantFeed] = field(default_factory=dict)  # inputs fed the same value every batch
    classes: list[str] | None = None  # class-folder names of an image folder; label k = classes[k]


@dataclass
class Batch:
    """Samples ``start:stop``: contiguous feeds in the model's dtypes, plus their labels / expected values."""

    start: int
    stop: int
    feeds: dict[str, np.ndarray]
    labels: np.ndarray | None
    expected: np.ndarray | None


# ---------------------------------------------------------------- validation


def _match_names(raw: dict[str, np.ndarray], specs: list[InputSpec], path: Path,
                 strict: bool = False) -> tuple[dict, dict, list[str]]:
    """Map model inputs to arrays; also return input name -> the array's name in the file, and notes.

    Arrays the model does not read (reference outputs, class ids kept under another name...) are
    left out with one note naming them; with ``strict`` they are refused instead.
    """
    data = {k: v for k, v in raw.items() if k not in RESERVED}
    wanted = [s.name for s in specs]
    if len(specs) == 1 and len(data) == 1:
        # One input, one array: the array's name does not matter.
        key, arr = next(iter(data.items()))
        if key != wanted[0]:
            logger.debug("%s: using array %r for the only model input %r", path, key, wanted[0])
        return {wanted[0]: arr}, {wanted[0]: key}, []
    missing = sorted(set(wanted) - set(data))
    unread = sorted(set(data) - set(wanted))
    if missing:
        parts = [f"missing arrays for model inputs {missing} (an input that takes one value in every "
                 "batch can be declared constant: --constant NAME=VALUE)"]
        parts += [f"unexpected arrays {unread}"] if unread else []
        raise BadDataError("; ".join(parts) + f" (model inputs: {', '.join(wanted)})", path)
    notes = []
    if unread:
        if strict:
            raise BadDataError(f"unexpected arrays {unread} (model inputs: {', '.join(wanted)}; "
                               f"reserved: {', '.join(RESERVED)}; refused because of --strict-data)", path)
        notes.append(f"{path}: ignored {len(unread)} array(s) the model does not read: "
                     f"{', '.join(repr(n) for n in unread)} (only {' and '.join(repr(r) for r in SCORED)} "
                     "are scored)")
        logger.info("%s", notes[-1])
    return {name: data[name] for name in wanted}, {name: name for name in wanted}, notes


def _feed_dtype(name: str, arr: np.ndarray, spec: InputSpec, path: Path) -> np.dtype:
    """Decide the per-batch cast: float<-float, int<-int, bool<-bool; anything else is refused.

    Integer data for a float input is refused: casting raw pixel values or counts silently skips the
    scaling the model was trained with, and the calibration then fits the wrong range.
    """
    src, dst = arr.dtype, spec.dtype
    if src == dst:
        return dst
    if dst.kind == "f" and src.kind in "iu":
        raise BadDataError(f"array {name!r} holds integers ({src}) but model input {spec.name!r} takes {dst}; "
                           f"convert and scale it to {dst} before saving (integers are not cast)", path)
    ok = (dst.kind == "f" and src.kind == "f") or (dst.kind in "iu" and src.kind in "iu")
    if not ok:
        raise BadDataError(f"array {name!r} has dtype {src}, but model input {spec.name!r} takes {dst}", path)
    logger.debug("%s: array %r is %s, cast to %s per batch", path, name, src, dst)
    return dst


def _fmt_shape(shape) -> str:
    return "(" + ", ".join("?" if d is None else str(d) for d in shape) + ")"


def _check_shapes(arrays: dict, specs: list[InputSpec], names: dict[str, str], axes: dict[str, int],
                  path: Path) -> list[tuple[str, str, int]]:
    """Fixed dims must match; returns the (symbol, array name, size) uses of symbolic dims (not compared here)."""
    uses = []
    for spec in specs:
        arr, name, batch = arrays[spec.name], names[spec.name], axes.get(spec.name, 0)
        if spec.shape is None:
            continue
        if arr.ndim != len(spec.shape) or arr.ndim == 0:
            raise BadDataError(
                f"array {name!r} has shape {tuple(arr.shape)}, model input expects {_fmt_shape(spec.shape)}"
                f" (axis {batch} = samples)",
                path,
            )
        for axis in range(arr.ndim):
            if axis == batch:  # the sample axis, whatever the model says
                continue
            want, got = spec.shape[axis], arr.shape[axis]
            if isinstance(want, int) and want > 0 and want != got:
                raise BadDataError(
                    f"array {name!r} has shape {tuple(arr.shape)}, model input expects"
                    f" {_fmt_shape(spec.shape)} (axis {axis}: {got} != {want})",
                    path,
                )
            if isinstance(want, str):
                uses.append((want, name, got))
    return uses


def _symbol_conflict(uses: list[tuple[str, str, int]]) -> str | None:
    """The first shared symbolic dim that takes two sizes, described, or None."""
    seen: dict[str, tuple[str, int]] = {}
    for symbol, name, size in uses:
        first = seen.setdefault(symbol, (name, size))
        if first[1] != size:
            return f"dimension {symbol!r} is {first[1]} in array {first[0]!r} but {size} in array {name!r}"
    return None


def _runs_on_first_sample(ds: "Dataset", model: onnx.ModelProto, conflict: str, path: Path) -> None:
    """Accept a symbol disagreement when onnxruntime runs the model on one sample; else a one-line error."""
    feeds = next(batches(ds, 1)).feeds
    try:
        open_session(model, what="the model").run(None, feeds)
    except ORT_ERRORS as exc:
        raise BadDataError(f"{conflict}, and onnxruntime cannot run the model on the first sample: "
                           f"{first_line(exc)}", path) from None
    logger.info("%s: %s; onnxruntime runs the model on it, so the symbols are not tied", path, conflict)


def load_dataset(
    path: str | Path, specs: list[InputSpec], *, require_labels: bool = False, layout: DataLayout | None = None,
    images: ImagePrep | None = None, model: onnx.ModelProto | None = None, strict: bool = False,
) -> Dataset:
    """Open an .npz / .npy-folder / image-folder data set and validate it against the model inputs ``specs``.

    ``require_labels`` demands a ``labels`` array (class folders give them for images). ``layout``
    gives per-input batch axes and constant inputs; ``images`` the preprocessing of an image folder.
    Values are scanned for NaN/Inf/overflow in one streaming pass. With ``model``, arrays that
    disagree on a shared symbolic dimension are accepted when onnxruntime runs the model on the first
    sample (without it they are refused). Arrays the model does not read
    are left out and named in ``Dataset.notes`` (refused with ``strict``). Raises BadDataError (UsageError
    for a bad option).
    """
    path = Path(path)
    is_dir = _is_folder(path)
    if not specs:
        raise BadDataError("the model has no inputs to feed", path)
    axes, constants = (layout or DataLayout()).resolve(specs)
    fed = [s for s in specs if s.name not in constants]
    if not fed:
        raise BadDataError("every model input is declared constant; nothing is left to take samples from", path)
    classes = None
    if is_dir and not any(path.glob("*.npy")):  # a folder with .npy files keeps meaning arrays
        if not holds_images(path):
            raise BadDataError("folder holds no .npy files and no PNG/JPEG images (judged by content)", path)
        raw, classes = read_image_folder(path, fed, images)
    else:
        raw = read_folder(path) if is_dir else read_npz(path)
    labels, expected = raw.get("labels"), raw.get("expected")
    older = raw.pop("targets", None)
    if older is not None:  # the name regression values had before "target" came to mean a target profile
        if expected is not None:
            raise BadDataError("both 'expected' and 'targets' arrays: 'targets' is the older name of 'expected'; "
                               "keep one", path)
        expected = raw["expected"] = older
    older_name = [f"{path}: array 'targets' read as 'expected', its new name (the old one goes in a later release)"] \
        if older is not None else []
    if require_labels and labels is None:
        raise BadDataError("no 'labels' array (integer class ids are needed to measure accuracy)", path)
    arrays, names, notes = _match_names(raw, fed, path, strict)
    notes = older_name + notes
    dtypes = {s.name: _feed_dtype(names[s.name], arrays[s.name], s, path) for s in fed}
    for name, arr in arrays.items():
        if arr.ndim == 0:
            raise BadDataError(f"array {names[name]!r} is a scalar; expected an axis of samples "
                               "(a value for every batch is a constant input)", path)
        if axes.get(name, 0) >= arr.ndim:
            raise BadDataError(f"array {names[name]!r} has no axis {axes[name]} to take samples from", path)
    counts = {names[name]: arr.shape[axes.get(name, 0)] for name, arr in arrays.items()}
    for extra_name, extra in (("labels", labels), ("expected", expected)):
        if extra is not None and extra.ndim:
            counts[extra_name] = extra.shape[0]
    if len(set(counts.values())) > 1:
        listed = ", ".join(f"{k}={v}" for k, v in counts.items())
        raise BadDataError(f"sample counts differ across arrays ({listed})", path)
    uses = _check_shapes(arrays, fed, names, axes, path)
    n = next(iter(counts.values()))
    if n < 1:
        raise BadDataError("no samples", path)
    if labels is not None:
        check_labels(labels, n, path)
    if expected is not None:
        check_expected(expected, n, path)
    for s in fed:
        if not getattr(arrays[s.name], "finite", False):
            scan_values(names[s.name], arrays[s.name], dtypes[s.name], path)
    moved = {k: a for k, a in axes.items() if a and k in arrays}
    arrays = {k: np.moveaxis(v, moved[k], 0) if k in moved else v for k, v in arrays.items()}
    logger.debug("%s: %d samples, inputs %s", path, n, {k: tuple(v.shape) for k, v in arrays.items()})
    max_batch = fixed_batch_size(fed, axes)
    if max_batch is not None and max_batch > 1 and n % max_batch:
        # onnxruntime refuses a short last batch, and padding it would put made-up samples into the figures
        raise BadDataError(f"{n} samples do not divide into batches of {max_batch}, the batch size the model "
                           f"fixes (give a multiple of {max_batch} samples, or export the model with a dynamic "
                           "batch dimension)", path)
    ds = Dataset(path=path, arrays=arrays, labels=labels, expected=expected, n=n, dtypes=dtypes,
                 max_batch=max_batch, batch_axes=moved, constants=constants, classes=classes, notes=notes)
    conflict = _symbol_conflict(uses)
    if conflict and model is None:
        raise BadDataError(conflict, path)
    if conflict:
        _runs_on_first_sample(ds, model, conflict, path)
    return ds


def _is_folder(path: Path) -> bool:
    """True for a folder, False for a file; BadDataError (one line) when the path names neither."""
    problem = path_problem(path)
    if problem:
        raise BadDataError(problem, path)
    try:
        return stat.S_ISDIR(os.stat(path).st_mode)
    except FileNotFoundError:
        raise BadDataError("no such file or folder", path) from None
    except (OSError, ValueError) as exc:
        raise BadDataError(f"cannot read: {os_reason(exc)}", path) from None


# ---------------------------------------------------------------- iteration and views


def batches(ds: Dataset, batch_size: int, *, limit: int | None = None) -> Iterator[Batch]:
    """Yield samples in order, ``batch_size`` at a time (the last may be short), up to ``limit``.

    Each batch owns fresh contiguous copies in the model's dtypes, each input's batch axis where
    the model wants it, plus the constant inputs; nothing else is held. A model with a static
    batch dimension gets batches of at most that size, whatever ``batch_size`` asks.
    """
    if batch_size < 1:
        raise ValueError("batch_size must be >= 1")
    batch_size = min(batch_size, ds.max_batch or batch_size)
    total = ds.n if limit is None else max(0, min(int(limit), ds.n))
    for start in range(0, total, batch_size):
        stop = min(start + batch_size, total)
        feeds = {}
        for name, arr in ds.arrays.items():
            part = arr[start:stop]
            if ds.batch_axes.get(name):
                part = np.moveaxis(np.asarray(part), 0, ds.batch_axes[name])
            feeds[name] = np.array(part, dtype=ds.dtypes.get(name, arr.dtype), order="C", copy=True)
        feeds.update({name: const.batch(stop - start) for name, const in ds.constants.items()})
        labels = None if ds.labels is None else np.array(ds.labels[start:stop], dtype=np.int64)
        expected = None if ds.expected is None else np.array(ds.expected[start:stop], order="C", copy=True)
        yield Batch(start=start, stop=stop, feeds=feeds, labels=labels, expected=expected)


def input_batches(ds: Dataset, batch_size: int) -> Callable[[Collection[str]], Iterator[Batch]]:
    """A batch source for :class:`~swapper.core.slices.SliceRunner`: ``source(names)`` batches only the
    arrays of ``ds`` named in ``names`` (no labels, no expected values), so a slice that reads none copies none."""

    def source(names: Collection[str]) -> Iterator[Batch]:
        only = replace(ds, arrays={k: v for k, v in ds.arrays.items() if k in names}, labels=None, expected=None)
        return batches(only, batch_size)

    return source


def replicate(ds: Dataset, times: int) -> Dataset:
    """A lazy view of ``ds`` repeated ``times`` times (sample i = original i % n); no data is copied."""
    if times < 1:
        raise ValueError("times must be >= 1")
    n = ds.n * int(times)
    return replace(ds, arrays={k: cycle(v, n) for k, v in ds.arrays.items()}, labels=cycle(ds.labels, n),
                   expected=cycle(ds.expected, n), n=n, dtypes=dict(ds.dtypes))


def subset(ds: Dataset, n: int, *, seed: int | None = None) -> Dataset:
    """The first ``n`` samples (a view), or with ``seed`` a random ``n`` kept in original order (a copy)."""
    if n < 1:
        raise ValueError("n must be >= 1")
    n = min(int(n), ds.n)
    if seed is None:
        take = lambda a: head(a, n)  # noqa: E731 - views, nothing copied
    else:
        idx = np.sort(np.random.default_rng(seed).choice(ds.n, size=n, replace=False))
        take = lambda a: None if a is None else np.asarray(a[idx])  # noqa: E731
    return replace(ds, arrays={k: take(v) for k, v in ds.arrays.items()}, labels=take(ds.labels),
                   expected=take(ds.expected), n=n, dtypes=dict(ds.dtypes))
