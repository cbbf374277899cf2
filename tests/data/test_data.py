"""Tests for swapper.data: loading .npz / .npy folders, validation, batching, lazy views.

References: numpy's .npy/.npz format docs (NEP 1; ``np.load`` allow_pickle and
mmap_mode semantics), the ONNX spec for graph inputs (initializers may be listed
as inputs), and onnxruntime's InferenceSession as the consumer of the feeds.
"""
from __future__ import annotations

import io
import zipfile

import numpy as np
import onnx
import onnxruntime as ort
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from onnx import TensorProto, helper

from swapper.data import values as V
from swapper.data.dataset import (
    InputSpec,
    batches,
    input_specs,
    load_dataset,
    replicate,
    subset,
)
from swapper.data.lazy_array import CycledArray
from swapper.errors import BadDataError, BadModelError

F32 = np.dtype(np.float32)


def spec(name="x", shape=("N", 3, 4), dtype=F32):
    return [InputSpec(name, np.dtype(dtype), shape)]


def sample(n=10, seed=0, shape=(3, 4)):
    return np.random.default_rng(seed).standard_normal((n, *shape)).astype(np.float32)


def concat_batches(ds, bs, key="x", limit=None):
    return np.concatenate([b.feeds[key] for b in batches(ds, bs, limit=limit)])


def assert_one_line_error(excinfo, path, *needles):
    msg = str(excinfo.value)
    assert "\n" not in msg
    assert str(path) in msg, msg
    for needle in needles:
        assert needle in msg, msg


class Trap:
    """Unpickling this object creates ``marker``: proof that a loader unpickled it."""

    def __init__(self, marker):
        self.marker = str(marker)

    def __reduce__(self):
        return (open, (self.marker, "w"))


# ------------------------------------------------------------------ round trips


def test_npz_round_trip_with_labels(tmp_path):
    x, y = sample(), np.arange(10) % 3
    np.savez(tmp_path / "d.npz", x=x, labels=y)
    ds = load_dataset(tmp_path / "d.npz", spec(), require_labels=True)
    assert ds.n == 10 and ds.expected is None
    np.testing.assert_array_equal(np.asarray(ds.arrays["x"]), x)
    np.testing.assert_array_equal(np.asarray(ds.labels), y)
    # source: numpy docs, np.savez stores members uncompressed (ZIP_STORED), so they can be memory-mapped
    assert isinstance(ds.arrays["x"], np.memmap)


def test_compressed_npz_round_trip(tmp_path):
    x, t = sample(7), np.linspace(0, 1, 7)
    np.savez_compressed(tmp_path / "d.npz", x=x, expected=t)
    ds = load_dataset(tmp_path / "d.npz", spec())
    np.testing.assert_array_equal(concat_batches(ds, 3), x)
    np.testing.assert_array_equal(np.concatenate([b.expected for b in batches(ds, 3)]), t)
    assert ds.notes == []


def test_the_older_name_of_expected_values_is_read_with_a_note(tmp_path):
    # README "Data files": the regression array is 'expected'; files written with its older name 'targets'
    # still load, with one note, and giving both is refused (which one is meant?)
    x, t = sample(7), np.linspace(0, 1, 7)
    np.savez(tmp_path / "old.npz", x=x, targets=t)
    ds = load_dataset(tmp_path / "old.npz", spec())
    np.testing.assert_array_equal(np.concatenate([b.expected for b in batches(ds, 3)]), t)
    assert len(ds.notes) == 1 and "'targets' read as 'expected'" in ds.notes[0]
    np.savez(tmp_path / "both.npz", x=x, targets=t, expected=t)
    with pytest.raises(BadDataError, match="both 'expected' and 'targets'"):
        load_dataset(tmp_path / "both.npz", spec())


def test_fortran_order_member_matches_numpy(tmp_path):
    # source: numpy .npy format docs, 'fortran_order' header key
    x = np.asfortranarray(sample(5))
    np.savez(tmp_path / "d.npz", x=x)
    ds = load_dataset(tmp_path / "d.npz", spec())
    np.testing.assert_array_equal(concat_batches(ds, 2), np.load(tmp_path / "d.npz")["x"])


