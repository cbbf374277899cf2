"""The ONNX side of the registry: emitters that write each function with standard ops."""
from __future__ import annotations

import logging
import math

import onnx.defs

from swapper.core.emit import Emitter
from swapper.functions.formulas import (
    GELU_TANH_C,
    IGELU_A,
    IGELU_B,
    QUICK_GELU_BETA,
    prelu_slope,
)

logger = logging.getLogger(__name__)

# ----------------------------------------------------------------- ONNX side
def has_op(op: str, opset: int) -> bool:
    """Whether the default domain defines ``op`` at ``opset`` (asks onnx's schema table)."""
    try:
        onnx.defs.get_schema(op, max_inclusive_version=opset)
        return True
    except onnx.defs.SchemaError:
        return False


def single_op(op: str, **attrs):
    """Emitter for a single ONNX op whose attributes come from params."""

    def emit(em: Emitter, x: str, y: str, params: dict) -> None:
        merged = {k: float(params.get(k, v)) for k, v in attrs.items()}
        em.node(op, [x], y, **merged)

    return emit


def emit_clip(lo: float, hi: float):
    def emit(em: Emitter, x: str, y: str, params: dict) -> None:
        # Clip takes min/max as inputs from opset 11 (ONNX operator spec, Clip-11).
        em.node("Clip", [x, em.const(lo, "lo"), em.const(hi, "hi")], y)

    return emit


def emit_swish_beta(em: Emitter, x: str, y: str, beta: float) -> None:
    z = x if beta == 1.0 else em.mul_const(x, beta)
    em.node("Mul", [x, em.node("Sigmoid", [z])], y)


def emit_swish(em, x, y, params):
    emit_swish_beta(em, x, y, float(params.get("beta", 1.0)))


def emit_quick_gelu(em, x, y, params):
    emit_swish_beta(em, x, y, QUICK_GELU_BETA)


def emit_gelu(em, x, y, params):
    if has_op("Gelu", em.opset):
        em.node("Gelu", [x], y, approximate="none")
        return
    half_x = em.mul_const(x, 0.5)
    e = em.node("Erf", [em.mul_const(x, 1.0 / math.sqrt(2.0))])
    em.node("Mul", [half_x, em.node("Add", [e, em.const(1.0, "one")])], y)


def emit_gelu_tanh(em, x, y, params):
    if has_op("Gelu", em.opset):
        em.node("Gelu", [x], y, approximate="tanh")
        return
    x3 = em.node("Mul", [em.node("Mul", [x, x]), x])
    inner = em.node("Add", [x, em.mul_const(x3, GELU_TANH_C)])
    t = em.node("Tanh", [em.mul_const(inner, math.sqrt(2.0 / math.pi))])
    em.node("Mul", [em.mul_const(x, 0.5), em.node("Add", [t, em.const(1.0, "one")])], y)


def emit_mish(em, x, y, params):
    if has_op("Mish", em.opset):
        em.node("Mish", [x], y)
        return
    em.node("Mul", [x, em.node("Tanh", [em.node("Softplus", [x])])], y)


def emit_celu(em, x, y, params):
    alpha = float(params.get("alpha", 1.0))
    if has_op("Celu", em.opset):
        em.node("Celu", [x], y, alpha=alpha)
    elif alpha == 1.0:
        em.node("Elu", [x], y, alpha=1.0)
    else:  # ONNX spec, Celu: alpha·Elu(x/alpha) with Elu alpha = 1
        em.mul_const(em.node("Elu", [em.mul_const(x, 1.0 / alpha)], alpha=1.0), alpha, y)


def emit_hard_swish(em, x, y, params):
    if has_op("HardSwish", em.opset):
        em.node("HardSwish", [x], y)
        return
    em.node("Mul", [x, em.node("HardSigmoid", [x], alpha=1.0 / 6.0, beta=0.5)], y)


def emit_prelu(em, x, y, params):
    slope = prelu_slope(params.get("slope", 0.25))
    # A one-element slope broadcasts unidirectionally to x (ONNX spec, PRelu).
    em.node("PRelu", [x, em.const([slope], "slope")], y)


def emit_poly_gelu(em, x, y, params):
    u = em.mul_const(x, 1.0 / math.sqrt(2.0))
    m = em.node("Min", [em.node("Abs", [u]), em.const(-IGELU_B, "clipb")])
    q = em.node("Add", [m, em.const(IGELU_B, "b")])
    p = em.node("Add", [em.mul_const(em.node("Mul", [q, q]), IGELU_A), em.const(1.0, "one")])
    erf_l = em.node("Mul", [em.node("Sign", [u]), p])
    h = em.node("Add", [em.mul_const(erf_l, 0.5), em.const(0.5, "half")])
    em.node("Mul", [x, h], y)
