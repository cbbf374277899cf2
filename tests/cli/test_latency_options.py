"""`--latency-runs N` / `--no-latency` on check (and swap --val), progress on the latency phase, and the
candidate's reported size being the size of the file written.

The size is held against the file system (os.stat of what was written, external data files included);
the number of timed runs against what the report records; progress against a recording reporter.
"""
from __future__ import annotations

import json
import shutil
from contextlib import contextmanager
from pathlib import Path

import numpy as np
import onnx
import pytest
from testkit import DEMO

from swapper import api
from swapper.core.model_io import load_model, save_model, saved_size

MODEL = DEMO / "meter_mlp_tanh_sigmoid.onnx"


@pytest.fixture(scope="module")
def files(tmp_path_factory) -> dict[str, Path]:
    root = tmp_path_factory.mktemp("latency")
    with np.load(DEMO / "val.npz") as z:
        np.savez(root / "val.npz", pixels=z["pixels"][:128], labels=z["labels"][:128])
    with np.load(DEMO / "calib.npz") as z:
        np.savez(root / "calib.npz", pixels=z["pixels"][:64])
    shutil.copy(MODEL, root / "m.onnx")
    return {"root": root, "model": root / "m.onnx", "val": root / "val.npz", "calib": root / "calib.npz"}


def test_no_latency_is_said_in_the_terminal_and_the_report(cli, files, tmp_path):
    result = cli("check", files["model"], files["model"], "--val", files["val"], "--report", tmp_path / "r",
                 "--no-latency")
    assert result.exit_code == 0, result.output
    assert "latency: not measured (--no-latency)" in result.stdout
    report = json.loads((tmp_path / "r" / "report.json").read_text())
    assert report["latency"] is None
    assert "latency not measured" in (tmp_path / "r" / "report.html").read_text()


def test_latency_runs_sets_the_timed_runs(cli, files, tmp_path):
    result = cli("check", files["model"], files["model"], "--val", files["val"], "--report", tmp_path / "r",
                 "--latency-runs", "7")
    assert result.exit_code == 0, result.output
    latency = json.loads((tmp_path / "r" / "report.json").read_text())["latency"]
    assert latency["original"]["runs"] == latency["candidate"]["runs"] == 7


def test_no_progress_output_in_a_pipe(cli, files, tmp_path):
    # CliRunner's streams are not terminals: no progress bar may reach the captured output
    result = cli("check", files["model"], files["model"], "--val", files["val"], "--report", tmp_path / "r",
                 "--latency-runs", "3")
    assert result.exit_code == 0
    assert "timing latency" not in result.output and "━" not in result.stderr


class Recorder:
    """A progress reporter that records each task's description, total and how far it advanced."""

    def __init__(self):
        self.tasks: list[list] = []

    @contextmanager
    def task(self, description, total):
        entry = [description, total, 0]
        self.tasks.append(entry)

        def advance(n=1):
            entry[2] += n

        yield advance


def test_the_latency_phase_reports_progress(files):
    loaded = load_model(files["model"])
    val = api.load_data(files["val"], loaded)
    recorder = Recorder()
    api.check(loaded.model, loaded.model, val, latency_repeats=5, progress=recorder)
    timing = [t for t in recorder.tasks if t[0] == "timing latency"]
    assert timing == [["timing latency", 5, 5]]  # one advance per interleaved round


def test_the_reported_candidate_size_is_the_written_file(cli, files, tmp_path):
    out = tmp_path / "out.onnx"
    result = cli("swap", files["model"], "--calib", files["calib"], "--val", files["val"], "-o", out,
                 "--report", tmp_path / "r", "--latency-runs", "2")
    assert result.exit_code == 0, result.output
    size = json.loads((tmp_path / "r" / "report.json").read_text())["size"]
    assert size["candidate"]["bytes"] == out.stat().st_size
    assert size["original"]["bytes"] == files["model"].stat().st_size


def test_saved_size_counts_the_external_data(tmp_path):
    model = onnx.load(MODEL)
    out = save_model(model, tmp_path / "big.onnx", external_above=16)  # the external-data path of > 2 GiB
    assert (tmp_path / "big.onnx.data").is_file()
    assert saved_size(out) == out.stat().st_size + (tmp_path / "big.onnx.data").stat().st_size
    assert saved_size(out) == load_model(out).file_bytes
