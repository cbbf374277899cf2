"""Recorded tensors of a data set, kept in RAM up to a budget and on disk beyond it."""
from __future__ import annotations

import bisect
import logging
import os
import tempfile
from pathlib import Path

import numpy as np

logger = logging.getLogger(__name__)

# Bytes of recorded tensors kept in RAM before spilling to disk. Small on purpose: calibration's own
# footprint is ~90 MiB (onnxruntime sessions, observers), and the benchmark's target is that 16x more
# calibration data costs at most +10% peak memory; raise it (--cache-mb) to trade memory for speed.
MEMORY_BUDGET = 8 << 20


class TensorCache:
    """Append-only store of tensors recorded batch by batch, in RAM up to a budget, then on disk.

    Each tensor is a sequence of rows (first axis = samples). While the bytes
    held in RAM stay within ``memory_budget`` a tensor keeps its batches as
    read-only numpy arrays (reads of one batch are views: no copy, no I/O);
    the append that would exceed the budget moves that tensor to a raw file
    ("spills" it), and it stays there. Reads of a spilled tensor read just the
    requested rows, so resident memory is at most the budget plus one batch
    whatever the calibration set's size. ``memory_budget=0`` keeps everything
    on disk. ``discard`` frees a tensor no later step reads (RAM or file).
    """

    def __init__(self, folder: str | Path | None = None, *, memory_budget: int = MEMORY_BUDGET):
        self._tmp = tempfile.TemporaryDirectory(prefix="swapper-cache-", dir=folder)
        self.root = Path(self._tmp.name)
        self.memory_budget = int(memory_budget)
        self._meta: dict[str, tuple[np.dtype, tuple, int]] = {}  # name -> (dtype, row shape, rows)
        self._files: dict[str, str] = {}  # spilled tensors
        self._chunks: dict[str, list[np.ndarray]] = {}  # tensors in RAM: their appended batches
        self._starts: dict[str, list[int]] = {}  # first row of each chunk (the end is the row count in _meta)
        self._held = 0  # bytes in RAM
        self._counter = 0  # file names are never reused, even after a discard
        self.bytes_written = 0  # to disk, over the cache's life (spills included)
        self.peak_bytes_held = 0

    def _file(self, name: str) -> str:
        if name not in self._files:
            self._files[name] = str(self.root / f"t{self._counter}.bin")
            self._counter += 1
        return self._files[name]

    def _write(self, name: str, array: np.ndarray) -> None:
        with open(self._file(name), "ab") as fh:
            if array.size:  # the array's own buffer (a buffered write loops until all is out): no bytes copy
                fh.write(memoryview(array).cast("B"))
        self.bytes_written += array.nbytes

    def _spill(self, name: str) -> None:
        """Move a tensor's batches from RAM to its file (in row order)."""
        chunks = self._chunks.pop(name, [])
        self._starts.pop(name, None)
        open(self._file(name), "ab").close()  # a tensor of zero rows still gets its (empty) file
        for chunk in chunks:
            self._write(name, chunk)
            self._held -= chunk.nbytes
        logger.debug("tensor cache: spilled %r to disk (%d bytes still in RAM)", name, self._held)

    def append(self, name: str, array: np.ndarray, *, owned: bool = False) -> None:
        """Add rows to tensor ``name`` (created on first append); row shape and dtype must not change.

        ``owned``: the caller hands ``array`` over and will not write to it, so a
        contiguous array is kept in RAM as is (made read-only) instead of copied.
        """
        array = np.asarray(array)
        dtype, row_shape, rows = self._meta.get(name, (array.dtype, array.shape[1:], 0))
        if array.shape[1:] != row_shape or array.dtype != dtype:
            raise ValueError(f"tensor {name!r} changed shape or dtype between batches")
        if name not in self._files and self._held + array.nbytes > self.memory_budget:
            self._spill(name)
        if name in self._files:
            self._write(name, np.ascontiguousarray(array))
        else:
            # read-only, and our own unless handed over: the caller may reuse its buffer, readers get views
            chunk = array if owned and array.flags.c_contiguous else np.array(array, order="C", copy=True)
            chunk.flags.writeable = False
            self._chunks.setdefault(name, []).append(chunk)
            self._starts.setdefault(name, []).append(rows)
            self._held += chunk.nbytes
            self.peak_bytes_held = max(self.peak_bytes_held, self._held)
        self._meta[name] = (dtype, row_shape, rows + array.shape[0])

    def __contains__(self, name: str) -> bool:
        return name in self._meta

    def names(self) -> list[str]:
        """The tensors held, in the order they were first appended."""
        return list(self._meta)

    def rows(self, name: str) -> int:
        return self._meta[name][2]

    def in_memory(self, name: str) -> bool:
        return name in self._meta and name not in self._files

    def read(self, name: str, start: int, stop: int) -> np.ndarray:
        """Rows ``start:stop`` of ``name`` (clipped at the end), as a read-only view or a fresh array."""
        dtype, row_shape, rows = self._meta[name]
        if start < 0:
            raise ValueError(f"start must be >= 0, got {start}")
        stop = max(start, min(stop, rows))  # past the end: no rows (a negative count would read the whole file)
        if name not in self._files:
            return self._read_chunks(name, start, stop, dtype, row_shape)
        per_row = int(np.prod(row_shape, dtype=np.int64))  # 1 for scalar rows: the product of no dims
        offset = start * per_row * dtype.itemsize
        data = np.fromfile(self._file(name), dtype=dtype, count=(stop - start) * per_row, offset=offset)
        return data.reshape((stop - start,) + tuple(row_shape))

    def _read_chunks(self, name: str, start: int, stop: int, dtype, row_shape) -> np.ndarray:
        chunks, starts = self._chunks.get(name, []), self._starts.get(name, [])
        first = max(0, bisect.bisect_right(starts, start) - 1)
        parts = []
        for i in range(first, len(chunks)):
            if starts[i] >= stop:
                break
            parts.append(chunks[i][max(start - starts[i], 0):stop - starts[i]])
        if len(parts) == 1:
            return parts[0]  # a view of one appended batch (the usual case: reads follow the appends' batching)
        if not parts:
            return np.empty((0,) + tuple(row_shape), dtype=dtype)
        return np.concatenate(parts)

    def discard(self, name: str) -> None:
        """Forget tensor ``name`` and free its RAM or delete its file (no-op when absent)."""
        self._meta.pop(name, None)
        for chunk in self._chunks.pop(name, []):
            self._held -= chunk.nbytes
        self._starts.pop(name, None)
        path = self._files.pop(name, None)
        if path is not None and os.path.exists(path):
            os.remove(path)

    def memory_bytes(self) -> int:
        """Bytes of recorded tensors held in RAM."""
        return self._held

    def disk_bytes(self) -> int:
        """Bytes of recorded tensors in spill files now."""
        return sum(os.path.getsize(f) for f in self._files.values() if os.path.exists(f))

    def nbytes(self) -> int:
        """Bytes of recorded tensors held, in RAM and on disk."""
        return self.memory_bytes() + self.disk_bytes()

    def close(self) -> None:
        self._chunks.clear()
        self._starts.clear()
        self._held = 0
        self._tmp.cleanup()

    def __enter__(self) -> "TensorCache":
        return self

    def __exit__(self, *exc) -> None:
        self.close()
