"""Exit codes through the command line, and the status encoder gated end to end.

Contract (README "Exit codes", swapper/errors.py): 0 approved, 1 rejected, 2 bad
input or usage, 3 cannot judge with this data, with one line on stderr saying
what is missing and which option or array supplies it. The status encoder and
its data are described in demo_models/README.md; its embeddings are recomputed
here with onnxruntime and compared with ``scipy.spatial.distance.cosine``.
"""
from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np
import onnx
import onnx.parser
import onnxruntime as ort
import pytest
from scipy.spatial.distance import cosine as scipy_cosine_distance
from typer.testing import CliRunner

from swapper.cli.app import app

DEMO = Path(__file__).resolve().parents[2] / "demo_models"
ENCODER = DEMO / "status_encoder_gelu.onnx"
CALIB, VAL = DEMO / "status_calib.npz", DEMO / "status_val.npz"
runner = CliRunner()


def invoke(*args):
    return runner.invoke(app, [str(a) for a in args])


def one_line(result, code: int) -> str:
    assert result.exit_code == code, (result.exit_code, result.stdout, result.stderr)
    text = result.stderr.strip()
    assert text and "\n" not in text and "Traceback" not in result.output, repr(result.stderr)
    return text


@pytest.fixture(scope="module")
def encoder(tmp_path_factory):
    """A copy of the status encoder (commands must never touch the checkout's file) and its swap."""
    root = tmp_path_factory.mktemp("enc")
    model = root / ENCODER.name
    shutil.copyfile(ENCODER, model)
    before = model.read_bytes()
    out = root / "swapped.onnx"
    result = invoke("swap", model, "-o", out, "--calib", CALIB, "--val", VAL, "--to", "hard_swish", "--plan", "all",
                    "--report", root / "rep")
    yield {"root": root, "model": model, "out": out, "result": result, "report": root / "rep" / "report.json"}
    assert model.read_bytes() == before  # README: the input model is never overwritten


def embeddings(path: Path) -> np.ndarray:
    data = np.load(VAL)
    sess = ort.InferenceSession(str(path), providers=["CPUExecutionProvider"])
    return sess.run(None, {"input_ids": data["input_ids"], "attention_mask": data["attention_mask"]})[0]


def test_status_encoder_swap_to_hard_swish_is_approved_by_cosine(encoder):
    result = encoder["result"]
    assert result.exit_code == 0, (result.stdout, result.stderr)
    assert encoder["out"].is_file()
    payload = json.loads(encoder["report"].read_text())
    v = payload["verdict"]
    assert v["approved"] is True and v["metric"] == "cosine" and v["outputs"] == ["embedding"]
    assert payload["comparison"]["output_kinds"]["embedding"]["kind"] == "embedding"
    # the figures in the report, recomputed from the written model: scipy cosine per validation message
    cos = np.array([1.0 - scipy_cosine_distance(a, b) for a, b in
                    zip(embeddings(encoder["model"]).astype(np.float64), embeddings(encoder["out"]))])
    errs = payload["comparison"]["output_errors"]["embedding"]
    assert errs["cosine_mean"] == pytest.approx(cos.mean(), abs=1e-6)
    assert errs["cosine_p5"] == pytest.approx(np.percentile(cos, 5, method="linear"), abs=1e-6)
    # README "The gate" defaults: mean >= 0.995 and worst 5% >= 0.99
    assert cos.mean() >= 0.995 and np.percentile(cos, 5) >= 0.99
    # the terminal names the metric and its numbers; status_val.npz's `classes` is left out with one note
    assert "decided by: cosine on embedding" in result.stdout and f"{errs['cosine_mean']:.5f}" in result.stdout
    assert result.stdout.count("ignored 1 array(s) the model does not read: 'classes'") == 1
    assert "top-1 agreement" not in result.stdout  # argmax of an embedding is not shown as a figure


def test_check_of_the_encoder_reports_cosine_and_exits_0(encoder, tmp_path):
    result = invoke("check", encoder["model"], encoder["out"], "--val", VAL, "--report", tmp_path / "r")
    assert result.exit_code == 0, (result.stdout, result.stderr)
    html = (tmp_path / "r" / "report.html").read_text()
    assert "Decided by: cosine on embedding" in html and "per-sample cosine mean" in html


@pytest.mark.parametrize("options,needles", [
    (("--metric", "top1"), ("'labels'", "--metric")),
    (("--metric", "rmse"), ("'expected'",)),
])
def test_check_that_cannot_judge_exits_3_with_one_line(encoder, tmp_path, options, needles):
    text = one_line(invoke("check", encoder["model"], encoder["out"], "--val", VAL, *options,
                           "--report", tmp_path / "r"), 3)
    assert text.startswith("cannot judge:") and all(n in text for n in needles), text
    assert not (tmp_path / "r").exists()  # decided before any measuring or reporting


def test_swap_that_cannot_judge_stops_before_calibrating(encoder, tmp_path):
    out = tmp_path / "o.onnx"
    result = invoke("swap", encoder["model"], "-o", out, "--calib", CALIB, "--val", VAL, "--metric", "top1",
                    "--report", tmp_path / "r")
    assert "labels" in one_line(result, 3)
    assert "calibration time" not in result.stdout and not out.exists() and not (tmp_path / "r").exists()


def test_a_model_with_no_float_output_exits_3(tmp_path):
    m = onnx.parser.parse_model('<ir_version: 8, opset_import: ["" : 17]>\n'
                                "g (float[N, 4] x) => (int64[N] ids) { ids = ArgMax <axis = 1, keepdims = 0> (x) }")
    path = tmp_path / "ids.onnx"
    onnx.save(m, str(path))
    np.savez(tmp_path / "val.npz", x=np.random.default_rng(0).normal(size=(10, 4)).astype(np.float32))
    text = one_line(invoke("check", path, path, "--val", tmp_path / "val.npz", "--report", tmp_path / "r"), 3)
    assert "no float output" in text and "int64" in text


def test_contradicting_gate_options_are_usage_errors(encoder, tmp_path):
    text = one_line(invoke("check", encoder["model"], encoder["out"], "--val", VAL, "--metric", "cosine",
                           "--min-sqnr", 30, "--report", tmp_path / "r"), 2)
    assert "--min-sqnr" in text
    text = one_line(invoke("swap", encoder["model"], "-o", tmp_path / "o.onnx", "--no-calibrate",
                           "--min-cosine", 0.99), 2)
    assert "--val" in text


def test_strict_data_refuses_the_extra_array(encoder, tmp_path):
    text = one_line(invoke("check", encoder["model"], encoder["out"], "--val", VAL, "--strict-data",
                           "--report", tmp_path / "r"), 2)
    assert "status_val.npz" in text and "'classes'" in text


def test_a_tight_floor_rejects_with_exit_1(encoder, tmp_path):
    result = invoke("check", encoder["model"], encoder["out"], "--val", VAL, "--min-cosine", 1.0,
                    "--report", tmp_path / "r")
    assert result.exit_code == 1, (result.stdout, result.stderr)  # rejected by the gate and nothing else
    v = json.loads((tmp_path / "r" / "report.json").read_text())["verdict"]
    assert v["approved"] is False and v["metric"] == "cosine" and v["thresholds"]["min_cosine"] == 1.0
