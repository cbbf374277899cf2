"""Tests of swapper.plan.layers: following a site's output to the linear layers that read it.

References: ONNX Reshape / Flatten are row-major (the operator spec; numpy.reshape
has the same semantics), so where a channel axis lands after a reshape is
checked against numpy on tagged arrays; a grouped Conv mixes only the channels
of its own group (ONNX operator spec, Conv ``group``).
"""
from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st
from onnx import helper
from testkit import float_model, init

from swapper.core.graph import GraphIndex
from swapper.plan.layers import channel_after_reshape, find_consumers
from swapper.scan.sites import find_sites


# ------------------------------------------------------------------ reshape channel mapping
@st.composite
def _reshapes(draw):
    rank = draw(st.integers(2, 4))
    before = tuple(draw(st.lists(st.integers(1, 4), min_size=rank, max_size=rank)))
    axis = draw(st.integers(0, rank - 1))
    # a random regrouping of the flat size into factors: a plausible reshape target
    total, after = int(np.prod(before)), []
    rest = total
    while rest > 1 and len(after) < 4:
        divisors = [d for d in range(2, rest + 1) if rest % d == 0]
        d = draw(st.sampled_from(divisors + [rest]))
        after.append(d)
        rest //= d
    after += [1] * draw(st.integers(0, 2))
    after = draw(st.permutations(after + [rest] if rest > 1 else after)) or [1]
    return before, axis, tuple(after)


@settings(max_examples=150, deadline=None)
@given(_reshapes())
def test_channel_after_reshape_matches_numpy_row_major(case):
    before, axis, after = case
    channels = before[axis]
    shape = [1] * len(before)
    shape[axis] = channels
    tagged = np.broadcast_to(np.arange(channels).reshape(shape), before).reshape(after)
    # source: ONNX Reshape/Flatten are row-major, as numpy.reshape (operator spec)
    keeps = [k for k, dim in enumerate(after) if dim == channels and np.array_equal(
        tagged, np.broadcast_to(np.arange(channels).reshape([-1 if j == k else 1 for j in range(len(after))]), after))]
    got = channel_after_reshape(before, after, axis, channels)
    if channels == 1:
        return  # one channel: any size-1 axis would do; nothing to map
    assert (got is not None) == bool(keeps)
    if got is not None:
        assert got in keeps


def test_channel_after_reshape_with_a_symbolic_batch():
    # [N, C, 1, 1] -> [N, C] (Flatten after a global pool) keeps the channels on axis 1
    assert channel_after_reshape(("N", 8, 1, 1), (None, 8), 1, 8) == 1
    assert channel_after_reshape(("N", 8, 2, 2), ("N", 32), 1, 8) is None
    assert channel_after_reshape(("N", 8, "H", 1), ("N", 8, "H"), 1, 8) == 1  # same dims before it
    assert channel_after_reshape(("N", 8, "H", 1), (None, 8, None), 1, 8) is None  # nothing to compare


# ------------------------------------------------------------------ consumers
def test_grouped_conv_is_skipped_with_a_note():
    # X[N, 2, 7, 7] -> Conv -> SiLU (x·Sigmoid(x)) -> Conv(pads 1, group 2) -> Y: the refit cannot
    # take a grouped consumer as one linear map of all the site's channels
    rng = np.random.default_rng(0)
    inits = [init("W1", rng.normal(size=(6, 2, 3, 3)) * 0.5), init("B1", rng.normal(size=6) * 0.3),
             init("W2", rng.normal(size=(4, 3, 3, 3)) * 0.3), init("B2", rng.normal(size=4) * 0.1)]
    nodes = [helper.make_node("Conv", ["X", "W1", "B1"], ["h"], name="conv1", pads=[1, 1, 1, 1]),
             helper.make_node("Sigmoid", ["h"], ["s"], name="sig"),
             helper.make_node("Mul", ["h", "s"], ["a"], name="mul"),
             helper.make_node("Conv", ["a", "W2", "B2"], ["Y"], name="conv2", pads=[1, 1, 1, 1], group=2)]
    model = float_model(nodes, [("X", ["N", 2, 7, 7])], [("Y", None)], inits, infer=True)
    sites = find_sites(model)
    found, notes = find_consumers(GraphIndex.of(model), sites[0], set())
    assert found == [] and any("grouped" in n for n in notes)
