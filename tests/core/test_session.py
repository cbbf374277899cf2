"""Tests of swapper.core.session: sessions, their options, and exposing internal tensors as outputs.

References: ``onnx.reference.ReferenceEvaluator`` executes the ONNX operator
spec in numpy and hands back every intermediate result (``intermediate=True``);
onnxruntime's Python API names the graph optimisation levels.
"""
from __future__ import annotations

import numpy as np
import onnx
import onnxruntime as ort
from onnx import helper
from onnx.reference import ReferenceEvaluator
from testkit import float_model, init

from swapper.core.session import OPTIMIZATION_LEVELS, expose, open_session, session_options


def _small_model() -> onnx.ModelProto:
    """x[N,4] -> MatMul W -> Add b -> Tanh -> Mul x2 -> y, with every intermediate named."""
    rng = np.random.default_rng(3)
    nodes = [
        helper.make_node("MatMul", ["x", "W"], ["mm"], name="mm"),
        helper.make_node("Add", ["mm", "b"], ["pre"], name="add"),
        helper.make_node("Tanh", ["pre"], ["act"], name="tanh"),
        helper.make_node("Mul", ["act", "two"], ["y"], name="mul"),
    ]
    inits = [init("W", rng.normal(size=(4, 5))), init("b", rng.normal(size=5)), init("two", 2.0)]
    return float_model(nodes, [("x", ["N", 4])], [("y", ["N", 5])], inits, ir_version=None, infer=True,
                       name="small")


def test_expose_matches_reference_intermediates():
    model = _small_model()
    x = np.random.default_rng(0).normal(size=(7, 4)).astype(np.float32)
    names = ["mm", "pre", "act"]
    exposed = expose(model, names + ["act", "y"])  # duplicates and existing outputs are not added twice
    out_names = [o.name for o in exposed.graph.output]
    assert out_names == ["y", "mm", "pre", "act"]
    assert [o.name for o in model.graph.output] == ["y"]  # the input model is left alone
    # source: ONNX operator spec as executed by onnx.reference.ReferenceEvaluator (intermediate=True)
    ref = ReferenceEvaluator(model).run(None, {"x": x}, intermediate=True)
    got = dict(zip(out_names, open_session(exposed).run(None, {"x": x})))
    for name in names + ["y"]:
        np.testing.assert_allclose(got[name], ref[name], rtol=1e-5, atol=1e-6)
        assert got[name].dtype == np.float32


def test_open_session_is_repeatable():
    model = expose(_small_model(), ["act"])
    x = np.random.default_rng(1).normal(size=(33, 4)).astype(np.float32)
    first = open_session(model).run(None, {"x": x})
    second = open_session(model.SerializeToString(), graph_optimization="disabled").run(None, {"x": x})
    # common practice, no source: two one-thread sessions of one model give bit-equal results (what
    # calibration relies on); graph optimisations may only reorder float math (tolerance)
    for a, b in zip(first, open_session(model).run(None, {"x": x})):
        np.testing.assert_array_equal(a, b)
    for a, b in zip(first, second):
        np.testing.assert_allclose(a, b, rtol=1e-5, atol=1e-6)


def test_session_options_mapping():
    # source: onnxruntime Python API, GraphOptimizationLevel enum names
    expected = {
        "all": ort.GraphOptimizationLevel.ORT_ENABLE_ALL,
        "extended": ort.GraphOptimizationLevel.ORT_ENABLE_EXTENDED,
        "basic": ort.GraphOptimizationLevel.ORT_ENABLE_BASIC,
        "disabled": ort.GraphOptimizationLevel.ORT_DISABLE_ALL,
    }
    assert OPTIMIZATION_LEVELS == expected
    for name, level in expected.items():
        options = session_options(2, name)
        assert options.graph_optimization_level == level
        assert options.intra_op_num_threads == 2
        assert options.inter_op_num_threads == 1
