"""Data layouts: which axis of each input counts samples, and inputs fed one fixed value in every batch.

Transformation: entries of a data description (a JSON file, see
:mod:`swapper.data.source`) and command-line options -> :class:`DataLayout`;
:meth:`DataLayout.resolve` checks it against the model's inputs and gives the
batch axis of each input and a :class:`ConstantFeed` per constant input.

- ``batch_axis``: input name -> the axis of that input (and of its array in the
  data file) that counts samples. 0 when not given. A recurrent state shaped
  [2, batch, 128] has batch axis 1.
- ``constant``: input name -> a value fed unchanged in every batch, so the data
  file does not hold it (a sample rate, an initial recurrent state):
  a number or nested list (cast to the input's dtype; its shape must fit the
  input's fixed dimensions), ``"zeros"`` (zeros of the input's shape; the
  input's batch axis, when declared, takes each batch's sample count and every
  other dimension must be fixed), or the name of an ``.npy`` file (relative to
  the description file; never unpickled).

Errors name where the entry came from (the description file, or the option
such as ``--constant sr=abc``) and the cause, on one line.
"""
from __future__ import annotations

import logging
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from swapper.data.npy_files import read_npz
from swapper.errors import BadDataError, UsageError

logger = logging.getLogger(__name__)


@dataclass(frozen=True)
class ConstantFeed:
    """A value fed in every batch; with ``batch_axis`` its single sample is repeated to the batch's size."""

    value: np.ndarray
    batch_axis: int | None = None

    def batch(self, count: int) -> np.ndarray:
        if self.batch_axis is None:
            return np.array(self.value, copy=True)
        return np.ascontiguousarray(np.repeat(self.value, count, axis=self.batch_axis))


@dataclass
class DataLayout:
    """Per-input batch axes and constants, before they are checked against a model."""

    batch_axis: dict[str, int] = field(default_factory=dict)
    constant: dict[str, object] = field(default_factory=dict)  # number | list | "zeros" | Path of an .npy
    origin: dict[str, str] = field(default_factory=dict)  # "batch_axis:NAME" / "constant:NAME" -> where declared

    def merged(self, other: "DataLayout") -> "DataLayout":
        """This layout with ``other``'s entries on top (options override a description file)."""
        return DataLayout({**self.batch_axis, **other.batch_axis}, {**self.constant, **other.constant},
                          {**self.origin, **other.origin})

    def is_empty(self) -> bool:
        return not self.batch_axis and not self.constant

    def resolve(self, specs) -> tuple[dict[str, int], dict[str, ConstantFeed]]:
        """(batch axis per input, constant feeds) checked against ``specs`` (``InputSpec`` list)."""
        by_name = {s.name: s for s in specs}
        for kind, entries in (("batch_axis", self.batch_axis), ("constant", self.constant)):
            for name in entries:
                if name not in by_name:
                    self._fail(f"{kind}:{name}", f"the model has no input {name!r} (inputs: {', '.join(by_name)})")
        axes = {}
        for name, axis in self.batch_axis.items():
            shape = by_name[name].shape
            if shape is not None and not 0 <= axis < max(len(shape), 1):
                self._fail(f"batch_axis:{name}", f"axis {axis} is outside input {name!r} of rank {len(shape)}")
            axes[name] = axis
        constants = {name: self._constant(name, raw, by_name[name], axes.get(name))
                     for name, raw in self.constant.items()}
        return axes, constants

    def _constant(self, name: str, raw, spec, axis: int | None) -> ConstantFeed:
        where = f"constant:{name}"
        if isinstance(raw, str) and raw == "zeros":
            shape = spec.shape
            if shape is None:
                self._fail(where, f"'zeros' needs the shape of input {name!r}, which the model does not give")
            dims = []
            for i, d in enumerate(shape):
                if i == axis:
                    dims.append(1)  # repeated to each batch's size
                elif isinstance(d, int) and d > 0:
                    dims.append(d)
                else:
                    self._fail(where, f"'zeros' needs fixed dimensions, but axis {i} of input {name!r} is "
                                      f"{d or '?'}; declare it as the batch axis or give the value")
            return ConstantFeed(np.zeros(dims, dtype=spec.dtype), axis)
        if isinstance(raw, Path):
            value = np.asarray(next(iter(read_npz(raw).values())))
        else:
            try:
                value = np.asarray(raw, dtype=np.float64 if spec.dtype.kind == "f" else None)
            except (TypeError, ValueError):
                self._fail(where, f"value {raw!r} is not a number, a list of numbers, 'zeros' or an .npy file")
        if value.dtype.kind not in "fiub" or (value.dtype.kind == "f" and not np.isfinite(value).all()):
            self._fail(where, f"value for input {name!r} must hold finite numbers")
        if spec.shape is not None and value.ndim != len(spec.shape):
            self._fail(where, f"value has shape {value.shape}, input {name!r} has rank {len(spec.shape)}")
        for i, (want, got) in enumerate(zip(spec.shape or (), value.shape)):
            if isinstance(want, int) and want > 0 and want != got and i != axis:
                self._fail(where, f"value has shape {value.shape}, input {name!r} needs {want} on axis {i}")
        cast = value.astype(spec.dtype)
        if spec.dtype.kind in "iu" and not np.array_equal(cast, value):
            self._fail(where, f"value does not fit input {name!r} of type {spec.dtype}")
        if axis is not None and value.shape[axis] != 1:
            self._fail(where, f"a constant with batch axis {axis} must hold one sample there, got {value.shape}")
        return ConstantFeed(cast, axis)

    def _fail(self, key: str, message: str):
        where = self.origin.get(key, "")
        if where.startswith("--"):
            raise UsageError(f"{where}: {message}")
        raise BadDataError(message, where or None)


