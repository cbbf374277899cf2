"""The accuracy gate through the CLI: `swapper swap --val` and `swapper check`.

Contract (README "Exit codes" and "The gate"): 0 approved and the model is
written; 1 rejected and the model is not written (unless --force, which keeps
the verdict in the model's metadata); 2 bad input; the input model is never
modified. Accuracies are recomputed here with onnxruntime + scikit-learn.

Measured on the build machine (onnxruntime 1.32.0, x86-64) for the cases used:
- meter_cnn_silu, default surrogates, --calib: top-1 97.78% -> 97.56%, drop 0.22 pp
  (1 sample of 450), so approved with the default 1 pp budget (4 samples of slack).
- meter_cnn_silu, --to relu --no-bias-correction --no-refit-consumers --mode local: 97.78% -> 93.78%, drop 4.00 pp,
  95% interval for the delta [-6.37, -2.02] pp, McNemar p = 1.2e-4 (n01=2, n10=20):
  rejected with a wide margin.
- meter_mlp_tanh_sigmoid, --to hard_tanh --no-calibrate: 96.22% -> 96.67%, interval [-0.57, +1.60] pp:
  approved with the default budget, rejected by --budget 0 --strict (upper end of the drop 0.57 > 0).
"""
from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np
import onnx
import pytest
from sklearn.metrics import accuracy_score
from testkit import CALIB, DEMO, VAL, one_line_error, run, sha256


def predict(path: Path) -> np.ndarray:
    """Top-1 classes on val.npz, computed here with onnxruntime."""
    return run(path, {"pixels": np.load(VAL)["pixels"]})[0].argmax(axis=1)


def top1(path: Path) -> float:
    """Top-1 accuracy on val.npz. source: scikit-learn accuracy_score of argmax predictions."""
    return accuracy_score(np.load(VAL)["labels"], predict(path))


def verdict_meta(path: Path) -> dict | None:
    props = {p.key: p.value for p in onnx.load(str(path)).metadata_props}
    return json.loads(props["swapper.verdict"]) if "swapper.verdict" in props else None


@pytest.fixture(scope="module")
def ws(tmp_path_factory):
    """A folder with copies of two demo models and their hashes; hashes are checked after every test."""
    root = tmp_path_factory.mktemp("gate")
    models = {}
    for name in ("meter_cnn_silu", "meter_mlp_tanh_sigmoid"):
        shutil.copyfile(DEMO / f"{name}.onnx", root / f"{name}.onnx")
        models[name] = root / f"{name}.onnx"
    hashes = {k: sha256(v) for k, v in models.items()}
    return {"root": root, "models": models, "hashes": hashes}


@pytest.fixture(autouse=True)
def inputs_unchanged(ws):
    yield
    for name, path in ws["models"].items():  # README: the input model is never overwritten
        assert sha256(path) == ws["hashes"][name], name


def _swap_cnn(cli, ws, label: str, *options):
    """`swapper swap` of meter_cnn_silu with --calib/--val and ``options``; (result, output path, report folder)."""
    out = ws["root"] / f"{label}.onnx"
    rep = ws["root"] / f"rep-{label}"
    result = cli("swap", ws["models"]["meter_cnn_silu"], "-o", out, "--calib", CALIB, "--val", VAL, "--plan", "all",
                 *options, "--report", rep)
    return result, out, rep


# meter_cnn_silu swapped to relu without calibration help: rejected (see the module docstring)
CRUDE = ("--to", "relu", "--no-bias-correction", "--no-refit-consumers", "--mode", "local")


@pytest.fixture(scope="module")
def approved(cli, ws):
    return _swap_cnn(cli, ws, "approved")


@pytest.fixture(scope="module")
def rejected(cli, ws):
    return _swap_cnn(cli, ws, "rejected", *CRUDE)


@pytest.fixture(scope="module")
def forced(cli, ws):
    return _swap_cnn(cli, ws, "forced", *CRUDE, "--force")


def test_approved_swap_exits_0_and_writes_the_model(ws, approved):
    result, out, rep = approved
    assert result.exit_code == 0, result.output
    assert out.is_file()
    assert "APPROVED" in result.stdout
    onnx.checker.check_model(onnx.load(str(out)), full_check=True)  # source: ONNX checker
    meta = verdict_meta(out)
    assert meta is not None and meta["approved"] is True
    payload = json.loads((rep / "report.json").read_text())
    assert payload["verdict"]["approved"] is True
    # README "The gate": approve when top-1 drop (original - candidate, pp) <= budget (1.0 by default);
    # both accuracies recomputed independently (source: scikit-learn accuracy_score)
    drop = 100 * (top1(ws["models"]["meter_cnn_silu"]) - top1(out))
    assert drop <= 1.0


