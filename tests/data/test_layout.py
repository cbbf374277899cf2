"""Inputs not batched on axis 0, and constant inputs, for a recurrent model built inline.

The model takes audio frames [B, 8], a recurrent state [2, B, 4] (batch on axis
1) and a scalar int64 sample rate. Oracle: onnxruntime running the model on
each batch our loader makes equals onnxruntime running it on the same samples
cut out of the stored arrays by numpy slicing along each array's own batch axis.
"""
from __future__ import annotations

import json

import numpy as np
import onnx
import onnxruntime as ort
import pytest
from onnx import TensorProto, helper, numpy_helper
from typer.testing import CliRunner

from swapper import api
from swapper.cli.app import app
from swapper.core.model_io import load_model
from swapper.data.dataset import batches, input_specs, load_dataset
from swapper.data.layout import DataLayout, parse_options
from swapper.data.source import data_source
from swapper.errors import BadDataError, UsageError

N, T = 7, 8


def recurrent_model(path):
    """y = tanh(frames·W + mean(state) ) · sr/16000; state_out = state + y (broadcast over the 2 layers)."""
    nd = helper.make_node
    nodes = [
        nd("MatMul", ["frames", "W"], ["h"]),
        nd("ReduceMean", ["state"], ["m"], axes=[0], keepdims=0),  # [B, 4]
        nd("Add", ["h", "m"], ["a"]), nd("Tanh", ["a"], ["t"]),
        nd("Cast", ["sr"], ["srf"], to=TensorProto.FLOAT), nd("Div", ["srf", "k"], ["scale"]),
        nd("Mul", ["t", "scale"], ["y"]),
        nd("Unsqueeze", ["y", "zero"], ["y3"]), nd("Add", ["state", "y3"], ["state_out"]),
    ]
    graph = helper.make_graph(
        nodes, "rnn",
        [helper.make_tensor_value_info("frames", TensorProto.FLOAT, ["B", T]),
         helper.make_tensor_value_info("state", TensorProto.FLOAT, [2, "B", 4]),
         helper.make_tensor_value_info("sr", TensorProto.INT64, [])],
        [helper.make_tensor_value_info("y", TensorProto.FLOAT, ["B", 4]),
         helper.make_tensor_value_info("state_out", TensorProto.FLOAT, [2, "B", 4])],
        [numpy_helper.from_array(np.random.default_rng(0).standard_normal((T, 4)).astype(np.float32), "W"),
         numpy_helper.from_array(np.array(16000.0, np.float32), "k"),
         numpy_helper.from_array(np.array([0], np.int64), "zero")])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    onnx.checker.check_model(model, full_check=True)
    onnx.save(model, path)
    return path


def data(tmp_path, with_state=True):
    rng = np.random.default_rng(1)
    arrays = {"frames": rng.standard_normal((N, T)).astype(np.float32)}
    if with_state:
        arrays["state"] = rng.standard_normal((2, N, 4)).astype(np.float32)  # stored as the model takes it
    np.savez(tmp_path / "d.npz", **arrays)
    return tmp_path / "d.npz", arrays


def run(path, feeds):
    return ort.InferenceSession(str(path), providers=["CPUExecutionProvider"]).run(None, feeds)


def test_batches_slice_each_array_along_its_own_axis_and_feed_constants(tmp_path):
    model = recurrent_model(tmp_path / "m.onnx")
    path, arrays = data(tmp_path)
    layout = parse_options(["state=1"], ["sr=16000"])
    ds = api.load_data(path, load_model(model), layout=layout)
    assert ds.n == N
    for batch in batches(ds, 3):
        a, b = batch.start, batch.stop
        assert batch.feeds["state"].shape == (2, b - a, 4) and batch.feeds["state"].flags.c_contiguous
        assert batch.feeds["sr"].dtype == np.int64 and batch.feeds["sr"].shape == ()
        want = run(model, {"frames": arrays["frames"][a:b], "state": arrays["state"][:, a:b],
                           "sr": np.array(16000, np.int64)})
        for got, expected in zip(run(model, batch.feeds), want):
            np.testing.assert_array_equal(got, expected)


def test_zero_state_repeats_to_each_batch(tmp_path):
    model = recurrent_model(tmp_path / "m.onnx")
    path, _ = data(tmp_path, with_state=False)
    ds = api.load_data(path, load_model(model), layout=parse_options(["state=1"], ["state=zeros", "sr=8000"]))
    sizes = [b.feeds["state"].shape for b in batches(ds, 4)]
    assert sizes == [(2, 4, 4), (2, 3, 4)]
    assert not any(b.feeds["state"].any() for b in batches(ds, 4))


def test_description_file_declares_the_same(tmp_path):
    model = recurrent_model(tmp_path / "m.onnx")
    path, _ = data(tmp_path, with_state=False)
    spec = tmp_path / "data.json"
    spec.write_text(json.dumps({"batch_axis": {"state": 1}, "constant": {"sr": 16000, "state": "zeros"}}))
    ds = api.load_data(data_source(path, description=spec), load_model(model))
    feeds = next(batches(ds, 5)).feeds
    assert feeds["state"].shape == (2, 5, 4) and int(feeds["sr"]) == 16000
    run(model, feeds)