def test_folder_round_trip_is_memmapped(tmp_path):
    x, y = sample(9), np.arange(9)
    np.save(tmp_path / "x.npy", x)
    np.save(tmp_path / "labels.npy", y)
    (tmp_path / "README.txt").write_text("not data")  # other files are ignored
    ds = load_dataset(tmp_path, spec(), require_labels=True)
    assert isinstance(ds.arrays["x"], np.memmap) and isinstance(ds.labels, np.memmap)
    np.testing.assert_array_equal(concat_batches(ds, 4), x)
    np.testing.assert_array_equal(np.concatenate([b.labels for b in batches(ds, 4)]), y)


def test_single_input_npz_is_name_agnostic(tmp_path):
    x = sample(4)
    np.savez(tmp_path / "d.npz", images=x, labels=np.zeros(4, dtype=np.int64))
    ds = load_dataset(tmp_path / "d.npz", spec(name="input.1"))
    assert list(ds.arrays) == ["input.1"]
    np.testing.assert_array_equal(concat_batches(ds, 4, key="input.1"), x)


def test_multi_input_names_must_match(tmp_path):
    specs = [InputSpec("a", F32, ("N", 2)), InputSpec("b", F32, ("N", 2))]
    np.savez(tmp_path / "d.npz", a=np.zeros((3, 2), np.float32), c=np.zeros((3, 2), np.float32))
    with pytest.raises(BadDataError) as e:
        load_dataset(tmp_path / "d.npz", specs)
    assert_one_line_error(e, tmp_path / "d.npz", "missing arrays for model inputs ['b']", "unexpected arrays ['c']")


# ------------------------------------------------------------------ refusing pickles


def test_pickled_object_array_is_refused_without_unpickling(tmp_path):
    fired, control = tmp_path / "fired", tmp_path / "control"
    folder = tmp_path / "set"
    folder.mkdir()
    np.save(folder / "x.npy", np.array([Trap(fired)], dtype=object), allow_pickle=True)
    np.savez(tmp_path / "d.npz", x=np.array([Trap(fired)], dtype=object))
    np.save(tmp_path / "control.npy", np.array([Trap(control)], dtype=object), allow_pickle=True)
    # source: numpy np.load docs: allow_pickle=True unpickles object arrays. The trap does fire then:
    np.load(tmp_path / "control.npy", allow_pickle=True)
    assert control.exists()
    for target in (folder, tmp_path / "d.npz"):
        with pytest.raises(BadDataError) as e:
            load_dataset(target, spec(shape=("N",)))
        assert "contains pickled objects (refused)" in str(e.value) and "\n" not in str(e.value)
    assert not fired.exists()


# ------------------------------------------------------------------ broken files


def test_missing_file_and_empty_folder(tmp_path):
    with pytest.raises(BadDataError) as e:
        load_dataset(tmp_path / "nope.npz", spec())
    assert_one_line_error(e, tmp_path / "nope.npz", "no such file")
    (tmp_path / "empty").mkdir()
    with pytest.raises(BadDataError) as e:
        load_dataset(tmp_path / "empty", spec())
    assert_one_line_error(e, tmp_path / "empty", "no .npy files")


def test_text_file_is_not_an_npz(tmp_path):
    p = tmp_path / "d.npz"
    p.write_text("a,b,c\n1,2,3\n")
    with pytest.raises(BadDataError) as e:
        load_dataset(p, spec())
    assert_one_line_error(e, p, "not an .npz")


@pytest.mark.parametrize("keep", [0.3, 0.6, 0.95])
def test_truncated_npz(tmp_path, keep):
    p = tmp_path / "d.npz"
    np.savez(p, x=sample(50))
    raw = p.read_bytes()
    p.write_bytes(raw[: int(len(raw) * keep)])
    with pytest.raises(BadDataError) as e:
        load_dataset(p, spec())
    assert_one_line_error(e, p)


