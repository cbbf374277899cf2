"""Open .npy files and .npz archives as arrays, safely and without reading them whole.

Transformation: a path becomes ``{name: array}``. Arrays are never unpickled
(``allow_pickle=False`` and an explicit header check first). Folder ``.npy``
files and uncompressed ``.npz`` members (``np.savez``'s default) are
memory-mapped, so sets larger than memory stream; compressed members are read
whole. Truncated, corrupt or empty files raise BadDataError naming the file.
"""
from __future__ import annotations

import math
import struct
import zipfile
from pathlib import Path

import numpy as np
from numpy.lib import format as npy_format

from swapper.errors import BadDataError, first_line

_ZIP_LOCAL_MAGIC = b"PK\x03\x04"
_ZIP_EMPTY_MAGIC = b"PK\x05\x06"
_NPY_MAGIC = b"\x93NUMPY"


def _read_header(fh, where: str, path: Path) -> tuple[tuple, bool, np.dtype]:
    """Parse an .npy header (shape, fortran_order, dtype); refuse object dtypes before any data is read."""
    try:
        version = npy_format.read_magic(fh)
        reader = npy_format.read_array_header_1_0 if version == (1, 0) else npy_format.read_array_header_2_0
        shape, fortran, dtype = reader(fh)
    except (ValueError, EOFError, OSError, SyntaxError) as exc:
        raise BadDataError(f"{where} is not a valid .npy array ({first_line(exc)})", path) from None
    if dtype.hasobject:
        raise BadDataError(f"{where} contains pickled objects (refused)", path)
    return tuple(shape), bool(fortran), dtype


def _check_size(shape, dtype, where: str, available: int, path: Path) -> None:
    if math.prod(shape) == 0:
        raise BadDataError(f"{where} is empty (shape {tuple(shape)})", path)
    if math.prod(shape) * dtype.itemsize > available:
        raise BadDataError(f"{where} is truncated (shorter than its header says)", path)


def _open_npy(path: Path, where: str) -> np.ndarray:
    """Memory-map one .npy file read-only after checking its header."""
    try:
        with open(path, "rb") as fh:
            shape, _, dtype = _read_header(fh, where, path)
            offset = fh.tell()
        _check_size(shape, dtype, where, path.stat().st_size - offset, path)
        return np.load(path, mmap_mode="r", allow_pickle=False)
    except OSError as exc:
        raise BadDataError(f"cannot read: {exc.strerror or exc}", path) from None
    except ValueError as exc:
        raise BadDataError(f"{where} cannot be loaded ({first_line(exc)})", path) from None


def _zip_member(path: Path, zf: zipfile.ZipFile, info: zipfile.ZipInfo, where: str) -> np.ndarray:
    """Memory-map a stored (uncompressed) .npz member; read a compressed one into memory."""
    stored = info.compress_type == zipfile.ZIP_STORED and not info.flag_bits & 0x1
    if stored:
        with open(path, "rb") as fh:
            fh.seek(info.header_offset)
            local = fh.read(30)
            if len(local) < 30 or local[:4] != _ZIP_LOCAL_MAGIC:
                raise BadDataError(f"not a valid .npz (corrupt entry for {info.filename!r})", path)
            name_len, extra_len = struct.unpack("<HH", local[26:30])
            start = info.header_offset + 30 + name_len + extra_len
            fh.seek(start)
            shape, fortran, dtype = _read_header(fh, where, path)
            offset = fh.tell()
        _check_size(shape, dtype, where, min(start + info.file_size, path.stat().st_size) - offset, path)
        return np.memmap(path, dtype=dtype, mode="r", offset=offset, shape=shape, order="F" if fortran else "C")
    with zf.open(info) as fh:
        shape, fortran, dtype = _read_header(fh, where, path)
        count = math.prod(shape)
        raw = fh.read(count * dtype.itemsize)
    _check_size(shape, dtype, where, len(raw), path)
    return np.frombuffer(raw, dtype=dtype, count=count).reshape(shape, order="F" if fortran else "C")


def read_npz(path: Path) -> dict[str, np.ndarray]:
    """The arrays of an .npz archive (or of one .npy file, keyed by its stem), sorted by name."""
    try:
        with open(path, "rb") as fh:
            magic = fh.read(6)
    except OSError as exc:
        raise BadDataError(f"cannot read: {exc.strerror or exc}", path) from None
    if not magic:
        raise BadDataError("file is empty", path)
    if magic == _NPY_MAGIC:
        return {path.stem: _open_npy(path, f"array {path.stem!r}")}
    if magic[:4] not in (_ZIP_LOCAL_MAGIC, _ZIP_EMPTY_MAGIC):
        raise BadDataError("not an .npz archive or .npy file (expected a zip of .npy arrays)", path)
    arrays: dict[str, np.ndarray] = {}
    try:
        with zipfile.ZipFile(path) as zf:
            for info in sorted(zf.infolist(), key=lambda i: i.filename):
                if info.is_dir():
                    continue
                if not info.filename.endswith(".npy"):
                    raise BadDataError(f"unexpected member {info.filename!r} in the archive (not an .npy)", path)
                key = info.filename[: -len(".npy")]
                arrays[key] = _zip_member(path, zf, info, f"array {key!r}")
    except (zipfile.BadZipFile, zipfile.LargeZipFile, EOFError, OSError, ValueError, struct.error) as exc:
        raise BadDataError(f"not a valid .npz (truncated or corrupt zip: {first_line(exc)})", path) from None
    if not arrays:
        raise BadDataError("the archive holds no arrays", path)
    return arrays


def read_folder(path: Path) -> dict[str, np.ndarray]:
    """The .npy files of a folder (hidden ones skipped), memory-mapped, keyed by file stem."""
    files = sorted(p for p in path.glob("*.npy") if p.is_file() and not p.name.startswith("."))
    if not files:
        raise BadDataError("folder contains no .npy files", path)
    return {f.stem: _open_npy(f, f"array {f.stem!r}") for f in files}
