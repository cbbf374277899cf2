"""Nothing lost: outputs never overwrite an input, bad output places are found before any work,
and written files get the permissions an ordinary new file gets.

An input is every file the run reads: the model, its external data, the calibration and validation
files, and the files of a data folder. "The same file" is judged the way the kernel does (same
resolved path, or same device and inode: POSIX stat(2) st_dev/st_ino), so symbolic links, hard links
and ``..`` do not slip through. Each refusal is one line, exit 2, and the inputs stay byte-identical.
"""
from __future__ import annotations

import os
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import onnx
import pytest
from testkit import DEMO, one_line_error, sha256

from swapper.core.files import atomic_write_bytes, check_output_path, check_report_dir
from swapper.errors import BadOutputError

ROOT = Path(__file__).resolve().parents[2]
MODEL = "meter_mlp_tanh_sigmoid.onnx"


@pytest.fixture
def work(tmp_path) -> Path:
    shutil.copy(DEMO / MODEL, tmp_path / "m.onnx")
    with np.load(DEMO / "calib.npz") as z:
        np.savez(tmp_path / "calib.npz", pixels=z["pixels"][:64])
    with np.load(DEMO / "val.npz") as z:
        np.savez(tmp_path / "val.npz", pixels=z["pixels"][:64], labels=z["labels"][:64])
    folder = tmp_path / "calib_dir"
    folder.mkdir()
    with np.load(tmp_path / "calib.npz") as z:
        np.save(folder / "pixels.npy", z["pixels"])
    return tmp_path


def _hashes(folder: Path) -> dict[str, str]:
    return {p.relative_to(folder).as_posix(): sha256(p) for p in sorted(folder.rglob("*")) if p.is_file()}


@pytest.mark.parametrize("args, out, names", [
    (["--calib", "calib.npz"], "calib.npz", "the calibration set"),
    (["--calib", "calib.npz", "--val", "val.npz"], "val.npz", "the validation set"),
    (["--calib", "calib_dir"], "calib_dir/pixels.npy", "the calibration set"),
    (["--calib", "calib.npz"], "sub/../m.onnx", "the input model"),
    (["--no-calibrate"], "./m.onnx", "the input model"),
])
def test_output_naming_an_input_is_refused(cli, work, monkeypatch, args, out, names):
    monkeypatch.chdir(work)
    (work / "sub").mkdir()
    before = _hashes(work)
    one_line_error(cli("swap", "m.onnx", *args, "-o", out), str(Path(out)), "refusing to overwrite", names)
    assert _hashes(work) == before


@pytest.mark.parametrize("make", ["symlink", "hardlink"])
def test_output_that_is_a_link_to_the_model_is_refused(cli, work, monkeypatch, make):
    monkeypatch.chdir(work)
    (os.symlink if make == "symlink" else os.link)("m.onnx", "alias.onnx")
    before = sha256(work / "m.onnx")
    one_line_error(cli("swap", "m.onnx", "--no-calibrate", "-o", "alias.onnx"), "alias.onnx", "the input model")
    assert sha256(work / "m.onnx") == before


def test_output_naming_the_external_data_is_refused(cli, work, monkeypatch):
    monkeypatch.chdir(work)
    model = onnx.load("m.onnx")
    onnx.save_model(model, "ext.onnx", save_as_external_data=True, all_tensors_to_one_file=True,
                    location="weights.bin", size_threshold=0)
    before = sha256(work / "weights.bin")
    one_line_error(cli("swap", "ext.onnx", "--no-calibrate", "-o", "weights.bin"), "weights.bin",
                   "external data")
    assert sha256(work / "weights.bin") == before


def test_report_folder_that_cannot_be_made_is_found_before_the_model_is_written(cli, work, monkeypatch):
    monkeypatch.chdir(work)
    Path("taken.txt").write_text("keep me\n")
    result = cli("swap", "m.onnx", "--calib", "calib.npz", "--val", "val.npz", "-o", "out.onnx",
                 "--report", "taken.txt/rep")
    one_line_error(result, "taken.txt", "not a folder")
    assert not Path("out.onnx").exists()  # checked before any work, so nothing half-done is left