def test_truncated_npy_in_folder(tmp_path):
    np.save(tmp_path / "x.npy", sample(20))
    raw = (tmp_path / "x.npy").read_bytes()
    (tmp_path / "x.npy").write_bytes(raw[:-10])
    with pytest.raises(BadDataError) as e:
        load_dataset(tmp_path, spec())
    assert_one_line_error(e, tmp_path / "x.npy", "truncated")


@pytest.mark.parametrize("compression", [zipfile.ZIP_STORED, zipfile.ZIP_DEFLATED])
def test_truncated_member_inside_an_intact_zip(tmp_path, compression):
    buf = io.BytesIO()
    np.save(buf, sample(20))
    p = tmp_path / "d.npz"
    with zipfile.ZipFile(p, "w", compression=compression) as zf:
        zf.writestr("x.npy", buf.getvalue()[:-10])  # the zip is valid, the array inside is short
    with pytest.raises(BadDataError) as e:
        load_dataset(p, spec())
    assert_one_line_error(e, p, "array 'x'", "truncated")


def test_messages_name_the_array_as_stored_in_the_file(tmp_path):
    x = sample(5)
    x[3, 0, 0] = np.nan
    np.savez(tmp_path / "d.npz", images=x)
    with pytest.raises(BadDataError) as e:
        load_dataset(tmp_path / "d.npz", spec())
    assert_one_line_error(e, tmp_path / "d.npz", "array 'images'", "NaN at sample 3")


@pytest.mark.parametrize(
    "shape, needle",
    [((5, 3, 5), "axis 2: 5 != 4"), ((5, 12), "expects (N, 3, 4)"), ((5, 3, 4, 1), "expects (N, 3, 4)")],
)
def test_wrong_shapes(tmp_path, shape, needle):
    np.savez(tmp_path / "d.npz", x=np.zeros(shape, np.float32))
    with pytest.raises(BadDataError) as e:
        load_dataset(tmp_path / "d.npz", spec())
    assert_one_line_error(e, tmp_path / "d.npz", "'x'", needle)


def test_dynamic_axes_accept_any_size_but_shared_symbols_must_agree(tmp_path):
    specs = [InputSpec("ids", np.dtype(np.int64), ("B", "T")), InputSpec("mask", np.dtype(np.int64), ("B", "T"))]
    np.savez(tmp_path / "ok.npz", ids=np.ones((2, 7), np.int64), mask=np.ones((2, 7), np.int64))
    assert load_dataset(tmp_path / "ok.npz", specs).n == 2
    np.savez(tmp_path / "bad.npz", ids=np.ones((2, 7), np.int64), mask=np.ones((2, 6), np.int64))
    with pytest.raises(BadDataError) as e:
        load_dataset(tmp_path / "bad.npz", specs)
    assert_one_line_error(e, tmp_path / "bad.npz", "'T'")


def test_mismatched_sample_counts(tmp_path):
    np.savez(tmp_path / "d.npz", x=sample(5), labels=np.arange(4))
    with pytest.raises(BadDataError) as e:
        load_dataset(tmp_path / "d.npz", spec())
    assert_one_line_error(e, tmp_path / "d.npz", "sample counts differ", "x=5", "labels=4")


@pytest.mark.parametrize(
    "labels, needle",
    [
        (np.array([0, 1, -1, 2]), "negative class id at sample 2"),
        (np.array([0.0, 1.0, 1.0, 2.0]), "integer class ids"),
        (np.zeros((4, 3), np.int64), "1-D"),
    ],
)
def test_bad_labels(tmp_path, labels, needle):
    np.savez(tmp_path / "d.npz", x=sample(4), labels=labels)
    with pytest.raises(BadDataError) as e:
        load_dataset(tmp_path / "d.npz", spec())
    assert_one_line_error(e, tmp_path / "d.npz", needle)


def test_require_labels(tmp_path):
    np.savez(tmp_path / "d.npz", x=sample(4))
    assert load_dataset(tmp_path / "d.npz", spec()).labels is None
    with pytest.raises(BadDataError) as e:
        load_dataset(tmp_path / "d.npz", spec(), require_labels=True)
    assert_one_line_error(e, tmp_path / "d.npz", "'labels'")


