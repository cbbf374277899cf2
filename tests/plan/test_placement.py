"""Tests of swapper.plan.placement: where each surrogate parameter goes (producer, consumers, nodes, held).

The graphs are written here; the rules are the operator definitions (ONNX
operator spec): Conv / Gemm / MatMul are linear, zero padding breaks an
input offset, BatchNormalization is a per-channel affine map, and Relu is
positively homogeneous. The fold arithmetic itself is tested in
tests/rewrite/test_folding.py.
"""
from __future__ import annotations

import numpy as np
import pytest
from onnx import helper
from testkit import float_model, init

from swapper import functions
from swapper.core.graph import GraphIndex
from swapper.errors import UsageError
from swapper.plan.placement import decide_placement
from swapper.scan.sites import Site


def _model(nodes, inits, x_shape, outs, extra_inputs=()):
    return float_model(nodes, [("X", list(x_shape)), *extra_inputs], [(o, None) for o in outs], inits, infer=True)


def _site(model, x, y, nodes, axis=1, channels=4):
    index = GraphIndex.of(model)
    return Site(id="s1", function="silu", params={}, input=x, output=y, nodes=tuple(nodes), form="op",
                shape=index.shape(x), channel_axis=axis, channels=channels, producer=None, consumers=(),
                role="hidden", elements=None, cost=0.0, cost_share=0.0)


def _silu(x, y):
    return [helper.make_node("Sigmoid", [x], ["sg"], name="sig"), helper.make_node("Mul", [x, "sg"], [y], name="mul")]


def conv_model(pads=1, bias2=True, residual=False, bn=False, y_is_output=False, after=None):
    rng = np.random.default_rng(0)
    inits = [init("W1", rng.normal(size=(4, 3, 3, 3))), init("B1", np.zeros(4)),
             init("W2", rng.normal(size=(2, 4, 3, 3))), init("B2", np.zeros(2))]
    nodes = [helper.make_node("Conv", ["X", "W1", "B1"], ["h"], name="c1", pads=[1] * 4)]
    x = "h"
    if bn:
        inits += [init(n, np.ones(4)) for n in ("g", "bt", "mu", "var")]
        nodes.append(helper.make_node("BatchNormalization", ["h", "g", "bt", "mu", "var"], ["hb"], name="bn"))
        x = "hb"
    nodes += _silu(x, "a")
    consumer = after or "Conv"
    if consumer == "Conv":
        nodes.append(helper.make_node("Conv", ["a", "W2"] + (["B2"] if bias2 else []), ["Y"], name="c2",
                                      pads=[pads] * 4))
    else:
        nodes.append(helper.make_node(consumer, ["a"], ["Y"], name="c2"))
    outs = ["Y"] + (["a"] if y_is_output else [])
    if residual:
        nodes.append(helper.make_node("Add", [x, "X2"], ["R"], name="res"))
        outs.append("R")
    model = _model(nodes, inits, (1, 3, 5, 5), outs, [("X2", [1, 4, 5, 5])] if residual else [])
    return model, _site(model, x, "a", ["sig", "mul"])


def mm_model(with_add=True, mm_shared=False, consumer_transA=False, channel_axis=2):
    """X[1, 3, 5] -> MatMul(+Add) -> SiLU -> MatMul -> Y, or -> Gemm when ``consumer_transA``."""
    rng = np.random.default_rng(1)
    inits = [init("W1", rng.normal(size=(5, 4))), init("B1", np.zeros(4)), init("W2", rng.normal(size=(4, 2)))]
    nodes = [helper.make_node("MatMul", ["X", "W1"], ["p"], name="mm1")]
    x = "p"
    outs = ["Y"]
    if with_add:
        nodes.append(helper.make_node("Add", ["p", "B1"], ["h"], name="add1"))
        x = "h"
    if mm_shared:
        nodes.append(helper.make_node("Relu", ["p"], ["side"], name="side"))
        outs.append("side")
    nodes += _silu(x, "a")
    if consumer_transA:
        nodes.append(helper.make_node("Gemm", ["a", "W2"], ["Y"], name="g2", transA=1))
        model = _model(nodes, inits, (4, 5), outs)  # a is [4(K), 4]: transA reads it as [M, K]
    else:
        nodes.append(helper.make_node("MatMul", ["a", "W2"], ["Y"], name="mm2"))
        model = _model(nodes, inits, (1, 3, 5), outs)
    return model, _site(model, x, "a", ["sig", "mul"], axis=channel_axis if not consumer_transA else 1)


def place(model, site, target="hard_swish", policy="exact"):
    return decide_placement(GraphIndex.of(model), site, functions.get(target), policy)


# -------------------------------------------------------------- placement
def test_conv_chain_exact_holds_d_behind_padding():
    placement, notes = place(*conv_model(pads=1))
    assert placement == {"a": "consumers", "b": "producer", "c": "producer", "d": "fixed"}
    assert any(n.startswith("d fixed") for n in notes)


