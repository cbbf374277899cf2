"""The function library against the ONNX spec (onnxruntime and onnx.reference),
scipy / scikit-learn, and the published formulas."""
from __future__ import annotations

import math

import numpy as np
import onnx
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays
from onnx import helper
from onnx.reference import ReferenceEvaluator
from scipy.optimize import least_squares
from scipy.special import erf, expit
from scipy.stats import norm
from sklearn.linear_model import LinearRegression
from testkit import float_model, run

from swapper import functions as F
from swapper.core.emit import Emitter
from swapper.core.model_io import MAX_OPSET, MIN_OPSET
from swapper.errors import UsageError
from swapper.functions import registry

RNG = np.random.default_rng(20240611)
X = np.concatenate([RNG.uniform(-8, 8, 500), [-6.0, -3.0, -1.0, 0.0, 1.0, 3.0, 6.0]]).astype(np.float32)
SHAPE = (X.size,)
OPSETS = list(range(MIN_OPSET, MAX_OPSET + 1))


def _model(nodes, initializers, opset):
    ir_version = helper.find_min_ir_version_for([helper.make_opsetid("", opset)])  # the oldest IR that has ``opset``
    return float_model(nodes, [("x", SHAPE)], [("y", SHAPE)], initializers, opset=opset, ir_version=ir_version)


def _ort(model, x):
    return run(model, {"x": x})[0]


def _emitted(name, opset, params):
    em = Emitter("swapper/s1", opset)
    F.get(name).emit(em, "x", "y", params)
    assert em.nodes[-1].output[0] == "y"  # CONTRACT: the last node writes y
    return _model(em.nodes, em.initializers, opset)


# ---------------------------------------------------------------- op vs ref
# (registry name, ONNX op, attributes, opset, params for ref)
OP_CASES = [
    ("sigmoid", "Sigmoid", {}, 13, {}),  # source: ONNX operator spec, Sigmoid
    ("tanh", "Tanh", {}, 13, {}),  # source: ONNX operator spec, Tanh
    ("relu", "Relu", {}, 14, {}),  # source: ONNX operator spec, Relu
    ("leaky_relu", "LeakyRelu", {}, 16, {}),  # source: ONNX operator spec, LeakyRelu (alpha=0.01 default)
    ("leaky_relu", "LeakyRelu", {"alpha": 0.2}, 16, {"alpha": 0.2}),
    ("elu", "Elu", {}, 6, {}),  # source: ONNX operator spec, Elu (alpha=1 default)
    ("elu", "Elu", {"alpha": 0.5}, 6, {"alpha": 0.5}),
    ("selu", "Selu", {}, 6, {}),  # source: ONNX operator spec, Selu (alpha/gamma defaults)
    ("celu", "Celu", {}, 12, {}),  # source: ONNX operator spec, Celu (alpha=1 default)
    ("celu", "Celu", {"alpha": 0.6}, 12, {"alpha": 0.6}),
    ("softplus", "Softplus", {}, 1, {}),  # source: ONNX operator spec, Softplus
    ("softsign", "Softsign", {}, 1, {}),  # source: ONNX operator spec, Softsign
    ("hard_sigmoid", "HardSigmoid", {}, 6, {}),  # source: ONNX operator spec, HardSigmoid (alpha=0.2, beta=0.5 defaults)
    ("hard_swish", "HardSwish", {}, 14, {}),  # source: ONNX operator spec, HardSwish (alpha=1/6, beta=0.5)
    ("mish", "Mish", {}, 18, {}),  # source: ONNX operator spec, Mish-18
    ("gelu", "Gelu", {}, 20, {}),  # source: ONNX operator spec, Gelu-20, approximate="none"
    ("gelu_tanh", "Gelu", {"approximate": "tanh"}, 20, {}),  # source: ONNX operator spec, Gelu-20, approximate="tanh"
]


@pytest.mark.parametrize("name,op,attrs,opset,params", OP_CASES)
def test_ref_matches_onnx_op(name, op, attrs, opset, params):
    model = _model([helper.make_node(op, ["x"], ["y"], **attrs)], [], opset)
    expected = F.get(name).ref(X.astype(np.float64), **params)
    np.testing.assert_allclose(_ort(model, X), expected, rtol=1e-5, atol=1e-5)
    np.testing.assert_allclose(ReferenceEvaluator(model).run(None, {"x": X})[0], expected, rtol=1e-5, atol=1e-5)


