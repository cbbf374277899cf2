"""Where a data set comes from and how to read it: a path plus its data description.

Transformation: the command line's data options and/or a JSON data
description file -> :class:`DataSource`, a path-like object that
:func:`swapper.api.load_data` reads with its layout and image preprocessing.

Data description file (a JSON object; every key is optional)::

    {
      "batch_axis": {"state": 1},
      "constant": {"sr": 16000, "state": "zeros"},
      "images": {"size": [48, 192], "resize": "pad", "pad_align": "start", "channels": "BGR",
                 "scale": "1/255", "mean": [0.5], "std": [0.5]}
    }

- ``batch_axis``, ``constant``: see :mod:`swapper.data.layout`.
- ``images`` (image folders, :mod:`swapper.data.images`): ``size`` [height,
  width] (default: the model input's fixed height and width); ``resize``
  stretch | crop | pad; ``pad_value`` 0..255; ``pad_align`` center | start;
  ``channels`` RGB | BGR | gray; ``layout`` NCHW | NHWC (default: from the
  model input's shape); ``scale`` a number or "a/b" (default 1/255); ``mean``,
  ``std`` one number per channel, or one for all (defaults 0 and 1).

Command-line options: ``--data-spec FILE`` (this file), ``--batch-axis
NAME=AXIS``, ``--constant NAME=VALUE``, ``--prep KEY=VALUE`` (the keys of
``images``; size as 48x192, mean/std comma-separated). Options override the
file's entries. Bad entries raise a one-line error naming the file or option.
"""
from __future__ import annotations

import json
import logging
import math
from dataclasses import dataclass, field, replace
from pathlib import Path

from swapper.core.files import open_regular, os_reason
from swapper.data.images import CHANNELS, LAYOUTS, RESIZE_MODES, ImagePrep
from swapper.data.layout import DataLayout, from_description, parse_options
from swapper.errors import BadDataError, UsageError

logger = logging.getLogger(__name__)

TOP_KEYS = ("batch_axis", "constant", "images")
MAX_IMAGE_SIDE = 8192  # network inputs are far smaller; larger is a typo (common practice, no source)
MAX_DESCRIPTION_BYTES = 1 << 20  # a description is a few lines; anything longer is not one


@dataclass
class DataSource:
    """A data path with the layout and image preprocessing to read it with; usable wherever a path is."""

    path: Path
    layout: DataLayout = field(default_factory=DataLayout)
    images: ImagePrep | None = None

    def __fspath__(self) -> str:
        return str(self.path)

    def __str__(self) -> str:
        return str(self.path)


def _fail(where: str, message: str):
    if where.startswith("--"):
        raise UsageError(f"{where}: {message}")
    raise BadDataError(message, where)


def _number(value, where: str, key: str) -> float:
    if isinstance(value, str) and "/" in value:
        top, _, bottom = value.partition("/")
        try:
            return float(top) / float(bottom)
        except (ValueError, ZeroDivisionError):
            _fail(where, f"{key}: {value!r} is not a number or a fraction a/b")
    try:
        number = float(value)
    except (TypeError, ValueError):
        _fail(where, f"{key}: {value!r} is not a number")
    if not math.isfinite(number):
        _fail(where, f"{key}: {value!r} is not finite")
    return number


def _numbers(value, where: str, key: str) -> tuple[float, ...]:
    items = value.split(",") if isinstance(value, str) else value if isinstance(value, list) else [value]
    return tuple(_number(v, where, key) for v in items)


def _size(value, where: str) -> tuple[int, int]:
    parts = value.lower().split("x") if isinstance(value, str) else value
    try:
        h, w = (int(p) for p in parts)
    except (TypeError, ValueError):
        _fail(where, f"size: {value!r} is not height x width (e.g. 48x192 or [48, 192])")
    if h < 1 or w < 1:
        _fail(where, f"size: {value!r} must be positive")
    if max(h, w) > MAX_IMAGE_SIDE:  # a typo (48x100000) would decode every image to gigabytes of floats
        _fail(where, f"size: {value!r} has a side above {MAX_IMAGE_SIDE} pixels")
    return h, w