def test_rejected_swap_exits_1_and_writes_no_model(ws, rejected):
    result, out, rep = rejected
    assert result.exit_code == 1, result.output
    assert not out.exists()
    assert not list(out.parent.glob(f".{out.name}*"))  # no temporary file left behind either
    assert "REJECTED" in result.stdout
    payload = json.loads((rep / "report.json").read_text())
    assert payload["verdict"]["approved"] is False
    assert payload["inputs"]["candidate"] is None  # not written, so no path or hash
    # the drop recomputed from the report's own accuracies exceeds the 1 pp budget (measured: 4.00 pp)
    c = payload["comparison"]
    assert 100 * (c["top1_original"] - c["top1_candidate"]) > 1.0


def test_force_writes_a_rejected_model_with_its_verdict(ws, forced, rejected):
    result, out, rep = forced
    assert result.exit_code == 1, result.output  # still a rejection for CI
    assert out.is_file()
    meta = verdict_meta(out)
    assert meta is not None and meta["approved"] is False
    # the model keeps the same verdict entry as report.json (README "The gate": metric, outputs, thresholds)
    assert set(meta) == {"approved", "reason", "rule", "metric", "outputs", "thresholds", "caution"}
    payload = json.loads((rep / "report.json").read_text())
    assert meta == payload["verdict"]
    assert meta["caution"] == payload["caution"]  # the model carries the caution with its verdict
    assert payload["inputs"]["candidate"]["sha256"] == sha256(out)
    # the forced model really is the rejected one: its drop exceeds the budget when measured here
    drop = 100 * (top1(ws["models"]["meter_cnn_silu"]) - top1(out))
    assert drop > 1.0
    # same options, same seed: the forced model has the accuracy the rejected run reported
    c = json.loads((rejected[2] / "report.json").read_text())["comparison"]
    assert top1(out) == pytest.approx(c["top1_candidate"])


def test_the_caution_is_the_line_after_the_verdict(ws, approved, rejected):
    for result, _, rep in (approved, rejected):
        lines = result.stdout.splitlines()
        at = next(i for i, line in enumerate(lines) if line.startswith(("APPROVED", "REJECTED")))
        caution = json.loads((rep / "report.json").read_text())["caution"]
        assert lines[at + 1].strip() == caution  # one line, right after the verdict


def test_strict_zero_budget_rejects_what_the_point_rule_approves(cli, ws, tmp_path):
    model = ws["models"]["meter_mlp_tanh_sigmoid"]
    common = ("--no-calibrate", "--to", "hard_tanh", "--val", VAL)
    loose = cli("swap", model, "-o", tmp_path / "a.onnx", *common, "--report", tmp_path / "ra")
    assert loose.exit_code == 0, loose.output
    strict = cli("swap", model, "-o", tmp_path / "b.onnx", *common, "--budget", 0, "--strict",
                 "--report", tmp_path / "rb")
    assert strict.exit_code == 1, strict.output
    assert not (tmp_path / "b.onnx").exists()
    payload = json.loads((tmp_path / "rb" / "report.json").read_text())
    iv = payload["comparison"]["interval"]
    # README "The gate": with --strict approve only when the upper end of the 95% interval for the drop <= budget
    assert iv["level"] == 0.95 and -iv["lo_pp"] > 0.0
    assert "non-inferiority" in payload["verdict"]["rule"]
    assert payload["budget"] == {"max_drop_pp": 0.0, "strict": True, "min_agreement": None}


def test_min_agreement_above_measured_agreement_rejects(cli, ws, approved, tmp_path):
    # README: --min-agreement also applies with labels. Measured agreement of the approved CNN: 99.78%.
    result = cli("check", ws["models"]["meter_cnn_silu"], approved[1], "--val", VAL, "--min-agreement", 1.0,
                 "--report", tmp_path / "r")
    payload = json.loads((tmp_path / "r" / "report.json").read_text())
    # agreement = share of samples with the same top-1 class, recomputed here (README "The gate")
    agreement = float(np.mean(predict(ws["models"]["meter_cnn_silu"]) == predict(approved[1])))
    assert payload["comparison"]["agreement"] == pytest.approx(agreement, abs=1e-12)
    assert agreement < 1.0  # measured 99.78% (449/450)
    assert result.exit_code == 1, result.output
    assert payload["verdict"]["approved"] is False and "agreement" in payload["verdict"]["reason"]


