"""Hostile data files: damaged zip containers, lying .npy headers, zip bombs, special files, odd folders.

Each is refused with one BadDataError line naming the file (exit 2 through the command line), before any
large allocation and without blocking. Formats: PKWARE's APPNOTE.TXT (zip: general purpose bit 0 =
encrypted, section 4.4.4; compression method field, 4.4.5: 0 stored, 8 deflate, 9 deflate64, 14 lzma,
99 AES), numpy's NEP 1 (.npy header: magic, version, little-endian header length, a Python dict literal
with descr, fortran_order, shape).
"""
from __future__ import annotations

import os
import struct
import subprocess
import sys
import tracemalloc
import zipfile
from pathlib import Path

import numpy as np
import pytest
from testkit import DEMO, one_line_error

from swapper.data import npy_files
from swapper.data.dataset import InputSpec, load_dataset
from swapper.data.npy_files import read_folder, read_npz
from swapper.errors import BadDataError

ROOT = Path(__file__).resolve().parents[2]
X = np.random.default_rng(0).standard_normal((16, 1, 8, 8)).astype(np.float32)
SPECS = [InputSpec("pixels", np.dtype(np.float32), ("N", 1, 8, 8))]


def _npz(path: Path, members: dict, method=zipfile.ZIP_STORED) -> Path:
    with zipfile.ZipFile(path, "w", method) as zf:
        for name, value in members.items():
            if isinstance(value, bytes):
                zf.writestr(f"{name}.npy", value)
            else:
                with zf.open(f"{name}.npy", "w") as fh:
                    np.lib.format.write_array(fh, np.asarray(value))
    return path


def _patch(path: Path, *, flags_or: int = 0, method: int | None = None) -> Path:
    """Set flag bits / the method in every local (PK\\3\\4) and central (PK\\1\\2) header (APPNOTE 4.3.7, 4.3.12)."""
    data = bytearray(path.read_bytes())
    for sig, flag_at, method_at in ((b"PK\x03\x04", 6, 8), (b"PK\x01\x02", 8, 10)):
        i = data.find(sig)
        while i >= 0:
            struct.pack_into("<H", data, i + flag_at, struct.unpack_from("<H", data, i + flag_at)[0] | flags_or)
            if method is not None:
                struct.pack_into("<H", data, i + method_at, method)
            i = data.find(sig, i + 4)
    path.write_bytes(bytes(data))
    return path


def _npy_bytes(shape, payload: bytes, descr: str = "<f4") -> bytes:
    """An .npy file (NEP 1, version 1.0) whose header says ``shape`` whatever ``payload`` holds."""
    header = f"{{'descr': '{descr}', 'fortran_order': False, 'shape': {tuple(shape)}, }}".encode()
    header += b" " * (-(len(header) + 11) % 64) + b"\n"
    return b"\x93NUMPY\x01\x00" + struct.pack("<H", len(header)) + header + payload


def refused(path: Path, *fragments: str) -> str:
    with pytest.raises(BadDataError) as info:
        read_folder(path) if path.is_dir() else read_npz(path)
    text = str(info.value)
    assert "\n" not in text and str(path) in text, text
    for fragment in fragments:
        assert fragment in text, (fragment, text)
    return text


@pytest.mark.parametrize("method", [zipfile.ZIP_STORED, zipfile.ZIP_DEFLATED])
def test_encrypted_members_are_refused(tmp_path, method):
    path = _patch(_npz(tmp_path / "e.npz", {"pixels": X}, method), flags_or=0x1)
    refused(path, "'pixels.npy' is encrypted")


@pytest.mark.parametrize("method", [9, 14, 99])  # deflate64, lzma (with deflate data inside), AES
def test_compression_methods_numpy_does_not_write_are_refused(tmp_path, method):
    path = _patch(_npz(tmp_path / "m.npz", {"pixels": X}, zipfile.ZIP_DEFLATED), method=method)
    refused(path, f"compression method {method}")


def test_a_corrupt_deflate_stream_is_one_line(tmp_path):
    path = _npz(tmp_path / "c.npz", {"pixels": X}, zipfile.ZIP_DEFLATED)
    data = bytearray(path.read_bytes())
    start = data.find(b"pixels.npy") + len("pixels.npy")
    for i in range(start + 20, start + 60):  # inside the deflate stream of the only member
        data[i] ^= 0x5A
    path.write_bytes(bytes(data))
    refused(path, "not a valid")


