"""Exit codes and the one-line promise at the command line's edge (README "Exit codes", swapper/errors.py).

Usage errors found by the option parser (unknown option, missing option, bad or out-of-range value) print
one line ``error: ...`` and exit 2, without the boxed usage panel typer/click print by default. An
unexpected exception is exit 4 with one line pointing at ``--verbose`` (which shows the traceback), never 1.
Paths and names are printed as written: rich markup in them is text. Everything runs in-process through
typer's CliRunner except where the Python entry point itself (``python -m swapper.cli``) is under test.
"""
from __future__ import annotations

import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest
from testkit import DEMO, one_line_error, sha256

from swapper.errors import EXIT_INTERNAL
from swapper.options import MAX_BATCH_SIZE, MAX_CACHE_MB, MAX_THREADS

ROOT = Path(__file__).resolve().parents[2]
MODEL = DEMO / "meter_mlp_tanh_sigmoid.onnx"
BOX = ("Usage:", "Try '", "╭", "│", "─")  # pieces of click's usage text and typer's rich panel


def usage_line(result, *fragments: str) -> str:
    """Exit 2 and one stderr line ``error: ...`` holding ``fragments``, and none of the usage panel."""
    line = one_line_error(result, *fragments)
    assert line.startswith("error: "), line
    assert not any(piece in result.output for piece in BOX), result.output
    return line


@pytest.mark.parametrize("extra, names", [
    (["--bogus"], "--bogus"),
    (["--threads", "abc"], "--threads"),
    (["--threads", "0"], "--threads"),
    (["--threads", str(MAX_THREADS + 1)], "--threads"),  # 100000 threads stall onnxruntime's pool
    (["--seed", "-1"], "--seed"),  # numpy's Generator refuses negative seeds
    (["--seed", str(2**32)], "--seed"),
    (["--cache-mb", "inf"], "--cache-mb"),
    (["--cache-mb", "nan"], "--cache-mb"),  # NaN passes every range comparison: refused by its own check
    (["--cache-mb", str(MAX_CACHE_MB * 2)], "--cache-mb"),
    (["--batch-size", str(MAX_BATCH_SIZE + 1)], "--batch-size"),
    (["--budget", "nan"], "--budget"),
    (["--min-cosine", "inf"], "--min-cosine"),
])
def test_bad_swap_options_are_one_usage_line(cli, tmp_path, extra, names):
    out = tmp_path / "out.onnx"
    usage_line(cli("swap", MODEL, "--calib", DEMO / "calib.npz", "-o", out, *extra), names)
    assert not out.exists()


def test_missing_option_is_one_usage_line(cli):
    usage_line(cli("check", MODEL, MODEL), "--val")


def test_unknown_option_of_scan_is_one_usage_line(cli):
    usage_line(cli("scan", MODEL, "--bogus"), "--bogus")


def test_bad_check_threads_is_one_usage_line(cli, tmp_path):
    usage_line(cli("check", MODEL, MODEL, "--val", DEMO / "val.npz", "--threads", "100000",
                   "--report", tmp_path / "r"), "--threads")


def test_an_internal_error_is_exit_4_with_one_line(cli, monkeypatch):
    from swapper import api

    def broken(*args, **kwargs):
        raise ZeroDivisionError("division by zero")

    monkeypatch.setattr(api, "scan", broken)
    result = cli("scan", MODEL)
    assert result.exit_code == EXIT_INTERNAL == 4, result.output
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in result.output, result.output
    assert lines[0].startswith("internal error: ZeroDivisionError: division by zero")
    assert "--verbose" in lines[0]
    verbose = cli("--verbose", "scan", MODEL)
    assert verbose.exit_code == 4
    assert "Traceback (most recent call last)" in verbose.stderr  # --verbose shows where it broke
    assert verbose.stderr.strip().splitlines()[-1].startswith("internal error: ZeroDivisionError")


def _module_entry(*args, cwd, prelude: str = "") -> subprocess.CompletedProcess:
    """``python -m swapper.cli ARGS`` with this checkout first on the path; ``prelude`` runs first."""
    code = prelude + "import runpy; runpy.run_module('swapper.cli', run_name='__main__', alter_sys=True)"
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")]))
    return subprocess.run([sys.executable, "-c", code, *map(str, args)], cwd=cwd, env=env, capture_output=True,
                          text=True, timeout=120)