# ------------------------------------------------------------------ values and dtypes


@settings(max_examples=25, deadline=None)
@given(
    n=st.integers(1, 40),
    data=st.data(),
    bad=st.sampled_from([np.nan, np.inf, -np.inf]),
    chunk_rows=st.integers(1, 8),
)
def test_nan_inf_rejected_with_first_index(tmp_path_factory, n, data, bad, chunk_rows):
    first = data.draw(st.integers(0, n - 1))
    later = data.draw(st.lists(st.integers(first, n - 1), max_size=3))
    x = sample(n)
    for i in [first, *later]:
        x[i, i % 3, 1] = bad
    p = tmp_path_factory.mktemp("nan") / "d.npz"
    np.savez(p, x=x)
    old = V.CHUNK_BYTES
    V.CHUNK_BYTES = chunk_rows * 12 * 4  # small chunks: the scan must cross chunk boundaries correctly
    try:
        with pytest.raises(BadDataError) as e:
            load_dataset(p, spec())
    finally:
        V.CHUNK_BYTES = old
    # source: IEEE 754 via numpy.isfinite; the first bad sample is the lowest index holding NaN/Inf
    assert_one_line_error(e, p, "array 'x'", f"at sample {first}", "NaN" if np.isnan(bad) else "Inf")


def test_dtype_casts_and_refusals(tmp_path):
    np.savez(tmp_path / "f64.npz", x=sample(3).astype(np.float64))
    b = next(batches(load_dataset(tmp_path / "f64.npz", spec()), 2))
    assert b.feeds["x"].dtype == np.float32 and b.feeds["x"].flags.c_contiguous
    # integer data for a float input is refused, not cast (README "Data files"); tests/check/test_data_arrays.py
    np.savez(tmp_path / "int.npz", x=np.arange(36, dtype=np.int16).reshape(3, 3, 4))
    with pytest.raises(BadDataError) as e:
        load_dataset(tmp_path / "int.npz", spec())
    assert_one_line_error(e, tmp_path / "int.npz", "array 'x'", "int16", "float32")
    np.savez(tmp_path / "bool.npz", x=np.zeros((3, 3, 4), bool))
    with pytest.raises(BadDataError) as e:
        load_dataset(tmp_path / "bool.npz", spec())
    assert_one_line_error(e, tmp_path / "bool.npz", "array 'x'", "dtype bool")
    np.savez(tmp_path / "f.npz", ids=np.zeros((3, 5), np.float32))
    with pytest.raises(BadDataError) as e:
        load_dataset(tmp_path / "f.npz", spec("ids", ("N", 5), np.int64))
    assert_one_line_error(e, tmp_path / "f.npz", "array 'ids'", "int64")


def test_narrowing_casts_that_would_change_values_are_refused(tmp_path):
    x = sample(4).astype(np.float64)
    x[2, 0, 0] = 1e300  # source: IEEE 754 binary32 max is about 3.4e38, so this would become inf
    np.savez(tmp_path / "big.npz", x=x)
    with pytest.raises(BadDataError) as e:
        load_dataset(tmp_path / "big.npz", spec())
    assert_one_line_error(e, tmp_path / "big.npz", "sample 2", "float32")
    ids = np.zeros((3, 2), np.int64)
    ids[1, 1] = 2**40  # does not fit int32
    np.savez(tmp_path / "ids.npz", ids=ids)
    with pytest.raises(BadDataError) as e:
        load_dataset(tmp_path / "ids.npz", spec("ids", ("N", 2), np.int32))
    assert_one_line_error(e, tmp_path / "ids.npz", "sample 1", "int32")


# ------------------------------------------------------------------ batching and views


