"""Emission forms: the equivalent ways to write each surrogate with ONNX ops.

Transformation: a fitted surrogate ``y = a·g(b·x + c) + d`` (a, b, c, d per
channel, g the registry's reference) -> the same function written as
``y = a'·E(b'·x + c') + d'`` where E is what one form emits and
(a', b', c', d') = ``form.reparam(a, b, c, d)`` is exact:

    surrogate     form              E(z)                            re-parametrisation
    hard_sigmoid  HardSigmoid       HardSigmoid(z; α, β)            none
                  Clip              Clip(z, 0, 1)                   b' = α·b, c' = α·c + β
    hard_tanh     Clip              Clip(z, -1, 1)                  none
                  HardSigmoid       HardSigmoid(z; ½, ½)            a' = 2a, d' = d − a
    hard_swish    HardSwish         HardSwish(z)            (≥ 14)  none
                  Mul-HardSigmoid   z·HardSigmoid(z; 1/6, ½)        none
                  Mul-Clip          z·Clip(z + 3, 0, 6)             a' = a/6
    relu          Relu              Relu(z)                         none (a > 0 moves inside, homogeneous)
                  Clip              Clip(z, 0, +inf)                none (homogeneous too)
                  Max               Max(z, 0)               (≥ 8)   none (homogeneous too)
    relu6         Clip              Clip(z, 0, 6)                   none
                  HardSigmoid       HardSigmoid(z; 1/6, 0)          a' = 6a
    leaky_relu    LeakyRelu; prelu PRelu; pwl hinges (Relu/Mul/Add); poly_gelu polynomial: one form each

Sources: ONNX operator specification (HardSigmoid: max(0, min(1, alpha·x + beta));
Clip-11: min/max as inputs; HardSwish-14: x·max(0, min(1, x/6 + ½)); Max-8:
multidirectional broadcasting), Howard et al. 2019 (h-swish = x·ReLU6(x+3)/6).

A form that moves a parameter (``moves``) is valid only where that parameter
can move without breaking the site's placement: a parameter placed "fixed"
must stay neutral, so the planner rules the form out there
(:func:`swapper.plan.choose`). The first form of each list whose opset the
model has is the one the registry's own emitter writes (:func:`default_form`).
``ops`` lists the op types in execution order, for
:meth:`swapper.targets.profile.TargetProfile.cost_of`; ``linear`` says each
node reads only the previous node's output (so a producer fusion may cover a
prefix of the chain).
"""
from __future__ import annotations

import logging
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from swapper.core.emit import Emitter
from swapper.errors import UsageError
from swapper.functions.emitters import emit_clip, single_op
from swapper.functions.formulas import HSIG_ALPHA, HSIG_BETA
from swapper.functions.registry import REGISTRY

logger = logging.getLogger(__name__)

Values = dict[str, np.ndarray]


def _same(vals: Values, params: dict) -> Values:
    return dict(vals)


@dataclass(frozen=True)
class Form:
    """One way to write a surrogate with ONNX ops (module docstring)."""

    surrogate: str
    name: str  # identifier within the surrogate ("Clip", "Mul-HardSigmoid"...), stored in the plan
    math: str  # what E(z) is, for people
    ops: tuple[str, ...] | None  # op types in execution order; None: read from the emitted nodes
    min_opset: int  # first default-domain opset that has every op in the form this way
    emit: Callable[[Emitter, str, str, dict], None]  # writes y = E(x) at em.opset; last node writes y
    moves: frozenset = frozenset()  # parameters the re-parametrisation changes
    reparam: Callable[[Values, dict], Values] = _same  # (a, b, c, d) of g -> (a', b', c', d') of E
    linear: bool = True  # every node reads only the previous node's output (and constants)

    @property
    def key(self) -> str:
        """``surrogate:name``, unique across all forms."""
        return f"{self.surrogate}:{self.name}"

    def op_types(self, params: dict | None = None, opset: int = 22) -> tuple[str, ...]:
        """The op types this form emits for ``params`` at ``opset``, in execution order."""
        if self.ops is not None:
            return self.ops
        em = Emitter("swapper/ops", opset)
        self.emit(em, "x", "y", dict(params or {}))
        return tuple(n.op_type for n in em.nodes)

    def emitted_values(self, vals: Values, params: dict | None = None) -> Values:
        """(a', b', c', d') that make ``a'·E(b'·x + c') + d'`` equal ``a·g(b·x + c) + d`` (float64 arrays)."""
        as64 = {p: np.asarray(v, dtype=np.float64) for p, v in vals.items()}
        return self.reparam(as64, dict(params or {}))


# --------------------------------------------------------------- emitters
def _emit_hsig(alpha: float, beta: float):
    def emit(em: Emitter, x: str, y: str, params: dict) -> None:
        em.node("HardSigmoid", [x], y, alpha=float(alpha), beta=float(beta))

    return emit


def _emit_mul_hsig(em: Emitter, x: str, y: str, params: dict) -> None:
    # ONNX spec, HardSwish-14: y = x·max(0, min(1, x/6 + 1/2)) = x·HardSigmoid(x; 1/6, 1/2)
    em.node("Mul", [x, em.node("HardSigmoid", [x], alpha=1.0 / 6.0, beta=0.5)], y)


def _emit_mul_clip(em: Emitter, x: str, y: str, params: dict) -> None:
    # Howard et al. 2019: 6·h-swish(x) = x·ReLU6(x + 3)
    shifted = em.node("Add", [x, em.const(3.0, "three")])
    em.node("Mul", [x, em.node("Clip", [shifted, em.const(0.0, "lo"), em.const(6.0, "hi")])], y)