def test_conv_chain_unpadded_folds_everything_even_without_bias():
    placement, _ = place(*conv_model(pads=0, bias2=False))
    assert placement == {"a": "consumers", "b": "producer", "c": "producer", "d": "consumers"}


def test_homogeneous_target_moves_a_inside():
    # relu is positively homogeneous (relu(s·z) = s·relu(z), s > 0): a joins b, c in the producer
    placement, notes = place(*conv_model(pads=1), target="relu")
    assert placement["a"] == "in-surrogate" and any("a > 0" in n for n in notes)
    placement, _ = place(*conv_model(pads=1, residual=True), target="relu")
    assert placement["a"] == "consumers"  # b is held (not folded), so a cannot go inside


@pytest.mark.parametrize("policy, d", [("approximate", "approx"), ("exact+nodes", "nodes"), ("exact", "fixed")])
def test_padded_conv_consumer_d_per_policy(policy, d):
    placement, notes = place(*conv_model(pads=1), policy=policy)
    assert placement["d"] == d
    if d == "approx":
        assert any("inexact" in n for n in notes)


def test_off_policy_places_every_parameter_in_nodes():
    placement, _ = place(*conv_model(pads=0), policy="off")
    assert set(placement.values()) == {"nodes"}


def test_batchnorm_producer_folds_b_and_c():
    placement, _ = place(*conv_model(pads=0, bn=True))
    assert placement["b"] == placement["c"] == "producer"


def test_producer_feeding_other_nodes_does_not_fold():
    placement, notes = place(*conv_model(pads=0, residual=True), policy="exact+nodes")
    assert placement["b"] == placement["c"] == "nodes"
    assert any("outside the site" in n for n in notes)


def test_graph_output_or_nonlinear_consumer_blocks_a_and_d():
    placement, _ = place(*conv_model(pads=0, y_is_output=True))
    assert placement["a"] == placement["d"] == "fixed"
    placement, notes = place(*conv_model(after="Relu"))
    assert placement["a"] == placement["d"] == "fixed" and any("not a linear layer" in n for n in notes)


def test_matmul_without_bias_folds_b_but_not_c():
    placement, notes = place(*mm_model(with_add=False))
    assert placement["b"] == "producer" and placement["c"] == "fixed"
    assert placement["a"] == "consumers" and placement["d"] == "fixed"  # MatMul consumer without bias Add
    placement, _ = place(*mm_model(with_add=False), policy="exact+nodes")
    assert placement["c"] == "nodes"


def test_matmul_add_producer_and_its_limits():
    placement, _ = place(*mm_model())
    assert placement["b"] == placement["c"] == "producer"
    placement, notes = place(*mm_model(mm_shared=True))
    assert placement["b"] == "fixed" and any("outside its bias Add" in n for n in notes)
    placement, notes = place(*mm_model(channel_axis=1))  # channels on the wrong axis for a MatMul
    assert placement["b"] == "fixed" and placement["a"] == "fixed"


def test_gemm_consumer_with_transposed_input_does_not_fold():
    placement, notes = place(*mm_model(consumer_transA=True))
    assert placement["a"] == "fixed" and any("transA" in n for n in notes)


def test_unknown_channels_fold_as_scalars():
    model, site = conv_model(pads=0)
    scalar = Site(**{**site.__dict__, "channel_axis": None, "channels": None})
    placement, _ = place(model, scalar)
    assert placement == {"a": "consumers", "b": "producer", "c": "producer", "d": "consumers"}


def test_unknown_policy_is_a_usage_error():
    with pytest.raises(UsageError, match="fold policy"):
        place(*conv_model(), policy="sometimes")


def test_plans_written_with_the_older_names_read_with_todays():
    # swapper/plan/plan.py docstring: the swapper.plan metadata of models written before the rename held
    # "source"/"target" fields, placement words "held"/"inner"/"consumers+" and fold "nodes".
    from swapper.plan.plan import Plan

    old = {"fold": "nodes", "swaps": [{
        "site_id": "s1", "source": "silu", "source_params": {}, "target": "relu", "target_params": {},
        "channel_axis": 1, "channels": 2, "a": [1.5, 2.0], "b": [1.0, 1.0], "c": [0.0, 0.0], "d": [0.0, 0.0],
        "placement": {"a": "inner", "b": "held", "c": "held", "d": "consumers+"}, "notes": [], "form": "Relu",
        "cost": None}]}
    plan = Plan.from_dict(old)
    (swap,) = plan.swaps
    assert plan.fold == "exact+nodes"
    assert (swap.function, swap.surrogate, swap.function_params, swap.surrogate_params) == ("silu", "relu", {}, {})
    assert swap.placement == {"a": "in-surrogate", "b": "fixed", "c": "fixed", "d": "consumers-via-max"}
    assert swap.free() == ("a", "d")  # fixed parameters stay out of the fit
    written = plan.to_dict()["swaps"][0]
    assert "source" not in written and "target" not in written and written["function"] == "silu"
