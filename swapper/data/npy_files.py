"""Open .npy files and .npz archives as arrays, safely and without reading them whole.

Transformation: a path becomes ``{name: array}``. Arrays are never unpickled
(the header is parsed first and object dtypes refused). Folder ``.npy`` files
and uncompressed ``.npz`` members (``np.savez``'s default) are memory-mapped,
so sets larger than memory stream; compressed members are read whole, up to
:data:`MAX_INFLATED` bytes in all.

Nothing is opened that is not a regular file (FIFOs, devices and sockets are
refused without blocking), and sizes are checked against the header before any
allocation: negative dims, a header promising more bytes than the file (or the
zip entry's declared size) holds, encrypted members and compression methods
numpy does not write are refused before inflating a byte. Every way an archive
can be broken (zip, zlib, .npy header) is one BadDataError line naming the file.
"""
from __future__ import annotations

import lzma
import math
import os
import stat
import struct
import tokenize
import zipfile
import zlib
from pathlib import Path

import numpy as np
from numpy.lib import format as npy_format

from swapper.core.files import open_regular, os_reason
from swapper.errors import BadDataError, first_line

_ZIP_LOCAL_MAGIC = b"PK\x03\x04"
_ZIP_EMPTY_MAGIC = b"PK\x05\x06"
_NPY_MAGIC = b"\x93NUMPY"
# Compressed members are inflated into memory; beyond this many bytes (all members together) an archive is
# refused rather than read (a zip bomb inflates 1 MiB to 1 GiB). Uncompressed archives and .npy folders are
# memory-mapped and have no such limit. The figure is a judgement call (common practice, no source).
MAX_INFLATED = 512 << 20
# What the header parser and the zip reader raise on damaged bytes, besides their own error types.
_DAMAGE = (ValueError, EOFError, OSError, SyntaxError, tokenize.TokenError, zlib.error, lzma.LZMAError,
           NotImplementedError, RuntimeError, struct.error, zipfile.BadZipFile, zipfile.LargeZipFile)


def _read_header(fh, where: str, path: Path) -> tuple[tuple, bool, np.dtype]:
    """Parse an .npy header (shape, fortran_order, dtype); refuse object dtypes and negative dims."""
    try:
        version = npy_format.read_magic(fh)
        reader = npy_format.read_array_header_1_0 if version == (1, 0) else npy_format.read_array_header_2_0
        shape, fortran, dtype = reader(fh)
    except _DAMAGE as exc:
        raise BadDataError(f"{where} is not a valid .npy array ({first_line(exc)})", path) from None
    if dtype.hasobject:
        raise BadDataError(f"{where} contains pickled objects (refused)", path)
    if any(d < 0 for d in shape):
        raise BadDataError(f"{where} has a negative dimension in its header (shape {tuple(shape)})", path)
    return tuple(shape), bool(fortran), dtype


def _check_size(shape, dtype, where: str, available: int, path: Path) -> int:
    """The byte count the header promises, once it is > 0 and at most ``available``."""
    need = math.prod(shape) * dtype.itemsize
    if math.prod(shape) == 0:
        raise BadDataError(f"{where} is empty (shape {tuple(shape)})", path)
    if need > available:
        raise BadDataError(f"{where} is truncated (its header promises {need} bytes, {max(available, 0)} follow)",
                           path)
    return need


def _open_npy(path: Path, where: str) -> np.ndarray:
    """Memory-map one .npy file read-only after checking its header against its size."""
    with open_regular(path, BadDataError) as fh:
        shape, fortran, dtype = _read_header(fh, where, path)
        offset = fh.tell()
        size = os.fstat(fh.fileno()).st_size
    _check_size(shape, dtype, where, size - offset, path)
    try:
        return np.memmap(path, dtype=dtype, mode="r", offset=offset, shape=shape, order="F" if fortran else "C")
    except (OSError, ValueError, OverflowError) as exc:
        raise BadDataError(f"{where} cannot be mapped: {os_reason(exc)}", path) from None


def _stored_member(path: Path, fh, info: zipfile.ZipInfo, where: str) -> np.ndarray:
    """Memory-map a stored (uncompressed) member after checking its local header and size."""
    fh.seek(info.header_offset)
    local = fh.read(30)
    if len(local) < 30 or local[:4] != _ZIP_LOCAL_MAGIC:
        raise BadDataError(f"not a valid .npz (corrupt entry for {info.filename!r})", path)
    name_len, extra_len = struct.unpack("<HH", local[26:30])
    start = info.header_offset + 30 + name_len + extra_len
    fh.seek(start)
    shape, fortran, dtype = _read_header(fh, where, path)
    offset = fh.tell()
    file_size = os.fstat(fh.fileno()).st_size
    _check_size(shape, dtype, where, min(start + info.file_size, file_size) - offset, path)
    try:
        return np.memmap(path, dtype=dtype, mode="r", offset=offset, shape=shape, order="F" if fortran else "C")
    except (OSError, ValueError, OverflowError) as exc:
        raise BadDataError(f"{where} cannot be mapped: {os_reason(exc)}", path) from None