def _choice(value, choices: tuple[str, ...], where: str, key: str) -> str:
    by_lower = {c.lower(): c for c in choices} | ({"grey": "gray", "l": "gray"} if key == "channels" else {})
    if not isinstance(value, str) or value.lower() not in by_lower:
        _fail(where, f"{key}: {value!r} is not one of {', '.join(choices)}")
    return by_lower[value.lower()]


def prep_from_entries(entries: dict, where: str, base: ImagePrep | None = None) -> ImagePrep:
    """``base`` (defaults) with the given ``images`` entries, validated; ``where`` names the file or option."""
    prep = base or ImagePrep()
    changes: dict = {}
    for key, value in entries.items():
        if key == "size":
            changes[key] = _size(value, where)
        elif key == "resize":
            changes[key] = _choice(value, RESIZE_MODES, where, key)
        elif key == "channels":
            changes[key] = _choice(value, CHANNELS, where, key)
        elif key == "layout":
            changes[key] = _choice(value, LAYOUTS, where, key)
        elif key == "pad_align":
            changes[key] = _choice(value, ("center", "start"), where, key)
        elif key == "scale":
            changes[key] = _number(value, where, key)
        elif key in ("mean", "std"):
            changes[key] = _numbers(value, where, key)
        elif key == "pad_value":
            number = _number(value, where, key)
            if number != int(number) or not 0 <= number <= 255:
                _fail(where, f"pad_value: {value!r} is not a whole number in 0..255")
            changes[key] = int(number)
        else:
            known = "size, resize, pad_value, pad_align, channels, layout, scale, mean, std"
            _fail(where, f"unknown image setting {key!r} (known: {known})")
    prep = replace(prep, **changes)
    for key in ("mean", "std"):
        if len(getattr(prep, key)) not in (1, prep.channel_count()):
            _fail(where, f"{key} has {len(getattr(prep, key))} values; {prep.channels} needs 1 or "
                         f"{prep.channel_count()}")
    if any(s == 0 for s in prep.std):
        _fail(where, "std must not be 0")
    return prep


def read_description(path: str | Path) -> tuple[DataLayout, ImagePrep | None]:
    """The layout and image preprocessing of a data description file (module docstring)."""
    path = Path(path)
    try:
        with open_regular(path, BadDataError) as fh:
            text = fh.read(MAX_DESCRIPTION_BYTES + 1)
        if len(text) > MAX_DESCRIPTION_BYTES:
            raise BadDataError(f"larger than {MAX_DESCRIPTION_BYTES >> 20} MiB; not a data description", path)
        entries = json.loads(text.decode("utf-8"))
    except OSError as exc:
        raise BadDataError(f"cannot read: {os_reason(exc)}", path) from None
    except (ValueError, UnicodeDecodeError, RecursionError) as exc:
        raise BadDataError(f"not a valid JSON data description ({exc})", path) from None
    if not isinstance(entries, dict):
        raise BadDataError("a data description is a JSON object", path)
    unknown = sorted(set(entries) - set(TOP_KEYS))
    if unknown:
        raise BadDataError(f"unknown keys {unknown} (known: {', '.join(TOP_KEYS)})", path)
    images = entries.get("images")
    if images is not None and not isinstance(images, dict):
        raise BadDataError("'images' must be an object", path)
    prep = prep_from_entries(images, str(path)) if images is not None else None
    return from_description(entries, path), prep


def data_source(path: str | Path | None, *, description: str | Path | None = None,
                batch_axes: list[str] | None = None, constants: list[str] | None = None,
                prep: list[str] | None = None) -> DataSource | None:
    """The DataSource for ``path`` from a description file and options (None when ``path`` is None)."""
    if path is None:
        return None
    layout, images = read_description(description) if description is not None else (DataLayout(), None)
    layout = layout.merged(parse_options(batch_axes, constants))
    for text in prep or []:
        key, sep, value = text.partition("=")
        if not sep or not key.strip() or not value.strip():
            raise UsageError(f"--prep {text}: expected KEY=VALUE (e.g. size=48x192)")
        images = prep_from_entries({key.strip(): value.strip()}, f"--prep {text}", images)
    return DataSource(Path(path), layout, images)
