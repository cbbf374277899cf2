"""The commands on sites inside If/Loop bodies: what scan says of a branch that did not run, what swap warns.

Reference: the ONNX operator spec of If (only the branch the condition names runs) and Loop.
"""
from __future__ import annotations

import numpy as np
import onnx
from onnx import parser
from testkit import as_loaded

# a Tanh, a Sigmoid in a Loop body (s2), a Softplus in an If branch (s3)
MODEL = """
<ir_version: 8, opset_import: ["" : 17]>
g (float[N,4] x, bool c) => (float[N,4] y, float[N,4] z) <int64 M = {3}> {
   x1 = Tanh(x)
   go = Constant<value = bool {1}>()
   y = Loop(M, go, x1) <body = body (int64 i, bool k, float[N,4] v) => (bool ko, float[N,4] vo) {
        ko = Identity(k)
        vo = Sigmoid(v)
   }>
   z = If(c) <then_branch = th () => (float[N,4] a) { a = Softplus(x) },
              else_branch = el () => (float[N,4] b) { b = Neg(x) }>
}
"""


def saved(tmp_path, model, name="m.onnx"):
    path = tmp_path / name
    onnx.save(model, path)
    return path


def test_scan_command_names_the_body_sites_that_did_not_run(tmp_path, cli):
    path = saved(tmp_path, as_loaded(parser.parse_model(MODEL)))
    np.savez(tmp_path / "calib.npz", x=np.ones((2, 4), np.float32))
    result = cli("scan", path, "--calib", tmp_path / "calib.npz", "--constant", "c=0")
    assert result.exit_code == 0, result.output
    assert "cost 0 for s3: their body did not run on the measured sample" in result.stdout
    assert "in Loop_2.body" in result.stdout  # where the Sigmoid sits


def test_swap_command_warns_about_body_sites_no_calibration_batch_ran(tmp_path, cli):
    path = saved(tmp_path, as_loaded(parser.parse_model(MODEL)))
    np.savez(tmp_path / "calib.npz", x=np.ones((8, 4), np.float32))
    result = cli("swap", path, "-o", tmp_path / "out.onnx", "--sites", "s3", "--to", "relu", "--fold", "exact+nodes",
                 "--calib", tmp_path / "calib.npz", "--constant", "c=0", "--target", "none")
    assert result.exit_code == 0, result.output
    assert "warning: s3 sits in a body no calibration batch ran" in result.stdout
    assert (tmp_path / "out.onnx").exists()


def test_sweep_says_which_body_sites_it_leaves_out(tmp_path, cli):
    # found in a trial: a sweep of a model whose sites sit in If/Loop bodies came back empty without a word
    path = saved(tmp_path, as_loaded(parser.parse_model(MODEL)))
    x = np.random.default_rng(0).normal(size=(16, 4)).astype(np.float32)
    np.savez(tmp_path / "calib.npz", x=x)
    np.savez(tmp_path / "val.npz", x=x)
    result = cli("sweep", path, "--calib", tmp_path / "calib.npz", "--val", tmp_path / "val.npz", "--constant", "c=1",
                 "--target", "none", "--metric", "sqnr", "--no-refit", "-o", tmp_path / "sweep.json")
    assert result.exit_code == 0, result.output
    assert "note: not swept: s2, s3 inside If/Loop/Scan bodies" in result.stdout
