"""Data mutants for benchmarks/fuzz.py: broken calibration / validation sets.

Transformation: (demo calib.npz or val.npz arrays, seeded rng) -> a hostile .npz, .npy or .npy folder in a
case folder. Container damage (zip bytes, deflate streams, encryption flags, compression methods, zip bombs,
.npy headers) and content damage (dtypes, shapes, NaN/Inf, labels, expected values, extra or missing arrays), plus
special files (FIFOs, /dev/zero, symlinks, sub-folders, names with rich markup; fuzz_data_content.py). Every
mutation is a small function ``(arrays, rng, ctx) -> Path`` registered in MUTATIONS.
"""
from __future__ import annotations

import os
import random
import struct
import warnings
import zipfile
from pathlib import Path

import fuzz_data_content as content
import numpy as np
from fuzz_npz import FIXED_TIME, DataCtx, build_bomb, npy_bytes, npy_raw, patch_headers, place, write_npz

__all__ = ["MUTATIONS", "DataCtx", "build_bomb", "make_data_mutant"]

# ---------------------------------------------------------------- container damage


def zip_bytes(arrays, rng, ctx):
    data = bytearray((write_npz(arrays, ctx.work / "tmp.npz")).read_bytes())
    os.unlink(ctx.work / "tmp.npz")
    style = rng.choice(("flip", "truncate", "zero", "insert", "delete", "header"))
    i = rng.randrange(len(data))
    if style == "flip":
        for _ in range(rng.choice((1, 4, 32))):
            data[rng.randrange(len(data))] ^= 1 << rng.randrange(8)
    elif style == "truncate":
        data = data[: rng.choice((4, 22, 30, 100, i))]
    elif style == "zero":
        k = rng.choice((4, 64, 4096))
        data[i : i + k] = bytes(len(data[i : i + k]))
    elif style == "insert":
        data[i:i] = rng.randbytes(rng.randint(1, 64))
    elif style == "delete":
        del data[i : i + rng.randint(1, 256)]
    else:  # damage the first .npy header inside the archive
        j = data.find(b"{'descr'")
        data[j + rng.randrange(60)] = rng.choice(b"(),:'-9xZ\x00\xff")
    path = ctx.work / "data.npz"
    path.write_bytes(bytes(data))
    return path


def deflate_corrupt(arrays, rng, ctx):
    path = write_npz(arrays, ctx.work / "data.npz", zipfile.ZIP_DEFLATED)
    data = bytearray(path.read_bytes())
    start = 30 + len("labels.npy")  # somewhere inside the first compressed stream
    for _ in range(rng.choice((1, 8, 64))):
        data[rng.randrange(start, start + 2000)] ^= rng.randint(1, 255)
    path.write_bytes(bytes(data))
    return path


def zip_encrypted(arrays, rng, ctx):
    method = rng.choice((zipfile.ZIP_STORED, zipfile.ZIP_DEFLATED))
    path = write_npz(arrays, ctx.work / "data.npz", method)
    pick = None if rng.random() < 0.5 else (lambda k: k == 0)
    path.write_bytes(bytes(patch_headers(bytearray(path.read_bytes()), flags_or=0x1, pick=pick)))
    return path


def zip_method(arrays, rng, ctx):
    path = write_npz(arrays, ctx.work / "data.npz", rng.choice((zipfile.ZIP_STORED, zipfile.ZIP_DEFLATED)))
    method = rng.choice((9, 99, 12, 14, 95, 1, 6, 8, 0, 93, 65535))  # deflate64, AES, bzip2, lzma, xz, ...
    path.write_bytes(bytes(patch_headers(bytearray(path.read_bytes()), method=method)))
    return path


def zip_bomb(arrays, rng, ctx):
    path = ctx.work / "data.npz"
    path.write_bytes(ctx.bomb.read_bytes())
    return path


def zip_size_lie(arrays, rng, ctx):
    """Central directory sizes that disagree with the member (bigger, smaller, zero)."""
    path = write_npz(arrays, ctx.work / "data.npz", rng.choice((zipfile.ZIP_STORED, zipfile.ZIP_DEFLATED)))
    data = bytearray(path.read_bytes())
    i = data.find(b"PK\x01\x02")
    field = rng.choice((20, 24))  # compressed / uncompressed size
    struct.pack_into("<I", data, i + field, rng.choice((0, 1, 0xFFFFFFFF, 2**31, 100)))
    path.write_bytes(bytes(data))
    return path