@settings(max_examples=30, deadline=None)
@given(n=st.integers(1, 30), bs=st.integers(1, 12), limit=st.none() | st.integers(0, 40))
def test_batches_cover_every_sample_once_in_order(tmp_path_factory, n, bs, limit):
    x, y = sample(n, seed=n), np.arange(n)[::-1].copy()
    folder = tmp_path_factory.mktemp("b")
    np.save(folder / "x.npy", x)
    np.save(folder / "labels.npy", y)
    ds = load_dataset(folder, spec())
    got = list(batches(ds, bs, limit=limit))
    expect = n if limit is None else min(n, limit)
    assert [b.start for b in got] == list(range(0, expect, bs))
    for b in got:
        # memory bound: a batch holds at most batch_size samples, in its own (non-mmapped) buffer
        assert b.feeds["x"].shape[0] == b.stop - b.start <= bs
        assert b.feeds["x"].nbytes == (b.stop - b.start) * 3 * 4 * 4
        assert not isinstance(b.feeds["x"], np.memmap) and b.feeds["x"].flags.owndata
    if expect:
        np.testing.assert_array_equal(np.concatenate([b.feeds["x"] for b in got]), x[:expect])
        np.testing.assert_array_equal(np.concatenate([b.labels for b in got]), y[:expect])


def test_replicate_four_times(tmp_path):
    x, y = sample(7), np.arange(7) % 2
    np.save(tmp_path / "x.npy", x)
    np.save(tmp_path / "labels.npy", y)
    ds = load_dataset(tmp_path, spec())
    big = replicate(ds, 4)
    assert big.n == 28
    assert isinstance(big.arrays["x"], CycledArray) and big.arrays["x"].base is ds.arrays["x"]  # no copy
    bs = 5  # does not divide 7: batches straddle the seams between copies
    assert all(b.feeds["x"].shape[0] <= bs for b in batches(big, bs))
    # reference: np.tile repeats the whole array along axis 0
    np.testing.assert_array_equal(concat_batches(big, bs), np.tile(x, (4, 1, 1)))
    np.testing.assert_array_equal(np.concatenate([b.labels for b in batches(big, bs)]), np.tile(y, 4))
    twice = replicate(big, 2)
    assert twice.n == 56 and twice.arrays["x"].base is ds.arrays["x"]


@settings(max_examples=40, deadline=None)
@given(m=st.integers(1, 6), length=st.integers(1, 25), data=st.data())
def test_cycled_array_indexing_matches_numpy_take_wrap(m, length, data):
    base = np.arange(m * 2).reshape(m, 2)
    arr = CycledArray(base, length)
    # reference: np.take(..., mode="wrap") is index modulo the axis length
    full = np.take(base, np.arange(length), axis=0, mode="wrap")
    start = data.draw(st.integers(-length, length))
    stop = data.draw(st.integers(-length, length + 3))
    step = data.draw(st.sampled_from([1, 1, 2, 3]))
    np.testing.assert_array_equal(arr[start:stop:step], full[start:stop:step])
    idx = data.draw(st.lists(st.integers(-length, length - 1), max_size=6))
    np.testing.assert_array_equal(arr[np.array(idx, dtype=np.int64)], full[np.array(idx, dtype=np.int64)])
    i = data.draw(st.integers(-length, length - 1))
    np.testing.assert_array_equal(arr[i], full[i])
    np.testing.assert_array_equal(arr[1:, 1], full[1:, 1])
    with pytest.raises(IndexError):
        arr[length]


def test_subset_first_n_and_seeded(tmp_path):
    x, y = sample(12), np.arange(12)
    np.savez(tmp_path / "d.npz", x=x, labels=y)
    ds = load_dataset(tmp_path / "d.npz", spec())
    head = subset(ds, 5)
    assert head.n == 5
    np.testing.assert_array_equal(concat_batches(head, 2), x[:5])
    r1, r2 = subset(ds, 6, seed=3), subset(ds, 6, seed=3)
    picked = np.concatenate([b.labels for b in batches(r1, 4)])
    assert len(set(picked)) == 6 and np.all(np.diff(picked) > 0)  # distinct, in original order
    np.testing.assert_array_equal(picked, np.asarray(r2.labels))  # deterministic for a seed
    np.testing.assert_array_equal(concat_batches(r1, 4), x[picked])
    assert subset(replicate(ds, 3), 20).n == 20
    np.testing.assert_array_equal(concat_batches(subset(replicate(ds, 3), 20), 7), np.tile(x, (2, 1, 1))[:20])


