"""Mutation test of the command line's promises on hostile inputs.

Seeded mutants of the demo models (bytes and ONNX structure) and of the demo data (zip container, .npy
header and content) are fed to `scan`, `swap` and `check` in-process through typer's CliRunner. Whatever
the mutation, the README's "Exit codes" paragraph and house rule 5 must hold:

- no exception escapes the command (only SystemExit, which is how typer ends a command);
- the exit code is 0 (done / approved), 1 (rejected by the gate) or 2 (bad input or usage);
- exit 2 prints exactly one line on stderr;
- the input files are byte-identical afterwards.

Long-running cases (FIFOs, zip bombs, hangs, memory limits) need subprocesses and timeouts: they live in
benchmarks/fuzz.py, which runs thousands of these mutants.
"""
from __future__ import annotations

import hashlib
import random
import struct
import tempfile
import zipfile
from pathlib import Path

import numpy as np
import onnx
from hypothesis import HealthCheck, Phase, given, settings
from hypothesis import strategies as st
from onnx import TensorProto, numpy_helper
from typer.testing import CliRunner

from swapper.cli import app

DEMO = Path(__file__).resolve().parents[2] / "demo_models"
MODELS = ("meter_cnn_silu", "meter_gelu_mlp", "meter_mlp_mish_gelutanh", "meter_mlp_tanh_sigmoid")
N_SAMPLES = 48  # a slice of the demo sets keeps each run short
# Bounded and reproducible: the same examples on every run, no shrinking (each example runs the CLI).
BOUNDED = dict(derandomize=True, database=None, deadline=None, phases=(Phase.explicit, Phase.generate),
               suppress_health_check=[HealthCheck.too_slow])
runner = CliRunner()


# ---------------------------------------------------------------- model mutations: (model, rng) -> bytes


def flip_bits(m, rng):
    data = bytearray(m.SerializeToString())
    for _ in range(rng.choice((1, 8, 64))):
        data[rng.randrange(len(data))] ^= 1 << rng.randrange(8)
    return bytes(data)


def truncate(m, rng):
    data = m.SerializeToString()
    return data[: rng.randrange(1, len(data))]


def drop_node(m, rng):
    m.graph.node.remove(rng.choice(list(m.graph.node)))
    return m


def rename_edge(m, rng):
    node = rng.choice([n for n in m.graph.node if n.input])
    node.input[0] = rng.choice(("dangling", "", node.output[0]))
    return m


def unknown_op(m, rng):
    node = rng.choice(list(m.graph.node))
    node.op_type, node.domain = rng.choice((("FuzzOp", ""), ("Sigmoid", "com.example"), ("Gelu", "")))
    return m


def opset_out_of_range(m, rng):
    m.opset_import[0].version = rng.choice((0, 7, 10, 23, 99, -1))
    return m


def short_raw_data(m, rng):
    t = rng.choice([t for t in m.graph.initializer if t.raw_data])
    t.raw_data = t.raw_data[: rng.randrange(len(t.raw_data))]
    return m


def special_weights(m, rng):
    t = rng.choice([t for t in m.graph.initializer if t.data_type == TensorProto.FLOAT])
    w = numpy_helper.to_array(t).copy()
    w.flat[rng.randrange(w.size)] = rng.choice((np.nan, np.inf, 3.2e38))
    t.CopyFrom(numpy_helper.from_array(w, t.name))
    return m


def bad_attribute(m, rng):
    node = rng.choice([n for n in m.graph.node if n.attribute])
    attr = rng.choice(list(node.attribute))
    node.attribute.remove(attr)
    node.attribute.append(onnx.helper.make_attribute(attr.name, rng.choice((0, -1, 2**40, 1.5, "x", [0, 0]))))
    return m


def input_dtype(m, rng):
    m.graph.input[0].type.tensor_type.elem_type = rng.choice((TensorProto.INT32, TensorProto.DOUBLE,
                                                              TensorProto.STRING, TensorProto.FLOAT16))
    return m


def weights_outside(m, rng):
    t = next(t for t in m.graph.initializer if t.raw_data)
    t.ClearField("raw_data")
    t.data_location = TensorProto.EXTERNAL
    t.external_data.add(key="location", value=rng.choice(("../w.bin", "/etc/hostname", "w\0.bin", "nothere.bin")))
    return m


def markup_in_names(m, rng):
    rng.choice(list(m.graph.node)).name = rng.choice(("[/b]", "[red]", "[/]"))
    return m


