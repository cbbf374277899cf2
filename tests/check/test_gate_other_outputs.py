"""A class verdict reads one output; the gate must not let a swap move the others (a detector's boxes).

Found by trying a two-headed model as a user would: a swap of the box head's Sigmoid was approved on
"top1 on scores" while the boxes moved. References: the cosine figures are recomputed with numpy from
onnxruntime's outputs of the two models.
"""
from __future__ import annotations

import numpy as np
import onnx
import onnxruntime as ort
from onnx import helper
from testkit import as_loaded, float_model, init

from swapper import api
from swapper.check.gate import DEFAULT_MIN_COSINE, GateRule
from swapper.core.model_io import load_model


def _two_heads(box_op: str):
    """x [N, 6] -> Gemm -> Softmax scores [N, 3]; x -> Gemm -> box_op -> boxes [N, 4]."""
    rng = np.random.default_rng(0)
    nodes = [helper.make_node("Gemm", ["x", "w1", "b1"], ["s"]), helper.make_node("Softmax", ["s"], ["scores"]),
             helper.make_node("Gemm", ["x", "w2", "b2"], ["z"]), helper.make_node(box_op, ["z"], ["boxes"])]
    inits = [init("w1", rng.normal(size=(6, 3))), init("b1", np.zeros(3)),
             init("w2", rng.normal(size=(6, 4))), init("b2", rng.normal(size=4))]
    return as_loaded(float_model(nodes, [("x", ["N", 6])], [("scores", ["N", 3]), ("boxes", ["N", 4])], inits))


def _val(tmp_path, model):
    x = np.random.default_rng(1).normal(size=(200, 6)).astype(np.float32)
    labels = ort.InferenceSession(model.SerializeToString()).run(["scores"], {"x": x})[0].argmax(1)
    np.savez(tmp_path / "val.npz", x=x, labels=labels)
    onnx.save(model, tmp_path / "m.onnx")
    return api.load_data(tmp_path / "val.npz", load_model(tmp_path / "m.onnx")), x


def test_a_moved_output_the_class_metric_does_not_read_rejects(tmp_path):
    original, candidate = _two_heads("Sigmoid"), _two_heads("Tanh")  # same scores, different boxes
    val, x = _val(tmp_path, original)
    result = api.check(original, candidate, val, budget=GateRule(), latency_repeats=0)
    boxes = [ort.InferenceSession(m.SerializeToString()).run(["boxes"], {"x": x})[0] for m in (original, candidate)]
    cos = (boxes[0] * boxes[1]).sum(1) / np.linalg.norm(boxes[0], axis=1) / np.linalg.norm(boxes[1], axis=1)
    assert cos.mean() < DEFAULT_MIN_COSINE  # numpy: the boxes really moved
    assert result.comparison.top1_candidate == result.comparison.top1_original  # the scores did not
    assert result.verdict.metric == "top1" and not result.verdict.approved
    assert "boxes" in result.verdict.reason and "boxes" in result.verdict.outputs


def test_untouched_other_outputs_leave_the_class_verdict_alone(tmp_path):
    original = _two_heads("Sigmoid")
    val, _ = _val(tmp_path, original)
    result = api.check(original, _two_heads("Sigmoid"), val, budget=GateRule(), latency_repeats=0)
    assert result.verdict.approved and result.verdict.metric == "top1"
    assert "every other float output keeps its values" in result.verdict.rule
