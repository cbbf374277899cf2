"""Values made JSON-safe: numpy scalars and arrays to plain types, non-finite floats to null with a note."""
from __future__ import annotations

import math

import numpy as np


def json_safe(value, notes: list[str] | None = None, where: str = "value"):
    """Turn ``value`` into plain JSON types; non-finite floats become ``None``.

    Each replaced float appends ``"<where>: +inf written as null"`` (or NaN) to
    ``notes`` so a reader knows why the field is empty. numpy scalars and arrays
    become Python numbers and lists; dict keys are sorted for stable output.
    """
    if isinstance(value, dict):
        return {str(k): json_safe(value[k], notes, f"{where}.{k}") for k in sorted(value, key=str)}
    if isinstance(value, (list, tuple)):
        return [json_safe(v, notes, f"{where}[{i}]") for i, v in enumerate(value)]
    if isinstance(value, np.ndarray):
        return json_safe(value.tolist(), notes, where)
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        v = float(value)
        if math.isfinite(v):
            return v
        if notes is not None:
            label = "NaN" if math.isnan(v) else ("+inf" if v > 0 else "-inf")
            notes.append(f"{where}: {label} written as null")
        return None
    return value
