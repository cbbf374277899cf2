"""What each output is: detection on small inline ONNX models, and the metric each kind gets by default.

Oracles: the ONNX operator definitions as executed by onnxruntime (Softmax rows
are non-negative and sum to 1; LpNormalization with p=2 gives rows of unit L2
length; Conv keeps [N, C, H, W]; MatMul on [N, T, D] gives [N, T, C]; ArgMax
gives int64), and the kind table in README "The gate".
"""
from __future__ import annotations

import numpy as np
import onnx
import onnx.parser
import onnxruntime as ort
import pytest
from onnx import numpy_helper

from swapper.check.compare import probe
from swapper.check.gate import GateRule, choose_metric
from swapper.check.kinds import default_metric, detect_kind, detect_kinds
from swapper.data.dataset import Dataset
from swapper.errors import CannotJudge

RNG = np.random.default_rng(20261204)


def model(text: str, **weights) -> onnx.ModelProto:
    """An ONNX model from its text form (onnx.parser) plus initializers for the declared weights."""
    m = onnx.parser.parse_model(text)
    m.graph.initializer.extend(numpy_helper.from_array(np.asarray(v, np.float32), k) for k, v in weights.items())
    onnx.checker.check_model(m, full_check=True)  # source: the ONNX checker
    return m


def run(m: onnx.ModelProto, x: np.ndarray) -> tuple[list[str], list[np.ndarray]]:
    sess = ort.InferenceSession(m.SerializeToString(), providers=["CPUExecutionProvider"])
    return [o.name for o in sess.get_outputs()], sess.run(None, {"x": x})


HEAD = '<ir_version: 8, opset_import: ["" : 17]>\n'
GEMM_CLASSIFIER = model(HEAD + """
g (float[N, 8] x) => (float[N, 4] out) <float[4, 8] W, float[4] B> {
    out = Gemm <transB = 1> (x, W, B)
}""", W=RNG.normal(size=(4, 8)), B=RNG.normal(size=4))
SOFTMAX_CLASSIFIER = model(HEAD + """
g (float[N, 8] x) => (float[N, 4] out) <float[4, 8] W, float[4] B> {
    z = Gemm <transB = 1> (x, W, B)
    out = Softmax <axis = 1> (z)
}""", W=RNG.normal(size=(4, 8)), B=RNG.normal(size=4))
UNIT_EMBEDDING = model(HEAD + """
g (float[N, 8] x) => (float[N, 6] out) <float[8, 6] W> {
    z = MatMul (x, W)
    out = LpNormalization <axis = 1, p = 2> (z)
}""", W=RNG.normal(size=(8, 6)))
CONV_MAP = model(HEAD + """
g (float[N, 2, 5, 5] x) => (float[N, 3, 5, 5] out) <float[3, 2, 3, 3] W> {
    out = Conv <pads = [1, 1, 1, 1]> (x, W)
}""", W=RNG.normal(size=(3, 2, 3, 3)))
SEQUENCE = model(HEAD + """
g (float[N, 7, 8] x) => (float[N, 7, 5] out) <float[8, 5] W> {
    out = MatMul (x, W)
}""", W=RNG.normal(size=(8, 5)))
ONE_VALUE = model(HEAD + """
g (float[N, 8] x) => (float[N, 1] out) <float[8, 1] W> {
    out = MatMul (x, W)
}""", W=RNG.normal(size=(8, 1)))
IDS_ONLY = model(HEAD + """
g (float[N, 8] x) => (int64[N] out) {
    out = ArgMax <axis = 1, keepdims = 0> (x)
}""")

X8 = RNG.normal(size=(12, 8)).astype(np.float32)


@pytest.mark.parametrize("m,x,kind", [
    (GEMM_CLASSIFIER, X8, "scores"),  # [N, 4] logits, neutral name: read as one score per class
    (SOFTMAX_CLASSIFIER, X8, "scores"),  # Softmax rows: non-negative, sum 1
    (UNIT_EMBEDDING, X8, "embedding"),  # LpNormalization p=2: unit rows
    (CONV_MAP, RNG.normal(size=(3, 2, 5, 5)).astype(np.float32), "dense"),  # [N, C, H, W]
    (SEQUENCE, RNG.normal(size=(3, 7, 8)).astype(np.float32), "dense"),  # [N, T, C]
    (ONE_VALUE, X8, "scalar"),
    (IDS_ONLY, X8, "non-float"),  # ArgMax gives int64
])
def test_each_output_kind_is_detected_on_onnxruntime_outputs(m, x, kind):
    names, outs = run(m, x)
    assert [k.kind for k in detect_kinds(names, outs)] == [kind]


