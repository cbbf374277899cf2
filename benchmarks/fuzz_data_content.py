"""Data mutations on content and on the files themselves: dtypes, shapes, values, labels, expected values, array
names, and special files (FIFOs, /dev/zero, symlinks, sub-folders, names with rich markup). Each is
``(arrays, rng, ctx) -> Path`` (see fuzz_data.py)."""
from __future__ import annotations

import os
from pathlib import Path

import numpy as np
from fuzz_npz import npy_bytes, place, write_npz

# ---------------------------------------------------------------- content damage


def _where(rng):
    return rng.choices(("npz", "npz_deflate", "folder", "npy"), weights=(6, 2, 2, 1))[0]


def _save(arrays, rng, ctx) -> Path:
    where = _where(rng)
    if where == "npy" and len(arrays) != 1:
        where = "npz"
    return place({}, {k: npy_bytes(v) for k, v in arrays.items()}, where, ctx)


def arr_dtype(arrays, rng, ctx):
    x = arrays["pixels"]
    kind = rng.choice(("object", "structured", "unicode", "bytes", "complex", "bool", "datetime", "float16",
                       "float64_overflow", "int32", "uint8", "bigendian", "int64_huge", "float64", "void"))
    arrays["pixels"] = {
        "object": lambda: np.array([x[i] for i in range(len(x))] + [None], dtype=object)[:-1],
        "structured": lambda: np.zeros(x.shape, dtype=[("a", "<f4"), ("b", "<i4")]),
        "unicode": lambda: x.astype(str),
        "bytes": lambda: x.astype("S8"),
        "complex": lambda: x.astype(np.complex64),
        "bool": lambda: x > 0.5,
        "datetime": lambda: x.astype(np.int64).astype("M8[s]"),
        "float16": lambda: x.astype(np.float16),
        "float64_overflow": lambda: np.where(x > 0.9, 1e300, x),
        "int32": lambda: (x * 16).astype(np.int32),
        "uint8": lambda: (x * 16).astype(np.uint8),
        "bigendian": lambda: x.astype(">f4"),
        "int64_huge": lambda: np.full(x.shape, 2**62, np.int64),
        "float64": lambda: x.astype(np.float64),
        "void": lambda: x.view(np.dtype("V4")),
    }[kind]()
    return _save(arrays, rng, ctx)


def arr_shape(arrays, rng, ctx):
    x = arrays["pixels"]
    n = len(x)
    arrays["pixels"] = rng.choice((
        x.reshape(n, 64), x.reshape(n, 8, 8), x.reshape(n, 1, 8, 8, 1), x[:, :, :4, :], x.reshape(n * 64),
        np.zeros((n, 3, 8, 8), np.float32), np.zeros((n, 1, 16, 16), np.float32), np.float32(1.0),
        x.reshape(n, 1, 64, 1), np.zeros((n, 0, 8, 8), np.float32), x.transpose(0, 2, 3, 1),
        np.asfortranarray(x),
    ))
    return _save(arrays, rng, ctx)