def zip_structure(arrays, rng, ctx):
    members = [(f"{k}.npy", npy_bytes(v)) for k, v in arrays.items()]
    style = rng.choice(("dup", "dir", "nonnpy", "traversal", "empty", "markup", "many", "nested_zip"))
    path = ctx.work / "data.npz"
    if style == "dup":
        members.append((members[0][0], npy_bytes(np.zeros((3, 1, 8, 8), np.float32))))
    elif style == "dir":
        members.append(("pixels.npy/", b""))
    elif style == "nonnpy":
        members.append((rng.choice(("readme.txt", "pixels.npz", "x.NPY", ".npy")), b"hello"))
    elif style == "traversal":
        members = [("../" * 3 + name, d) for name, d in members]
    elif style == "empty":
        members = []
    elif style == "markup":
        members = [("[red]" + name if name.startswith("pixels") else name, d) for name, d in members]
    elif style == "many":
        members += [(f"extra{i}.npy", npy_bytes(np.zeros(1, np.float32))) for i in range(2000)]
    else:
        inner = ctx.work / "inner.npz"
        write_npz(arrays, inner)
        members = [("pixels.npy", inner.read_bytes())]
        os.unlink(inner)
    with zipfile.ZipFile(path, "w") as zf, warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)  # "Duplicate name": on purpose
        for name, data in members:
            zf.writestr(zipfile.ZipInfo(name, date_time=FIXED_TIME), data)
    return path


def npy_header(arrays, rng, ctx):
    """Hand-written .npy headers: negative or enormous shapes, bad dicts, odd versions, lies about size."""
    x = arrays["pixels"]
    payload = x.tobytes()
    n = len(x)
    header = rng.choice((
        f"{{'descr': '<f4', 'fortran_order': False, 'shape': (-{n}, 1, 8, 8), }}",
        f"{{'descr': '<f4', 'fortran_order': False, 'shape': ({n}, -1, 8, -8), }}",
        "{'descr': '<f4', 'fortran_order': False, 'shape': (4611686018427387904, 1, 8, 8), }",
        "{'descr': '<f4', 'fortran_order': False, 'shape': (18446744073709551616, 1, 8, 8), }",
        f"{{'descr': '<f4', 'fortran_order': False, 'shape': ({n * 1000}, 1, 8, 8), }}",
        f"{{'descr': '<f4', 'fortran_order': True, 'shape': ({n}, 1, 8, 8), }}",
        "{'descr': '<f4', 'fortran_order': False, 'shape': (), }",
        "{'descr': '<f4', 'fortran_order': False, 'shape': (1.5, 1, 8, 8), }",
        "{'descr': '<f4', 'fortran_order': False, 'shape': 'abc', }",
        "{'descr': '<f4', 'fortran_order': False, }",
        "{'descr': 'O', 'fortran_order': False, 'shape': (2,), }",
        "{'descr': [('a', '<f4'), ('b', 'O')], 'fortran_order': False, 'shape': (2,), }",
        f"{{'descr': ('<f4', (8, 8)), 'fortran_order': False, 'shape': ({n}, 1), }}",
        "{'descr': '<f99', 'fortran_order': False, 'shape': (1,), }",
        "{'descr': '<f4', 'fortran_order': 'maybe', 'shape': (1,), }",
        "__import__('os').system('true')",
        "{'descr': '<f4', 'fortran_order': False, 'shape': (" + "1, " * 40 + "), }",
        f"{{'descr': '<f4', 'fortran_order': False, 'shape': ({n}, 1, 8, 8), 'extra': 1}}",
    ))
    version = rng.choice(((1, 0), (2, 0), (3, 0), (1, 0), (9, 9)))
    data = npy_raw(header, payload, version if version in ((1, 0), (2, 0), (3, 0)) else (1, 0))
    if version == (9, 9):
        data = data[:6] + bytes((9, 9)) + data[8:]
    where = rng.choice(("npz", "npz_deflate", "npy", "folder"))
    return place(arrays, {"pixels": data}, where, ctx)


# the order is part of a case's seed: append new mutations at the end
MUTATIONS = {
    "zip_bytes": zip_bytes, "deflate_corrupt": deflate_corrupt, "zip_encrypted": zip_encrypted,
    "zip_method": zip_method,
    "zip_bomb": zip_bomb, "zip_size_lie": zip_size_lie, "zip_structure": zip_structure, "npy_header": npy_header,
    "arr_dtype": content.arr_dtype, "arr_shape": content.arr_shape, "arr_values": content.arr_values,
    "labels_bad": content.labels_bad, "expected_bad": content.expected_bad, "arrays_names": content.arrays_names,
    "folder_special": content.folder_special, "path_special": content.path_special,
}
WEIGHTS = {"zip_bomb": 0.1, "path_special": 0.6}


def make_data_mutant(base: dict, rng: random.Random, ctx: DataCtx) -> tuple[str, Path]:
    names = list(MUTATIONS)
    name = rng.choices(names, weights=[WEIGHTS.get(n, 1.0) for n in names])[0]
    arrays = {k: np.array(v) for k, v in base.items()}
    return name, MUTATIONS[name](arrays, rng, ctx)