def test_the_cues_the_detection_relies_on_hold_for_the_operators():
    # source: ONNX Softmax and LpNormalization definitions, executed by onnxruntime; if these facts did not
    # hold, the value cues would be reading something else
    p = run(SOFTMAX_CLASSIFIER, X8)[1][0].astype(np.float64)
    assert (p >= 0).all() and np.allclose(p.sum(axis=1), 1.0, atol=1e-6)
    e = run(UNIT_EMBEDDING, X8)[1][0].astype(np.float64)
    assert np.allclose(np.linalg.norm(e, axis=1), 1.0, atol=1e-6)
    logits = run(GEMM_CLASSIFIER, X8)[1][0]
    assert (logits < 0).any() and not np.allclose(np.linalg.norm(logits, axis=1), 1.0, atol=1e-3)


def test_names_decide_when_values_say_nothing():
    raw = RNG.normal(size=(10, 16)).astype(np.float32) * 3.0  # neither probabilities nor unit rows
    assert detect_kind("features", raw).kind == "embedding"
    assert detect_kind("sentence_embedding", raw).kind == "embedding"
    assert detect_kind("class_logits", raw).kind == "scores"
    assert detect_kind("output_0", raw).kind == "scores"  # no cue: a [N, C] float output reads as class scores
    # values win over names: unit rows named "logits" are still an embedding (cue order, kinds.py docstring)
    unit = raw / np.linalg.norm(raw, axis=1, keepdims=True)
    assert detect_kind("logits", unit).kind == "embedding"


def test_targets_make_the_matching_output_a_regression_and_size_one_axes_do_not_make_a_map():
    out = RNG.normal(size=(10, 3)).astype(np.float32)
    assert detect_kind("y", out, targets_per_sample=3).kind == "regression"
    assert detect_kind("y", out, targets_per_sample=2).kind == "scores"
    assert detect_kind("y", out.reshape(10, 1, 3)).kind == "scores"  # [N, 1, C]: one class axis
    assert detect_kind("y", out.reshape(10, 3, 1)).has_class_view


def _dataset(x: np.ndarray, labels=None, expected=None) -> Dataset:
    return Dataset(path="mem.npz", arrays={"x": x}, labels=labels, expected=expected, n=len(x))


@pytest.mark.parametrize("m,x,labels,metric", [
    (GEMM_CLASSIFIER, X8, np.arange(12) % 4, "top1"),
    (GEMM_CLASSIFIER, X8, None, "agreement"),
    (UNIT_EMBEDDING, X8, None, "cosine"),
    (CONV_MAP, RNG.normal(size=(3, 2, 5, 5)).astype(np.float32), None, "cosine"),
    (SEQUENCE, RNG.normal(size=(3, 7, 8)).astype(np.float32), None, "cosine"),
    (ONE_VALUE, X8, None, "sqnr"),
])
def test_default_metric_per_kind_follows_the_readme_table(m, x, labels, metric):
    # source: README "The gate" table (class scores + labels -> top1, no labels -> agreement, embedding and
    # dense maps -> cosine, one value per sample -> sqnr)
    ds = _dataset(x, labels=labels)
    kinds = probe(m, ds, batch_size=4)
    assert choose_metric(kinds, GateRule(), has_labels=labels is not None, has_expected=False).metric == metric


def test_labels_on_an_embedding_are_left_unused_with_a_note():
    kinds = probe(UNIT_EMBEDDING, _dataset(X8, labels=np.zeros(12, np.int64)), batch_size=4)
    metric, notes = default_metric(kinds, has_labels=True, has_expected=False)
    assert metric == "cosine" and any("labels not used" in n for n in notes)


def test_an_integer_only_model_cannot_be_judged():
    kinds = probe(IDS_ONLY, _dataset(X8), batch_size=4)
    with pytest.raises(CannotJudge) as e:
        choose_metric(kinds, GateRule(), has_labels=False, has_expected=False)
    assert e.value.exit_code == 3 and "no float output" in str(e.value) and "int64" in str(e.value)
