"""Hostile model files: special files, odd paths, external data that leaves its folder, tensors whose
bytes do not match their dims, and models swapper must not write.

Each case answers with exit 2 and one line naming the model (README "Exit codes", house rule 5). Files
that could block or exhaust memory (a FIFO, /dev/zero) run in a fresh interpreter with a timeout, so a
regression fails the test instead of hanging the suite.
"""
from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import onnx
import onnxruntime as ort
import pytest
from onnx import TensorProto, helper, numpy_helper
from testkit import DEMO, float_model, init, one_line_error

from swapper.core.model_io import load_model, save_model
from swapper.errors import BadModelError

ROOT = Path(__file__).resolve().parents[2]
TANH = DEMO / "meter_mlp_tanh_sigmoid.onnx"
has_dev_zero = pytest.mark.skipif(not Path("/dev/zero").exists(), reason="needs /dev/zero")


def cli_subprocess(*args, cwd, timeout=60) -> subprocess.CompletedProcess:
    """``swapper ARGS`` in a fresh interpreter, killed after ``timeout`` seconds (a hang fails the test)."""
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")]))
    return subprocess.run([sys.executable, "-m", "swapper.cli", *map(str, args)], cwd=cwd, env=env,
                          capture_output=True, text=True, timeout=timeout, stdin=subprocess.DEVNULL)


def assert_one_line(proc: subprocess.CompletedProcess, *fragments: str) -> None:
    lines = proc.stderr.strip().splitlines()
    assert proc.returncode == 2 and len(lines) == 1, (proc.returncode, proc.stderr)
    for fragment in fragments:
        assert fragment in lines[0], (fragment, lines[0])


def test_a_fifo_model_is_refused_without_blocking(tmp_path):
    os.mkfifo(tmp_path / "pipe.onnx")  # nobody writes to it: a plain open() would wait forever
    assert_one_line(cli_subprocess("scan", "pipe.onnx", cwd=tmp_path), "pipe.onnx", "not a regular file")


@has_dev_zero
def test_a_link_to_dev_zero_is_refused_before_reading(tmp_path):
    os.symlink("/dev/zero", tmp_path / "zero.onnx")  # endless input: reading it whole exhausts memory
    assert_one_line(cli_subprocess("scan", "zero.onnx", cwd=tmp_path), "zero.onnx", "not a regular file")


def test_a_name_longer_than_the_system_allows(cli, tmp_path):
    path = tmp_path / ("m" * 300 + ".onnx")  # NAME_MAX is 255 bytes on Linux (limits.h)
    one_line_error(cli("scan", path), "m" * 50, "longer than 255 bytes")


# ---------------------------------------------------------------- external data


def _external(folder: Path, location: str, name: str = "ext.onnx", **entries: str) -> Path:
    """A tiny model whose weight W is external data at ``location`` (the bytes are not written here)."""
    x = helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", 4])
    y = helper.make_tensor_value_info("y", TensorProto.FLOAT, ["N", 3])
    w = onnx.TensorProto(name="W", data_type=TensorProto.FLOAT, dims=[4, 3])
    w.data_location = TensorProto.EXTERNAL
    w.external_data.add(key="location", value=location)
    for key, value in entries.items():
        w.external_data.add(key=key, value=value)
    graph = helper.make_graph([helper.make_node("MatMul", ["x", "W"], ["h"]), helper.make_node("Tanh", ["h"], ["y"])],
                              "g", [x], [y], [w])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    path = folder / name
    path.write_bytes(model.SerializeToString())
    return path


WEIGHTS = np.arange(12, dtype=np.float32).tobytes()