def parse_options(batch_axes: list[str] | None, constants: list[str] | None) -> DataLayout:
    """``--batch-axis NAME=AXIS`` and ``--constant NAME=VALUE`` options as a DataLayout.

    VALUE is a number, comma-separated numbers (a 1-D value), ``zeros`` or a path ending in ``.npy``.
    """
    layout = DataLayout()
    for text in batch_axes or []:
        name, value = _split(text, "--batch-axis", "NAME=AXIS")
        try:
            layout.batch_axis[name] = int(value)
        except ValueError:
            raise UsageError(f"--batch-axis {text}: the axis must be a whole number") from None
        layout.origin[f"batch_axis:{name}"] = f"--batch-axis {text}"
    for text in constants or []:
        name, value = _split(text, "--constant", "NAME=VALUE")
        layout.constant[name] = _option_value(value, text)
        layout.origin[f"constant:{name}"] = f"--constant {text}"
    return layout


def from_description(entries: dict, path: Path) -> DataLayout:
    """The ``batch_axis`` / ``constant`` entries of a data description file at ``path``."""
    layout = DataLayout()
    axes, consts = entries.get("batch_axis", {}), entries.get("constant", {})
    if not isinstance(axes, dict) or not isinstance(consts, dict):
        raise BadDataError("'batch_axis' and 'constant' must be objects keyed by input name", path)
    for name, axis in axes.items():
        if not isinstance(axis, int) or isinstance(axis, bool):
            raise BadDataError(f"batch_axis of {name!r} must be a whole number, got {axis!r}", path)
        layout.batch_axis[name] = axis
        layout.origin[f"batch_axis:{name}"] = str(path)
    for name, value in consts.items():
        if isinstance(value, str) and value != "zeros":
            if not value.endswith(".npy"):
                raise BadDataError(f"constant {name!r}: {value!r} is not 'zeros' or an .npy file", path)
            value = (path.parent / value)
            if not value.is_file():
                raise BadDataError(f"constant {name!r}: no such file {value}", path)
        layout.constant[name] = value
        layout.origin[f"constant:{name}"] = str(path)
    return layout


def _split(text: str, option: str, form: str) -> tuple[str, str]:
    name, sep, value = text.partition("=")
    if not sep or not name.strip() or not value.strip():
        raise UsageError(f"{option} {text}: expected {form}")
    return name.strip(), value.strip()


def _option_value(value: str, text: str):
    if value == "zeros":
        return value
    if value.endswith(".npy"):
        path = Path(value)
        if not path.is_file():
            raise UsageError(f"--constant {text}: no such file {value}")
        return path
    try:
        numbers = [float(v) if any(c in v for c in ".eE") or v.lower() in ("inf", "nan") else int(v)
                   for v in value.split(",")]
    except ValueError:
        raise UsageError(f"--constant {text}: not a number, comma-separated numbers, zeros or an .npy file") from None
    return numbers if "," in value else numbers[0]
