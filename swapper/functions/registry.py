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
- ``DEFAULT_SURROGATE[source] -> surrogate name``; ``ALTERNATIVES[source]`` the
  surrogates tried next on a target where the default does not pay;
  ``candidates(source)`` both, in order.
- ``surrogate_params(function, function_params, surrogate) -> dict``: the surrogate's own
  fixed parameters when it replaces ``function`` (e.g. the knots of a piecewise-linear fit);
  {} for surrogates without any.

Words: a *swappable* function is a costly one swapper looks for (``sources()``,
``is_cheap`` false); a *surrogate* is one it writes in its place (``is_cheap``
true: cheap where targets fuse or table it, not always by the CPU cost here).
"Target" means a target profile (swapper/targets/), never a surrogate.

Additions: ``sources()`` lists the costly names; ``Function.cost`` is the
measured ``swapper.functions.costs.relative_cost(name)``, or ``Function.static_cost``
(our estimate) for a function not yet in the measured table.

Kinks: ``grad`` returns the derivative of the piece selected by strict
inequalities (relu'(0) = 0, clip'(bound) = 0, leaky'(0) = alpha, a pwl knot
takes the left slope), always one of the one-sided derivatives, so a valid
sub-gradient. poly_gelu at 0 uses sign(0) = 0 and returns the mean of its two
one-sided derivatives.
"""
from __future__ import annotations

import logging
from dataclasses import dataclass, field
from typing import Callable

import numpy as np

from swapper.core.emit import Emitter
from swapper.errors import UsageError
from swapper.functions.costs import relative_cost
from swapper.functions.emitters import (
    emit_celu,
    emit_clip,
    emit_gelu,
    emit_gelu_tanh,
    emit_hard_swish,
    emit_mish,
    emit_poly_gelu,
    emit_prelu,
    emit_quick_gelu,
    emit_swish,
    single_op,
)
from swapper.functions.formulas import (
    HSIG_ALPHA,
    HSIG_BETA,
    QUICK_GELU_BETA,
    SELU_ALPHA,
    SELU_GAMMA,
    Array,
    as_float,
    celu,
    celu_grad,
    clip_grad,
    elu,
    elu_grad,
    gelu,
    gelu_grad,
    gelu_tanh,
    gelu_tanh_grad,
    hard_sigmoid,
    hard_sigmoid_grad,
    hard_swish,
    hard_swish_grad,
    leaky_relu,
    leaky_relu_grad,
    mish,
    mish_grad,
    poly_gelu,
    poly_gelu_grad,
    prelu,
    prelu_grad,
    selu,
    selu_grad,
    sigmoid,
    sigmoid_grad,
    softplus,
    swish,
    swish_grad,
)
from swapper.functions.pwl import (
    PWL_DEFAULT_SEGMENTS,
    emit_pwl,
    fit_pwl,
    pwl_grad,
    pwl_ref,
)

logger = logging.getLogger(__name__)


@dataclass(frozen=True)
class Function:
    name: str
    ref: Callable[..., Array]
    grad: Callable[..., Array] | None
    emit: Callable[[Emitter, str, str, dict], None]
    is_cheap: bool
    static_cost: float  # our own relative cost estimate per element (relu = 1), used until measured
    params: dict = field(default_factory=dict)  # default parameters
    homogeneous: bool = False
    source: str = ""  # where the formula is published

    def bind(self, params: dict) -> tuple[Callable[[Array], Array], Callable[[Array], Array] | None]:
        """(g, dg): the function and its derivative with ``params`` fixed, as the fitters take them."""
        def g(x: Array) -> Array:
            return self.ref(x, **params)

        dg = None if self.grad is None else (lambda x: self.grad(x, **params))
        return g, dg

    @property
    def cost(self) -> float:
        """Relative cost per element (Relu = 1): measured (swapper/functions/op_costs.json), else our estimate.

        The estimate covers a function added to the registry before anyone re-ran
        benchmarks/measure_op_costs.py, so a scan never fails on a missing table row.
        """
        try:
            return float(relative_cost(self.name))
        except (LookupError, UsageError):
            return self.static_cost


REGISTRY: dict[str, Function] = {}


DEFAULT_SURROGATE: dict[str, str] = {
    "silu": "hard_swish", "swish": "hard_swish", "gelu": "hard_swish",
    "gelu_tanh": "hard_swish", "quick_gelu": "hard_swish", "mish": "hard_swish",
    "sigmoid": "hard_sigmoid", "tanh": "hard_tanh", "softsign": "hard_tanh",
    "softplus": "relu", "elu": "relu", "selu": "relu", "celu": "relu",
}


# Tried after the default when a target is given and the default does not pay there
# (:mod:`swapper.plan.choose`): among these, the cheapest on the target that pays wins and ties go to the
# earlier entry. Each list starts with the shapes closest to its source (common practice, no source).
ALTERNATIVES: dict[str, tuple[str, ...]] = {
    **{s: ("relu", "leaky_relu", "relu6") for s in ("silu", "swish", "gelu", "gelu_tanh", "quick_gelu", "mish")},
    "sigmoid": ("hard_tanh", "relu6"), "tanh": ("hard_sigmoid", "relu6"), "softsign": ("hard_sigmoid", "relu6"),
    **{s: ("leaky_relu", "relu6") for s in ("softplus", "elu", "selu", "celu")},
    # cheap itself, but on a target where Relu fuses into the layer before it and its own ops do not, dearer
    "hard_swish": ("relu", "relu6", "leaky_relu"),
}


def candidates(source: str) -> list[str]:
    """The surrogates tried for ``source``, in order: its default, then its alternatives.

    A cheap function is its own first candidate (re-emitted in another form
    where a target lacks its op or runs another form faster), then its alternatives;
    a function without a default has none.
    """
    fn = get(source)
    if fn.is_cheap:
        return [source, *ALTERNATIVES.get(source, ())]
    default = DEFAULT_SURROGATE.get(source)
    return [] if default is None else list(dict.fromkeys([default, *ALTERNATIVES.get(source, ())]))


def get(name: str) -> Function:
    try:
        return REGISTRY[name]
    except KeyError:
        raise UsageError(f"unknown function {name!r}; valid: {', '.join(sorted(REGISTRY))}") from None


def surrogates() -> list[str]:
    return sorted(n for n, f in REGISTRY.items() if f.is_cheap)


def sources() -> list[str]:
    """The costly functions swapper looks for, sorted."""
    return sorted(n for n, f in REGISTRY.items() if not f.is_cheap)


# ------------------------------------------------------------------ registry
def _add(name, ref, grad, emit, cheap, cost, params=None, homogeneous=False, source=""):
    REGISTRY[name] = Function(name, ref, grad, emit, cheap, cost, dict(params or {}), homogeneous, source)


_add("sigmoid", sigmoid, sigmoid_grad, single_op("Sigmoid"), False, 4.0,
     source="ONNX operator spec, Sigmoid: 1/(1+exp(-x))")


_add("tanh", lambda x: np.tanh(as_float(x)), lambda x: 1.0 - np.tanh(as_float(x)) ** 2, single_op("Tanh"), False, 4.0,
     source="ONNX operator spec, Tanh")


_add("silu", swish, swish_grad, emit_swish, False, 5.0,
     source="Elfwing et al. 2018, SiLU: x·sigmoid(x)")


_add("swish", swish, swish_grad, emit_swish, False, 6.0, {"beta": 1.0},
     source="Ramachandran et al. 2017, Swish: x·sigmoid(beta·x)")


_add("gelu", gelu, gelu_grad, emit_gelu, False, 6.0,
     source="Hendrycks & Gimpel 2016, GELU: x·Phi(x) = 0.5x(1+erf(x/sqrt 2))")


_add("gelu_tanh", gelu_tanh, gelu_tanh_grad, emit_gelu_tanh, False, 8.0,
     source="Hendrycks & Gimpel 2016, tanh form: 0.5x(1+tanh(sqrt(2/pi)(x+0.044715x^3)))")


_add("quick_gelu", lambda x: swish(x, QUICK_GELU_BETA), lambda x: swish_grad(x, QUICK_GELU_BETA),
     emit_quick_gelu, False, 6.0, source="Hendrycks & Gimpel 2016, sigmoid form: x·sigmoid(1.702x)")


_add("mish", mish, mish_grad, emit_mish, False, 9.0,
     source="Misra 2019, Mish: x·tanh(softplus(x))")


_add("softplus", softplus, sigmoid, single_op("Softplus"), False, 5.0,
     source="ONNX operator spec, Softplus: ln(exp(x)+1)")


_add("elu", elu, elu_grad, single_op("Elu", alpha=1.0), False, 4.0, {"alpha": 1.0},
     source="Clevert et al. 2016, ELU; ONNX operator spec, Elu")


_add("selu", selu, selu_grad, single_op("Selu", alpha=SELU_ALPHA, gamma=SELU_GAMMA), False, 4.5,
     {"alpha": SELU_ALPHA, "gamma": SELU_GAMMA},
     source="Klambauer et al. 2017, SELU; ONNX operator spec, Selu defaults")


_add("celu", celu, celu_grad, emit_celu, False, 4.5, {"alpha": 1.0},
     source="Barron 2017, CELU; ONNX operator spec, Celu")


_add("softsign", lambda x: as_float(x) / (1.0 + np.abs(as_float(x))), lambda x: 1.0 / (1.0 + np.abs(as_float(x))) ** 2,
     single_op("Softsign"), False, 2.5, source="ONNX operator spec, Softsign: x/(1+|x|)")


_add("relu", lambda x: np.maximum(as_float(x), 0.0), lambda x: clip_grad(x, 0.0, np.inf), single_op("Relu"), True, 1.0,
     homogeneous=True, source="ONNX operator spec, Relu")


_add("relu6", lambda x: np.clip(as_float(x), 0.0, 6.0), lambda x: clip_grad(x, 0.0, 6.0), emit_clip(0.0, 6.0),
     True, 1.0, source="Howard et al. 2017 (MobileNet), ReLU6 = Clip(x, 0, 6)")


_add("leaky_relu", leaky_relu, leaky_relu_grad, single_op("LeakyRelu", alpha=0.01), True, 1.0, {"alpha": 0.01},
     homogeneous=True, source="Maas et al. 2013, leaky ReLU; ONNX operator spec, LeakyRelu")


_add("prelu", prelu, prelu_grad, emit_prelu, True, 1.2, {"slope": 0.25}, homogeneous=True,
     source="He et al. 2015, PReLU; ONNX operator spec, PRelu")


_add("hard_sigmoid", hard_sigmoid, hard_sigmoid_grad, single_op("HardSigmoid", alpha=HSIG_ALPHA, beta=HSIG_BETA),
     True, 1.2, {"alpha": HSIG_ALPHA, "beta": HSIG_BETA},
     source="ONNX operator spec, HardSigmoid: max(0, min(1, alpha·x+beta))")


_add("hard_swish", hard_swish, hard_swish_grad, emit_hard_swish, True, 1.5,
     source="Howard et al. 2019 (MobileNetV3), h-swish: x·ReLU6(x+3)/6")


_add("hard_tanh", lambda x: np.clip(as_float(x), -1.0, 1.0), lambda x: clip_grad(x, -1.0, 1.0),
     emit_clip(-1.0, 1.0), True, 1.0, source="Collobert 2004, hard tanh = Clip(x, -1, 1)")


_add("pwl", pwl_ref, pwl_grad, emit_pwl, True, 3.0, {"knots": (0.0,), "slopes": (0.0, 1.0), "intercept": 0.0},
     source="continuous piecewise-linear function as a sum of hinges (ReLU basis)")


_add("poly_gelu", poly_gelu, poly_gelu_grad, emit_poly_gelu, True, 3.0,
     source="Kim et al. 2021 (I-BERT), i-GELU: a=-0.2888, b=-1.769")


# ------------------------------------------------------- surrogate parameters
def surrogate_params(function: str, function_params: dict, surrogate: str, *,
                     segments: int = PWL_DEFAULT_SEGMENTS) -> dict:
    """The surrogate's own fixed parameters when it replaces ``function``.

    hard_sigmoid: alpha/beta (0.2/0.5, see HSIG_ALPHA); leaky_relu: alpha 0.01;
    prelu: its default scalar slope; pwl: a weighted least-squares fit of
    ``function`` with ``segments`` pieces; {} for the others. A costly surrogate
    (e.g. gelu -> gelu_tanh) gets its default parameters.
    """
    src, sur = get(function), get(surrogate)
    if surrogate == "pwl":
        # Only the function's own numeric parameters shape the fit (a site may carry other keys).
        merged = {**src.params, **{k: v for k, v in (function_params or {}).items() if k in src.params}}
        items = tuple(sorted((k, float(v)) for k, v in merged.items()))
        return fit_pwl(src.ref, items, segments, function)
    return dict(sur.params)