MODEL_MUTATIONS = {f.__name__: f for f in (
    flip_bits, truncate, drop_node, rename_edge, unknown_op, opset_out_of_range, short_raw_data, special_weights,
    bad_attribute, input_dtype, weights_outside, markup_in_names)}


# ---------------------------------------------------------------- data mutations: (arrays, rng, path) -> None


def _npz(path, members, method=zipfile.ZIP_STORED):
    with zipfile.ZipFile(path, "w", method) as zf:
        for name, value in members.items():
            with zf.open(f"{name}.npy", "w") as fh:
                np.lib.format.write_array(fh, np.asanyarray(value), allow_pickle=True)


def _patch_headers(path, *, flags_or=0, method=None):
    """Set general-purpose flag bits / the method field in every local and central zip header."""
    data = bytearray(path.read_bytes())
    for sig, flag_at, method_at in ((b"PK\x03\x04", 6, 8), (b"PK\x01\x02", 8, 10)):
        i = data.find(sig)
        while i >= 0:
            struct.pack_into("<H", data, i + flag_at, struct.unpack_from("<H", data, i + flag_at)[0] | flags_or)
            if method is not None:
                struct.pack_into("<H", data, i + method_at, method)
            i = data.find(sig, i + 4)
    path.write_bytes(bytes(data))


def flip_bytes(arrays, rng, path):
    _npz(path, arrays)
    data = bytearray(path.read_bytes())
    for _ in range(rng.choice((1, 8, 64))):
        data[rng.randrange(len(data))] ^= rng.randrange(1, 256)
    path.write_bytes(bytes(data))


def encrypted_flag(arrays, rng, path):
    _npz(path, arrays, rng.choice((zipfile.ZIP_STORED, zipfile.ZIP_DEFLATED)))
    _patch_headers(path, flags_or=0x1)  # APPNOTE.TXT 4.4.4: bit 0 = encrypted


def unsupported_method(arrays, rng, path):
    _npz(path, arrays, zipfile.ZIP_DEFLATED)
    _patch_headers(path, method=rng.choice((9, 14, 99)))  # deflate64, lzma (data is deflate), AES


def corrupt_deflate(arrays, rng, path):
    _npz(path, arrays, zipfile.ZIP_DEFLATED)
    data = bytearray(path.read_bytes())
    for _ in range(rng.choice((1, 16))):
        data[rng.randrange(50, 900)] ^= rng.randrange(1, 256)
    path.write_bytes(bytes(data))


def header_shape(arrays, rng, path):
    x = arrays["pixels"]
    shape = rng.choice(((-len(x), 1, 8, 8), (2**62, 1, 8, 8), (len(x), 1, 8, -8)))
    header = f"{{'descr': '<f4', 'fortran_order': False, 'shape': {shape}, }}".encode()
    header += b" " * (-(len(header) + 11) % 64) + b"\n"
    members = dict(arrays)
    members["pixels"] = b"\x93NUMPY\x01\x00" + struct.pack("<H", len(header)) + header + x.tobytes()
    with zipfile.ZipFile(path, "w") as zf:
        for name, value in members.items():
            if isinstance(value, bytes):
                zf.writestr(f"{name}.npy", value)
            else:
                with zf.open(f"{name}.npy", "w") as fh:
                    np.lib.format.write_array(fh, value)


def odd_dtype(arrays, rng, path):
    x = arrays["pixels"]
    arrays["pixels"] = rng.choice((x.astype(np.int32), x.astype(np.float16), x.astype(np.complex64), x > 0.5,
                                   np.array(list(x) + [None], dtype=object)[:-1]))
    _npz(path, arrays)


def odd_values(arrays, rng, path):
    x = arrays["pixels"].copy()
    x.flat[rng.randrange(x.size)] = rng.choice((np.nan, np.inf, 3.2e38))
    arrays["pixels"] = rng.choice((x, x.reshape(len(x), -1), x[:0]))
    _npz(path, arrays)


def odd_labels(arrays, rng, path):
    n = len(arrays["pixels"])
    arrays["labels"] = rng.choice((np.full(n, 10), np.full(n, 2**40), np.arange(n) - 1,
                                   (np.arange(n) % 10).astype(np.float32), np.arange(n - 1) % 10))
    _npz(path, arrays)