def test_python_m_entry_point_has_the_same_guard(tmp_path):
    proc = _module_entry("scan", MODEL, cwd=tmp_path,
                         prelude="import swapper.api as a\na.scan = lambda *x, **k: 1 / 0\n")
    assert proc.returncode == 4, proc.stderr
    assert len(proc.stderr.strip().splitlines()) == 1 and "ZeroDivisionError" in proc.stderr
    usage = _module_entry("scan", MODEL, "--bogus", cwd=tmp_path)
    assert usage.returncode == 2 and usage.stderr.strip().splitlines() == ["error: No such option: --bogus"]


@pytest.mark.parametrize("name", ["[/b]good.onnx", "[red]good.onnx", "[bold red]x[/].onnx"])
def test_markup_in_a_valid_model_path_is_printed_as_written(cli, tmp_path, name):
    path = tmp_path / name  # "[/b]good.onnx" is the file "b]good.onnx" in a folder named "["
    path.parent.mkdir(exist_ok=True)
    shutil.copy(MODEL, path)
    result = cli("scan", path)
    assert result.exit_code == 0, result.output
    assert name in result.stdout  # rich would have swallowed "[red]" or failed on "[/b]"


@pytest.mark.parametrize("name", ["[/b]bad.onnx", "[red]bad.onnx"])
def test_markup_in_a_broken_model_path_is_printed_as_written(cli, tmp_path, name):
    path = tmp_path / name
    path.parent.mkdir(exist_ok=True)
    path.write_bytes(b"not a model")
    one_line_error(cli("scan", path), name)


def test_markup_in_the_output_path_and_node_names(cli, tmp_path):
    import onnx

    model = onnx.load(MODEL)
    for node, name in zip(model.graph.node, ("[/b]", "[red]", "[/]")):
        node.name = name
    path = tmp_path / "names.onnx"
    onnx.save(model, path)
    assert cli("scan", path).exit_code == 0
    (tmp_path / "[").mkdir()
    out = tmp_path / "[/b]out.onnx"
    result = cli("swap", path, "--no-calibrate", "-o", out)
    assert result.exit_code == 0, result.output
    assert out.is_file() and f"wrote {out}" in " ".join(result.stdout.split())


def test_demo_out_naming_a_file_is_one_line(cli, tmp_path):
    taken = tmp_path / "taken.txt"
    taken.write_text("keep me\n")
    before = sha256(taken)
    one_line_error(cli("demo", "--out", taken), str(taken), "is a file")
    one_line_error(cli("demo", "--out", taken / "demo"), str(taken))
    assert sha256(taken) == before


def test_sigterm_ends_the_run_and_removes_its_spill_files(tmp_path):
    # A killed run used to leave swapper-cache-* folders in TMPDIR; SIGTERM now unwinds the stack
    # (exit 128 + 15, the shell's convention) so the cache's temporary folder is removed.
    import signal
    import time

    import numpy as np

    with np.load(DEMO / "calib.npz") as z:
        np.savez(tmp_path / "calib.npz", pixels=np.tile(z["pixels"], (16, 1, 1, 1)))  # 4096 samples
    tmp = tmp_path / "tmp"
    tmp.mkdir()
    env = dict(os.environ, TMPDIR=str(tmp),
               PYTHONPATH=os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")]))
    proc = subprocess.Popen([sys.executable, "-m", "swapper.cli", "swap", str(DEMO / "meter_cnn_silu.onnx"),
                             "--calib", "calib.npz", "-o", "out.onnx", "--cache-mb", "0", "--target", "none"],
                            cwd=tmp_path, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    deadline = time.monotonic() + 120
    while not any(tmp.glob("swapper-cache-*")) and proc.poll() is None and time.monotonic() < deadline:
        time.sleep(0.01)
    assert proc.poll() is None, "the run ended before its cache folder was seen"
    proc.send_signal(signal.SIGTERM)
    proc.communicate(timeout=60)
    assert proc.returncode == 143
    assert not list(tmp.glob("swapper-cache-*"))
    assert not (tmp_path / "out.onnx").exists()