def arr_values(arrays, rng, ctx):
    x = arrays["pixels"].copy()
    kind = rng.choice(("nan", "inf", "ninf", "huge", "zeros", "constant", "denormal", "one", "two", "empty",
                       "negative", "max32"))
    if kind in ("nan", "inf", "ninf"):
        x.flat[rng.randrange(x.size)] = {"nan": np.nan, "inf": np.inf, "ninf": -np.inf}[kind]
    elif kind == "huge":
        x[...] = 3.2e38
    elif kind == "max32":
        x[: max(1, len(x) // 2)] = np.finfo(np.float32).max
    elif kind == "zeros":
        x[...] = 0
    elif kind == "constant":
        x[...] = 0.5
    elif kind == "denormal":
        x[...] = 1e-44
    elif kind == "negative":
        x = -x * 1e6
    elif kind in ("one", "two", "empty"):
        k = {"one": 1, "two": 2, "empty": 0}[kind]
        x = x[:k]
        for name in ("labels", "expected", "targets"):
            if name in arrays:
                arrays[name] = arrays[name][:k]
    arrays["pixels"] = x
    return _save(arrays, rng, ctx)


def labels_bad(arrays, rng, ctx):
    n = len(arrays["pixels"])
    base = arrays.get("labels", np.arange(n) % 10)
    arrays["labels"] = rng.choice((
        np.full(n, 10), np.full(n, 1000), np.full(n, 2**40), np.full(n, np.iinfo(np.int64).max),
        np.where(np.arange(n) == 3, -1, base), base.astype(np.float32), base.astype(np.float32) + 0.5,
        np.stack([base, base], 1), base[:-1], np.concatenate([base, base[:1]]), base > 4,
        base.astype(np.uint64) + np.uint64(2**63), base.astype(np.int8), base.astype(str),
        np.int64(3), np.full(n, np.nan), np.zeros(n, np.int64), np.array([0] * n, dtype=object),
    ))
    return _save(arrays, rng, ctx)


def expected_bad(arrays, rng, ctx):
    n = len(arrays["pixels"])
    # "targets" is the older name of "expected", still read: both names are mutated
    arrays[rng.choice(("expected", "targets"))] = rng.choice((
        np.zeros(n, np.float32), np.ones((n, 10), np.float32), np.ones((n, 3), np.float32),
        np.full(n, np.nan), np.zeros(n + 1), np.arange(n).astype(str), np.full((n, 10), 3.2e38, np.float32),
        np.arange(n) % 10,
    ))
    if rng.random() < 0.5:
        arrays.pop("labels", None)
    return _save(arrays, rng, ctx)


def arrays_names(arrays, rng, ctx):
    style = rng.choice(("extra", "renamed", "only_labels", "two_inputs", "reserved_only", "markup"))
    x = arrays["pixels"]
    if style == "extra":
        arrays[rng.choice(("extra", "weights", "logits", "pixels2"))] = x
    elif style == "renamed":
        arrays[rng.choice(("x", "input", "", "[red]", "labels ", "LABELS"))] = arrays.pop("pixels")
    elif style == "only_labels":
        arrays = {"labels": np.arange(len(x)) % 10}
    elif style == "two_inputs":
        arrays["pixels_b"] = x
        arrays["labels"] = np.arange(len(x)) % 10
    elif style == "reserved_only":
        arrays = {rng.choice(("expected", "targets")): x.reshape(len(x), -1)}
    else:
        arrays["[/b]"] = arrays.pop("pixels")
    return _save(arrays, rng, ctx)


# ---------------------------------------------------------------- special files and paths


def folder_special(arrays, rng, ctx):
    folder = ctx.work / rng.choice(("data", "data.npz", "[red]data", "da ta"))
    folder.mkdir()
    style = rng.choice(("subdir", "fifo", "devzero", "link_out", "link_loop", "hidden", "empty", "markup",
                        "broken_link", "link_in"))
    for k, v in arrays.items():
        if style in ("fifo", "devzero", "link_out", "link_loop", "broken_link", "link_in", "hidden") and k == "pixels":
            continue
        (folder / f"{k}.npy").write_bytes(npy_bytes(v))
    target = folder / "pixels.npy"
    if style == "subdir":
        (folder / "x.npy").mkdir()
        (folder / "x.npy" / "pixels.npy").write_bytes(npy_bytes(arrays["pixels"]))
    elif style == "fifo":
        os.mkfifo(target)
    elif style == "devzero":
        os.symlink("/dev/zero", target)
    elif style == "link_out":
        outside = ctx.work.parent / f"{ctx.work.name}_outside.npy"
        outside.write_bytes(npy_bytes(arrays["pixels"]))
        os.symlink(outside, target)
    elif style == "link_loop":
        os.symlink("pixels.npy", target)
    elif style == "broken_link":
        os.symlink("nothere.npy", target)
    elif style == "link_in":
        (folder / "real.bin").write_bytes(npy_bytes(arrays["pixels"]))
        os.symlink("real.bin", target)
    elif style == "hidden":
        (folder / ".pixels.npy").write_bytes(npy_bytes(arrays["pixels"]))
    elif style == "empty":
        for p in folder.iterdir():
            p.unlink()
    elif style == "markup":
        os.rename(target, folder / "[red]pix.npy")
    return folder


def path_special(arrays, rng, ctx):
    style = rng.choice(("fifo", "devzero", "devnull", "dir_npz", "missing", "model", "npy_single", "markup",
                        "markup_close", "long", "proc", "unreadable_link"))
    work = ctx.work
    if style == "fifo":
        os.mkfifo(work / "data.npz")
        return work / "data.npz"
    if style in ("devzero", "devnull"):
        os.symlink(f"/dev/{style[3:]}", work / "data.npz")
        return work / "data.npz"
    if style == "dir_npz":
        (work / "data.npz").mkdir()
        return work / "data.npz"
    if style == "missing":
        return work / "nothere.npz"
    if style == "model":
        return work / "model.onnx"  # the model file given as data (the driver puts it there)
    if style == "npy_single":
        path = work / "pixels.npy"
        path.write_bytes(npy_bytes(arrays["pixels"]))
        return path
    if style == "markup":
        return write_npz(arrays, work / "[red]data.npz")
    if style == "markup_close":
        (work / "[").mkdir()
        return write_npz(arrays, work / "[" / "b]data.npz")  # the path reads "[/b]data.npz"
    if style == "long":
        return work / ("d" * 300 + ".npz")
    if style == "proc":
        return Path("/proc/self/environ")
    os.symlink("/root/.nonexistent/x.npz", work / "data.npz")
    return work / "data.npz"
