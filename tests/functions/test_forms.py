"""Emission forms against the ONNX operator spec, as executed by onnxruntime and onnx.reference.ReferenceEvaluator.

Each form, after its re-parametrisation, must compute the surrogate's
a·g(b·x + c) + d at every opset it claims; the numpy side is the registry's
reference, itself held against the published formulas in test_functions.py.
"""
from __future__ import annotations

import numpy as np
import onnx
import pytest
from onnx import helper
from onnx.reference import ReferenceEvaluator
from testkit import float_model, hard_sigmoid, hard_swish, hard_tanh, relu, run

from swapper import functions as F
from swapper.core.emit import Emitter
from swapper.core.model_io import MAX_OPSET, MIN_OPSET
from swapper.errors import UsageError
from swapper.functions.forms import all_forms, default_form, forms_of, get_form

RNG = np.random.default_rng(7)
X = np.concatenate([RNG.uniform(-9, 9, 400), [-6.0, -3.0, -1.0, 0.0, 1.0, 3.0, 6.0]]).astype(np.float32)
SHAPE = (X.size,)
# (a, b, c, d) sets: both signs of every parameter; the re-parametrisation must hold for any values
VALUES = [(1.7, 0.8, 0.3, -0.4), (-0.6, -1.3, -0.9, 0.25)]
PARAMS = {"hard_sigmoid": [{}, {"alpha": 1 / 6, "beta": 0.5}], "leaky_relu": [{}, {"alpha": 0.2}],
          "pwl": [F.surrogate_params("silu", {}, "pwl")]}


def _cases():
    for form in all_forms():
        for params in PARAMS.get(form.surrogate, [F.get(form.surrogate).params]):
            for opset in range(max(form.min_opset, MIN_OPSET), MAX_OPSET + 1):
                yield pytest.param(form, params, opset, id=f"{form.key}-{opset}-{len(params)}")


def _affine_model(form, params, opset, vals):
    """y = a'·E(b'·x + c') + d' with E written by ``form`` and the primed values as scalar initializers."""
    em = Emitter("swapper/s1", opset)
    z = em.node("Add", [em.node("Mul", ["x", em.const(vals["b"], "b")]), em.const(vals["c"], "c")])
    g = em.fresh("g")
    form.emit(em, z, g, dict(params))
    em.node("Add", [em.node("Mul", [g, em.const(vals["a"], "a")]), em.const(vals["d"], "d")], "y")
    ir = helper.find_min_ir_version_for([helper.make_opsetid("", opset)])
    return float_model(em.nodes, [("x", SHAPE)], [("y", SHAPE)], em.initializers, opset=opset, ir_version=ir)


@pytest.mark.parametrize("form,params,opset", list(_cases()))
def test_form_computes_its_surrogate_after_reparametrisation(form, params, opset):
    g = F.get(form.surrogate)
    for a, b, c, d in VALUES:
        vals = {"a": np.float64(a), "b": np.float64(b), "c": np.float64(c), "d": np.float64(d)}
        model = _affine_model(form, params, opset, form.emitted_values(vals, params))
        # source: ONNX checker with full_check (strict shape inference against the opset's schemas)
        onnx.checker.check_model(model, full_check=True)
        expected = a * g.ref(b * X.astype(np.float64) + c, **params) + d
        tol = {"rtol": 1e-5, "atol": 3e-5}  # float32 rounding of the primed values and the ops
        np.testing.assert_allclose(run(model, {"x": X})[0], expected, **tol)  # source: onnxruntime
        np.testing.assert_allclose(ReferenceEvaluator(model).run(None, {"x": X})[0], expected, **tol)


@pytest.mark.parametrize("form,params,opset", [c for c in _cases() if c.values[2] in (MIN_OPSET, 14, MAX_OPSET)])
def test_declared_ops_are_what_the_form_emits(form, params, opset):
    em = Emitter("swapper/s1", opset)
    form.emit(em, "x", "y", dict(params))
    assert tuple(n.op_type for n in em.nodes) == form.op_types(params, opset)
    assert em.nodes[-1].output[0] == "y"  # the last node writes y, as the registry's emitters do
    if form.linear:  # each node reads only the previous node's output and constants
        produced = {"x"} | {n.output[0] for n in em.nodes}
        for prev, node in zip(["x"] + [n.output[0] for n in em.nodes], em.nodes):
            assert [i for i in node.input if i in produced] == [prev], (form.key, node)


@pytest.mark.parametrize("surrogate", F.surrogates())
@pytest.mark.parametrize("opset", range(MIN_OPSET, MAX_OPSET + 1))
def test_default_form_is_what_the_registry_emits(surrogate, opset):
    params = PARAMS.get(surrogate, [F.get(surrogate).params])[0]
    em = Emitter("swapper/s1", opset)
    F.get(surrogate).emit(em, "x", "y", dict(params))
    assert default_form(surrogate, opset).op_types(params, opset) == tuple(n.op_type for n in em.nodes)


def test_every_surrogate_has_forms_and_hard_swish_needs_opset_14_for_its_op():
    assert {f.surrogate for f in all_forms()} == set(F.surrogates())
    # source: ONNX operator spec, HardSwish (since version 14)
    assert get_form("hard_swish", "HardSwish").min_opset == 14
    assert default_form("hard_swish", 13).name == "Mul-HardSigmoid"
    assert default_form("hard_swish", 14).name == "HardSwish"


@pytest.mark.parametrize("form", all_forms(), ids=lambda f: f.key)
def test_reparametrisation_moves_exactly_what_it_declares(form):
    params = PARAMS.get(form.surrogate, [F.get(form.surrogate).params])[0]
    vals = {p: np.array([v, -2 * v + 0.5]) for p, v in zip("abcd", (1.3, 0.7, -0.2, 0.4))}
    out = form.emitted_values(vals, params)
    changed = {p for p in "abcd" if not np.array_equal(out[p], vals[p])}
    assert changed == set(form.moves)


def test_published_identities_behind_the_forms():
    z = np.linspace(-8, 8, 3201)
    # source: Howard et al. 2019, h-swish(x) = x·ReLU6(x + 3)/6
    np.testing.assert_allclose(hard_swish(z), z * np.clip(z + 3, 0, 6) / 6, rtol=1e-12, atol=1e-15)
    # source: ONNX operator spec, HardSigmoid = max(0, min(1, alpha·x + beta)); 2·HS(z; ½, ½) − 1 = clip(z, -1, 1)
    np.testing.assert_allclose(2 * hard_sigmoid(z, 0.5, 0.5) - 1, hard_tanh(z), atol=1e-15)
    np.testing.assert_allclose(6 * hard_sigmoid(z, 1 / 6, 0.0), np.clip(z, 0, 6), atol=1e-12)
    np.testing.assert_allclose(np.maximum(z, 0), relu(z), rtol=0)


def test_unknown_names_are_refused_with_the_valid_ones():
    with pytest.raises(UsageError, match="Clip, HardSigmoid"):
        get_form("hard_tanh", "Tanh")
    with pytest.raises(UsageError, match="unknown function"):
        forms_of("relu7")
    assert [f.name for f in forms_of("gelu_tanh")] == ["registry"]  # a costly function named with --to