def test_refs_match_scipy_and_published_formulas():
    x = np.linspace(-10, 10, 4001)
    g = {n: F.get(n).ref for n in F.REGISTRY}
    # source: scipy.special.expit is the logistic sigmoid
    np.testing.assert_allclose(g["sigmoid"](x), expit(x), rtol=1e-12)
    # source: Hendrycks & Gimpel 2016, GELU(x) = x·Phi(x); scipy.stats.norm.cdf and scipy.special.erf
    np.testing.assert_allclose(g["gelu"](x), x * norm.cdf(x), rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(g["gelu"](x), 0.5 * x * (1 + erf(x / np.sqrt(2))), rtol=1e-12, atol=1e-15)
    # source: Hendrycks & Gimpel 2016, tanh form with 0.044715
    np.testing.assert_allclose(
        g["gelu_tanh"](x), 0.5 * x * (1 + np.tanh(np.sqrt(2 / np.pi) * (x + 0.044715 * x**3))), rtol=1e-12)
    # source: Hendrycks & Gimpel 2016, sigmoid form x·sigmoid(1.702x)
    np.testing.assert_allclose(g["quick_gelu"](x), x / (1 + np.exp(-1.702 * x)), rtol=1e-12)
    # source: Elfwing et al. 2018, SiLU x·sigmoid(x)
    np.testing.assert_allclose(g["silu"](x), x / (1 + np.exp(-x)), rtol=1e-12)
    # source: Ramachandran et al. 2017, Swish x·sigmoid(beta·x); beta=1 is SiLU
    np.testing.assert_allclose(g["swish"](x, beta=1.7), x / (1 + np.exp(-1.7 * x)), rtol=1e-12)
    np.testing.assert_allclose(g["swish"](x), g["silu"](x), rtol=1e-15)
    # source: Misra 2019, Mish x·tanh(ln(1+e^x))
    np.testing.assert_allclose(g["mish"](x), x * np.tanh(np.log1p(np.exp(x))), rtol=1e-12)
    # source: Howard et al. 2019, h-swish = x·ReLU6(x+3)/6, h-sigmoid = ReLU6(x+3)/6
    relu6 = np.clip(x + 3, 0, 6)
    np.testing.assert_allclose(g["hard_swish"](x), x * relu6 / 6, rtol=1e-15)
    np.testing.assert_allclose(g["hard_sigmoid"](x, alpha=1 / 6, beta=0.5), relu6 / 6, rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(g["relu6"](x), np.minimum(np.maximum(x, 0), 6), rtol=0)
    np.testing.assert_allclose(g["hard_tanh"](x), np.minimum(np.maximum(x, -1), 1), rtol=0)
    # source: mathematics, tanh(x) = 2·sigmoid(2x) − 1
    np.testing.assert_allclose(g["tanh"](x), 2 * expit(2 * x) - 1, rtol=1e-12, atol=1e-15)
    # source: ONNX operator spec, Softplus = ln(exp(x) + 1)
    np.testing.assert_allclose(g["softplus"](x), np.log1p(np.exp(x)), rtol=1e-12)


def test_poly_gelu_is_igelu_of_kim_et_al():
    x = np.linspace(-8, 8, 8001)
    a, b = -0.2888, -1.769  # source: Kim et al. 2021 (I-BERT), i-GELU constants
    u = x / np.sqrt(2)
    erf_l = np.sign(u) * (a * (np.minimum(np.abs(u), -b) + b) ** 2 + 1)
    np.testing.assert_allclose(F.get("poly_gelu").ref(x), x * 0.5 * (1 + erf_l), rtol=1e-12, atol=1e-15)
    # It approximates exact GELU: measured max |error| 0.018 on [-8, 8]; bound with headroom.
    assert np.max(np.abs(F.get("poly_gelu").ref(x) - F.get("gelu").ref(x))) < 0.03


# ----------------------------------------------------------------- emitters
EMIT_PARAMS = [(n, {}) for n in sorted(F.REGISTRY)] + [
    ("swish", {"beta": 1.5}),
    ("elu", {"alpha": 0.7}),
    ("celu", {"alpha": 0.5}),  # opset 11 has no Celu: decomposed path
    ("selu", {"alpha": 1.5, "gamma": 1.2}),
    ("leaky_relu", {"alpha": 0.2}),
    ("hard_sigmoid", {"alpha": 1 / 6, "beta": 0.5}),
    ("prelu", {"slope": 0.1}),
    ("pwl", F.surrogate_params("silu", {}, "pwl")),
    ("pwl", F.surrogate_params("gelu", {}, "pwl", segments=8)),
    ("pwl", {"knots": (-1.0, 2.0), "slopes": (1.0, 0.0, 1.0), "intercept": 0.0}),
]


@pytest.mark.parametrize("opset", OPSETS)
@pytest.mark.parametrize("name,params", EMIT_PARAMS, ids=lambda v: v if isinstance(v, str) else "")
def test_emitter_is_valid_and_agrees_with_ref(name, params, opset):
    model = _emitted(name, opset, params)
    # source: ONNX checker (full_check runs strict shape inference against the opset's schemas)
    onnx.checker.check_model(model, full_check=True)
    expected = F.get(name).ref(X.astype(np.float64), **params)
    # float32 tolerance; gelu_tanh below opset 20 goes through x^3 in float32
    tol = dict(rtol=2e-5, atol=2e-5)
    np.testing.assert_allclose(_ort(model, X), expected, **tol)  # source: onnxruntime
    np.testing.assert_allclose(ReferenceEvaluator(model).run(None, {"x": X})[0], expected, **tol)


@pytest.mark.parametrize("name,op,first", [
    ("hard_swish", "HardSwish", 14),  # source: ONNX operator spec, HardSwish-14
    ("gelu", "Gelu", 20),  # source: ONNX operator spec, Gelu-20
    ("gelu_tanh", "Gelu", 20),
    ("mish", "Mish", 18),  # source: ONNX operator spec, Mish-18
    ("celu", "Celu", 12),  # source: ONNX operator spec, Celu-12
])
def test_native_op_used_exactly_from_its_opset(name, op, first):
    for opset in OPSETS:
        ops = {n.op_type for n in _emitted(name, opset, {}).graph.node}
        assert (op in ops) == (opset >= first), (name, opset, ops)


@pytest.mark.parametrize("opset", [MIN_OPSET, 14, MAX_OPSET])
def test_silu_and_swish_are_always_decomposed(opset):
    for name in ("silu", "swish", "quick_gelu"):
        ops = sorted(n.op_type for n in _emitted(name, opset, {"beta": 1.0} if name == "swish" else {}).graph.node)
        assert "Sigmoid" in ops and "Mul" in ops


def test_prelu_with_a_slope_tensor_is_refused():
    em = Emitter("swapper/s1", 13)
    with pytest.raises(UsageError, match="prelu is only detected"):
        F.get("prelu").emit(em, "x", "y", {"slope": [0.1, 0.2]})


# --------------------------------------------------------------------- grads
def _kinks(name, params):
    p = {**F.get(name).params, **params}
    return {
        "relu": [0.0], "leaky_relu": [0.0], "prelu": [0.0], "selu": [0.0], "elu": [0.0],
        "relu6": [0.0, 6.0], "hard_tanh": [-1.0, 1.0], "hard_swish": [-3.0, 3.0],
        "poly_gelu": [0.0],
        "hard_sigmoid": [-p.get("beta", 0) / p.get("alpha", 1), (1 - p.get("beta", 0)) / p.get("alpha", 1)],
        "pwl": list(p.get("knots", ())),
    }.get(name, [])


GRAD_PARAMS = EMIT_PARAMS


@pytest.mark.parametrize("name,params", GRAD_PARAMS, ids=lambda v: v if isinstance(v, str) else "")
@settings(max_examples=25, deadline=None)
@given(xs=arrays(np.float64, 64, elements=st.floats(-7, 7)))
def test_grad_matches_central_difference(name, params, xs):
    # source: central finite difference, error O(h^2)
    kinks = np.array(_kinks(name, params) or [np.inf])
    xs = xs[np.min(np.abs(xs[:, None] - kinks[None, :]), axis=1) > 1e-3]
    f = F.get(name)
    h = 1e-6
    fd = (f.ref(xs + h, **params) - f.ref(xs - h, **params)) / (2 * h)
    np.testing.assert_allclose(f.grad(xs, **params), fd, rtol=1e-5, atol=1e-6)


def test_grad_at_kinks_is_a_one_sided_derivative():
    # source: sub-gradient convention documented in swapper.functions.registry (strict-inequality piece)
    for name, params in EMIT_PARAMS:
        f = F.get(name)
        for k in _kinks(name, params):
            h = 1e-7
            left = (f.ref(k, **params) - f.ref(k - h, **params)) / h
            right = (f.ref(k + h, **params) - f.ref(k, **params)) / h
            g = float(f.grad(np.array(k), **params))
            assert min(left, right) - 1e-4 <= g <= max(left, right) + 1e-4, (name, k, g, left, right)


# ----------------------------------------------------------- homogeneity
HOMOGENEOUS = sorted(n for n, f in F.REGISTRY.items() if f.homogeneous)


@pytest.mark.parametrize("name", HOMOGENEOUS)
@settings(max_examples=40, deadline=None)
@given(z=arrays(np.float64, 32, elements=st.floats(-100, 100)), s=st.floats(1e-3, 1e3))
def test_homogeneous_flag_holds(name, z, s):
    # source: definition of positive homogeneity, g(s·z) = s·g(z) for s > 0
    g = F.get(name).ref
    np.testing.assert_allclose(g(s * z), s * g(z), rtol=1e-12, atol=1e-12)


def test_homogeneous_set_is_as_documented():
    # source: mathematics; relu, leaky relu and prelu are the positively homogeneous ones
    assert HOMOGENEOUS == ["leaky_relu", "prelu", "relu"]


@pytest.mark.parametrize("name", sorted(n for n, f in F.REGISTRY.items() if not f.homogeneous))
def test_non_homogeneous_have_a_counterexample(name):
    # pwl's default params are relu-shaped; a fitted pwl (intercept, off-zero knots) is not homogeneous
    params = F.surrogate_params("silu", {}, "pwl") if name == "pwl" else {}
    g = F.get(name).ref
    z = np.linspace(-5, 5, 101)
    worst = max(np.max(np.abs(g(s * z, **params) - s * g(z, **params))) for s in (0.5, 2.0, 3.0))
    assert worst > 1e-3  # e.g. hard_swish(2·2) = 4 but 2·hard_swish(2) = 3.33


# ----------------------------------------------------------------------- pwl
@pytest.mark.parametrize("segments", range(1, 9))
def test_pwl_uses_only_hinge_ops(segments):
    for source in F.sources():
        model = _emitted("pwl", 13, F.surrogate_params(source, {}, "pwl", segments=segments))
        assert {n.op_type for n in model.graph.node} <= {"Relu", "Clip", "Max", "Min", "Mul", "Add"}


def test_pwl_fit_is_the_weighted_least_squares_solution():
    p = F.surrogate_params("silu", {}, "pwl", segments=6)
    # source: scipy.stats.norm.ppf, knots at the N(0,1) quantiles i/k
    np.testing.assert_allclose(p["knots"], norm.ppf(np.arange(1, 6) / 6), rtol=1e-12, atol=1e-15)
    x = np.linspace(-6, 6, 4801)
    basis = np.column_stack([x] + [np.maximum(x - t, 0) for t in p["knots"]])
    # source: scikit-learn LinearRegression with sample_weight (weighted least squares)
    lr = LinearRegression().fit(basis, F.get("silu").ref(x), sample_weight=norm.pdf(x))
    slopes = lr.coef_[0] + np.concatenate([[0.0], np.cumsum(lr.coef_[1:])])
    np.testing.assert_allclose(p["slopes"], slopes, atol=1e-6)
    assert p["intercept"] == pytest.approx(lr.intercept_, abs=1e-6)
    assert F.surrogate_params("silu", {}, "pwl") == p  # deterministic, default 6 segments


def test_pwl_beats_hard_swish_on_silu():
    x = np.linspace(-6, 6, 4801)
    w = np.sqrt(norm.pdf(x))
    silu = F.get("silu").ref(x)

    def fitted_max_error(g):
        # the same a·g(b·x+c)+d least-squares scaling for both surrogates
        r = least_squares(lambda q: w * (q[0] * g(q[1] * x + q[2]) + q[3] - silu), [1.0, 1.0, 0.0, 0.0])
        a, b, c, d = r.x
        return np.max(np.abs(a * g(b * x + c) + d - silu))

    p = F.surrogate_params("silu", {}, "pwl")
    pwl_err = fitted_max_error(lambda z: F.get("pwl").ref(z, **p))
    hs_err = fitted_max_error(F.get("hard_swish").ref)
    # measured: pwl (6 segments) 0.066, hard_swish 0.57 (0.14 unscaled)
    assert pwl_err < 0.1 and pwl_err < 0.25 * hs_err


@pytest.mark.parametrize("params", [
    {"knots": (1.0, 0.0), "slopes": (0.0, 1.0, 2.0), "intercept": 0.0},  # not increasing
    {"knots": (0.0,), "slopes": (1.0,), "intercept": 0.0},  # one slope too few
    {"knots": tuple(range(8)), "slopes": (0.0,) * 9, "intercept": 0.0},  # 9 segments
])
def test_pwl_rejects_bad_params(params):
    with pytest.raises(UsageError):
        F.get("pwl").ref(np.zeros(3), **params)
    with pytest.raises(UsageError):
        F.get("pwl").emit(Emitter("p", 13), "x", "y", params)


def test_pwl_segment_limit():
    with pytest.raises(UsageError, match="segments"):
        F.surrogate_params("silu", {}, "pwl", segments=9)


# ---------------------------------------------- surrogates, registry, costs
def test_default_surrogates_cover_every_swappable_function():
    assert sorted(F.DEFAULT_SURROGATE) == F.sources()
    assert all(F.get(t).is_cheap for t in F.DEFAULT_SURROGATE.values())
    assert set(F.sources()) | set(F.surrogates()) == set(F.REGISTRY)


def test_surrogate_params():
    assert F.surrogate_params("silu", {}, "hard_swish") == {}
    assert F.surrogate_params("elu", {"alpha": 1.0}, "relu") == {}
    assert F.surrogate_params("silu", {}, "leaky_relu") == {"alpha": 0.01}
    hs = F.surrogate_params("sigmoid", {}, "hard_sigmoid")
    assert hs == {"alpha": 0.2, "beta": 0.5}  # source: ONNX operator spec, HardSigmoid defaults
    # The choice over Howard et al.'s 1/6: lower N(0,1)-weighted squared error against sigmoid
    # (measured weighted RMSE 0.024 vs 0.048).
    x = np.linspace(-6, 6, 4801)
    w = norm.pdf(x)
    err = {a: np.sum(w * (F.get("hard_sigmoid").ref(x, alpha=a, beta=0.5) - expit(x)) ** 2) for a in (0.2, 1 / 6)}
    assert err[0.2] < 0.5 * err[1 / 6]
    # swish's beta reaches the pwl fit
    assert F.surrogate_params("swish", {"beta": 2.0}, "pwl") != F.surrogate_params("swish", {"beta": 1.0}, "pwl")
    assert F.surrogate_params("gelu", {}, "gelu_tanh") == {}  # a costly surrogate keeps its defaults
    assert F.surrogate_params("silu", {}, "swish") == {"beta": 1.0}
    # keys a site carries that the source does not take are ignored by the fit
    assert F.surrogate_params("silu", {"form": "mul-sigmoid"}, "pwl") == F.surrogate_params("silu", {}, "pwl")
    with pytest.raises(UsageError, match="unknown function"):
        F.surrogate_params("silu", {}, "nope")


def test_get_unknown_lists_valid_names():
    with pytest.raises(UsageError, match="relu"):
        F.get("relu7")


def test_cost_prefers_measured_table_and_falls_back(monkeypatch):
    monkeypatch.setattr(registry, "relative_cost", lambda name: {"silu": 7.5}[name])  # KeyError for the rest
    assert F.get("silu").cost == 7.5
    assert F.get("relu").cost == F.get("relu").static_cost
    assert all(f.cost > 0 and math.isfinite(f.cost) for f in F.REGISTRY.values())
