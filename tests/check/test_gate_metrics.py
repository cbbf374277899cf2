"""The gate's cosine and SQNR rules on inline models run by onnxruntime, figures recomputed outside swapper.

Oracles: onnxruntime runs the original and the candidate; per-sample cosine is
recomputed with ``scipy.spatial.distance.cosine``, the worst-5% figure with
``numpy.percentile`` (``method="linear"``), SQNR with ``10·log10(Σx²/Σ(x − x̂)²)``.
The rules are README "The gate"; the default floors are derived as stated in
swapper/check/gate.py's docstring and re-derived here.
"""
from __future__ import annotations

import math

import numpy as np
import onnx
import onnx.parser
import onnxruntime as ort
import pytest
from onnx import numpy_helper
from scipy.spatial.distance import cosine as scipy_cosine_distance

from swapper.check.compare import compare
from swapper.check.gate import Budget, GateRule, decide, preflight
from swapper.data.dataset import Dataset
from swapper.errors import CannotJudge, UsageError

HEAD = '<ir_version: 8, opset_import: ["" : 17]>\n'
# an embedding (unit rows) and a [N, C, L] map from the same input
TWO_OUTPUTS = HEAD + """
g (float[N, 8] x) => (float[N, 6] embedding, float[N, 2, 4] heatmap) <float[8, 6] W, float[8, 8] V, int64[3] S> {
    z = MatMul (x, W)
    embedding = LpNormalization <axis = 1, p = 2> (z)
    h = MatMul (x, V)
    heatmap = Reshape (h, S)
}"""


def two_outputs(w: np.ndarray, v: np.ndarray) -> onnx.ModelProto:
    m = onnx.parser.parse_model(TWO_OUTPUTS)
    m.graph.initializer.extend([numpy_helper.from_array(w.astype(np.float32), "W"),
                                numpy_helper.from_array(v.astype(np.float32), "V"),
                                numpy_helper.from_array(np.array([-1, 2, 4], np.int64), "S")])
    onnx.checker.check_model(m, full_check=True)  # source: the ONNX checker
    return m


def outputs(m: onnx.ModelProto, x: np.ndarray) -> list[np.ndarray]:
    sess = ort.InferenceSession(m.SerializeToString(), providers=["CPUExecutionProvider"])
    return sess.run(None, {"x": x})