def _inflated_member(path: Path, zf: zipfile.ZipFile, info: zipfile.ZipInfo, where: str, budget: int) -> np.ndarray:
    """Read a deflated member into memory, refusing it before inflating when it would exceed ``budget`` bytes."""
    if info.file_size > budget:
        raise BadDataError(f"{where} inflates to {info.file_size} bytes, above the {MAX_INFLATED >> 20} MiB "
                           "limit for compressed archives (save it with numpy.savez, uncompressed, or as a "
                           "folder of .npy files: those are memory-mapped)", path)
    with zf.open(info) as member:
        shape, fortran, dtype = _read_header(member, where, path)
        header_bytes = member.tell()
        need = _check_size(shape, dtype, where, info.file_size - header_bytes, path)
        raw = member.read(need)
    _check_size(shape, dtype, where, len(raw), path)
    count = math.prod(shape)
    return np.frombuffer(raw, dtype=dtype, count=count).reshape(shape, order="F" if fortran else "C")


def _check_member(info: zipfile.ZipInfo, path: Path) -> None:
    """Refuse members numpy never writes before opening them: encrypted, or an unsupported method."""
    if info.flag_bits & 0x1:  # APPNOTE.TXT 4.4.4: general purpose bit 0 = encrypted
        raise BadDataError(f"member {info.filename!r} is encrypted (refused)", path)
    if info.compress_type not in (zipfile.ZIP_STORED, zipfile.ZIP_DEFLATED):
        raise BadDataError(f"member {info.filename!r} uses compression method {info.compress_type}; only stored "
                           "and deflate (what numpy writes) are read", path)
    if not info.filename.endswith(".npy"):
        raise BadDataError(f"unexpected member {info.filename!r} in the archive (not an .npy)", path)


def _read_archive(path: Path, fh) -> dict[str, np.ndarray]:
    arrays: dict[str, np.ndarray] = {}
    budget = MAX_INFLATED
    with zipfile.ZipFile(fh) as zf:
        for info in sorted(zf.infolist(), key=lambda i: i.filename):
            if info.is_dir():
                continue
            _check_member(info, path)
            key = info.filename[: -len(".npy")]
            if info.compress_type == zipfile.ZIP_STORED:
                arrays[key] = _stored_member(path, fh, info, f"array {key!r}")
            else:
                arrays[key] = _inflated_member(path, zf, info, f"array {key!r}", budget)
                budget -= arrays[key].nbytes
    return arrays


def read_npz(path: Path) -> dict[str, np.ndarray]:
    """The arrays of an .npz archive (or of one .npy file, keyed by its stem), sorted by name."""
    with open_regular(path, BadDataError) as fh:
        try:
            magic = fh.read(6)
        except OSError as exc:
            raise BadDataError(f"cannot read: {os_reason(exc)}", path) from None
        if not magic:
            raise BadDataError("file is empty", path)
        if magic == _NPY_MAGIC:
            arrays = None
        elif magic[:4] not in (_ZIP_LOCAL_MAGIC, _ZIP_EMPTY_MAGIC):
            raise BadDataError("not an .npz archive or .npy file (expected a zip of .npy arrays)", path)
        else:
            try:
                arrays = _read_archive(path, fh)
            except _DAMAGE as exc:
                raise BadDataError(f"not a valid .npz (truncated or corrupt zip: {first_line(exc)})", path) \
                    from None
    if arrays is None:
        return {path.stem: _open_npy(path, f"array {path.stem!r}")}
    if not arrays:
        raise BadDataError("the archive holds no arrays", path)
    return arrays


def npy_folder_files(path: Path) -> list[Path]:
    """The .npy files of a folder that :func:`read_folder` reads, in sorted order.

    Hidden files and sub-folders (even one named ``x.npy``) are skipped; a
    symbolic link that leaves the folder, a broken one, or a FIFO, device or
    socket is refused (BadDataError naming it).
    """
    try:
        root = path.resolve(strict=True)
        entries = sorted(p for p in path.iterdir() if p.name.endswith(".npy") and not p.name.startswith("."))
    except (OSError, RuntimeError) as exc:
        raise BadDataError(f"cannot list the folder: {os_reason(exc)}", path) from None
    files = []
    for entry in entries:
        try:
            real = entry.resolve(strict=True)
            mode = os.stat(real).st_mode
        except (OSError, RuntimeError, ValueError) as exc:
            raise BadDataError(f"cannot read: {os_reason(exc)}", entry) from None
        if real.parent != root and root not in real.parents:
            raise BadDataError("symbolic link leaving the folder; refused", entry)
        if stat.S_ISDIR(mode):
            continue  # a folder named like an array is not one
        if not stat.S_ISREG(mode):
            raise BadDataError("not a regular file (a FIFO, device or socket); refused", entry)
        files.append(entry)
    return files


def read_folder(path: Path) -> dict[str, np.ndarray]:
    """The .npy files of a folder (:func:`npy_folder_files`), memory-mapped, keyed by file stem."""
    files = npy_folder_files(path)
    if not files:
        raise BadDataError("folder contains no .npy files", path)
    return {f.stem: _open_npy(f, f"array {f.stem!r}") for f in files}