def test_damage_inside_the_header_dict_is_one_line(tmp_path):
    # an unclosed dict: numpy's header filter tokenizes it and raises tokenize.TokenError (not a ValueError)
    header = b"{'descr': '<f4', 'fortran_order': False, 'shape': (16, 1, 8, 8), "
    header += b" " * (-(len(header) + 11) % 64) + b"\n"
    raw = b"\x93NUMPY\x01\x00" + struct.pack("<H", len(header)) + header + X.tobytes()
    refused(_npz(tmp_path / "h.npz", {"pixels": raw}), "not a valid .npy array")


@pytest.mark.parametrize("shape", [(-16, 1, 8, 8), (16, 1, 8, -8), (-16, -1, 8, 8)])
def test_negative_dims_are_refused_in_archives_folders_and_files(tmp_path, shape):
    raw = _npy_bytes(shape, X.tobytes())
    refused(_npz(tmp_path / "n.npz", {"pixels": raw}), "negative dimension")
    (tmp_path / "n.npy").write_bytes(raw)
    refused(tmp_path / "n.npy", "negative dimension")
    folder = tmp_path / "folder"
    folder.mkdir()
    (folder / "pixels.npy").write_bytes(raw)
    refused(folder, "negative dimension")


def test_a_header_promising_more_than_the_file_holds(tmp_path):
    raw = _npy_bytes((2**40, 1, 8, 8), X.tobytes())
    refused(_npz(tmp_path / "huge.npz", {"pixels": raw}), "truncated")
    refused(_npz(tmp_path / "hugez.npz", {"pixels": raw}, zipfile.ZIP_DEFLATED), "truncated")


def test_a_zip_bomb_is_refused_before_inflating_and_in_little_memory(tmp_path, monkeypatch):
    # 64 MiB of zeros deflate to about 64 KiB (deflate's ratio tops out near 1032:1, zlib tech notes);
    # with the limit lowered to 16 MiB the same code path meets a bomb 4 times its size.
    monkeypatch.setattr(npy_files, "MAX_INFLATED", 16 << 20)
    path = _npz(tmp_path / "bomb.npz", {"pixels": np.zeros((1 << 24,), np.float32)}, zipfile.ZIP_DEFLATED)
    assert path.stat().st_size < 1 << 20
    tracemalloc.start()
    try:
        refused(path, "inflates to", "limit for compressed archives")
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak < 4 << 20  # the member was never inflated


def test_a_member_whose_declared_size_is_too_small_for_its_header(tmp_path):
    # The central directory's uncompressed size (APPNOTE 4.4.9) is what the limit trusts: a member that
    # declares fewer bytes than its .npy header needs is refused before its data is inflated.
    big = np.random.default_rng(1).standard_normal((1 << 18,)).astype(np.float32)  # 1 MiB of data
    path = _npz(tmp_path / "lie.npz", {"pixels": big}, zipfile.ZIP_DEFLATED)
    data = bytearray(path.read_bytes())
    central = data.find(b"PK\x01\x02")
    struct.pack_into("<I", data, central + 24, 64 << 10)  # uncompressed size field of the central header
    local = data.find(b"PK\x03\x04")
    struct.pack_into("<I", data, local + 22, 64 << 10)
    path.write_bytes(bytes(data))
    refused(path, "truncated (its header promises 1048576 bytes")


def test_the_inflated_budget_counts_every_member(tmp_path, monkeypatch):
    monkeypatch.setattr(npy_files, "MAX_INFLATED", X.nbytes + 4096)
    path = _npz(tmp_path / "two.npz", {"a": X, "b": X}, zipfile.ZIP_DEFLATED)
    refused(path, "array 'b' inflates")


def _cli_subprocess(*args, cwd, timeout=60) -> subprocess.CompletedProcess:
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")]))
    return subprocess.run([sys.executable, "-m", "swapper.cli", *map(str, args)], cwd=cwd, env=env,
                          capture_output=True, text=True, timeout=timeout, stdin=subprocess.DEVNULL)


