"""A tiny graph builder used by the function emitters and the rewriter.

Everything it creates is named ``swapper/<site-id>/...`` so added nodes and
initializers never collide with the model's own names.
"""
from __future__ import annotations

from typing import Any

import numpy as np
import onnx
from onnx import helper, numpy_helper


class Emitter:
    """Collects nodes and initializers for one site, at one opset.

    Constants are made in ``dtype``, the element type of the tensors the site
    computes on (float32 by default): ONNX ops such as Clip and Mul take all
    their inputs in one type, so a float16 or float64 site needs its limits and
    factors in float16 or float64 (ONNX operator spec, type constraint T).
    """

    def __init__(self, prefix: str, opset: int, taken: set[str] | None = None, dtype=np.float32):
        self.prefix = prefix.rstrip("/")
        self.opset = opset
        self.dtype = np.dtype(dtype)
        self.nodes: list[onnx.NodeProto] = []
        self.initializers: list[onnx.TensorProto] = []
        self._taken = taken if taken is not None else set()

    def fresh(self, hint: str) -> str:
        """A new unique tensor or node name under this emitter's prefix."""
        base = f"{self.prefix}/{hint}"
        name, k = base, 0
        while name in self._taken:
            k += 1
            name = f"{base}_{k}"
        self._taken.add(name)
        return name

    def const(self, value: Any, hint: str, dtype=None) -> str:
        """Add an initializer holding ``value`` (in ``dtype``, default the emitter's) and return its name."""
        name = self.fresh(hint)
        dtype = self.dtype if dtype is None else dtype
        self.initializers.append(numpy_helper.from_array(np.asarray(value, dtype=dtype), name))
        return name

    def node(self, op_type: str, inputs: list[str], output: str | None = None, **attrs: Any) -> str:
        """Add one node; return its (single) output name, fresh unless ``output`` is given."""
        out = output if output is not None else self.fresh(op_type)
        self.nodes.append(
            helper.make_node(op_type, inputs, [out], name=self.fresh(f"{op_type}_node"), **attrs)
        )
        return out

    def mul_const(self, x: str, k: float, y: str | None = None) -> str:
        """Add Mul(x, k) with k a new scalar initializer (the emitter's dtype); return its output (``y`` if given)."""
        return self.node("Mul", [x, self.const(k, "k")], y)

    def identity(self, x: str, y: str) -> str:
        return self.node("Identity", [x], y)