@pytest.mark.parametrize("location, setup, cause", [
    ("w\0.bin", None, "NUL byte"),
    ("w" * 300 + ".bin", None, "longer than 255 bytes"),
    ("/etc/hostname", None, "outside the model's folder"),
    ("../w.bin", None, "outside the model's folder"),
    ("loop_a.bin", lambda d: (os.symlink("loop_b.bin", d / "loop_a.bin"), os.symlink("loop_a.bin", d / "loop_b.bin")),
     "symbolic link"),
    ("out.bin", lambda d: ((d.parent / "w.bin").write_bytes(WEIGHTS), os.symlink(d.parent / "w.bin", d / "out.bin")),
     "outside the model's folder"),
    ("short.bin", lambda d: (d / "short.bin").write_bytes(WEIGHTS[:20]), "holds 20 bytes, its dims [4, 3] need 48"),
    ("sub", lambda d: (d / "sub").mkdir(), "is a directory"),
])
def test_external_data_must_be_a_plain_file_inside_the_folder(cli, tmp_path, location, setup, cause):
    folder = tmp_path / "models"
    folder.mkdir()
    if setup is not None:
        setup(folder)
    path = _external(folder, location)
    one_line_error(cli("scan", path), str(path), cause)


def test_external_data_offset_beyond_the_file(cli, tmp_path):
    (tmp_path / "w.bin").write_bytes(WEIGHTS)
    path = _external(tmp_path, "w.bin", offset="40", length="48")
    one_line_error(cli("scan", path), str(path), "external data bytes 40..88 lie outside 'w.bin' (48 bytes)")


def test_external_data_that_is_a_fifo_is_refused_without_blocking(tmp_path):
    os.mkfifo(tmp_path / "pipe.bin")
    _external(tmp_path, "pipe.bin")
    assert_one_line(cli_subprocess("scan", "ext.onnx", cwd=tmp_path), "ext.onnx", "not a regular file")


# ---------------------------------------------------------------- tensor payloads


def _tiny(w: onnx.TensorProto) -> onnx.ModelProto:
    nodes = [helper.make_node("MatMul", ["x", "W"], ["h"]), helper.make_node("Tanh", ["h"], ["y"])]
    return float_model(nodes, [("x", ["N", 4])], [("y", ["N", 3])], [w], ir_version=None)


def _raw(dims, payload: bytes, dtype=TensorProto.FLOAT) -> onnx.TensorProto:
    t = onnx.TensorProto(name="W", data_type=dtype, dims=dims)
    t.raw_data = payload
    return t


def _typed(dims, values) -> onnx.TensorProto:
    t = onnx.TensorProto(name="W", data_type=TensorProto.FLOAT, dims=dims)
    t.float_data.extend(values)
    return t


# ONNX IR spec, TensorProto: raw_data holds prod(dims) little-endian values; float_data one per element.
@pytest.mark.parametrize("tensor, cause", [
    (_raw([4, 3], WEIGHTS[:45]), "holds 45 bytes, its dims [4, 3] need 48"),
    (_raw([4, 3], WEIGHTS + b"\0" * 4), "holds 52 bytes, its dims [4, 3] need 48"),
    (_typed([4, 3], [1.0] * 11), "holds 11 values in float_data, its dims [4, 3] need 12"),
    (_raw([-4, -3], WEIGHTS), "negative dimension"),
    (_raw([4, 3], WEIGHTS, dtype=99), "no known element type"),
])
def test_tensor_payloads_must_match_their_dims(tmp_path, tensor, cause):
    path = tmp_path / "m.onnx"
    path.write_bytes(_tiny(tensor).SerializeToString())
    with pytest.raises(BadModelError, match="initializer 'W'") as info:
        load_model(path)
    assert cause in str(info.value) and str(path) in str(info.value)


def test_a_constant_node_payload_is_checked_too(tmp_path):
    value = _raw([3], np.ones(3, np.float32).tobytes()[:10])
    nodes = [helper.make_node("Constant", [], ["c"], value=value), helper.make_node("Add", ["x", "c"], ["y"])]
    path = tmp_path / "m.onnx"
    path.write_bytes(float_model(nodes, [("x", ["N", 3])], [("y", ["N", 3])], ir_version=None).SerializeToString())
    with pytest.raises(BadModelError, match="attribute 'value' of node 'W' holds 10 bytes"):
        load_model(path)


