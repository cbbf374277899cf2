"""The target options of the command line: `swapper targets`, `swap --target/--opset/--force`, `check --target`.

Timing goes through testkit.fixed_timer (conftest's stand-in, or a test's
own): what is checked is what the commands do with an answer, never a speed.
Expected choices come from the profile files and the ONNX operator spec
(HardSwish since opset 14), as README "Targets" states the rules.
"""
from __future__ import annotations

import json
import shutil

import onnx
import pytest
from testkit import CALIB, DEMO, VAL, fixed_timer, one_line_error

from swapper.targets import builtin_targets, load_target


@pytest.fixture(scope="module")
def models(tmp_path_factory):
    root = tmp_path_factory.mktemp("targets")
    for name in ("meter_resnet_silu", "meter_mlp_tanh_sigmoid", "meter_gelu_mlp"):
        shutil.copyfile(DEMO / f"{name}.onnx", root / f"{name}.onnx")
    return root


def _ops(path) -> set[str]:
    return {n.op_type for n in onnx.load(str(path)).graph.node}


def _meta(path) -> dict:
    return {p.key: p.value for p in onnx.load(str(path)).metadata_props}


def test_targets_lists_every_builtin_profile(cli):
    result = cli("targets")
    assert result.exit_code == 0
    lines = result.stdout.strip().splitlines()
    assert [ln.split()[0] for ln in lines] == builtin_targets()
    listed = json.loads(cli("targets", "--json").stdout)
    for entry in listed:
        p = load_target(entry["name"])
        assert entry == {"name": p.name, "precision": p.precision, "costs_from": p.costs_from,
                         "opset": {"min": p.opset_min, "max": p.opset_max}, "description": p.description}


def test_swap_that_does_not_pay_on_the_measured_target_writes_nothing(cli, models, tmp_path, monkeypatch):
    monkeypatch.setattr("swapper.check.on_target.measure_latency", fixed_timer(1.03))
    out = tmp_path / "o.onnx"
    result = cli("swap", models / "meter_mlp_tanh_sigmoid.onnx", "-o", out, "--no-calibrate")
    assert result.exit_code == 0, result.output
    assert result.stdout.strip().splitlines()[-1] == (
        "nothing pays on ort-cpu: candidate 1.030× the original, not measurably faster (needs <= 0.98×); "
        "no model written")
    assert not out.exists()
    forced = cli("swap", models / "meter_mlp_tanh_sigmoid.onnx", "-o", out, "--no-calibrate", "--force")
    assert forced.exit_code == 0 and out.exists()
    assert "not faster on ort-cpu; written because of --force" in forced.stdout
    timing = json.loads(_meta(out)["swapper.target"])
    # the model keeps how it was timed and the answer, not the timings (same inputs, same bytes: README)
    assert timing["target"] == "ort-cpu" and timing["faster"] is False and "ratio" not in timing


def test_swap_on_a_faster_target_writes_and_records_the_timing(cli, models, tmp_path):
    out = tmp_path / "o.onnx"
    result = cli("swap", models / "meter_mlp_tanh_sigmoid.onnx", "-o", out, "--calib", CALIB,
                 "--target", "ort-cpu-int8")
    assert result.exit_code == 0, result.output
    meta = _meta(out)
    plan = json.loads(meta["swapper.plan"])
    assert plan["target"] == "ort-cpu-int8" and {s["form"] for s in plan["swaps"]} == {"Clip"}
    timing = json.loads(meta["swapper.target"])
    assert timing["quantized"] and timing["faster"] is True  # conftest's stand-in answer: 0.9


def test_declared_target_and_the_opset_hint(cli, models, tmp_path):
    # npu-int8: x·Sigmoid(x) costs Sigmoid + Mul; hard_swish pays only as the HardSwish op (opset 14+),
    # so at opset 13 relu is taken and the command says what --opset 14 would give
    out = tmp_path / "o.onnx"
    result = cli("swap", models / "meter_resnet_silu.onnx", "-o", out, "--no-calibrate", "--target", "npu-int8")
    assert result.exit_code == 0, result.output
    assert "hint: HardSwish needs opset 14; this model is opset 13; rerun with --opset 14" in result.stdout
    assert "HardSwish" not in _ops(out) and "Sigmoid" not in _ops(out)
    out14 = tmp_path / "o14.onnx"
    result = cli("swap", models / "meter_resnet_silu.onnx", "-o", out14, "--no-calibrate", "--target", "npu-int8",
                 "--opset", 14, "--report", tmp_path / "rep")
    assert result.exit_code == 0, result.output
    assert "converted opset 13 → 14" in result.stdout and "hint:" not in result.stdout
    model = onnx.load(str(out14))
    assert [o.version for o in model.opset_import if o.domain in ("", "ai.onnx")] == [14]
    assert "HardSwish" in _ops(out14)
    plan = json.loads((tmp_path / "rep" / "report.json").read_text())["plan"]
    assert plan["conversion"]["from"] == 13 and plan["conversion"]["to"] == 14 and plan["opset"] == 14
    assert plan["conversion"]["max_abs_diff"] <= plan["conversion"]["bound"]


