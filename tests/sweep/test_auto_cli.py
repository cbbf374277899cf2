"""`swapper sweep` and `swapper swap --plan auto|all` through the command line, on testkit.two_elu_model."""
from __future__ import annotations

import json

import numpy as np
import onnx
import pytest
from testkit import two_elu_data, two_elu_model

from swapper.check.latency import LatencyStats


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    root = tmp_path_factory.mktemp("auto")
    onnx.save(two_elu_model(), root / "m.onnx")
    np.savez(root / "calib.npz", x=two_elu_data(96, 1))
    np.savez(root / "val.npz", x=two_elu_data(96, 2))
    return root


def _args(files):
    return (files / "m.onnx", "--calib", files / "calib.npz", "--val", files / "val.npz")


def test_sweep_writes_the_json_and_the_plot(cli, files, tmp_path):
    out = tmp_path / "sweep.json"
    result = cli("sweep", *_args(files), "--target", "none", "--to", "relu", "--metric", "sqnr", "-o", out)
    assert result.exit_code == 0, result.output
    payload = json.loads(out.read_text())
    assert payload["schema"] == "swapper.sweep/1" and len(payload["sites"]) == 2
    assert (tmp_path / "sweep.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG spec 5.2)
    as_json = cli("sweep", *_args(files), "--target", "none", "--to", "relu", "--no-refit", "--metric", "sqnr",
                  "-o", tmp_path / "again.json", "--json")
    assert as_json.exit_code == 0 and json.loads(as_json.stdout)["schema"] == "swapper.sweep/1"


def test_sweep_without_an_output_writes_a_new_report_folder(cli, files, tmp_path, monkeypatch):
    # README: without -o the sweep goes to reports/<model>-<UTC time>/sweep.json, a folder it creates
    monkeypatch.chdir(tmp_path)
    result = cli("sweep", *_args(files), "--target", "none", "--to", "relu", "--no-refit", "--metric", "sqnr")
    assert result.exit_code == 0, result.output
    written = list((tmp_path / "reports").glob("m-*/sweep.json"))
    assert len(written) == 1 and json.loads(written[0].read_text())["schema"] == "swapper.sweep/1"


def _slower_whole_models(models, feeds, **settings):
    # stand-in for the latency measurer: a candidate timed in a site's neighbourhood is faster (0.9), the
    # whole candidate model (its graph output "out") slower (1.05) than the original
    whole = "out" in {o.name for o in models["original"].graph.output}
    ratio = 1.05 if whole else 0.9
    return {name: LatencyStats(*(3 * [1.0 if name == "original" else ratio]), settings.get("repeats", 30))
            for name in sorted(models)}


def test_a_plan_that_is_not_faster_is_never_written(cli, files, tmp_path, monkeypatch):
    monkeypatch.setattr("swapper.check.on_target.measure_latency", _slower_whole_models)
    out = tmp_path / "o.onnx"
    result = cli("swap", *_args(files), "-o", out, "--metric", "sqnr", "--min-sqnr", 3, "--to", "relu",
                 "--report", tmp_path / "rep")
    assert result.exit_code == 0, result.output
    assert "nothing pays on ort-cpu" in result.stdout and "no model written" in result.stdout
    assert "verification 1" in result.stdout  # the sweep saw savings; the combined plan was timed and refused
    assert not out.exists() and not (tmp_path / "rep").exists()


def test_auto_on_a_faster_target_writes_the_plan_and_its_search(cli, files, tmp_path):
    out = tmp_path / "o.onnx"  # the session's stand-in clock: every candidate 0.9x the original
    result = cli("swap", *_args(files), "-o", out, "--metric", "sqnr", "--min-sqnr", 3, "--to", "relu",
                 "--report", tmp_path / "rep")
    assert result.exit_code == 0, result.output
    report = json.loads((tmp_path / "rep" / "report.json").read_text())
    search = report["search"]
    assert search["target"]["name"] == "ort-cpu" and search["target"]["costs_from"] == "measured"
    assert {s["site_id"] for s in search["sites"]} == {s["site_id"] for s in report["plan"]["swaps"]}
    assert all(s["chosen"] and s["why"].startswith("chosen") for s in search["sites"])
    assert "Automatic plan" in (tmp_path / "rep" / "report.html").read_text()
    assert (tmp_path / "rep" / "sweep.json").exists()


def test_plan_all_is_the_plan_without_a_validation_set(cli, files, tmp_path):
    gated, plain = tmp_path / "gated.onnx", tmp_path / "plain.onnx"
    a = cli("swap", *_args(files), "-o", gated, "--plan", "all", "--target", "none", "--metric", "sqnr",
            "--min-sqnr", 3, "--report", tmp_path / "ra")
    b = cli("swap", files / "m.onnx", "--calib", files / "calib.npz", "-o", plain, "--target", "none")
    assert a.exit_code == 0 and b.exit_code == 0, a.output + b.output
    ga, gb = onnx.load(gated), onnx.load(plain)
    assert ga.graph.SerializeToString() == gb.graph.SerializeToString()  # same sites, same calibration, same bytes
    meta = {p.key: p.value for p in ga.metadata_props}
    assert len(json.loads(meta["swapper.plan"])["swaps"]) == 2  # every eligible site
    assert json.loads((tmp_path / "ra" / "report.json").read_text())["search"] is None


def test_auto_without_calibration_data_is_a_usage_error(cli, files, tmp_path):
    result = cli("swap", *_args(files)[:1], "--val", files / "val.npz", "--plan", "auto", "-o", tmp_path / "o.onnx",
                 "--no-calibrate")
    assert result.exit_code == 2 and "--calib" in result.stderr


def test_a_model_with_nothing_to_swap_says_so_in_one_line(cli, tmp_path):
    from testkit import float_model, init

    # a Gemm and a Relu: Relu is already cheap (registry), so no site is eligible and nothing can pay
    model = float_model([onnx.helper.make_node("Gemm", ["x", "w"], ["h"]), onnx.helper.make_node("Relu", ["h"], ["y"])],
                        [("x", ["N", 4])], [("y", ["N", 3])], [init("w", np.ones((4, 3)))])
    onnx.save(model, tmp_path / "m.onnx")
    np.savez(tmp_path / "d.npz", x=two_elu_data(20, 0))
    out = tmp_path / "o.onnx"
    result = cli("swap", tmp_path / "m.onnx", "--calib", tmp_path / "d.npz", "--val", tmp_path / "d.npz", "-o", out,
                 "--metric", "sqnr")
    assert result.exit_code == 0, result.output
    assert [line for line in result.stdout.splitlines() if line.startswith("nothing pays")] and not out.exists()


def test_nothing_swept_on_a_declared_target_names_the_ops_it_cannot_run(cli, tmp_path):
    # found in a trial: on mcu-int8 a HardSigmoid the target cannot run stayed and the line said only that
    # nothing pays. mcu-int8 marks HardSigmoid unsupported (swapper/targets/builtin/mcu-int8.json).
    from onnx import helper, numpy_helper

    rng = np.random.default_rng(0)
    nodes = [helper.make_node("Gemm", ["x", "w1", "b1"], ["h"]), helper.make_node("Add", ["h", "x2"], ["a"]),
             helper.make_node("HardSigmoid", ["a"], ["g"]), helper.make_node("Gemm", ["g", "w2", "b2"], ["logits"])]
    inits = [numpy_helper.from_array(v.astype(np.float32), k) for k, v in
             {"w1": rng.normal(size=(8, 16)), "b1": np.zeros(16), "x2": rng.normal(size=(1, 16)),
              "w2": rng.normal(size=(16, 4)), "b2": np.zeros(4)}.items()]
    graph = helper.make_graph(nodes, "g", [helper.make_tensor_value_info("x", onnx.TensorProto.FLOAT, ["N", 8])],
                              [helper.make_tensor_value_info("logits", onnx.TensorProto.FLOAT, ["N", 4])], inits)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    onnx.save(model, tmp_path / "m.onnx")
    x = rng.normal(size=(64, 8)).astype(np.float32)
    np.savez(tmp_path / "c.npz", x=x)
    np.savez(tmp_path / "v.npz", x=x, labels=np.zeros(64, np.int64))
    result = cli("swap", tmp_path / "m.onnx", "-o", tmp_path / "o.onnx", "--calib", tmp_path / "c.npz",
                 "--val", tmp_path / "v.npz", "--target", "mcu-int8", "--budget", "100")
    assert result.exit_code == 0, result.output
    # the Clip form cannot place b, c behind this Add: no zero-node candidate, so nothing is swept
    assert "no site was eligible to sweep" in result.stdout
    assert "the model keeps ops mcu-int8 cannot run: HardSigmoid ×1" in result.stdout
    assert not (tmp_path / "o.onnx").exists()