def test_swap_of_a_short_payload_is_one_line(cli, tmp_path):
    model = onnx.load(TANH)
    w = next(t for t in model.graph.initializer if t.raw_data)
    w.raw_data = w.raw_data[:-8]
    path = tmp_path / "short.onnx"
    onnx.save(model, path)
    one_line_error(cli("swap", path, "--no-calibrate", "-o", tmp_path / "out.onnx"), str(path), repr(w.name))
    assert not (tmp_path / "out.onnx").exists()


def test_a_name_that_is_not_utf8_is_one_line(cli, tmp_path):
    # protobuf string fields must hold UTF-8 (protobuf language guide); one flipped bit in an attribute name
    # breaks that, and Python's parser then hands the name over as bytes
    model = onnx.load(TANH)
    node = next(n for n in model.graph.node if n.attribute)
    name = node.attribute[0].name.encode()
    data = model.SerializeToString()
    damaged = name[:1] + b"\xe5" + name[2:]
    assert data.count(name) >= 1
    path = tmp_path / "damaged.onnx"
    path.write_bytes(data.replace(name, damaged, 1))
    one_line_error(cli("scan", path), str(path), "is not valid UTF-8")


# ---------------------------------------------------------------- what is never written


def test_weights_that_overflow_when_folded_are_not_written(cli, tmp_path):
    # 3.2e38 is finite in float32 (max 3.4028235e38, IEEE 754 binary32); folding a scale > 1.06 into it is not.
    model = onnx.load(TANH)
    for t in model.graph.initializer:
        if t.name == "net.5.weight":  # the last Gemm: d of the sigmoid site folds into its bias, a into it
            t.CopyFrom(numpy_helper.from_array(np.full(numpy_helper.to_array(t).shape, 3.2e38, np.float32), t.name))
    assert all(np.isfinite(numpy_helper.to_array(t)).all() for t in model.graph.initializer)
    path = tmp_path / "huge.onnx"
    onnx.save(model, path)
    out = tmp_path / "out.onnx"
    result = cli("swap", path, "--no-calibrate", "-o", out)
    lines = result.stderr.strip().splitlines()  # stdout holds the swap table printed before writing
    assert result.exit_code == 2 and len(lines) == 1, result.output
    assert str(out) in lines[0] and "NaN or infinite" in lines[0]
    assert "swapper/" in lines[0]  # names the folded copy of the weight
    assert "RuntimeWarning" not in result.output  # numpy's overflow warning stays out of the one line
    assert not out.exists()


def test_save_model_refuses_nan_invalid_and_unloadable_models(tmp_path):
    nan = _tiny(init("W", np.full((4, 3), np.nan, np.float32)))
    with pytest.raises(BadModelError, match="initializer 'W' holds NaN or infinite"):
        save_model(nan, tmp_path / "nan.onnx")
    broken = _tiny(init("W", np.ones((4, 3), np.float32)))
    broken.graph.node[1].input[0] = "nowhere"  # reads a tensor nothing produces
    with pytest.raises(BadModelError, match="fails onnx.checker"):
        save_model(broken, tmp_path / "broken.onnx")
    x = helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", 2])
    y = helper.make_tensor_value_info("y", TensorProto.FLOAT, ["N", 2])
    # onnx.checker accepts an op of an imported custom domain; onnxruntime has no kernel for it
    custom = helper.make_model(helper.make_graph([helper.make_node("Foo", ["x"], ["y"], domain="com.example")],
                                                 "g", [x], [y]),
                               opset_imports=[helper.make_opsetid("", 17), helper.make_opsetid("com.example", 1)])
    with pytest.raises(BadModelError, match="onnxruntime cannot load"):
        save_model(custom, tmp_path / "custom.onnx")
    assert not list(tmp_path.iterdir())


