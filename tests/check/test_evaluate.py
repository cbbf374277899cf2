"""compare() against onnxruntime run directly, and every branch of decide()."""
from __future__ import annotations

import json
import math
from contextlib import contextmanager

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper
from sklearn.metrics import (
    accuracy_score,
    mean_absolute_error,
    mean_squared_error,
    top_k_accuracy_score,
)
from testkit import in_memory, init, run

from swapper.check import stats
from swapper.check.compare import Comparison, compare, reference
from swapper.check.gate import Budget, decide
from swapper.data.dataset import input_specs, load_dataset
from swapper.errors import BadDataError, BadModelError, CannotJudge, UsageError

FEATURES, CLASSES, N = 8, 12, 203  # N not a multiple of the batch size: the last batch is short


def _gemm_model(weight: np.ndarray, bias: np.ndarray, *, out_name: str = "logits",
                tail: str | None = None, out_type=TensorProto.FLOAT) -> onnx.ModelProto:
    """x (N, FEATURES) -> Gemm -> [optional tail op] -> out_name (N, classes)."""
    classes = weight.shape[1]
    nodes = [helper.make_node("Gemm", ["x", "W", "B"], ["z" if tail else out_name])]
    inits = [init("W", weight), init("B", bias)]
    if tail == "div0":  # z / 0 -> ±inf (IEEE 754), a non-finite candidate
        inits.append(init("zero", np.zeros(1)))
        nodes.append(helper.make_node("Div", ["z", "zero"], [out_name]))
    elif tail == "double":  # same values, dtype float64: a changed signature
        nodes.append(helper.make_node("Cast", ["z"], [out_name], to=TensorProto.DOUBLE))
    graph = helper.make_graph(
        nodes, "clf",
        [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", FEATURES])],
        [helper.make_tensor_value_info(out_name, out_type, ["N", classes])],
        initializer=inits,
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    onnx.checker.check_model(model, full_check=True)
    return model


@pytest.fixture(scope="module")
def setup():
    rng = np.random.default_rng(42)
    w = rng.normal(size=(FEATURES, CLASSES)).astype(np.float32)
    b = rng.normal(size=CLASSES).astype(np.float32) * 0.1
    x = rng.normal(size=(N, FEATURES)).astype(np.float32)
    # labels from the original plus noise, so the original is decent but not perfect
    labels = np.argmax(x @ w + b + rng.normal(size=(N, CLASSES)) * 1.5, axis=1).astype(np.int64)
    original = _gemm_model(w, b)
    perturbed = _gemm_model(w + rng.normal(size=w.shape).astype(np.float32) * 0.6, b)
    return {"w": w, "b": b, "x": x, "labels": labels, "original": original, "perturbed": perturbed}


# ----------------------------------------------------------------------------- compare()


def test_identical_models(setup):
    ds = in_memory({"x": setup["x"]}, setup["labels"])
    comp = compare(setup["original"], setup["original"].SerializeToString(), ds, batch_size=32)
    assert comp.n == N and comp.task == "classification"
    assert comp.agreement == 1.0
    assert comp.delta_pp == 0.0 and comp.n01 == 0 and comp.n10 == 0
    assert comp.mcnemar_p == 1.0  # no discordant pairs (McNemar 1947: the test only uses them)
    assert comp.interval.lo < 0.0 < comp.interval.hi
    err = comp.output_errors["logits"]
    assert err["max_abs"] == 0.0 and err["sqnr_db"] == math.inf
    assert not comp.has_nonfinite and not comp.signature_changed
    verdict = decide(comp, Budget(max_drop_pp=0.0))
    assert verdict.approved


def test_different_models_match_direct_onnxruntime(setup):
    ds = in_memory({"x": setup["x"]}, setup["labels"])
    comp = compare(setup["original"], setup["perturbed"], ds, batch_size=37)
    # reference: run both models in one go with onnxruntime and count by hand
    ref_o = run(setup["original"], {"x": setup["x"]})[0]
    ref_c = run(setup["perturbed"], {"x": setup["x"]})[0]
    y = setup["labels"]
    co, cc = ref_o.argmax(1) == y, ref_c.argmax(1) == y
    assert comp.n01 == int(np.sum(~co & cc))
    assert comp.n10 == int(np.sum(co & ~cc))
    assert comp.n01 + comp.n10 > 0  # the perturbation must actually change some predictions
    # source: scikit-learn accuracy_score / top_k_accuracy_score on the direct outputs
    assert comp.top1_original == pytest.approx(accuracy_score(y, ref_o.argmax(1)))
    assert comp.top1_candidate == pytest.approx(accuracy_score(y, ref_c.argmax(1)))
    assert comp.top5_original == pytest.approx(top_k_accuracy_score(y, ref_o, k=5, labels=np.arange(CLASSES)))
    assert comp.top5_candidate == pytest.approx(top_k_accuracy_score(y, ref_c, k=5, labels=np.arange(CLASSES)))
    assert comp.delta_pp == pytest.approx(100 * (cc.mean() - co.mean()))
    assert comp.agreement == pytest.approx(np.mean(ref_o.argmax(1) == ref_c.argmax(1)))
    # source: scipy-backed exact McNemar already checked in test_stats; here the wiring
    assert comp.mcnemar_p == pytest.approx(stats.mcnemar_exact(comp.n01, comp.n10))
    # output errors over batches == numpy on the whole outputs (definitions in stats docstring)
    e = ref_o.astype(np.float64) - ref_c
    got = comp.output_errors["logits"]
    assert got["max_abs"] == pytest.approx(np.abs(e).max(), rel=1e-6)
    assert got["rmse"] == pytest.approx(np.sqrt(np.mean(e**2)), rel=1e-6)
    assert got["sqnr_db"] == pytest.approx(10 * np.log10(np.sum(ref_o.astype(np.float64) ** 2) / np.sum(e**2)),
                                           rel=1e-6)
    json.dumps(comp.to_dict(), allow_nan=False)  # RFC 8259: no NaN/Infinity in JSON


def test_reference_gives_the_same_comparison_as_the_model(setup):
    ds = in_memory({"x": setup["x"]}, setup["labels"])
    direct = compare(setup["original"], setup["perturbed"], ds, batch_size=37)
    ref = reference(setup["original"], ds, batch_size=37)
    # the original's outputs are stored once and stand in for running it again: identical figures
    for candidate in (setup["perturbed"], setup["perturbed"].SerializeToString()):
        assert compare(ref, candidate, ds, batch_size=37).to_dict() == direct.to_dict()
    with pytest.raises(UsageError, match="batch size"):
        compare(ref, setup["perturbed"], ds, batch_size=32)
    with pytest.raises(UsageError, match="dataset"):
        compare(ref, setup["perturbed"], in_memory({"x": setup["x"]}, setup["labels"]), batch_size=37)


def test_to_dict_is_json_safe_with_notes(setup):
    ds = in_memory({"x": setup["x"]}, setup["labels"])
    comp = compare(setup["original"], setup["original"], ds)
    d = json.loads(json.dumps(comp.to_dict(), allow_nan=False))
    assert d["output_errors"]["logits"]["sqnr_db"] is None
    assert any("sqnr_db" in note and "+inf" in note for note in d["notes"])
    assert isinstance(d["n01"], int) and isinstance(d["interval"]["lo_pp"], float)


def test_agreement_only_without_labels(setup):
    comp = compare(setup["original"], setup["perturbed"], in_memory({"x": setup["x"]}), batch_size=50)
    ref_o = run(setup["original"], {"x": setup["x"]})[0]
    ref_c = run(setup["perturbed"], {"x": setup["x"]})[0]
    assert comp.task == "agreement"
    assert comp.top1_original is None and comp.n01 is None and comp.interval is None
    assert comp.agreement == pytest.approx(np.mean(ref_o.argmax(1) == ref_c.argmax(1)))


def test_regression_targets(setup):
    rng = np.random.default_rng(1)
    targets = rng.normal(size=(N, CLASSES)).astype(np.float32)
    comp = compare(setup["original"], setup["perturbed"], in_memory({"x": setup["x"]}, expected=targets), batch_size=64)
    assert comp.task == "regression" and comp.agreement is None
    ref_c = run(setup["perturbed"], {"x": setup["x"]})[0]
    # source: scikit-learn mean_absolute_error / mean_squared_error
    assert comp.regression["candidate"]["mae"] == pytest.approx(mean_absolute_error(targets, ref_c), rel=1e-6)
    assert comp.regression["candidate"]["rmse"] == pytest.approx(
        math.sqrt(mean_squared_error(targets, ref_c)), rel=1e-6)


def test_loaded_dataset_and_progress(setup, tmp_path):
    path = tmp_path / "val.npz"
    np.savez(path, x=setup["x"], labels=setup["labels"])
    ds = load_dataset(path, input_specs(setup["original"]), require_labels=True)
    advanced: list[int] = []

    class Recorder:
        @contextmanager
        def task(self, description, total):
            advanced.append(-total)
            yield lambda k=1: advanced.append(k)

    comp = compare(setup["original"], setup["perturbed"], ds, batch_size=64, progress=Recorder())
    assert advanced[0] == -N and sum(advanced[1:]) == N
    assert comp.n == N


def test_nonfinite_candidate(setup):
    bad = _gemm_model(setup["w"], setup["b"], tail="div0")
    comp = compare(setup["original"], bad, in_memory({"x": setup["x"]}, setup["labels"]))
    assert comp.has_nonfinite
    v = decide(comp, Budget(max_drop_pp=100.0))
    assert not v.approved and "NaN or Inf" in v.reason
    json.dumps(comp.to_dict(), allow_nan=False)


@pytest.mark.parametrize("variant", ["name", "dtype", "classes"])
def test_signature_change_detected(setup, variant):
    if variant == "name":
        cand = _gemm_model(setup["w"], setup["b"], out_name="scores")
    elif variant == "dtype":
        cand = _gemm_model(setup["w"], setup["b"], tail="double", out_type=TensorProto.DOUBLE)
    else:
        cand = _gemm_model(setup["w"][:, :-1], setup["b"][:-1])
    comp = compare(setup["original"], cand, in_memory({"x": setup["x"]}))
    assert comp.signature_changed and comp.signature_reason
    v = decide(comp, Budget(max_drop_pp=100.0))
    assert not v.approved and "signature" in v.reason


def test_bad_inputs(setup):
    with pytest.raises(BadModelError):
        compare(b"not a model", setup["original"], in_memory({"x": setup["x"]}))
    with pytest.raises(BadDataError):  # labels outside the 12 classes
        compare(setup["original"], setup["original"], in_memory({"x": setup["x"]}, np.full(N, CLASSES)))
    with pytest.raises(BadDataError):  # wrong feature width reaches onnxruntime
        compare(setup["original"], setup["original"], in_memory({"x": np.zeros((4, 3), np.float32)}))
    with pytest.raises(UsageError):
        compare(setup["original"], setup["original"], in_memory({"x": setup["x"]}), batch_size=0)


# ----------------------------------------------------------------------------- decide()


def _labelled(both: int, n01: int, n10: int, neither: int, agreement: float | None = None) -> Comparison:
    """A Comparison built from a 2x2 table through the stats functions."""
    orig = np.array([1] * both + [0] * n01 + [1] * n10 + [0] * neither, dtype=bool)
    cand = np.array([1] * both + [1] * n01 + [0] * n10 + [0] * neither, dtype=bool)
    iv = stats.paired_accuracy_difference(orig, cand)
    return Comparison(
        n=orig.size, task="classification", top1_original=stats.accuracy(orig), top1_candidate=stats.accuracy(cand),
        delta_pp=iv.delta, n01=n01, n10=n10, mcnemar_p=stats.mcnemar_exact(n01, n10), interval=iv,
        agreement=agreement if agreement is not None else 1 - (n01 + n10) / orig.size,
    )


def test_decide_approves_within_budget():
    comp = _labelled(180, 2, 3, 15)  # drop = (3 - 2) / 200 = 0.5 pp
    v = decide(comp, Budget(max_drop_pp=1.0))
    assert v.approved and "0.50 pp" in v.reason and "1.00 pp" in v.rule


def test_decide_rejects_over_budget():
    comp = _labelled(180, 1, 6, 13)  # drop = 5 / 200 = 2.5 pp
    v = decide(comp, Budget(max_drop_pp=1.0))
    assert not v.approved and "2.50 pp" in v.reason


def test_strict_rejects_where_default_approves():
    comp = _labelled(180, 2, 3, 15)  # drop 0.5 pp, but 200 samples leave a wide interval
    assert comp.interval.lo < -1.0  # upper end of the drop above the 1 pp budget
    assert decide(comp, Budget(max_drop_pp=1.0)).approved
    v = decide(comp, Budget(max_drop_pp=1.0, strict=True))
    assert not v.approved and "non-inferiority" in v.rule and "upper" in v.reason
    # with enough samples the same drop passes the strict rule
    big = _labelled(180 * 200, 2 * 200, 3 * 200, 15 * 200)
    assert decide(big, Budget(max_drop_pp=1.0, strict=True)).approved


def test_min_agreement_also_applies_with_labels():
    comp = _labelled(160, 20, 20, 0)  # delta 0, agreement 0.8
    assert decide(comp, Budget(max_drop_pp=1.0)).approved
    v = decide(comp, Budget(max_drop_pp=1.0, min_agreement=0.9))
    assert not v.approved and "agreement" in v.reason


def test_no_labels_agreement_rule():
    comp = Comparison(n=1000, task="agreement", agreement=0.995)
    v = decide(comp, Budget(max_drop_pp=1.0))  # default: agreement >= 1 - 1/100
    assert v.approved and "99.00%" in v.rule and "no labels" in v.rule
    assert not decide(comp, Budget(max_drop_pp=0.2)).approved  # needs 99.8%
    assert not decide(comp, Budget(max_drop_pp=5.0, min_agreement=0.999)).approved
    assert decide(comp, Budget(max_drop_pp=0.0, min_agreement=0.99)).approved


def test_regression_and_nothing_to_measure():
    reg = Comparison(n=10, task="regression",
                     regression={"original": {"mae": 1.0, "rmse": 1.0}, "candidate": {"mae": 1.0, "rmse": 1.005}})
    assert decide(reg, Budget(max_drop_pp=1.0)).approved
    assert not decide(reg, Budget(max_drop_pp=0.1)).approved
    # README "Exit codes": nothing to judge is not a rejection but "cannot judge with this data", exit 3
    with pytest.raises(CannotJudge) as e:
        decide(Comparison(n=10, task="outputs"), Budget())
    assert e.value.exit_code == 3 and "nothing to judge" in str(e.value)


def test_budget_validation():
    with pytest.raises(UsageError):
        Budget(max_drop_pp=-1)
    with pytest.raises(UsageError):
        Budget(min_agreement=1.5)
