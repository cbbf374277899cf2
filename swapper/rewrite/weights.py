"""Folded copies of weights, and folding one parameter set into one layer.

Transformation: a layer's weight or bias input that a fold changes is rewired
to a fresh tensor only that layer reads, kept in float64 until written out
(:class:`Weights`); later folds into the same input update that copy, so folds
compose in the order they are made. :func:`apply_producer` makes a layer output
``b·out + c`` per output channel; :func:`apply_consumer` makes a layer read
``a·y + d`` instead of ``y`` (input weights scaled by a, ``W·d`` added to its
bias). The arithmetic is :mod:`swapper.rewrite.folding`.
"""
from __future__ import annotations

import logging

import numpy as np
import onnx
from onnx import numpy_helper

from swapper.core.emit import Emitter
from swapper.core.graph import GraphIndex, attr
from swapper.core.surgery import copy_name, input_at, rewire
from swapper.functions.params import NEUTRAL
from swapper.plan.fold_targets import ConsumerFold, ProducerFold
from swapper.rewrite.folding import input_offset, input_scale, scale_shift_output

logger = logging.getLogger(__name__)


class Weights:
    """Folded copies of weight tensors, in float64 until written out.

    Each (node, input) that gets folded is rewired once to a fresh tensor that
    only it reads (named by :func:`swapper.core.surgery.copy_name`, added by
    :func:`swapper.core.surgery.splice`); later folds into the same input update
    that copy, so two sites folding into one layer compose.
    """

    def __init__(self, index: GraphIndex, taken: set[str]):
        self.index = index
        self.taken = taken
        self.values: dict[str, np.ndarray] = {}
        self.dtypes: dict[str, np.dtype] = {}

    def read(self, node: onnx.NodeProto, slot: int) -> np.ndarray | None:
        name = input_at(node, slot)
        if not name:
            return None
        if name in self.values:
            return self.values[name].copy()
        value = self.index.const(name)
        return None if value is None else value.astype(np.float64)

    def dtype(self, node: onnx.NodeProto, slot: int) -> np.dtype:
        """dtype of the tensor in ``slot``; a missing bias takes the weight's (slot 1) dtype."""
        name = input_at(node, slot)
        if name in self.dtypes:
            return self.dtypes[name]
        value = self.index.const(name) if name else None
        if value is None:
            return self.dtype(node, 1) if slot != 1 else np.dtype(np.float32)
        return value.dtype

    def write(self, node: onnx.NodeProto, slot: int, value: np.ndarray, em: Emitter) -> None:
        """Set input ``slot`` of ``node``; its first write rewires it to a new tensor under ``em``'s prefix."""
        name = input_at(node, slot)
        if name in self.values:
            self.values[name] = np.asarray(value, dtype=np.float64)
            return
        dtype = self.dtype(node, slot)
        new = copy_name(node, slot, self.taken, em.prefix)
        rewire(node, slot, new)
        self.values[new] = np.asarray(value, dtype=np.float64)
        self.dtypes[new] = np.dtype(dtype)

    def tensors(self) -> list[onnx.TensorProto]:
        return [numpy_helper.from_array(self.values[n].astype(self.dtypes[n]), n) for n in sorted(self.values)]


def is_neutral(p: str, v: np.ndarray) -> bool:
    """True when every value of parameter ``p`` is its neutral value (it changes nothing)."""
    return bool(np.all(v == NEUTRAL[p]))


def apply_producer(w: Weights, pf: ProducerFold, b: np.ndarray, c: np.ndarray, em: Emitter) -> list[str]:
    """Fold b (scale) and c (shift) into the layer that produces x. Returns the touched node names."""
    node, bias_node = pf.node, pf.bias_node
    bias = None if bias_node is None else w.read(bias_node, pf.bias_slot)
    new_w, new_bias = scale_shift_output(pf.kind, node, w.read(node, 1), bias, b, c)
    touched = []
    if not is_neutral("b", b):
        w.write(node, 1, new_w, em)
        touched.append(node.name)
    if bias_node is not None and (not is_neutral("c", c) or (bias is not None and not is_neutral("b", b))):
        w.write(bias_node, pf.bias_slot, new_bias, em)
        touched.append(bias_node.name)
    return touched


def apply_consumer(w: Weights, f: ConsumerFold, a: np.ndarray | None, d: np.ndarray | None,
                    em: Emitter) -> list[str]:
    """Fold y -> a·y + d into one linear consumer. d uses the weights before the a scaling."""
    layer = f.layer
    node = layer.node
    weight = w.read(node, 1)
    touched = []
    if d is not None:
        offset = input_offset(layer.kind, node, weight, d)
        if layer.kind == "gemm":  # C is scaled by beta inside Gemm
            offset = offset / float(attr(node, "beta", 1.0))
        bias = w.read(layer.bias_node, layer.bias_slot)
        w.write(layer.bias_node, layer.bias_slot, (0.0 if bias is None else bias) + offset, em)
        touched.append(layer.bias_node.name)
    if a is not None:
        w.write(node, 1, input_scale(layer.kind, node, weight, a), em)
        touched.append(node.name)
    return touched