@pytest.mark.parametrize("elem, np_dtype", [(TensorProto.FLOAT16, np.float16), (TensorProto.DOUBLE, np.float64)])
def test_float16_and_float64_sites_get_constants_of_their_type(cli, tmp_path, elem, np_dtype):
    # Clip's min/max share the input's type T (ONNX operator spec, Clip-13); tanh -> hard_tanh emits a Clip.
    rng = np.random.default_rng(0)
    w1, w2 = rng.normal(size=(8, 6)).astype(np_dtype), rng.normal(size=(6, 4)).astype(np_dtype)
    nodes = [helper.make_node("MatMul", ["x", "W1"], ["h"]), helper.make_node("Tanh", ["h"], ["t"]),
             helper.make_node("MatMul", ["t", "W2"], ["z"]), helper.make_node("Sigmoid", ["z"], ["y"])]
    graph = helper.make_graph(nodes, "g", [helper.make_tensor_value_info("x", elem, ["N", 8])],
                              [helper.make_tensor_value_info("y", elem, ["N", 4])],
                              [numpy_helper.from_array(w1, "W1"), numpy_helper.from_array(w2, "W2")])
    path = tmp_path / "m.onnx"
    onnx.save(helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)]), path)
    out = tmp_path / "out.onnx"
    result = cli("swap", path, "--no-calibrate", "-o", out, "--fold", "off", "--target", "none")  # emit, do not time
    assert result.exit_code == 0, result.output
    written = onnx.load(out)
    onnx.checker.check_model(written, full_check=True)
    clips = [n for n in written.graph.node if n.op_type == "Clip"]
    assert clips, [n.op_type for n in written.graph.node]
    inits = {t.name: t for t in written.graph.initializer}
    assert all(inits[i].data_type == elem for n in clips for i in n.input[1:] if i in inits)
    session = ort.InferenceSession(out.read_bytes(), providers=["CPUExecutionProvider"])
    (y,) = session.run(None, {"x": rng.normal(size=(3, 8)).astype(np_dtype)})
    assert y.dtype == np_dtype and np.isfinite(y).all()


# ---------------------------------------------------------------- onnxruntime's own log


def test_onnxruntime_errors_reach_stderr_as_our_one_line_only(tmp_path):
    # A Reshape to [-1, 3] of [N, 8] passes shape inference with N symbolic and fails in onnxruntime when
    # 8N is not a multiple of 3 (ONNX spec, Reshape: -1 is inferred from the remaining size); onnxruntime
    # logs such failures from C++ straight to the process's stderr unless its logger is told not to.
    nodes = [helper.make_node("Reshape", ["x", "shape"], ["r"]), helper.make_node("Sigmoid", ["r"], ["s"]),
             helper.make_node("MatMul", ["s", "W"], ["y"])]
    model = float_model(nodes, [("x", ["N", 8])], [("y", ["M", 2])],
                        [init("shape", np.array([-1, 3], np.int64), np.int64), init("W", np.ones((3, 2)))],
                        ir_version=None)
    onnx.save(model, tmp_path / "m.onnx")
    np.savez(tmp_path / "calib.npz", x=np.ones((64, 8), np.float32))  # 512 values: not a multiple of 3
    proc = cli_subprocess("swap", "m.onnx", "--calib", "calib.npz", "-o", "out.onnx", cwd=tmp_path)
    assert_one_line(proc, "m.onnx", "onnxruntime failed running")
    assert "[E:onnxruntime" not in proc.stderr
    assert not (tmp_path / "out.onnx").exists()


def test_a_declared_dimension_beyond_any_tensor_is_refused_before_inference(cli, tmp_path):
    # Found by benchmarks/fuzz.py (seed 7, m01840): a value_info claiming 2**40 elements made onnx's
    # shape inference die of std::bad_alloc; the ONNX IR spec allows any int64 dim_value, so the bound
    # is ours (swapper.core.model_io.MAX_DECLARED_DIM).
    model = _tiny(numpy_helper.from_array(np.ones((2, 2), np.float32), "w"))
    model.graph.value_info.append(helper.make_tensor_value_info("y", TensorProto.FLOAT, [2**40]))
    path = tmp_path / "huge_dim.onnx"
    onnx.save(model, path)
    with pytest.raises(BadModelError, match="declares a dimension of 1099511627776"):
        load_model(path)
    result = cli("scan", path)
    assert result.exit_code == 2, result.output
