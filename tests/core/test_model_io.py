"""Safe loading and atomic saving: every broken model gives one line, exit 2, and no traceback."""
from __future__ import annotations

import os
import pickle
from pathlib import Path

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper, numpy_helper
from testkit import float_model, init, one_line_error

from swapper.core.model_io import MAX_OPSET, MIN_OPSET, load_model, save_model
from swapper.errors import BadModelError, BadOutputError


def tiny_model(opset: int = 17, act: str = "Sigmoid") -> onnx.ModelProto:
    # y = act(x @ W): built with onnx.helper so the graph is visible here
    nodes = [helper.make_node("MatMul", ["x", "W"], ["h"], name="mm"), helper.make_node(act, ["h"], ["y"], name="act")]
    return float_model(nodes, [("x", ["N", 4])], [("y", ["N", 3])],
                       [init("W", np.arange(12, dtype=np.float32).reshape(4, 3) / 10)], opset=opset, ir_version=None)


def write(tmp_path, model, name="m.onnx"):
    path = tmp_path / name
    path.write_bytes(model.SerializeToString())
    return path


def test_loads_a_valid_model_and_infers_shapes(tmp_path):
    path = write(tmp_path, tiny_model())
    loaded = load_model(path)
    assert loaded.opset == 17
    # shape inference filled in the intermediate tensor (ONNX MatMul spec: [N,4]x[4,3] -> [N,3])
    shapes = {vi.name: vi for vi in loaded.model.graph.value_info}
    assert "h" in shapes
    assert [d.dim_value for d in shapes["h"].type.tensor_type.shape.dim][1] == 3


def test_missing_file(cli, tmp_path):
    path = tmp_path / "absent.onnx"
    one_line_error(cli("scan", path), str(path), "no such file")


def test_directory(cli, tmp_path):
    one_line_error(cli("scan", tmp_path), str(tmp_path), "is a directory")


def test_empty_file(cli, tmp_path):
    path = tmp_path / "empty.onnx"
    path.write_bytes(b"")
    one_line_error(cli("scan", path), str(path), "empty")


@pytest.mark.parametrize("payload", [b"this is plain text, not a model\n" * 10, os.urandom(257)])
def test_not_a_protobuf(cli, tmp_path, payload):
    path = tmp_path / "junk.onnx"
    path.write_bytes(payload)
    result = cli("scan", path)
    assert result.exit_code == 2 and "Traceback" not in result.output and str(path) in " ".join(result.output.split())