def test_report_files_may_not_overwrite_the_output_model(cli, work, monkeypatch):
    monkeypatch.chdir(work)
    Path("rep").mkdir()
    one_line_error(cli("swap", "m.onnx", "--calib", "calib.npz", "--val", "val.npz", "-o", "rep/report.json",
                       "--report", "rep"), "rep", "the output model")


needs_proc = pytest.mark.skipif(not Path("/proc/self").is_dir(), reason="needs Linux /proc")


@needs_proc
def test_unwritable_places_even_for_root(tmp_path):
    # procfs refuses new files whoever asks (proc(5)); a path under a regular file cannot exist (ENOTDIR).
    # Both hold as root, where a chmod 0500 folder would still be writable.
    with pytest.raises(BadOutputError, match="cannot write in folder '/proc'"):
        check_output_path("/proc/out.onnx")
    with pytest.raises(BadOutputError, match="cannot write in folder '/proc/self'"):
        check_report_dir("/proc/self")
    taken = tmp_path / "taken.txt"
    taken.write_text("x")
    with pytest.raises(BadOutputError, match="is not a folder"):
        check_output_path(taken / "out.onnx")
    with pytest.raises(BadOutputError, match="is not a folder"):
        check_report_dir(taken / "rep")
    with pytest.raises(BadOutputError, match="cannot write"):
        atomic_write_bytes(b"x", "/proc/out.onnx")
    assert not [p for p in tmp_path.iterdir() if p.name != "taken.txt"]


@needs_proc
def test_check_report_under_proc_is_one_line(cli, work):
    cand = work / "m.onnx"
    one_line_error(cli("check", cand, cand, "--val", work / "val.npz", "--report", "/proc/self"), "/proc/self")


def test_too_long_and_nul_paths_are_refused(tmp_path):
    with pytest.raises(BadOutputError, match="longer than 255 bytes"):
        check_output_path(tmp_path / ("o" * 300 + ".onnx"))
    with pytest.raises(BadOutputError, match="NUL byte"):
        check_output_path(str(tmp_path / "a\0b.onnx"))


UMASK_PROBE = """
import os, stat, sys
from pathlib import Path
import onnx
from onnx import helper, TensorProto
os.umask(int(sys.argv[1], 8))
from swapper.core.files import atomic_write_bytes
from swapper.core.model_io import save_model
folder = Path(sys.argv[2])
atomic_write_bytes(b"{}", folder / "a.json")
x = helper.make_tensor_value_info("x", TensorProto.FLOAT, [1, 2])
y = helper.make_tensor_value_info("y", TensorProto.FLOAT, [1, 2])
m = helper.make_model(helper.make_graph([helper.make_node("Relu", ["x"], ["y"])], "g", [x], [y]),
                      opset_imports=[helper.make_opsetid("", 17)])
save_model(m, folder / "m.onnx")
print(" ".join(oct(stat.S_IMODE(os.stat(folder / n).st_mode)) for n in ("a.json", "m.onnx")))
"""


@pytest.mark.parametrize("umask, mode", [("022", "0o644"), ("027", "0o640"), ("002", "0o664")])
def test_written_files_get_the_umask_permissions(tmp_path, umask, mode):
    # An ordinary new file is created 0666 & ~umask (POSIX open(2) with creat mode 0666, as shells and
    # Python's open() do); mkstemp's 0600 must not leak into what we write. A fresh interpreter, since
    # the umask is per process.
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")]))
    proc = subprocess.run([sys.executable, "-c", UMASK_PROBE, umask, str(tmp_path)], capture_output=True,
                          text=True, env=env, timeout=120)
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.split() == [mode, mode]
