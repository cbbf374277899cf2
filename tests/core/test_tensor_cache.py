"""Tests of swapper.core.tensor_cache: recorded tensors held in RAM up to a budget, on disk beyond it.

Reference: what went in, put together with ``np.concatenate``.
"""
from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from testkit import held_arrays

from swapper.core.tensor_cache import TensorCache


@settings(max_examples=40, deadline=None)
@given(
    sizes=st.lists(st.integers(0, 9), min_size=1, max_size=6),
    row_shape=st.sampled_from([(), (3,), (2, 4), (1, 2, 3)]),
    dtype=st.sampled_from([np.float32, np.float64, np.int64]),
    budget=st.sampled_from([0, 200, 1 << 30]),  # all on disk, spilled part way, all in RAM
    data=st.data(),
)
def test_cache_round_trips_and_reads_only_requested_rows(sizes, row_shape, dtype, budget, data):
    rng = np.random.default_rng(sum(sizes))
    parts = [(rng.normal(size=(n,) + row_shape) * 100).astype(dtype) for n in sizes]
    whole = np.concatenate(parts)  # source: reference = numpy concatenation of the appended batches
    with TensorCache(memory_budget=budget) as cache:
        for p in parts:
            cache.append("t", p, owned=data.draw(st.booleans()))
        assert "t" in cache and "u" not in cache
        assert cache.rows("t") == whole.shape[0]
        assert cache.nbytes() == whole.nbytes  # raw rows, nothing else, wherever they are
        assert cache.memory_bytes() <= budget and cache.memory_bytes() + cache.disk_bytes() == whole.nbytes
        np.testing.assert_array_equal(cache.read("t", 0, whole.shape[0]), whole)
        start = data.draw(st.integers(0, whole.shape[0] + 3))
        stop = data.draw(st.integers(start, whole.shape[0] + 5))
        got = cache.read("t", start, stop)
        expect = whole[start:stop]  # python slicing clips at the end the same way
        assert got.shape == expect.shape and got.dtype == expect.dtype
        np.testing.assert_array_equal(got, expect)


def test_cache_keeps_tensors_apart_and_rejects_changes():
    with TensorCache() as cache:
        a = np.arange(6, dtype=np.float32).reshape(2, 3)
        b = -np.arange(8, dtype=np.float32).reshape(2, 4)
        cache.append("a", a)
        cache.append("b", b)
        cache.append("a", a + 10)
        np.testing.assert_array_equal(cache.read("a", 1, 3), np.concatenate([a, a + 10])[1:3])
        np.testing.assert_array_equal(cache.read("b", 0, 2), b)
        with pytest.raises(ValueError):
            cache.append("a", np.zeros((1, 4), dtype=np.float32))  # row shape changed
        with pytest.raises(ValueError):
            cache.append("a", np.zeros((1, 3), dtype=np.float64))  # dtype changed
        with pytest.raises(ValueError):
            cache.read("a", -1, 2)
        root = cache.root
        assert root.exists()
    assert not root.exists()  # the context manager removes the spill folder


def test_cache_footprint_does_not_grow_with_batches():
    batch = np.random.default_rng(2).normal(size=(64, 16, 8, 8)).astype(np.float32)  # 256 KiB a batch
    small = batch[:, :4]  # 64 KiB a batch

    def state_after(n_batches: int, budget: int):
        with TensorCache(memory_budget=budget) as cache:
            for _ in range(n_batches):
                cache.append("x", batch)
                cache.append("y", small)
            assert cache.rows("x") == 64 * n_batches
            assert cache.nbytes() == n_batches * (batch.nbytes + small.nbytes)
            held = sum(a.nbytes for a in held_arrays(cache))
            assert held == cache.memory_bytes() <= budget
            first = {n: cache.read(n, 0, 1) for n in cache.names()}
            state = {"attributes": sorted(vars(cache)), "files": sorted(p.name for p in cache.root.iterdir()),
                     "tensors": {n: (a.dtype, a.shape[1:]) for n, a in first.items()}}  # without the row counts
            return held, state, cache.in_memory("x"), cache.in_memory("y")

    # common practice, no source: bounded memory means no recorded data beyond the budget kept in Python
    # attributes; with budget 0 nothing at all, as a plain spill-to-disk store
    held_1, state_1, *_ = state_after(1, 0)
    held_40, state_40, *_ = state_after(40, 0)
    assert held_1 == held_40 == 0
    assert state_1 == state_40
    # a 1 MiB budget: 3 batches of both fit; the 4th x would not, so x spills (and stays on disk)
    # while y keeps its RAM; y spills too once its own 16 batches fill the budget
    budget = 1 << 20
    held_3, _, x_in_ram_3, _ = state_after(3, budget)
    held_8, _, x_in_ram_8, y_in_ram_8 = state_after(8, budget)
    held_40, _, x_in_ram_40, y_in_ram_40 = state_after(40, budget)
    assert x_in_ram_3 and held_3 == 3 * (batch.nbytes + small.nbytes)
    assert not x_in_ram_8 and y_in_ram_8 and held_8 == 8 * small.nbytes
    assert not x_in_ram_40 and not y_in_ram_40 and held_40 == 0


def test_discard_frees_ram_and_disk_and_leaves_others_alone():
    rng = np.random.default_rng(4)
    a, b = rng.normal(size=(6, 5)).astype(np.float32), rng.normal(size=(6, 3)).astype(np.float32)
    for budget in (0, a.nbytes, 1 << 20):  # both on disk / a spilled on its 2nd append, b in RAM / both in RAM
        with TensorCache(memory_budget=budget) as cache:
            cache.append("a", a[:3])
            cache.append("b", b[:3])
            cache.append("a", a[3:])
            cache.append("b", b[3:])
            assert [cache.in_memory(n) for n in "ab"] == {0: [False, False], a.nbytes: [False, True]}.get(
                budget, [True, True])
            files_before, b_on_disk = len(list(cache.root.iterdir())), not cache.in_memory("b")
            cache.discard("b")
            assert "b" not in cache and "b" not in cache.names() and cache.names() == ["a"]
            assert cache.nbytes() == a.nbytes
            assert len(list(cache.root.iterdir())) == files_before - b_on_disk  # its spill file is gone
            np.testing.assert_array_equal(cache.read("a", 0, 6), a)  # source: what went in
            cache.discard("b")  # twice: no-op
            cache.append("b", b[:2])  # a fresh tensor under the old name, rows from 0
            assert cache.rows("b") == 2
            np.testing.assert_array_equal(cache.read("b", 0, 9), b[:2])
            cache.discard("a")
            cache.discard("b")
            assert cache.nbytes() == 0 and cache.memory_bytes() == 0 and list(cache.root.iterdir()) == []


def test_reads_in_ram_are_read_only_and_appends_copy_unless_owned():
    x = np.arange(12, dtype=np.float32).reshape(4, 3)
    with TensorCache() as cache:
        cache.append("copied", x)
        mine = x.copy()
        cache.append("owned", mine, owned=True)
        view = cache.read("copied", 0, 4)
        with pytest.raises(ValueError):
            view[0, 0] = -1.0  # readers cannot change what later readers see
        x[0, 0] = 99.0  # the caller reuses its buffer: the cache kept its own copy
        assert cache.read("copied", 0, 1)[0, 0] == 0.0
        assert np.shares_memory(cache.read("owned", 0, 4), mine) and not mine.flags.writeable
        np.testing.assert_array_equal(cache.read("copied", 1, 3), np.arange(3, 9, dtype=np.float32).reshape(2, 3))
