"""The function registry: every activation swapper knows, in one place.

Each entry gives a float64 numpy reference, its derivative (used by the
fitters), an ONNX emitter that writes the function with standard ops at the
model's own opset, a relative cost, and whether the function is a cheap
surrogate. Adding a function = adding one entry here and its test.

CONTRACT (the rest of the package relies on it):
- ``REGISTRY: dict[str, Function]`` keyed by ``Function.name``.
- ``get(name) -> Function`` raises ``UsageError`` listing valid names.
- ``Function.ref(x, **params)`` and ``Function.grad(x, **params)`` take and
  return float64 arrays of the same shape.
- ``Function.emit(em: Emitter, x: str, y: str, params: dict)`` appends nodes to
  ``em`` computing ``y = g(x)`` elementwise at ``em.opset``; its last node
  writes ``y``.
- ``Function.homogeneous``: g(s·z) = s·g(z) for every s > 0 (relu, leaky_relu),
  so an outer scale a > 0 can be moved inside.
- ``DEFAULT_TARGET[source] -> surrogate name``.
- ``target_params(source, source_params, target) -> dict``: the surrogate's own
  fixed parameters for a given source (e.g. the knots of a piecewise-linear fit);
  {} for surrogates without any.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable

import numpy as np

from .emit import Emitter
from .errors import UsageError

Array = np.ndarray


@dataclass(frozen=True)
class Function:
    name: str
    ref: Callable[..., Array]
    grad: Callable[..., Array] | None
    emit: Callable[[Emitter, str, str, dict], None]
    is_cheap: bool
    cost: float  # relative cost per element (see swapper/data/op_costs.json)
    params: dict = field(default_factory=dict)  # default parameters
    homogeneous: bool = False
    source: str = ""  # where the formula is published


REGISTRY: dict[str, Function] = {}
DEFAULT_TARGET: dict[str, str] = {}


def get(name: str) -> Function:
    try:
        return REGISTRY[name]
    except KeyError:
        raise UsageError(f"unknown function {name!r}; valid: {', '.join(sorted(REGISTRY))}") from None


def surrogates() -> list[str]:
    return sorted(n for n, f in REGISTRY.items() if f.is_cheap)


def target_params(source: str, source_params: dict, target: str) -> dict:
    raise NotImplementedError  # filled in by the registry entries below
