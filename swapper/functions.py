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

Additions: ``sources()`` lists the costly names; ``Function.cost`` is the
measured ``swapper.costs.relative_cost(name)``, or ``Function.static_cost``
(our estimate) for a function not yet in the measured table.

Kinks: ``grad`` returns the derivative of the piece selected by strict
inequalities (relu'(0) = 0, clip'(bound) = 0, leaky'(0) = alpha, a pwl knot
takes the left slope), always one of the one-sided derivatives, so a valid
sub-gradient. poly_gelu at 0 uses sign(0) = 0 and returns the mean of its two
one-sided derivatives.
"""
from __future__ import annotations

import logging
import math
from dataclasses import dataclass, field
from typing import Callable

import numpy as np
import onnx.defs
from scipy.special import erf, expit

from . import costs
from .emit import Emitter
from .errors import UsageError
from .pwl import PWL_DEFAULT_SEGMENTS, emit_pwl, fit_pwl, pwl_grad, pwl_ref

logger = logging.getLogger(__name__)

Array = np.ndarray

# i-GELU constants of Kim et al. 2021 (I-BERT, Sec. 3.4): erf(x) ~ L(x).
IGELU_A = -0.2888
IGELU_B = -1.769
GELU_TANH_C = 0.044715  # Hendrycks & Gimpel 2016, tanh approximation
QUICK_GELU_BETA = 1.702  # Hendrycks & Gimpel 2016, sigmoid approximation x·σ(1.702x)
# ONNX operator spec, Selu defaults (float32 values of the attributes).
SELU_ALPHA = 1.67326319217681884765625
SELU_GAMMA = 1.05070102214813232421875
# ONNX operator spec: HardSigmoid defaults; also what we use for sigmoid sources:
# under N(0,1) weighting on [-6, 6] alpha=0.2 has weighted RMSE 0.024 against
# sigmoid versus 0.048 for Howard et al.'s 1/6 (max error 0.076 vs 0.069), and the
# calibration objective is weighted least squares (measured on a 4801-point grid).
HSIG_ALPHA, HSIG_BETA = 0.2, 0.5


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
        """Relative cost per element (Relu = 1): measured (swapper/resources/op_costs.json), else our estimate.

        The estimate covers a function added to the registry before anyone re-ran
        benchmarks/measure_op_costs.py, so a scan never fails on a missing table row.
        """
        try:
            return float(costs.relative_cost(self.name))
        except (LookupError, UsageError):
            return self.static_cost


REGISTRY: dict[str, Function] = {}
DEFAULT_TARGET: dict[str, str] = {
    "silu": "hard_swish", "swish": "hard_swish", "gelu": "hard_swish",
    "gelu_tanh": "hard_swish", "quick_gelu": "hard_swish", "mish": "hard_swish",
    "sigmoid": "hard_sigmoid", "tanh": "hard_tanh", "softsign": "hard_tanh",
    "softplus": "relu", "elu": "relu", "selu": "relu", "celu": "relu",
}


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


# ---------------------------------------------------------------- numpy side
def _f(x) -> Array:
    return np.asarray(x, dtype=np.float64)


def _sigmoid(x):
    return expit(_f(x))


def _softplus(x):
    return np.logaddexp(0.0, _f(x))  # log(1 + e^x) without overflow


def _swish(x, beta=1.0):
    x = _f(x)
    return x * expit(beta * x)


def _swish_grad(x, beta=1.0):
    x = _f(x)
    s = expit(beta * x)
    return s + beta * x * s * (1.0 - s)


def _gelu(x):
    x = _f(x)
    return 0.5 * x * (1.0 + erf(x / math.sqrt(2.0)))


def _gelu_grad(x):
    x = _f(x)
    return 0.5 * (1.0 + erf(x / math.sqrt(2.0))) + x * np.exp(-0.5 * x * x) / math.sqrt(2.0 * math.pi)


def _gelu_tanh(x):
    x = _f(x)
    return 0.5 * x * (1.0 + np.tanh(math.sqrt(2.0 / math.pi) * (x + GELU_TANH_C * x**3)))


def _gelu_tanh_grad(x):
    x = _f(x)
    k = math.sqrt(2.0 / math.pi)
    t = np.tanh(k * (x + GELU_TANH_C * x**3))
    return 0.5 * (1.0 + t) + 0.5 * x * (1.0 - t * t) * k * (1.0 + 3.0 * GELU_TANH_C * x * x)


def _mish(x):
    x = _f(x)
    return x * np.tanh(_softplus(x))


def _mish_grad(x):
    x = _f(x)
    t = np.tanh(_softplus(x))
    return t + x * (1.0 - t * t) * expit(x)


def _elu(x, alpha=1.0):
    x = _f(x)
    return np.where(x > 0, x, alpha * np.expm1(np.minimum(x, 0.0)))


def _elu_grad(x, alpha=1.0):
    x = _f(x)
    return np.where(x > 0, 1.0, alpha * np.exp(np.minimum(x, 0.0)))


def _selu(x, alpha=SELU_ALPHA, gamma=SELU_GAMMA):
    return gamma * _elu(x, alpha)


def _selu_grad(x, alpha=SELU_ALPHA, gamma=SELU_GAMMA):
    return gamma * _elu_grad(x, alpha)


def _celu(x, alpha=1.0):
    return alpha * _elu(_f(x) / alpha, 1.0)


def _celu_grad(x, alpha=1.0):
    return _elu_grad(_f(x) / alpha, 1.0)


def _leaky(x, alpha=0.01):
    x = _f(x)
    return np.where(x > 0, x, alpha * x)


def _leaky_grad(x, alpha=0.01):
    return np.where(_f(x) > 0, 1.0, alpha)


def _clip_grad(x, lo, hi, slope=1.0):
    x = _f(x)
    return np.where((x > lo) & (x < hi), slope, 0.0)


def _hard_sigmoid(x, alpha=HSIG_ALPHA, beta=HSIG_BETA):
    return np.clip(alpha * _f(x) + beta, 0.0, 1.0)


def _hard_sigmoid_grad(x, alpha=HSIG_ALPHA, beta=HSIG_BETA):
    z = alpha * _f(x) + beta
    return np.where((z > 0) & (z < 1), alpha, 0.0)


def _hard_swish(x):
    x = _f(x)
    return x * np.clip(x + 3.0, 0.0, 6.0) / 6.0


def _hard_swish_grad(x):
    x = _f(x)
    return np.where(x >= 3.0, 1.0, np.where(x > -3.0, (2.0 * x + 3.0) / 6.0, 0.0))


def _igelu_erf(u):
    # Kim et al. 2021: L(u) = sign(u)·[a·(min(|u|, -b) + b)^2 + 1]
    return np.sign(u) * (IGELU_A * (np.minimum(np.abs(u), -IGELU_B) + IGELU_B) ** 2 + 1.0)


def _poly_gelu(x):
    x = _f(x)
    return x * 0.5 * (1.0 + _igelu_erf(x / math.sqrt(2.0)))


def _poly_gelu_grad(x):
    x = _f(x)
    u = x / math.sqrt(2.0)
    dl = np.where(np.abs(u) < -IGELU_B, 2.0 * IGELU_A * (np.abs(u) + IGELU_B), 0.0)  # sign(u)^2 = 1
    return 0.5 * (1.0 + _igelu_erf(u)) + x * 0.5 * dl / math.sqrt(2.0)


def _prelu(x, slope=0.25):
    return _leaky(x, _prelu_slope(slope))


def _prelu_grad(x, slope=0.25):
    return _leaky_grad(x, _prelu_slope(slope))


def _prelu_slope(slope) -> float:
    if np.ndim(slope) != 0:
        raise UsageError("prelu is only detected, not a swap target (per-channel slope tensor)")
    return float(slope)


# ----------------------------------------------------------------- ONNX side
def _has(op: str, opset: int) -> bool:
    """Whether the default domain defines ``op`` at ``opset`` (asks onnx's schema table)."""
    try:
        onnx.defs.get_schema(op, max_inclusive_version=opset)
        return True
    except onnx.defs.SchemaError:
        return False


def _op(op: str, **attrs):
    """Emitter for a single ONNX op whose attributes come from params."""

    def emit(em: Emitter, x: str, y: str, params: dict) -> None:
        merged = {k: float(params.get(k, v)) for k, v in attrs.items()}
        em.node(op, [x], y, **merged)

    return emit


def _emit_clip(lo: float, hi: float):
    def emit(em: Emitter, x: str, y: str, params: dict) -> None:
        # Clip takes min/max as inputs from opset 11 (ONNX operator spec, Clip-11).
        em.node("Clip", [x, em.const(lo, "lo"), em.const(hi, "hi")], y)

    return emit


def _emit_swish_beta(em: Emitter, x: str, y: str, beta: float) -> None:
    z = x if beta == 1.0 else em.mul_const(x, beta)
    em.node("Mul", [x, em.node("Sigmoid", [z])], y)


def _emit_swish(em, x, y, params):
    _emit_swish_beta(em, x, y, float(params.get("beta", 1.0)))


def _emit_quick_gelu(em, x, y, params):
    _emit_swish_beta(em, x, y, QUICK_GELU_BETA)


def _emit_gelu(em, x, y, params):
    if _has("Gelu", em.opset):
        em.node("Gelu", [x], y, approximate="none")
        return
    half_x = em.mul_const(x, 0.5)
    e = em.node("Erf", [em.mul_const(x, 1.0 / math.sqrt(2.0))])
    em.node("Mul", [half_x, em.node("Add", [e, em.const(1.0, "one")])], y)


def _emit_gelu_tanh(em, x, y, params):
    if _has("Gelu", em.opset):
        em.node("Gelu", [x], y, approximate="tanh")
        return
    x3 = em.node("Mul", [em.node("Mul", [x, x]), x])
    inner = em.node("Add", [x, em.mul_const(x3, GELU_TANH_C)])
    t = em.node("Tanh", [em.mul_const(inner, math.sqrt(2.0 / math.pi))])
    em.node("Mul", [em.mul_const(x, 0.5), em.node("Add", [t, em.const(1.0, "one")])], y)


def _emit_mish(em, x, y, params):
    if _has("Mish", em.opset):
        em.node("Mish", [x], y)
        return
    em.node("Mul", [x, em.node("Tanh", [em.node("Softplus", [x])])], y)


def _emit_celu(em, x, y, params):
    alpha = float(params.get("alpha", 1.0))
    if _has("Celu", em.opset):
        em.node("Celu", [x], y, alpha=alpha)
    elif alpha == 1.0:
        em.node("Elu", [x], y, alpha=1.0)
    else:  # ONNX spec, Celu: alpha·Elu(x/alpha) with Elu alpha = 1
        em.mul_const(em.node("Elu", [em.mul_const(x, 1.0 / alpha)], alpha=1.0), alpha, y)


def _emit_hard_swish(em, x, y, params):
    if _has("HardSwish", em.opset):
        em.node("HardSwish", [x], y)
        return
    em.node("Mul", [x, em.node("HardSigmoid", [x], alpha=1.0 / 6.0, beta=0.5)], y)


def _emit_prelu(em, x, y, params):
    slope = _prelu_slope(params.get("slope", 0.25))
    # A one-element slope broadcasts unidirectionally to x (ONNX spec, PRelu).
    em.node("PRelu", [x, em.const([slope], "slope")], y)


def _emit_poly_gelu(em, x, y, params):
    u = em.mul_const(x, 1.0 / math.sqrt(2.0))
    m = em.node("Min", [em.node("Abs", [u]), em.const(-IGELU_B, "clipb")])
    q = em.node("Add", [m, em.const(IGELU_B, "b")])
    p = em.node("Add", [em.mul_const(em.node("Mul", [q, q]), IGELU_A), em.const(1.0, "one")])
    erf_l = em.node("Mul", [em.node("Sign", [u]), p])
    h = em.node("Add", [em.mul_const(erf_l, 0.5), em.const(0.5, "half")])
    em.node("Mul", [x, h], y)


# ------------------------------------------------------------------ registry
def _add(name, ref, grad, emit, cheap, cost, params=None, homogeneous=False, source=""):
    REGISTRY[name] = Function(name, ref, grad, emit, cheap, cost, dict(params or {}), homogeneous, source)


def _sigmoid_grad(x):
    s = _sigmoid(x)
    return s * (1.0 - s)


_add("sigmoid", _sigmoid, _sigmoid_grad, _op("Sigmoid"), False, 4.0,
     source="ONNX operator spec, Sigmoid: 1/(1+exp(-x))")
_add("tanh", lambda x: np.tanh(_f(x)), lambda x: 1.0 - np.tanh(_f(x)) ** 2, _op("Tanh"), False, 4.0,
     source="ONNX operator spec, Tanh")
_add("silu", _swish, _swish_grad, _emit_swish, False, 5.0,
     source="Elfwing et al. 2018, SiLU: x·sigmoid(x)")
_add("swish", _swish, _swish_grad, _emit_swish, False, 6.0, {"beta": 1.0},
     source="Ramachandran et al. 2017, Swish: x·sigmoid(beta·x)")
_add("gelu", _gelu, _gelu_grad, _emit_gelu, False, 6.0,
     source="Hendrycks & Gimpel 2016, GELU: x·Phi(x) = 0.5x(1+erf(x/sqrt 2))")
_add("gelu_tanh", _gelu_tanh, _gelu_tanh_grad, _emit_gelu_tanh, False, 8.0,
     source="Hendrycks & Gimpel 2016, tanh form: 0.5x(1+tanh(sqrt(2/pi)(x+0.044715x^3)))")
_add("quick_gelu", lambda x: _swish(x, QUICK_GELU_BETA), lambda x: _swish_grad(x, QUICK_GELU_BETA),
     _emit_quick_gelu, False, 6.0, source="Hendrycks & Gimpel 2016, sigmoid form: x·sigmoid(1.702x)")
_add("mish", _mish, _mish_grad, _emit_mish, False, 9.0,
     source="Misra 2019, Mish: x·tanh(softplus(x))")
_add("softplus", _softplus, _sigmoid, _op("Softplus"), False, 5.0,
     source="ONNX operator spec, Softplus: ln(exp(x)+1)")
_add("elu", _elu, _elu_grad, _op("Elu", alpha=1.0), False, 4.0, {"alpha": 1.0},
     source="Clevert et al. 2016, ELU; ONNX operator spec, Elu")
_add("selu", _selu, _selu_grad, _op("Selu", alpha=SELU_ALPHA, gamma=SELU_GAMMA), False, 4.5,
     {"alpha": SELU_ALPHA, "gamma": SELU_GAMMA},
     source="Klambauer et al. 2017, SELU; ONNX operator spec, Selu defaults")
_add("celu", _celu, _celu_grad, _emit_celu, False, 4.5, {"alpha": 1.0},
     source="Barron 2017, CELU; ONNX operator spec, Celu")
_add("softsign", lambda x: _f(x) / (1.0 + np.abs(_f(x))), lambda x: 1.0 / (1.0 + np.abs(_f(x))) ** 2,
     _op("Softsign"), False, 2.5, source="ONNX operator spec, Softsign: x/(1+|x|)")

_add("relu", lambda x: np.maximum(_f(x), 0.0), lambda x: _clip_grad(x, 0.0, np.inf), _op("Relu"), True, 1.0,
     homogeneous=True, source="ONNX operator spec, Relu")
_add("relu6", lambda x: np.clip(_f(x), 0.0, 6.0), lambda x: _clip_grad(x, 0.0, 6.0), _emit_clip(0.0, 6.0),
     True, 1.0, source="Howard et al. 2017 (MobileNet), ReLU6 = Clip(x, 0, 6)")
_add("leaky_relu", _leaky, _leaky_grad, _op("LeakyRelu", alpha=0.01), True, 1.0, {"alpha": 0.01},
     homogeneous=True, source="Maas et al. 2013, leaky ReLU; ONNX operator spec, LeakyRelu")
_add("prelu", _prelu, _prelu_grad, _emit_prelu, True, 1.2, {"slope": 0.25}, homogeneous=True,
     source="He et al. 2015, PReLU; ONNX operator spec, PRelu")
_add("hard_sigmoid", _hard_sigmoid, _hard_sigmoid_grad, _op("HardSigmoid", alpha=HSIG_ALPHA, beta=HSIG_BETA),
     True, 1.2, {"alpha": HSIG_ALPHA, "beta": HSIG_BETA},
     source="ONNX operator spec, HardSigmoid: max(0, min(1, alpha·x+beta))")
_add("hard_swish", _hard_swish, _hard_swish_grad, _emit_hard_swish, True, 1.5,
     source="Howard et al. 2019 (MobileNetV3), h-swish: x·ReLU6(x+3)/6")
_add("hard_tanh", lambda x: np.clip(_f(x), -1.0, 1.0), lambda x: _clip_grad(x, -1.0, 1.0),
     _emit_clip(-1.0, 1.0), True, 1.0, source="Collobert 2004, hard tanh = Clip(x, -1, 1)")
_add("pwl", pwl_ref, pwl_grad, emit_pwl, True, 3.0, {"knots": (0.0,), "slopes": (0.0, 1.0), "intercept": 0.0},
     source="continuous piecewise-linear function as a sum of hinges (ReLU basis)")
_add("poly_gelu", _poly_gelu, _poly_gelu_grad, _emit_poly_gelu, True, 3.0,
     source="Kim et al. 2021 (I-BERT), i-GELU: a=-0.2888, b=-1.769")


# ---------------------------------------------------------- target parameters
def target_params(source: str, source_params: dict, target: str, *, segments: int = PWL_DEFAULT_SEGMENTS) -> dict:
    """The surrogate's own fixed parameters when it replaces ``source``.

    hard_sigmoid: alpha/beta (0.2/0.5, see HSIG_ALPHA); leaky_relu: alpha 0.01;
    prelu: its default scalar slope; pwl: a weighted least-squares fit of
    ``source`` with ``segments`` pieces; {} for the others. A costly target
    (e.g. gelu -> gelu_tanh) gets its default parameters.
    """
    src, tgt = get(source), get(target)
    if target == "pwl":
        # Only the source's own numeric parameters shape the fit (a site may carry other keys).
        merged = {**src.params, **{k: v for k, v in (source_params or {}).items() if k in src.params}}
        items = tuple(sorted((k, float(v)) for k, v in merged.items()))
        return fit_pwl(source, items, segments)
    return dict(tgt.params)