@pytest.mark.parametrize("where", ["calib.npz", "folder/pixels.npy", "spec.json"])
def test_fifos_are_refused_without_blocking(tmp_path, where):
    (tmp_path / "m.onnx").write_bytes((DEMO / "meter_mlp_tanh_sigmoid.onnx").read_bytes())
    (tmp_path / "folder").mkdir()
    os.mkfifo(tmp_path / where)
    calib = {"calib.npz": "calib.npz", "folder/pixels.npy": "folder", "spec.json": str(DEMO / "calib.npz")}[where]
    extra = ["--data-spec", "spec.json"] if where == "spec.json" else []
    proc = _cli_subprocess("swap", "m.onnx", "--calib", calib, "-o", "out.onnx", *extra, cwd=tmp_path)
    lines = proc.stderr.strip().splitlines()
    assert proc.returncode == 2 and len(lines) == 1, proc.stderr
    assert Path(where).name in lines[0] and "not a regular file" in lines[0]


@pytest.mark.skipif(not Path("/dev/zero").exists(), reason="needs /dev/zero")
def test_a_device_in_a_folder_is_refused(tmp_path):
    folder = tmp_path / "folder"
    folder.mkdir()
    os.symlink("/dev/zero", folder / "pixels.npy")
    refused(folder, "pixels.npy")


def test_a_link_leaving_the_folder_is_refused(tmp_path):
    np.save(tmp_path / "outside.npy", X)
    folder = tmp_path / "folder"
    folder.mkdir()
    os.symlink(tmp_path / "outside.npy", folder / "pixels.npy")
    refused(folder, "symbolic link leaving the folder")


def test_a_sub_folder_named_like_an_array_is_skipped(cli, tmp_path):
    folder = tmp_path / "folder"
    folder.mkdir()
    with np.load(DEMO / "calib.npz") as z:
        np.save(folder / "pixels.npy", z["pixels"][:64])
    (folder / "x.npy").mkdir()
    ds = load_dataset(folder, SPECS)
    assert list(ds.arrays) == ["pixels"] and ds.n == 64
    # the report hashes exactly the files read, so the sub-folder does not break it either
    result = cli("swap", DEMO / "meter_mlp_tanh_sigmoid.onnx", "--calib", folder, "--val", DEMO / "val.npz",
                 "-o", tmp_path / "out.onnx", "--report", tmp_path / "rep", "--no-latency")
    # --calib with --val plans automatically, which keeps only a plan its own verification approved, or
    # writes nothing; both end in 0 (README, "The sweep and the automatic plan")
    assert result.exit_code == 0, result.output
    import json

    entry = json.loads((tmp_path / "rep" / "report.json").read_text())["inputs"]["calibration"]
    assert entry["bytes"] == (folder / "pixels.npy").stat().st_size


def test_a_fixed_batch_size_must_divide_the_samples(cli, tmp_path):
    import onnx

    model = onnx.load(DEMO / "meter_mlp_tanh_sigmoid.onnx")
    model.graph.input[0].type.tensor_type.shape.dim[0].dim_value = 7  # onnxruntime then refuses other sizes
    path = tmp_path / "b7.onnx"
    onnx.save(model, path)
    with np.load(DEMO / "calib.npz") as z:
        np.savez(tmp_path / "calib.npz", pixels=z["pixels"][:64])  # 64 = 9 * 7 + 1
    one_line_error(cli("swap", path, "--calib", tmp_path / "calib.npz", "-o", tmp_path / "out.onnx"),
                   "calib.npz", "64 samples do not divide into batches of 7")


def test_expected_values_for_a_classifier_are_refused_naming_the_file(cli, tmp_path):
    with np.load(DEMO / "val.npz") as z:
        np.savez(tmp_path / "val.npz", pixels=z["pixels"][:64], expected=np.zeros(64, np.float32))
    model = DEMO / "meter_mlp_tanh_sigmoid.onnx"  # 10 class scores per sample
    one_line_error(cli("check", model, model, "--val", tmp_path / "val.npz", "--report", tmp_path / "rep"),
                   "val.npz", "'expected' has 1 value(s) per sample")