def test_truncated_model(cli, tmp_path):
    data = tiny_model().SerializeToString()
    path = tmp_path / "cut.onnx"
    path.write_bytes(data[: len(data) // 2])
    one_line_error(cli("scan", path))


def test_pickle_is_not_unpickled(cli, tmp_path):
    marker = tmp_path / "pwned"

    class Hostile:
        def __reduce__(self):
            return (open, (str(marker), "w"))

    path = tmp_path / "model.onnx"
    path.write_bytes(pickle.dumps(Hostile()))
    assert cli("scan", path).exit_code == 2 and not marker.exists()


def test_invalid_graph(cli, tmp_path):
    model = tiny_model()
    model.graph.node[1].input[0] = "undefined_tensor"  # ONNX IR spec: inputs must be defined before use
    path = write(tmp_path, model)
    one_line_error(cli("scan", path), str(path), "invalid graph")


@pytest.mark.parametrize("opset", [MIN_OPSET - 4, MAX_OPSET + 3])
def test_opset_outside_range(cli, tmp_path, opset):
    model = tiny_model()
    model.opset_import[0].version = opset
    path = write(tmp_path, model)
    one_line_error(cli("scan", path), str(path), f"opset {opset}", f"{MIN_OPSET}..{MAX_OPSET}")


def _with_external(tmp_path, location: str) -> onnx.ModelProto:
    model = tiny_model()
    weight = model.graph.initializer[0]
    raw = numpy_helper.to_array(weight).tobytes()
    weight.ClearField("float_data")
    weight.ClearField("raw_data")
    weight.data_location = TensorProto.EXTERNAL
    for key, value in (("location", location), ("offset", "0"), ("length", str(len(raw)))):
        weight.external_data.add(key=key, value=value)
    return model, raw


def test_external_data_beside_the_model_loads(tmp_path):
    model, raw = _with_external(tmp_path, "weights.bin")
    (tmp_path / "weights.bin").write_bytes(raw)
    path = write(tmp_path, model)
    loaded = load_model(path)
    w = numpy_helper.to_array(loaded.model.graph.initializer[0])
    assert np.array_equal(w, np.arange(12, dtype=np.float32).reshape(4, 3) / 10)
    assert loaded.file_bytes == path.stat().st_size + len(raw)


@pytest.mark.parametrize("location", ["../outside.bin", "/etc/passwd", "sub/../../x.bin"])
def test_external_data_path_traversal_refused(cli, tmp_path, location):
    inner = tmp_path / "models"
    inner.mkdir()
    model, raw = _with_external(inner, location)
    (tmp_path / "outside.bin").write_bytes(raw)
    path = write(inner, model)
    one_line_error(cli("scan", path), str(path), "outside the model's folder")


def test_external_data_missing(cli, tmp_path):
    model, _ = _with_external(tmp_path, "gone.bin")
    path = write(tmp_path, model)
    one_line_error(cli("scan", path), str(path), "missing")


def test_model_without_sites_is_not_an_error(cli, tmp_path):
    path = write(tmp_path, tiny_model(act="Identity"))
    result = cli("scan", path)
    assert result.exit_code == 0
    assert "no activation sites found" in result.output


def test_save_is_atomic_and_never_overwrites_the_input(tmp_path):
    path = write(tmp_path, tiny_model())
    before = path.read_bytes()
    with pytest.raises(BadOutputError):
        save_model(tiny_model(act="Tanh"), path, inputs=(path,))
    assert path.read_bytes() == before
    out = save_model(tiny_model(act="Tanh"), tmp_path / "out.onnx", inputs=(path,))
    assert onnx.load(str(out)).graph.node[1].op_type == "Tanh"
    assert not [p for p in tmp_path.iterdir() if p.name.endswith(".tmp")]  # no temporary left behind


def test_save_into_missing_or_readonly_folder(tmp_path):
    with pytest.raises(BadOutputError, match="does not exist"):
        save_model(tiny_model(), tmp_path / "nope" / "m.onnx")
    # Read-only places that stay read-only for root (a chmod 0500 folder does not: root ignores the mode):
    # a path whose parent is a regular file (ENOTDIR) and procfs, which refuses new files (proc(5)).
    taken = tmp_path / "taken.txt"
    taken.write_text("x")
    with pytest.raises(BadOutputError, match="is not a folder"):
        save_model(tiny_model(), taken / "m.onnx")
    if Path("/proc/self").is_dir():
        with pytest.raises(BadOutputError, match="cannot write in folder '/proc'"):
            save_model(tiny_model(), "/proc/m.onnx")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["taken.txt"]  # nothing left behind


def test_errors_are_one_line_exceptions(tmp_path):
    with pytest.raises(BadModelError) as info:
        load_model(tmp_path / "x.onnx")
    assert "\n" not in str(info.value)


def test_large_models_are_saved_with_external_data_and_load_back(tmp_path):
    # The 2 GiB protobuf limit (protobuf docs) is simulated with a low threshold: same code path.
    model = tiny_model()
    out = save_model(model, tmp_path / "big.onnx", external_above=16)
    assert (tmp_path / "big.onnx.data").is_file()
    assert model.graph.initializer[0].data_location == TensorProto.DEFAULT  # the caller's model is untouched
    loaded = load_model(out)
    w = numpy_helper.to_array(loaded.model.graph.initializer[0])
    assert np.array_equal(w, numpy_helper.to_array(model.graph.initializer[0]))
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".big.onnx.")]  # no staging left behind
