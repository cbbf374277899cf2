"""Run a model with onnxruntime and hand out the tensors inside it.

``expose`` adds internal tensors as extra graph outputs (on a copy);
``open_session`` builds a deterministic CPU session; ``TensorCache`` spills
recorded tensors to disk batch by batch so memory does not grow with the
calibration set (reads come back one batch at a time with ``np.fromfile``).
"""
from __future__ import annotations

import logging
import os
import tempfile
from pathlib import Path

import numpy as np
import onnx
import onnxruntime as ort
from onnx import helper

from .graph import GraphIndex

logger = logging.getLogger(__name__)


def open_session(model: onnx.ModelProto | bytes, *, threads: int = 1, optimize: bool = True) -> ort.InferenceSession:
    """A CPU session with fixed threading, so repeated runs give identical numbers."""
    options = ort.SessionOptions()
    options.intra_op_num_threads = threads
    options.inter_op_num_threads = 1
    options.execution_mode = ort.ExecutionMode.ORT_SEQUENTIAL
    options.log_severity_level = 3
    if not optimize:
        options.graph_optimization_level = ort.GraphOptimizationLevel.ORT_DISABLE_ALL
    data = model if isinstance(model, bytes) else model.SerializeToString()
    return ort.InferenceSession(data, options, providers=["CPUExecutionProvider"])


def expose(model: onnx.ModelProto, names: list[str]) -> onnx.ModelProto:
    """A copy of ``model`` whose graph outputs also include ``names`` (in order, no duplicates)."""
    out = onnx.ModelProto()
    out.CopyFrom(model)
    index = GraphIndex.of(out)
    present = {o.name for o in out.graph.output}
    for name in dict.fromkeys(names):
        if name in present:
            continue
        elem = index.dtypes.get(name, onnx.TensorProto.FLOAT)
        out.graph.output.append(helper.make_tensor_value_info(name, elem, None))
        present.add(name)
    return out


class TensorCache:
    """Append-only, on-disk store of tensors recorded batch by batch.

    Each tensor is a raw file of rows (first axis = samples). Reading a batch
    reads just those rows, so resident memory stays at one batch.
    """

    def __init__(self, folder: str | Path | None = None):
        self._tmp = tempfile.TemporaryDirectory(prefix="swapper-cache-", dir=folder)
        self.root = Path(self._tmp.name)
        self._meta: dict[str, tuple[np.dtype, tuple, int]] = {}  # name -> (dtype, row shape, rows)
        self._files: dict[str, str] = {}

    def _file(self, name: str) -> str:
        if name not in self._files:
            self._files[name] = str(self.root / f"t{len(self._files)}.bin")
        return self._files[name]

    def append(self, name: str, array: np.ndarray) -> None:
        array = np.ascontiguousarray(array)
        dtype, row_shape, rows = self._meta.get(name, (array.dtype, array.shape[1:], 0))
        if array.shape[1:] != row_shape or array.dtype != dtype:
            raise ValueError(f"tensor {name!r} changed shape or dtype between batches")
        with open(self._file(name), "ab") as fh:
            if array.size:  # the array's own buffer (a buffered write loops until all is out): no bytes copy
                fh.write(memoryview(array).cast("B"))
        self._meta[name] = (dtype, row_shape, rows + array.shape[0])

    def __contains__(self, name: str) -> bool:
        return name in self._meta

    def rows(self, name: str) -> int:
        return self._meta[name][2]

    def read(self, name: str, start: int, stop: int) -> np.ndarray:
        dtype, row_shape, rows = self._meta[name]
        if start < 0:
            raise ValueError(f"start must be >= 0, got {start}")
        stop = max(start, min(stop, rows))  # past the end: no rows (a negative count would read the whole file)
        per_row = int(np.prod(row_shape, dtype=np.int64)) if row_shape else 1
        offset = start * per_row * dtype.itemsize
        data = np.fromfile(self._file(name), dtype=dtype, count=(stop - start) * per_row, offset=offset)
        return data.reshape((stop - start,) + tuple(row_shape))

    def nbytes(self) -> int:
        return sum(os.path.getsize(f) for f in self._files.values() if os.path.exists(f))

    def close(self) -> None:
        self._tmp.cleanup()

    def __enter__(self) -> "TensorCache":
        return self

    def __exit__(self, *exc) -> None:
        self.close()
