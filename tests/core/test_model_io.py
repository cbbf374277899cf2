"""Safe loading and atomic saving: every broken model gives one line, exit 2, and no traceback."""
from __future__ import annotations

import os
import pickle

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper, numpy_helper
from typer.testing import CliRunner

from swapper.cli.app import app
from swapper.core.model_io import MAX_OPSET, MIN_OPSET, load_model, save_model
from swapper.errors import BadModelError, BadOutputError

runner = CliRunner()


def tiny_model(opset: int = 17, act: str = "Sigmoid") -> onnx.ModelProto:
    # y = act(x @ W): built with onnx.helper so the graph is visible here
    w = numpy_helper.from_array(np.arange(12, dtype=np.float32).reshape(4, 3) / 10, "W")
    nodes = [helper.make_node("MatMul", ["x", "W"], ["h"], name="mm"), helper.make_node(act, ["h"], ["y"], name="act")]
    graph = helper.make_graph(nodes, "g", [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", 4])],
                              [helper.make_tensor_value_info("y", TensorProto.FLOAT, ["N", 3])], [w])
    return helper.make_model(graph, opset_imports=[helper.make_opsetid("", opset)])


def write(tmp_path, model, name="m.onnx"):
    path = tmp_path / name
    path.write_bytes(model.SerializeToString())
    return path


def scan_error(path) -> tuple[int, str]:
    result = runner.invoke(app, ["scan", str(path)])
    return result.exit_code, result.output


def assert_one_line_error(path, code, output, *fragments):
    assert code == 2, output
    lines = [line for line in output.strip().splitlines() if line.strip()]
    assert len(lines) == 1, output  # one line, no traceback
    assert "Traceback" not in output
    assert str(path) in " ".join(output.split())
    for fragment in fragments:
        assert fragment in output


def test_loads_a_valid_model_and_infers_shapes(tmp_path):
    path = write(tmp_path, tiny_model())
    loaded = load_model(path)
    assert loaded.opset == 17
    # shape inference filled in the intermediate tensor (ONNX MatMul spec: [N,4]x[4,3] -> [N,3])
    shapes = {vi.name: vi for vi in loaded.model.graph.value_info}
    assert "h" in shapes
    assert [d.dim_value for d in shapes["h"].type.tensor_type.shape.dim][1] == 3


def test_missing_file(tmp_path):
    path = tmp_path / "absent.onnx"
    assert_one_line_error(path, *scan_error(path), "no such file")


def test_directory(tmp_path):
    assert_one_line_error(tmp_path, *scan_error(tmp_path), "is a directory")


def test_empty_file(tmp_path):
    path = tmp_path / "empty.onnx"
    path.write_bytes(b"")
    assert_one_line_error(path, *scan_error(path), "empty")


@pytest.mark.parametrize("payload", [b"this is plain text, not a model\n" * 10, os.urandom(257)])
def test_not_a_protobuf(tmp_path, payload):
    path = tmp_path / "junk.onnx"
    path.write_bytes(payload)
    code, out = scan_error(path)
    assert code == 2 and "Traceback" not in out and str(path) in " ".join(out.split())


def test_truncated_model(tmp_path):
    data = tiny_model().SerializeToString()
    path = tmp_path / "cut.onnx"
    path.write_bytes(data[: len(data) // 2])
    code, out = scan_error(path)
    assert code == 2 and len(out.strip().splitlines()) == 1 and "Traceback" not in out


def test_pickle_is_not_unpickled(tmp_path):
    marker = tmp_path / "pwned"

    class Hostile:
        def __reduce__(self):
            return (open, (str(marker), "w"))

    path = tmp_path / "model.onnx"
    path.write_bytes(pickle.dumps(Hostile()))
    code, out = scan_error(path)
    assert code == 2 and not marker.exists()


def test_invalid_graph(tmp_path):
    model = tiny_model()
    model.graph.node[1].input[0] = "undefined_tensor"  # ONNX IR spec: inputs must be defined before use
    path = write(tmp_path, model)
    assert_one_line_error(path, *scan_error(path), "invalid graph")


@pytest.mark.parametrize("opset", [MIN_OPSET - 4, MAX_OPSET + 3])
def test_opset_outside_range(tmp_path, opset):
    model = tiny_model()
    model.opset_import[0].version = opset
    path = write(tmp_path, model)
    assert_one_line_error(path, *scan_error(path), f"opset {opset}", f"{MIN_OPSET}..{MAX_OPSET}")


def _with_external(tmp_path, location: str) -> onnx.ModelProto:
    model = tiny_model()
    init = model.graph.initializer[0]
    raw = numpy_helper.to_array(init).tobytes()
    init.ClearField("float_data")
    init.ClearField("raw_data")
    init.data_location = TensorProto.EXTERNAL
    for key, value in (("location", location), ("offset", "0"), ("length", str(len(raw)))):
        init.external_data.add(key=key, value=value)
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
def test_external_data_path_traversal_refused(tmp_path, location):
    inner = tmp_path / "models"
    inner.mkdir()
    model, raw = _with_external(inner, location)
    (tmp_path / "outside.bin").write_bytes(raw)
    path = write(inner, model)
    assert_one_line_error(path, *scan_error(path), "outside the model's folder")


def test_external_data_missing(tmp_path):
    model, _ = _with_external(tmp_path, "gone.bin")
    path = write(tmp_path, model)
    assert_one_line_error(path, *scan_error(path), "missing")


def test_model_without_sites_is_not_an_error(tmp_path):
    path = write(tmp_path, tiny_model(act="Identity"))
    result = runner.invoke(app, ["scan", str(path)])
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
    ro = tmp_path / "ro"
    ro.mkdir()
    ro.chmod(0o500)
    try:
        if os.access(ro, os.W_OK):  # root ignores permission bits
            pytest.skip("running as a user that can write to read-only folders")
        with pytest.raises(BadOutputError, match="not writable"):
            save_model(tiny_model(), ro / "m.onnx")
    finally:
        ro.chmod(0o700)


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
