"""Checks of the values in a data set, streamed in chunks: NaN/Inf and overflow, labels, expected values (regression).

Every check names the file, the array and the first bad sample in one line (BadDataError).
"""
from __future__ import annotations

import logging
import math
from collections.abc import Iterator
from pathlib import Path

import numpy as np

from swapper.errors import BadDataError

logger = logging.getLogger(__name__)

# Validation scans arrays in chunks of about this many bytes so a memmap is never read whole.
CHUNK_BYTES = 32 * 2**20


def value_chunks(arr, rows_hint: int | None = None) -> Iterator[tuple[int, np.ndarray]]:
    row_bytes = max(1, math.prod(arr.shape[1:]) * arr.dtype.itemsize)
    step = rows_hint or max(1, CHUNK_BYTES // row_bytes)
    for start in range(0, len(arr), step):
        yield start, np.asarray(arr[start : start + step])


def scan_values(name: str, arr: np.ndarray, target: np.dtype, path: Path) -> None:
    """Reject NaN/Inf (first bad sample) and values the per-batch cast would not keep."""
    src = arr.dtype
    float_limit = None
    if target.kind == "f" and src.kind == "f" and target.itemsize < src.itemsize:
        float_limit = np.finfo(target).max  # e.g. float64 -> float32 would turn 1e300 into inf
    int_range = None
    if target.kind in "iu" and src.kind in "iu" and not np.can_cast(src, target, "safe"):
        int_range = (np.iinfo(target).min, np.iinfo(target).max)
    if src.kind != "f" and int_range is None:
        return
    for start, chunk in value_chunks(arr):
        flat = chunk.reshape(len(chunk), -1)
        if src.kind == "f":
            bad = ~np.isfinite(flat).all(axis=1)
            if bad.any():
                i = int(np.argmax(bad))
                what = "NaN" if np.isnan(flat[i]).any() else "Inf"
                raise BadDataError(f"array {name!r} contains {what} at sample {start + i}", path)
            if float_limit is not None:
                over = (np.abs(flat) > float_limit).any(axis=1)
                if over.any():
                    raise BadDataError(
                        f"array {name!r} sample {start + int(np.argmax(over))} overflows {target}", path
                    )
        elif int_range is not None and flat.size:
            over = ((flat < int_range[0]) | (flat > int_range[1])).any(axis=1)
            if over.any():
                raise BadDataError(f"array {name!r} sample {start + int(np.argmax(over))} does not fit {target}", path)


def check_labels(labels: np.ndarray, n: int, path: Path) -> None:
    if labels.dtype.kind not in "iu":
        raise BadDataError(f"'labels' must be integer class ids, got dtype {labels.dtype}", path)
    if labels.ndim != 1 or len(labels) != n:
        raise BadDataError(f"'labels' must be 1-D with {n} entries, got shape {tuple(labels.shape)}", path)
    if labels.dtype.kind == "i":
        for start, chunk in value_chunks(labels, rows_hint=1 << 20):
            neg = chunk < 0
            if neg.any():
                raise BadDataError(f"'labels' has a negative class id at sample {start + int(np.argmax(neg))}", path)


def check_expected(expected: np.ndarray, n: int, path: Path) -> None:
    if expected.dtype.kind not in "fiu":
        raise BadDataError(f"'expected' must be numeric, got dtype {expected.dtype}", path)
    if expected.ndim == 0 or len(expected) != n:
        raise BadDataError(f"'expected' must have {n} rows, got shape {tuple(expected.shape)}", path)
    scan_values("expected", expected, expected.dtype, path)
