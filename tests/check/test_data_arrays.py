"""Data files with arrays the model does not read, and integer data: what is kept, cast, noted or refused.

Contract: README "Data files". Oracles: onnxruntime's input type checks (it
accepts only the declared element type, so feeds must arrive in it) and the
ONNX Gather definition (integer indices pick rows of the table).
"""
from __future__ import annotations

import logging

import numpy as np
import onnx
import onnx.parser
import onnxruntime as ort
import pytest
from onnx import numpy_helper

from swapper.data.dataset import InputSpec, batches, load_dataset
from swapper.errors import BadDataError

F32 = np.dtype(np.float32)
I64 = np.dtype(np.int64)


def one_line_naming(excinfo, path, *needles) -> None:
    msg = str(excinfo.value)
    assert "\n" not in msg and str(path) in msg, msg
    for needle in needles:
        assert needle in msg, msg


def test_arrays_the_model_does_not_read_are_left_out_with_one_note(tmp_path, caplog):
    path = tmp_path / "val.npz"
    x = np.random.default_rng(0).normal(size=(6, 3)).astype(np.float32)
    np.savez(path, a=x, b=x, reference_out=np.zeros((6, 2), np.float32), classes=np.arange(6),
             labels=np.arange(6) % 2)
    specs = [InputSpec("a", F32, ("N", 3)), InputSpec("b", F32, ("N", 3))]
    with caplog.at_level(logging.INFO, logger="swapper.data.dataset"):
        ds = load_dataset(path, specs)
    assert sorted(ds.arrays) == ["a", "b"] and ds.labels is not None  # labels stay reserved and kept
    assert len(ds.notes) == 1
    named = ds.notes[0].split(" (only")[0]  # the note's list of left-out arrays, before the reminder
    assert str(path) in named and "'classes'" in named and "'reference_out'" in named and "'labels'" not in named
    note = ds.notes[0]
    assert note in caplog.text  # logged at INFO as well as returned
    np.testing.assert_array_equal(next(batches(ds, 6)).feeds["a"], x)


def test_strict_data_refuses_them(tmp_path):
    path = tmp_path / "val.npz"
    x = np.zeros((4, 3), np.float32)
    np.savez(path, a=x, b=x, extra=x)
    specs = [InputSpec("a", F32, ("N", 3)), InputSpec("b", F32, ("N", 3))]
    with pytest.raises(BadDataError) as e:
        load_dataset(path, specs, strict=True)
    one_line_naming(e, path, "'extra'", "--strict-data")


def test_a_missing_input_is_still_an_error_naming_what_was_found(tmp_path):
    path = tmp_path / "val.npz"
    np.savez(path, a=np.zeros((4, 3), np.float32), c=np.zeros((4, 3), np.float32))
    with pytest.raises(BadDataError) as e:
        load_dataset(path, [InputSpec("a", F32, ("N", 3)), InputSpec("b", F32, ("N", 3))])
    one_line_naming(e, path, "missing arrays for model inputs ['b']", "'c'")


@pytest.mark.parametrize("dtype", [np.uint8, np.int16, np.int64])
def test_integer_data_for_a_float_input_is_refused(tmp_path, dtype):
    path = tmp_path / "pixels.npz"
    np.savez(path, pixels=np.arange(2 * 8 * 8, dtype=dtype).reshape(2, 1, 8, 8))
    with pytest.raises(BadDataError) as e:
        load_dataset(path, [InputSpec("input", F32, ("N", 1, 8, 8))])
    one_line_naming(e, path, "'pixels'", np.dtype(dtype).name, "float32")


def test_float64_is_still_narrowed_to_float32(tmp_path):
    path = tmp_path / "x.npz"
    x = np.random.default_rng(1).normal(size=(5, 3))
    np.savez(path, x=x)
    feeds = next(batches(load_dataset(path, [InputSpec("x", F32, ("N", 3))]), 5)).feeds["x"]
    assert feeds.dtype == np.float32
    np.testing.assert_array_equal(feeds, x.astype(np.float32))


def test_int64_token_ids_stay_int64_and_feed_a_gather(tmp_path):
    # Gather (ONNX spec): out[i, t] = table[ids[i, t]]; onnxruntime refuses ids that are not int64 here
    m = onnx.parser.parse_model('<ir_version: 8, opset_import: ["" : 17]>\n'
                                "g (int64[N, 5] ids) => (float[N, 5, 2] out) <float[50, 2] T> {"
                                " out = Gather <axis = 0> (T, ids) }")
    table = np.arange(100, dtype=np.float32).reshape(50, 2)
    m.graph.initializer.append(numpy_helper.from_array(table, "T"))
    ids = np.random.default_rng(2).integers(0, 50, size=(7, 5), dtype=np.int64)
    np.savez(tmp_path / "ids.npz", ids=ids, classes=np.arange(7))
    ds = load_dataset(tmp_path / "ids.npz", [InputSpec("ids", I64, ("N", 5))])
    feed = next(batches(ds, 7)).feeds["ids"]
    assert feed.dtype == np.int64
    np.testing.assert_array_equal(feed, ids)
    sess = ort.InferenceSession(m.SerializeToString(), providers=["CPUExecutionProvider"])
    np.testing.assert_array_equal(sess.run(None, {"ids": feed})[0], table[ids])