def _emit_max0(em: Emitter, x: str, y: str, params: dict) -> None:
    em.node("Max", [x, em.const(0.0, "zero")], y)


# ------------------------------------------------------- re-parametrisations
def _into_b_c(vals: Values, params: dict) -> Values:
    """Clip(α·(b·x + c) + β, 0, 1): α and β move into b and c."""
    alpha, beta = float(params.get("alpha", HSIG_ALPHA)), float(params.get("beta", HSIG_BETA))
    return {**vals, "b": alpha * vals["b"], "c": alpha * vals["c"] + beta}


def _tanh_from_hsig(vals: Values, params: dict) -> Values:
    """Clip(z, -1, 1) = 2·HardSigmoid(z; ½, ½) − 1, so a·g + d = 2a·E + (d − a)."""
    return {**vals, "a": 2.0 * vals["a"], "d": vals["d"] - vals["a"]}


def _scale_a(k: float):
    def reparam(vals: Values, params: dict) -> Values:
        return {**vals, "a": vals["a"] * k}

    return reparam


# ---------------------------------------------------------------- the table
FORMS: dict[str, tuple[Form, ...]] = {}


def _add(*forms: Form) -> None:
    FORMS[forms[0].surrogate] = tuple(forms)


_AD, _BC, _A = frozenset("ad"), frozenset("bc"), frozenset("a")

_add(Form("hard_sigmoid", "HardSigmoid", "HardSigmoid(z; α, β)", ("HardSigmoid",), 6, REGISTRY["hard_sigmoid"].emit),
     Form("hard_sigmoid", "Clip", "Clip(α·z + β, 0, 1)", ("Clip",), 11, emit_clip(0.0, 1.0), _BC, _into_b_c))
_add(Form("hard_tanh", "Clip", "Clip(z, -1, 1)", ("Clip",), 11, REGISTRY["hard_tanh"].emit),
     Form("hard_tanh", "HardSigmoid", "2·HardSigmoid(z; ½, ½) − 1", ("HardSigmoid",), 6, _emit_hsig(0.5, 0.5),
          _AD, _tanh_from_hsig))
_add(Form("hard_swish", "HardSwish", "HardSwish(z)", ("HardSwish",), 14, single_op("HardSwish")),
     Form("hard_swish", "Mul-HardSigmoid", "z·HardSigmoid(z; 1/6, ½)", ("HardSigmoid", "Mul"), 6, _emit_mul_hsig,
          linear=False),
     Form("hard_swish", "Mul-Clip", "z·Clip(z + 3, 0, 6) / 6", ("Add", "Clip", "Mul"), 11, _emit_mul_clip,
          _A, _scale_a(1.0 / 6.0), linear=False))
_add(Form("relu", "Relu", "Relu(z)", ("Relu",), 6, REGISTRY["relu"].emit),
     Form("relu", "Clip", "Clip(z, 0, +inf)", ("Clip",), 11, emit_clip(0.0, np.inf)),
     Form("relu", "Max", "Max(z, 0)", ("Max",), 8, _emit_max0))
_add(Form("relu6", "Clip", "Clip(z, 0, 6)", ("Clip",), 11, REGISTRY["relu6"].emit),
     Form("relu6", "HardSigmoid", "6·HardSigmoid(z; 1/6, 0)", ("HardSigmoid",), 6, _emit_hsig(1.0 / 6.0, 0.0),
          _A, _scale_a(6.0)))
_add(Form("leaky_relu", "LeakyRelu", "LeakyRelu(z; α)", ("LeakyRelu",), 6, REGISTRY["leaky_relu"].emit))
_add(Form("prelu", "PRelu", "PRelu(z, slope)", ("PRelu",), 9, REGISTRY["prelu"].emit))
_add(Form("pwl", "hinges", "s0·z + i0 + Σ Δs·Relu(z − t)", None, 7, REGISTRY["pwl"].emit, linear=False))
_add(Form("poly_gelu", "polynomial", "z·(1 + L(z/√2))/2 (i-GELU)", None, 9, REGISTRY["poly_gelu"].emit,
          linear=False))


# ----------------------------------------------------------------- queries
def forms_of(surrogate: str) -> tuple[Form, ...]:
    """Every form of ``surrogate`` (the registry default first).

    A registry function without a list of its own (a costly function named
    with ``--to``, e.g. gelu_tanh) has one form, "registry": its registry
    emitter, ops read from what it emits. UsageError for an unknown name.
    """
    if surrogate in FORMS:
        return FORMS[surrogate]
    if surrogate not in REGISTRY:
        raise UsageError(f"unknown function {surrogate!r}; valid: {', '.join(sorted(REGISTRY))}")
    return (Form(surrogate, "registry", f"{surrogate}(z) as the registry writes it", None, 1,
                 REGISTRY[surrogate].emit, linear=False),)


def get_form(surrogate: str, name: str) -> Form:
    """The form ``name`` of ``surrogate``; UsageError listing the valid names."""
    for form in forms_of(surrogate):
        if form.name == name:
            return form
    valid = ", ".join(f.name for f in forms_of(surrogate))
    raise UsageError(f"{surrogate} has no form {name!r}; valid: {valid}")


def default_form(surrogate: str, opset: int) -> Form:
    """The form the registry's own emitter writes at ``opset`` (the first whose opset the model has)."""
    for form in forms_of(surrogate):
        if opset >= form.min_opset:
            return form
    raise UsageError(f"no form of {surrogate} exists at opset {opset}")


def all_forms() -> list[Form]:
    """Every form of every surrogate, surrogates sorted, each in its own order."""
    return [f for name in sorted(FORMS) for f in FORMS[name]]