def odd_arrays(arrays, rng, path):
    n = len(arrays["pixels"])
    extra = rng.choice((("expected", np.zeros(n, np.float32)), ("targets", np.ones((n, 10), np.float32)),
                        ("extra", arrays["pixels"])))  # "targets": the older name of "expected", still read
    arrays[extra[0]] = extra[1]
    _npz(path, arrays)


DATA_MUTATIONS = {f.__name__: f for f in (
    flip_bytes, encrypted_flag, unsupported_method, corrupt_deflate, header_shape, odd_dtype, odd_values,
    odd_labels, odd_arrays)}


# ---------------------------------------------------------------- the promises


def _digests(folder: Path) -> dict[str, str]:
    return {p.relative_to(folder).as_posix(): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file()}


def _assert_promises(work: Path, args: list[str], context: str) -> None:
    before = _digests(work)
    result = runner.invoke(app, args)
    where = f"{context}: swapper {' '.join(args)}\nstdout: {result.stdout[-800:]}\nstderr: {result.stderr[-800:]}"
    # README "Exit codes" and house rule 5: user errors end the command, never escape it
    assert result.exception is None or isinstance(result.exception, SystemExit), (
        f"{type(result.exception).__name__}: {result.exception}\n{where}")
    assert result.exit_code in (0, 1, 2), where
    if result.exit_code == 2:  # README: "one line on stderr naming the file and the cause"
        assert len(result.stderr.strip().splitlines()) == 1, where
    after = _digests(work)
    # README: inputs never modified; whatever is written goes where the command was told (under out/)
    assert {k: after.get(k) for k in before} == before, f"an input file changed\n{where}"
    assert all(k.startswith("out/") for k in set(after) - set(before)), f"a file written outside out/\n{where}"


def _demo_data(name: str) -> dict[str, np.ndarray]:
    with np.load(DEMO / name) as z:
        return {k: z[k][:N_SAMPLES] for k in z.files}


def _setup(work: Path, model: str) -> None:
    (work / "out").mkdir()
    (work / "orig.onnx").write_bytes((DEMO / f"{model}.onnx").read_bytes())
    np.savez(work / "calib.npz", **_demo_data("calib.npz"))
    np.savez(work / "val.npz", **_demo_data("val.npz"))


@settings(max_examples=160, **BOUNDED)
@given(model=st.sampled_from(MODELS), mutation=st.sampled_from(sorted(MODEL_MUTATIONS)),
       command=st.sampled_from(("scan", "scan", "scan --json", "swap", "swap", "check")),
       name=st.sampled_from(("m.onnx", "m.onnx", "m.onnx", "[red]m.onnx")), seed=st.integers(0, 2**32 - 1))
def test_model_mutants_keep_the_cli_promises(model, mutation, command, name, seed):
    rng = random.Random(seed)
    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        _setup(work, model)
        mutant = MODEL_MUTATIONS[mutation](onnx.load(DEMO / f"{model}.onnx"), rng)
        path = work / name
        path.write_bytes(mutant if isinstance(mutant, bytes) else mutant.SerializeToString())
        args = {
            "scan": ["scan", str(path)],
            "scan --json": ["scan", str(path), "--json"],
            "swap": ["swap", str(path), "--no-calibrate", "-o", str(work / "out" / "swapped.onnx")],
            "check": ["check", str(work / "orig.onnx"), str(path), "--val", str(work / "val.npz"),
                      "--report", str(work / "out" / "report")],
        }[command]
        _assert_promises(work, args, f"{model} {mutation} seed={seed}")


@settings(max_examples=90, **BOUNDED)
@given(model=st.sampled_from(MODELS), mutation=st.sampled_from(sorted(DATA_MUTATIONS)),
       command=st.sampled_from(("swap", "check")), seed=st.integers(0, 2**32 - 1))
def test_data_mutants_keep_the_cli_promises(model, mutation, command, seed):
    rng = random.Random(seed)
    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        _setup(work, model)
        arrays = _demo_data("calib.npz" if command == "swap" else "val.npz")
        path = work / "mutant.npz"
        DATA_MUTATIONS[mutation](arrays, rng, path)
        args = {
            "swap": ["swap", str(work / "orig.onnx"), "--calib", str(path), "-o", str(work / "out" / "swapped.onnx")],
            "check": ["check", str(work / "orig.onnx"), str(work / "orig.onnx"), "--val", str(path),
                      "--report", str(work / "out" / "report")],
        }[command]
        _assert_promises(work, args, f"{model} {mutation} seed={seed}")