def scipy_cosines(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    a, b = a.reshape(len(a), -1).astype(np.float64), b.reshape(len(b), -1).astype(np.float64)
    return np.array([1.0 - scipy_cosine_distance(u, v) for u, v in zip(a, b)])


@pytest.fixture(scope="module")
def pair():
    """Original and a candidate whose embedding weights are nudged and whose map weights are badly damaged."""
    rng = np.random.default_rng(20261204)
    w, v = rng.normal(size=(8, 6)), rng.normal(size=(8, 8))
    x = rng.normal(size=(300, 8)).astype(np.float32)
    original = two_outputs(w, v)
    candidate = two_outputs(w + rng.normal(scale=0.08, size=w.shape), v + rng.normal(scale=1.0, size=v.shape))
    ds = Dataset(path="mem.npz", arrays={"x": x}, labels=None, expected=None, n=len(x))
    comp = compare(original, candidate, ds, batch_size=64)
    ref, cand = outputs(original, x), outputs(candidate, x)
    return {"ds": ds, "comp": comp, "original": original,
            "cos": {"embedding": scipy_cosines(ref[0], cand[0]), "heatmap": scipy_cosines(ref[1], cand[1])},
            "sqnr": {name: 10 * np.log10(np.sum(r.astype(np.float64) ** 2) / np.sum((r.astype(np.float64) - c) ** 2))
                     for name, r, c in zip(("embedding", "heatmap"), ref, cand)}}


def test_comparison_figures_match_scipy_and_the_sqnr_formula(pair):
    errs = pair["comp"].output_errors
    for name in ("embedding", "heatmap"):
        cos = pair["cos"][name]
        assert errs[name]["cosine_mean"] == pytest.approx(cos.mean(), abs=1e-6)
        assert errs[name]["cosine_p5"] == pytest.approx(np.percentile(cos, 5, method="linear"), abs=1e-6)
        assert errs[name]["cosine_min"] == pytest.approx(cos.min(), abs=1e-6)
        assert errs[name]["sqnr_db"] == pytest.approx(pair["sqnr"][name], abs=1e-4)
    assert [k.kind for k in pair["comp"].output_kinds] == ["embedding", "dense"]


def test_cosine_rule_flips_at_the_measured_mean(pair):
    emb = pair["cos"]["embedding"]
    mean, p5 = emb.mean(), np.percentile(emb, 5)
    assert mean > 0.99  # the nudge keeps the embedding close; the map is far off (next test)
    rule = dict(metric="cosine", min_cosine_p5=-1.0)
    only_emb = pair["comp"]
    ok = decide(only_emb, GateRule(min_cosine=float(pair["cos"]["heatmap"].mean()) - 1e-6, **rule))
    assert ok.approved and ok.metric == "cosine" and ok.outputs == ["embedding", "heatmap"]
    no = decide(only_emb, GateRule(min_cosine=float(mean) + 1e-6, **rule))
    assert not no.approved and "embedding" in no.reason
    # the worst-5% floor rejects on its own when the mean passes (p5 < mean for spread-out cosines)
    assert p5 < mean
    floor = float(min(mean, pair["cos"]["heatmap"].mean())) - 1e-6
    p5_no = decide(only_emb, GateRule(metric="cosine", min_cosine=floor, min_cosine_p5=float(p5) + 1e-6))
    assert not p5_no.approved and "worst 5%" in p5_no.reason


def test_every_judged_output_must_pass(pair):
    # default metric: the first float output is an embedding -> cosine on every output with >= 2 values/sample
    v = decide(pair["comp"], GateRule())
    assert v.metric == "cosine" and v.outputs == ["embedding", "heatmap"]
    heat = pair["cos"]["heatmap"]
    assert heat.mean() < 0.995  # source: scipy, the damaged map is far below the default floor
    assert not v.approved and v.reason.startswith("heatmap:") and "embedding:" not in v.reason
    assert v.thresholds == {"min_cosine": 0.995, "min_cosine_p5": pytest.approx(0.99)}


def test_sqnr_rule_flips_at_the_measured_sqnr(pair):
    worst = min(pair["sqnr"].values())
    assert decide(pair["comp"], GateRule(min_sqnr_db=float(worst) - 1e-3)).approved
    v = decide(pair["comp"], GateRule(min_sqnr_db=float(worst) + 1e-3))
    assert not v.approved and v.metric == "sqnr" and "dB" in v.reason


def test_default_floors_and_where_they_come_from():
    assert GateRule().cosine_floor == 0.995  # README "The gate": rule of thumb, no source
    # derived worst-5% floor: 1 - 2*(1 - min_cosine)
    assert GateRule().cosine_p5_floor == pytest.approx(0.99)
    assert GateRule(min_cosine=0.98).cosine_p5_floor == pytest.approx(0.96)
    # |x - x_hat|^2 = 2(1 - cos) for unit vectors: 0.995 allows a 10% relative error
    assert math.sqrt(2 * (1 - 0.995)) == pytest.approx(0.1)
    # 20 dB default SQNR: an error orthogonal to x with power 1% of x's gives cosine 1/sqrt(1.01) >= 0.995;
    # built here and measured with scipy
    rng = np.random.default_rng(1)
    x = rng.normal(size=64)
    e = rng.normal(size=64)
    e -= (e @ x) / (x @ x) * x  # orthogonal to x
    e *= math.sqrt((x @ x) / (e @ e) * 10 ** (-GateRule().sqnr_floor / 10))
    assert 10 * math.log10((x @ x) / (e @ e)) == pytest.approx(20.0)
    assert 1 - scipy_cosine_distance(x, x + e) == pytest.approx(1 / math.sqrt(1.01))
    assert 1 - scipy_cosine_distance(x, x + e) >= 0.995


def test_options_that_contradict_are_usage_errors():
    with pytest.raises(UsageError):
        GateRule(min_cosine=1.5)
    with pytest.raises(UsageError):
        GateRule(metric="psnr")
    with pytest.raises(UsageError):
        GateRule(min_cosine=0.99, min_sqnr_db=30.0)  # two metrics and no --metric to choose
    with pytest.raises(UsageError):
        GateRule(metric="top1", min_cosine=0.99)
    assert GateRule(min_sqnr_db=30.0).requested == "sqnr" and GateRule(min_cosine_p5=0.9).requested == "cosine"


def test_asking_for_what_the_data_cannot_give_raises_cannot_judge(pair):
    for metric, needle in (("top1", "'labels'"), ("rmse", "'expected'")):
        with pytest.raises(CannotJudge) as e:
            preflight(pair["original"], pair["ds"], GateRule(metric=metric), batch_size=32)
        assert e.value.exit_code == 3 and needle in str(e.value) and "\n" not in str(e.value)
    # agreement on an embedding is allowed when asked for, with a note saying what it reads
    choice = preflight(pair["original"], pair["ds"], GateRule(metric="agreement"), batch_size=32)
    assert choice.outputs == ["embedding"] and any("read as class scores" in n for n in choice.notes)


def test_a_bare_budget_still_judges_a_classifier_by_top1():
    rng = np.random.default_rng(2)
    m = onnx.parser.parse_model(HEAD + """
g (float[N, 8] x) => (float[N, 5] logits) <float[5, 8] W> {
    logits = Gemm <transB = 1> (x, W)
}""")
    m.graph.initializer.append(numpy_helper.from_array(rng.normal(size=(5, 8)).astype(np.float32), "W"))
    x = rng.normal(size=(80, 8)).astype(np.float32)
    labels = outputs(m, x)[0].argmax(axis=1)
    ds = Dataset(path="mem.npz", arrays={"x": x}, labels=labels, expected=None, n=len(x))
    v = decide(compare(m, m, ds), Budget(max_drop_pp=0.0))
    # identical models: no drop (definition of the top-1 rule), decided by top1 on the logits
    assert v.approved and v.metric == "top1" and v.outputs == ["logits"]