@pytest.mark.parametrize("case", ["nan", "shape", "missing", "short-labels"])
def test_bad_validation_data_exits_2(cli, ws, tmp_path, case):
    pixels = np.load(VAL)["pixels"]
    labels = np.load(VAL)["labels"]
    val = tmp_path / "val.npz"
    if case == "nan":
        bad = pixels.copy()
        bad[11, 0, 0, 0] = np.inf
        np.savez(val, pixels=bad, labels=labels)
        expect = ("'pixels'", "11")
    elif case == "shape":
        np.savez(val, pixels=pixels[:, :, :, :5], labels=labels)
        expect = ("'pixels'", "shape")
    elif case == "missing":
        val = tmp_path / "absent.npz"
        expect = ("absent.npz",)
    else:  # labels whose length does not match the samples
        np.savez(val, pixels=pixels, labels=labels[:-3])
        expect = ("labels",)
    out = tmp_path / "o.onnx"
    result = cli("swap", ws["models"]["meter_mlp_tanh_sigmoid"], "-o", out, "--no-calibrate", "--val", val,
                 "--report", tmp_path / "r")
    one_line_error(result, *expect)
    assert not out.exists()


# ----------------------------------------------------------------------------- swapper check


def test_check_exit_codes_follow_the_verdict(cli, ws, approved, forced, tmp_path):
    original = ws["models"]["meter_cnn_silu"]
    ok = cli("check", original, approved[1], "--val", VAL, "--report", tmp_path / "ok")
    assert ok.exit_code == 0, ok.output
    no = cli("check", original, forced[1], "--val", VAL, "--report", tmp_path / "no")
    assert no.exit_code == 1, no.output
    for folder, approved_flag, cand in (("ok", True, approved[1]), ("no", False, forced[1])):
        payload = json.loads((tmp_path / folder / "report.json").read_text())
        assert payload["verdict"]["approved"] is approved_flag
        assert payload["plan"] is None and payload["sites"] == [] and payload["calibration"] is None
        assert payload["inputs"]["candidate"]["sha256"] == sha256(cand)
        # source: scikit-learn accuracy_score of onnxruntime argmax predictions
        assert payload["comparison"]["top1_original"] == pytest.approx(top1(original), abs=1e-12)
        assert payload["comparison"]["top1_candidate"] == pytest.approx(top1(cand), abs=1e-12)


def test_check_a_model_against_itself_is_approved_with_no_change(cli, ws, tmp_path):
    model = ws["models"]["meter_mlp_tanh_sigmoid"]
    result = cli("check", model, model, "--val", VAL, "--budget", 0, "--report", tmp_path / "r")
    assert result.exit_code == 0, result.output
    c = json.loads((tmp_path / "r" / "report.json").read_text())["comparison"]
    # identical models: no discordant pairs, full agreement, zero delta (definition of McNemar's table)
    assert (c["n01"], c["n10"], c["agreement"], c["delta_pp"]) == (0, 0, 1.0, 0.0)
    # a zero drop reads "0.00", not "-0.00" (the negation of 0.0 is -0.0 in IEEE 754 arithmetic)
    assert "drop 0.00 pp" in result.stdout and "-0.00" not in result.stdout
    assert c["drop_pp"] == 0.0 and str(c["drop_pp"]) == "0.0"


def test_check_int8_adds_the_int8_section(cli, ws, approved, tmp_path):
    result = cli("check", ws["models"]["meter_cnn_silu"], approved[1], "--val", VAL, "--int8",
                 "--calib", CALIB, "--report", tmp_path / "r")
    # the candidate the swap approved (exit 0 above), judged by the same float rule: the verdict is decided
    # before the int8 view is built (swapper.api.check), so --int8 adds figures and the exit code stays 0
    assert result.exit_code == 0, result.output
    payload = json.loads((tmp_path / "r" / "report.json").read_text())
    q = payload["int8"]
    assert q is not None
    assert set(q) >= {"comparison", "latency", "size", "quantization"}
    assert q["comparison"]["n"] == 450  # source: demo_models/README.md, val.npz has 450 rows
    for key in ("top1_original", "top1_candidate"):
        assert 0.0 <= q["comparison"][key] <= 1.0
    # int8 models keep fp32 accuracy within a few points on this easy task (common practice, no source)
    assert abs(q["comparison"]["top1_original"] - payload["comparison"]["top1_original"]) < 0.05
    assert q["latency"]["original"]["median_ms"] > 0 and q["latency"]["ratio"] > 0
    assert q["size"]["original_bytes"] > 0 and q["size"]["candidate_bytes"] > 0
    assert "int8" in (tmp_path / "r" / "report.html").read_text()


def test_check_bad_input_exits_2(cli, ws, approved, tmp_path):
    original = ws["models"]["meter_cnn_silu"]
    result = cli("check", original, tmp_path / "nope.onnx", "--val", VAL, "--report", tmp_path / "r")
    assert result.exit_code == 2 and "nope.onnx" in result.stderr
    flat = tmp_path / "flat.npz"
    np.savez(flat, pixels=np.load(VAL)["pixels"].reshape(450, 64), labels=np.load(VAL)["labels"])
    result = cli("check", original, approved[1], "--val", flat, "--report", tmp_path / "r2")
    assert result.exit_code == 2 and "flat.npz" in result.stderr
