"""A read-only array view that repeats a base array along its first axis, lazily.

Transformation: ``base`` (n samples) and a length N become an array-like
whose sample i is ``base[i % n]``; indexing copies only the rows asked for,
so a data set can be replicated to any size without holding the copies
(:func:`swapper.data.dataset.replicate`, :func:`swapper.data.dataset.subset`).
"""
from __future__ import annotations

import logging
import math

import numpy as np

logger = logging.getLogger(__name__)


class CycledArray:
    """A read-only, lazy array whose sample i is ``base[i % len(base)]``; nothing is copied up front.

    Supports what :func:`swapper.data.dataset.batches` and :func:`swapper.data.dataset.subset` need: ``len``, ``shape``,
    ``dtype`` and indexing on the first axis by int, slice or integer array.
    """

    def __init__(self, base: np.ndarray, length: int):
        if len(base) == 0:
            raise ValueError("cannot cycle an empty array")
        self.base = base
        self.length = int(length)

    shape = property(lambda self: (self.length,) + tuple(self.base.shape[1:]))
    dtype = property(lambda self: self.base.dtype)
    ndim = property(lambda self: self.base.ndim)
    size = property(lambda self: math.prod(self.shape))
    nbytes = property(lambda self: self.size * self.dtype.itemsize)

    def __len__(self) -> int:
        return self.length

    def __repr__(self) -> str:
        return f"CycledArray(shape={self.shape}, dtype={self.dtype}, base_samples={len(self.base)})"

    def __getitem__(self, key):
        if isinstance(key, tuple):
            head, rest = (key[0], key[1:]) if key else (slice(None), ())
            part = self[head]
            return part[rest] if isinstance(head, (int, np.integer)) else part[(slice(None),) + rest]
        m = len(self.base)
        if isinstance(key, (int, np.integer)):
            i = int(key) + self.length if key < 0 else int(key)
            if not 0 <= i < self.length:
                raise IndexError(f"index {key} out of range for {self.length} samples")
            return self.base[i % m]
        if isinstance(key, slice):
            start, stop, step = key.indices(self.length)
            if step != 1:
                return self.base[np.arange(start, stop, step) % m]
            pieces, pos = [], start
            while pos < stop:  # contiguous runs of base, at most one copy of the requested rows
                b = pos % m
                take = min(m - b, stop - pos)
                pieces.append(self.base[b : b + take])
                pos += take
            if len(pieces) == 1:
                return pieces[0]
            return np.concatenate(pieces) if pieces else self.base[:0]
        idx = np.asarray(key)
        if idx.dtype.kind not in "iu":
            raise IndexError("CycledArray supports int, slice and integer-array indices only")
        idx = np.where(idx < 0, idx + self.length, idx)
        if idx.size and (idx.min() < 0 or idx.max() >= self.length):
            raise IndexError(f"index out of range for {self.length} samples")
        return self.base[idx % m]

    def __array__(self, dtype=None, copy=None):
        logger.debug("materialising a CycledArray of %d samples", self.length)
        out = self[:]
        return out.astype(dtype) if dtype is not None else np.array(out)


def cycle(arr, length: int):
    """``arr`` repeated to ``length`` samples as a CycledArray (None stays None); never nests views."""
    if arr is None:
        return None
    if isinstance(arr, CycledArray) and len(arr) % len(arr.base) == 0:
        arr = arr.base  # whole cycles: index the original directly instead of nesting views
    return CycledArray(arr, length)


def head(arr, n: int):
    """The first ``n`` samples of ``arr`` without copying (None stays None); a CycledArray stays lazy."""
    if arr is None:
        return None
    return CycledArray(arr.base, n) if isinstance(arr, CycledArray) else arr[:n]