def test_a_surrogate_the_target_cannot_run_is_a_one_line_error(cli, models, tmp_path):
    # mcu-int8 has no HardSigmoid kernel; its Clip form needs b, c in the producer, which a residual Add is not
    one_line_error(cli("swap", models / "meter_resnet_silu.onnx", "-o", tmp_path / "o.onnx", "--no-calibrate",
                       "--target", "mcu-int8", "--to", "hard_sigmoid"),
                   "hard_sigmoid cannot be used on mcu-int8", "HardSigmoid, which mcu-int8 does not run")
    one_line_error(cli("swap", models / "meter_resnet_silu.onnx", "-o", tmp_path / "o.onnx", "--no-calibrate",
                       "--target", "mcu-int8", "--opset", 23), "mcu-int8 accepts opsets 11..22")
    one_line_error(cli("swap", models / "meter_resnet_silu.onnx", "-o", tmp_path / "o.onnx", "--no-calibrate",
                       "--target", "no-such-board"), "unknown target 'no-such-board'")


def test_without_a_target_the_registry_defaults_come_back(cli, models, tmp_path):
    out = tmp_path / "o.onnx"
    result = cli("swap", models / "meter_gelu_mlp.onnx", "-o", out, "--no-calibrate", "--target", "none")
    assert result.exit_code == 0, result.output
    plan = json.loads(_meta(out)["swapper.plan"])
    # README "What gets swapped": gelu -> hard_swish; opset 18 has the HardSwish op
    assert plan["target"] is None and {(s["surrogate"], s["form"]) for s in plan["swaps"]} == {("hard_swish", "HardSwish")}
    assert "swapper.target" not in _meta(out)


def test_check_reports_the_target(cli, models, tmp_path):
    cand = tmp_path / "c.onnx"
    assert cli("swap", models / "meter_gelu_mlp.onnx", "-o", cand, "--no-calibrate", "--target", "none").exit_code == 0
    result = cli("check", models / "meter_gelu_mlp.onnx", cand, "--val", VAL, "--target", "npu-int8",
                 "--report", tmp_path / "r")
    # README "Measured results": the uncalibrated hard_swish swap of meter_gelu_mlp loses 0.22 points on
    # val.npz, inside the default 1-point budget; a declared target's lacking ops are reported, not gated
    assert result.exit_code == 0, result.output
    entry = json.loads((tmp_path / "r" / "report.json").read_text())["latency"]["target"]
    # npu-int8 cannot run Div or Erf (the erf-GELU of the original); the hard_swish candidate has neither
    assert entry["lacking_ops"] == {"original": {"Div": 2, "Erf": 2}, "candidate": {}}
    assert "ops npu-int8 cannot run: original Div ×2, Erf ×2; candidate none" in result.stdout  # said, not only filed
    result = cli("check", models / "meter_gelu_mlp.onnx", cand, "--val", VAL, "--target", "ort-cpu-int8",
                 "--calib", CALIB, "--report", tmp_path / "r8")
    entry = json.loads((tmp_path / "r8" / "report.json").read_text())["latency"]["target"]
    assert entry["quantized"] and entry["ratio"] == pytest.approx(0.9)
    assert "on ort-cpu-int8: candidate 0.900× the original" in result.stdout


def test_functions_lists_each_surrogates_forms(cli):
    rows, last = {}, None  # function -> its table cells, a wrapped row's continuation lines joined on
    for ln in cli("functions").stdout.splitlines():
        if not ln.startswith("│"):
            continue
        cells = [c.strip() for c in ln.strip().strip("│").split("│")]
        if cells[0]:
            rows[last := cells[0]] = cells
        else:
            rows[last] = [f"{a} {b}".strip() for a, b in zip(rows[last], cells)]
    # source: ONNX operator spec, HardSwish since opset 14; Howard et al. 2019 for x·ReLU6(x + 3)/6
    assert rows["hard_swish"][4].startswith("HardSwish (opset ≥ 14), Mul-HardSigmoid, Mul-Clip")
    assert rows["relu"][4] == "Relu, Clip, Max" and rows["silu"][4] == ""
