"""Writers for the data mutators: .npy bytes (with hand-written headers), zip archives with fixed times, the
zip bomb, zip header patching, and placing arrays as an archive, a single .npy or a folder of .npy files."""
from __future__ import annotations

import io
import struct
import zipfile
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from numpy.lib import format as npy_format

FIXED_TIME = (1980, 1, 1, 0, 0, 0)  # reproducible archive bytes
BOMB_SAMPLES = 4 * 2**20  # x [N,1,8,8] float32 = 1 GiB when inflated


@dataclass
class DataCtx:
    work: Path
    np_rng: np.random.Generator
    bomb: Path | None = None  # a prebuilt ~1 GiB-inflating archive (built once per run)
    side_files: list[str] = field(default_factory=list)


def npy_bytes(arr: np.ndarray) -> bytes:
    buf = io.BytesIO()
    npy_format.write_array(buf, np.asanyarray(arr), allow_pickle=True)
    return buf.getvalue()


def npy_raw(header: str, payload: bytes, version: tuple[int, int] = (1, 0)) -> bytes:
    """An .npy file with a hand-written header dict (which may lie about shape or dtype)."""
    head = header.encode("latin1")
    fmt = "<H" if version == (1, 0) else "<I"
    prefix = 10 if version == (1, 0) else 12
    pad = (-(prefix + len(head) + 1)) % 64
    head = head + b" " * pad + b"\n"
    return b"\x93NUMPY" + bytes(version) + struct.pack(fmt, len(head)) + head + payload


def zip_members(path: Path, members: list[tuple[str, bytes]], method: int = zipfile.ZIP_STORED) -> Path:
    with zipfile.ZipFile(path, "w") as zf:
        for name, data in members:
            info = zipfile.ZipInfo(name, date_time=FIXED_TIME)
            info.compress_type = method
            zf.writestr(info, data)
    return path


def write_npz(arrays: dict, path: Path, method: int = zipfile.ZIP_STORED) -> Path:
    return zip_members(path, [(f"{k}.npy", npy_bytes(v)) for k, v in arrays.items()], method)


def patch_headers(data: bytearray, *, flags_or: int = 0, method: int | None = None, pick=None) -> bytearray:
    """Set flag bits / compression method in local and central headers (all members, or those ``pick`` says)."""
    for sig, flag_at, method_at in ((b"PK\x03\x04", 6, 8), (b"PK\x01\x02", 8, 10)):
        start, k = 0, 0
        while (i := data.find(sig, start)) >= 0:
            if pick is None or pick(k):
                flags = struct.unpack_from("<H", data, i + flag_at)[0] | flags_or
                struct.pack_into("<H", data, i + flag_at, flags)
                if method is not None:
                    struct.pack_into("<H", data, i + method_at, method)
            start, k = i + 4, k + 1
    return data


def build_bomb(path: Path) -> Path:
    """An archive whose single x member inflates to ~1 GiB of zeros (a valid header first)."""
    header = npy_raw(f"{{'descr': '<f4', 'fortran_order': False, 'shape': ({BOMB_SAMPLES}, 1, 8, 8), }}", b"")
    with zipfile.ZipFile(path, "w", zipfile.ZIP_DEFLATED, compresslevel=9) as zf:
        info = zipfile.ZipInfo("pixels.npy", date_time=FIXED_TIME)
        info.compress_type = zipfile.ZIP_DEFLATED
        with zf.open(info, "w", force_zip64=True) as fh:
            fh.write(header)
            zero = bytes(16 << 20)
            for _ in range(BOMB_SAMPLES * 256 // len(zero)):
                fh.write(zero)
    return path


def place(arrays, raw: dict[str, bytes], where: str, ctx) -> Path:
    """Put raw .npy bytes (replacing arrays of the same name) in an archive, a single .npy, or a folder."""
    members = {f"{k}.npy": npy_bytes(v) for k, v in arrays.items()}
    members.update({f"{k}.npy": v for k, v in raw.items()})
    if where == "npy" and len(raw) == 1:
        path = ctx.work / f"{next(iter(raw))}.npy"
        path.write_bytes(next(iter(raw.values())))
        return path
    if where == "folder":
        folder = ctx.work / "data"
        folder.mkdir()
        for name, data in members.items():
            (folder / name).write_bytes(data)
        return folder
    method = zipfile.ZIP_DEFLATED if where == "npz_deflate" else zipfile.ZIP_STORED
    return zip_members(ctx.work / "data.npz", list(members.items()), method)