def test_constant_from_an_npy_file_relative_to_the_description(tmp_path):
    model = recurrent_model(tmp_path / "m.onnx")
    path, _ = data(tmp_path, with_state=False)
    h0 = np.arange(8, dtype=np.float32).reshape(2, 1, 4)
    np.save(tmp_path / "h0.npy", h0)
    spec = tmp_path / "data.json"
    spec.write_text(json.dumps({"batch_axis": {"state": 1}, "constant": {"sr": 16000, "state": "h0.npy"}}))
    feeds = next(batches(api.load_data(data_source(path, description=spec), load_model(model)), 3)).feeds
    np.testing.assert_array_equal(feeds["state"], np.repeat(h0, 3, axis=1))


@pytest.mark.parametrize("axes,consts,needle", [
    (["state=3"], ["sr=16000"], "axis 3 is outside input 'state' of rank 3"),
    (["state=1"], ["rate=16000"], "--constant rate=16000: the model has no input 'rate'"),
    (["state=1"], ["sr=abc"], "--constant sr=abc: not a number"),
    (["state=x"], [], "--batch-axis state=x: the axis must be a whole number"),
    ([], ["state=zeros", "sr=1"], "axis 1 of input 'state' is B"),
    (["state=1"], ["sr=1.5"], "does not fit input 'sr' of type int64"),
    (["state=1"], ["sr=1,2"], "value has shape (2,), input 'sr' has rank 0"),
])
def test_bad_options_are_one_line_usage_errors(tmp_path, axes, consts, needle):
    model = load_model(recurrent_model(tmp_path / "m.onnx"))
    path, _ = data(tmp_path)
    with pytest.raises(UsageError) as e:
        api.load_data(path, model, layout=parse_options(axes, consts))
    assert needle in str(e.value) and "\n" not in str(e.value)


@pytest.mark.parametrize("text,needle", [
    ("[1, 2]", "a data description is a JSON object"),
    ('{"batch_axes": {}}', "unknown keys ['batch_axes']"),
    ('{"constant": {"sr": "fast"}}', "constant 'sr': 'fast' is not 'zeros' or an .npy file"),
    ('{"batch_axis": {"state": 1.5}}', "batch_axis of 'state' must be a whole number"),
    ("{oops", "not a valid JSON data description"),
])
def test_bad_description_files_are_named(tmp_path, text, needle):
    spec = tmp_path / "data.json"
    spec.write_text(text)
    with pytest.raises(BadDataError) as e:
        data_source(tmp_path / "d.npz", description=spec)
    assert str(e.value).startswith(str(spec)) and needle in str(e.value)


def test_unknown_input_in_a_description_names_the_file(tmp_path):
    model = load_model(recurrent_model(tmp_path / "m.onnx"))
    path, _ = data(tmp_path)
    spec = tmp_path / "data.json"
    spec.write_text(json.dumps({"constant": {"rate": 1}}))
    with pytest.raises(BadDataError) as e:
        api.load_data(data_source(path, description=spec), model)
    assert str(e.value).startswith(str(spec)) and "no input 'rate'" in str(e.value)


def test_without_a_layout_the_state_cannot_be_supplied(tmp_path):
    # the old behaviour, kept as the default: axis 0 counts samples everywhere, every input needs an array
    model = load_model(recurrent_model(tmp_path / "m.onnx"))
    path, _ = data(tmp_path)
    with pytest.raises(BadDataError) as e:
        load_dataset(path, input_specs(model.model))
    assert "missing arrays for model inputs ['sr']" in str(e.value)


def test_layouts_merge_options_over_a_file():
    merged = DataLayout({"a": 1}, {"c": 1}, {"batch_axis:a": "f"}).merged(parse_options(["a=2"], None))
    assert merged.batch_axis == {"a": 2} and merged.constant == {"c": 1}


def test_cli_swap_with_batch_axis_and_constants(tmp_path):
    model = recurrent_model(tmp_path / "m.onnx")
    path, _ = data(tmp_path)
    out = tmp_path / "out.onnx"
    result = CliRunner().invoke(app, ["swap", str(model), "-o", str(out), "--calib", str(path),
                                      "--batch-axis", "state=1", "--constant", "sr=16000"])
    assert result.exit_code == 0, result.output
    swapped = onnx.load(out)
    assert "Tanh" not in [n.op_type for n in swapped.graph.node]
    feeds = {"frames": np.zeros((2, T), np.float32), "state": np.zeros((2, 2, 4), np.float32),
             "sr": np.array(16000, np.int64)}
    assert run(out, feeds)[0].shape == (2, 4)


def test_cli_bad_constant_is_one_line_exit_2(tmp_path):
    model = recurrent_model(tmp_path / "m.onnx")
    path, _ = data(tmp_path)
    result = CliRunner().invoke(app, ["swap", str(model), "-o", str(tmp_path / "o.onnx"), "--calib", str(path),
                                      "--constant", "sr"])
    assert result.exit_code == 2 and "--constant sr: expected NAME=VALUE" in result.output
    assert "Traceback" not in result.output
