"""Tests of swapper.core.jsonable: numpy values made JSON-safe, non-finite numbers written as null with a note.

Reference: RFC 8259 JSON has no Infinity or NaN; ``json.dumps(allow_nan=False)``
enforces it.
"""
from __future__ import annotations

import json
import math

import numpy as np

from swapper.core.jsonable import json_safe


def test_json_safe_replaces_non_finite_with_null_and_notes():
    notes: list[str] = []
    out = json_safe({"b": np.float32(1.5), "a": [np.int64(3), math.inf, float("nan")],
                           "c": np.bool_(True), "d": np.arange(2)}, notes, "x")
    # RFC 8259 JSON has no Infinity/NaN; allow_nan=False makes json.dumps enforce it
    text = json.dumps(out, allow_nan=False)
    assert json.loads(text) == {"a": [3, None, None], "b": 1.5, "c": True, "d": [0, 1]}
    assert notes == ["x.a[1]: +inf written as null", "x.a[2]: NaN written as null"]
