"""Shared symbolic dimensions: free per array unless onnxruntime says the model ties them.

Source of truth: onnxruntime running the model on one sample (the ONNX spec
gives a dim_param no meaning beyond "unknown"; a model ties two axes only
through what its ops require, e.g. Add's broadcasting rule).
"""
from __future__ import annotations

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper

from swapper import api
from swapper.core.model_io import load_model
from swapper.data.dataset import input_specs, load_dataset
from swapper.errors import BadDataError


def save(tmp_path, nodes, inputs, outputs):
    graph = helper.make_graph(nodes, "g", [helper.make_tensor_value_info(n, TensorProto.FLOAT, s) for n, s in inputs],
                              [helper.make_tensor_value_info(n, TensorProto.FLOAT, s) for n, s in outputs])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    onnx.save(model, tmp_path / "m.onnx")
    return load_model(tmp_path / "m.onnx")


def test_height_and_width_both_called_question_mark_are_free(tmp_path):
    # the exported classifier's input: [-1, 3, ?, ?], pooled globally, so any height and width run
    model = save(tmp_path, [helper.make_node("GlobalAveragePool", ["x"], ["p"]), helper.make_node("Flatten", ["p"], ["y"])],
                 [("x", [-1, 3, "?", "?"])], [("y", [-1, 3])])
    np.savez(tmp_path / "d.npz", x=np.ones((4, 3, 8, 12), np.float32))
    assert api.load_data(tmp_path / "d.npz", model).n == 4
    with pytest.raises(BadDataError, match="dimension '\\?' is 8 in array 'x' but 12 in array 'x'"):
        load_dataset(tmp_path / "d.npz", input_specs(model.model))  # without the model: nothing to ask


def test_a_model_that_ties_the_symbol_rejects_with_file_array_and_runtime_message(tmp_path):
    # x + xᵀ needs a square x (ONNX operator spec, Add: multidirectional broadcasting)
    model = save(tmp_path, [helper.make_node("Transpose", ["x"], ["t"], perm=[0, 2, 1]),
                            helper.make_node("Add", ["x", "t"], ["y"])],
                 [("x", ["N", "S", "S"])], [("y", ["N", "S", "S"])])
    np.savez(tmp_path / "d.npz", x=np.ones((4, 8, 12), np.float32))
    with pytest.raises(BadDataError) as e:
        api.load_data(tmp_path / "d.npz", model)
    msg = str(e.value)
    assert msg.startswith(str(tmp_path / "d.npz")) and "array 'x'" in msg and "\n" not in msg
    assert "onnxruntime cannot run the model on the first sample" in msg
    np.savez(tmp_path / "ok.npz", x=np.ones((4, 8, 8), np.float32))
    assert api.load_data(tmp_path / "ok.npz", model).n == 4


def test_two_inputs_sharing_a_symbol(tmp_path):
    model = save(tmp_path, [helper.make_node("Add", ["ids", "mask"], ["y"])],
                 [("ids", ["B", "T"]), ("mask", ["B", "T"])], [("y", ["B", "T"])])
    np.savez(tmp_path / "bad.npz", ids=np.ones((2, 7), np.float32), mask=np.ones((2, 6), np.float32))
    with pytest.raises(BadDataError, match="'T' is 7 in array 'ids' but 6 in array 'mask'.*onnxruntime"):
        api.load_data(tmp_path / "bad.npz", model)
    np.savez(tmp_path / "ok.npz", ids=np.ones((2, 7), np.float32), mask=np.ones((2, 7), np.float32))
    assert api.load_data(tmp_path / "ok.npz", model).n == 2