# ------------------------------------------------------------------ model inputs


def _model(tmp_path):
    w = helper.make_tensor("w", TensorProto.FLOAT, [4], [1.0, 2.0, 3.0, 4.0])
    graph = helper.make_graph(
        [helper.make_node("Add", ["x", "w"], ["y"]), helper.make_node("Cast", ["ids"], ["z"], to=TensorProto.INT64)],
        "g",
        [
            helper.make_tensor_value_info("x", TensorProto.FLOAT, ["batch", 3, 4]),
            helper.make_tensor_value_info("ids", TensorProto.INT32, [None, 5]),
            # source: ONNX IR spec, an initializer may also appear in graph.input (it then has a default)
            helper.make_tensor_value_info("w", TensorProto.FLOAT, [4]),
        ],
        [
            helper.make_tensor_value_info("y", TensorProto.FLOAT, ["batch", 3, 4]),
            helper.make_tensor_value_info("z", TensorProto.INT64, [None, 5]),
        ],
        initializer=[w],
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    onnx.checker.check_model(model)
    return model


def test_input_specs_agree_with_onnxruntime_and_feeds_run(tmp_path):
    model = _model(tmp_path)
    specs = input_specs(model)
    sess = ort.InferenceSession(model.SerializeToString(), providers=["CPUExecutionProvider"])
    ort_inputs = [i for i in sess.get_inputs() if i.name != "w"]
    assert [s.name for s in specs] == [i.name for i in ort_inputs] == ["x", "ids"]
    # source: onnxruntime NodeArg.type strings 'tensor(float)', 'tensor(int32)'
    assert [s.dtype for s in specs] == [np.dtype(np.float32), np.dtype(np.int32)]
    assert [i.type for i in ort_inputs] == ["tensor(float)", "tensor(int32)"]
    assert specs[0].shape == ("batch", 3, 4) and specs[1].shape[1] == 5 and specs[1].shape[0] in (None, "")
    # float64 and int64 data cast per batch to what onnxruntime accepts (it refuses wrong dtypes)
    x, ids = sample(6).astype(np.float64), np.arange(30, dtype=np.int64).reshape(6, 5)
    np.savez(tmp_path / "d.npz", x=x, ids=ids)
    ds = load_dataset(tmp_path / "d.npz", specs)
    outs = [sess.run(None, b.feeds) for b in batches(ds, 4)]
    np.testing.assert_allclose(np.concatenate([o[0] for o in outs]), x.astype(np.float32) + [1, 2, 3, 4], rtol=1e-6)
    np.testing.assert_array_equal(np.concatenate([o[1] for o in outs]), ids)


def test_input_specs_refuses_non_tensor_inputs():
    seq = helper.make_tensor_sequence_value_info("s", TensorProto.FLOAT, None)
    graph = helper.make_graph(
        [helper.make_node("SequenceLength", ["s"], ["n"])], "g", [seq],
        [helper.make_tensor_value_info("n", TensorProto.INT64, [])],
    )
    with pytest.raises(BadModelError, match="'s' is a sequence_type"):
        input_specs(helper.make_model(graph))


def test_static_batch_dimension_caps_batches(tmp_path):
    # A model exported with batch 1 (common for edge targets) must get batches of 1, whatever is asked;
    # onnxruntime rejects any other first dimension (ONNX shape semantics: a dim_value is fixed).
    x = np.arange(5 * 3, dtype=np.float32).reshape(5, 3)
    np.savez(tmp_path / "d.npz", x=x)
    ds = load_dataset(tmp_path / "d.npz", [InputSpec("x", np.dtype(np.float32), (1, 3))])
    got = list(batches(ds, 4))
    assert [b.feeds["x"].shape[0] for b in got] == [1] * 5
    assert np.array_equal(np.concatenate([b.feeds["x"] for b in got]), x)
