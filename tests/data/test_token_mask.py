"""Which input is the attention mask, and which token positions the statistics read.

The detection rule is swapper's own (documented in swapper/data/token_mask.py); the models it is tried on are
written inline and run by onnxruntime, whose output shows what the mask means to the model: changing a padding
position's id leaves the embedding as it was, changing a real one does not (ONNX operator spec: Gather, Cast,
ReduceSum, Div). The sampled positions are checked against numpy's own draw.
"""
from __future__ import annotations

import numpy as np
import pytest
from testkit import DEMO, in_memory, run, token_batch, token_model

from swapper.core.model_io import load_model
from swapper.data.dataset import InputSpec, input_specs
from swapper.data.token_mask import TokenSelection, find_mask_input, token_rows
from swapper.errors import BadDataError, UsageError


def test_the_inline_encoder_ignores_padding_positions_so_its_mask_marks_them():
    # the premise of masking, from onnxruntime: padding ids do not reach the output, real ones do
    model, batch = token_model(), token_batch(6, 5, seed=1)
    base = run(model, batch)[0]
    pad = batch["attention_mask"] == 0
    assert pad.any()
    changed = dict(batch, input_ids=np.where(pad, 7, batch["input_ids"]))
    np.testing.assert_array_equal(run(model, changed)[0], base)
    real = dict(batch, input_ids=np.where(~pad, (batch["input_ids"] % 11) + 1, batch["input_ids"]))
    assert not np.allclose(run(model, real)[0], base)


@pytest.mark.parametrize("ids_name, mask_name", [("input_ids", "attention_mask"), ("tokens", "input_mask"),
                                                 ("ids", "Mask")])
def test_the_mask_is_found_by_name_dtype_and_shape(ids_name, mask_name):
    specs = input_specs(token_model(ids_name=ids_name, mask_name=mask_name))
    name, why = find_mask_input(specs)
    assert name == mask_name
    assert mask_name in why


def test_an_input_not_named_mask_is_not_taken():
    name, why = find_mask_input(input_specs(token_model(mask_name="lengths_seen")))
    assert name is None and "no attention mask" in why


@pytest.mark.parametrize("specs", [
    # a float input called mask (an image mask, a weight map) is not a token mask
    [InputSpec("input_ids", np.dtype(np.int64), ("N", "T")), InputSpec("mask", np.dtype(np.float32), ("N", "T"))],
    # shaped unlike the token ids
    [InputSpec("input_ids", np.dtype(np.int64), ("N", "T")), InputSpec("mask", np.dtype(np.int64), ("N", "S"))],
    [InputSpec("input_ids", np.dtype(np.int64), ("N", 8)), InputSpec("mask", np.dtype(np.int64), ("N", 9))],
    # no token ids beside it
    [InputSpec("pixels", np.dtype(np.float32), ("N", 3, 8, 8)), InputSpec("mask", np.dtype(np.int64), ("N", 8))],
    # rank 3
    [InputSpec("input_ids", np.dtype(np.int64), ("N", "T", 1)), InputSpec("mask", np.dtype(np.int64), ("N", "T", 1))],
])
def test_inputs_that_do_not_fit_the_rule_are_not_taken(specs):
    assert find_mask_input(specs)[0] is None


def test_two_candidates_mean_no_guess():
    specs = [InputSpec("input_ids", np.dtype(np.int64), ("N", "T")),
             InputSpec("attention_mask", np.dtype(np.int64), ("N", "T")),
             InputSpec("special_tokens_mask", np.dtype(np.bool_), ("N", "T"))]
    name, why = find_mask_input(specs)
    assert name is None and "--mask-input" in why
    assert find_mask_input(specs, "special_tokens_mask")[0] == "special_tokens_mask"


def test_naming_the_mask_and_switching_it_off():
    specs = input_specs(token_model(mask_name="keep"))
    assert find_mask_input(specs, "keep")[0] == "keep"
    assert find_mask_input(input_specs(token_model()), "none")[0] is None
    with pytest.raises(UsageError, match="no such input"):
        find_mask_input(specs, "attention_mask")
    with pytest.raises(UsageError, match="rank 2"):
        find_mask_input([InputSpec("x", np.dtype(np.float32), ("N", 4))], "x")


def test_the_demo_status_encoder_mask_is_found():
    # demo_models/README.md: the status encoder reads input_ids and attention_mask, int64 [batch, 16]
    assert find_mask_input(input_specs(load_model(DEMO / "status_encoder_gelu.onnx").model))[0] == "attention_mask"


def test_every_real_position_is_kept_under_the_cap():
    batch = token_batch(9, 6, seed=2)
    sel = TokenSelection.of(in_memory(batch), "attention_mask", cap=10_000)
    assert sel.kept == sel.used == int(batch["attention_mask"].sum())
    for start, stop in [(0, 4), (4, 9), (0, 9)]:
        np.testing.assert_array_equal(sel.keep(start, stop), batch["attention_mask"][start:stop] != 0)


def test_beyond_the_cap_a_seeded_uniform_sample_of_real_positions_is_kept():
    batch = token_batch(40, 8, seed=3)
    mask = batch["attention_mask"]
    cap = int(mask.sum()) // 3
    sel = TokenSelection.of(in_memory(batch), "attention_mask", cap=cap, seed=5)
    keep = np.concatenate([sel.keep(s, min(s + 7, 40)) for s in range(0, 40, 7)])  # batch by batch
    assert keep.sum() == cap and not (keep & (mask == 0)).any()
    # the same draw made directly with numpy: ordinals among the real positions, sample-major order
    ordinals = np.random.default_rng(5).choice(int(mask.sum()), size=cap, replace=False)
    expected = np.zeros(mask.size, dtype=bool)
    expected[np.flatnonzero(mask.reshape(-1))[ordinals]] = True
    np.testing.assert_array_equal(keep.reshape(-1), expected)


def test_a_mask_with_no_real_position_is_refused():
    batch = token_batch(3, 4)
    batch["attention_mask"][:] = 0
    with pytest.raises(BadDataError, match="masks every token"):
        TokenSelection.of(in_memory(batch), "attention_mask")


def test_rows_are_the_kept_positions_and_misaligned_tensors_are_refused():
    keep = np.array([[True, False, True], [False, True, True]])
    t = np.arange(2 * 3 * 4, dtype=np.float32).reshape(2, 3, 4)
    np.testing.assert_array_equal(token_rows(t, keep, "x"), t.reshape(6, 4)[keep.reshape(-1)])
    with pytest.raises(BadDataError, match="does not line up"):
        token_rows(t[:, :2], keep, "site input")
    with pytest.raises(BadDataError, match="does not line up"):
        token_rows(t.reshape(2, 12), keep, "site input")
