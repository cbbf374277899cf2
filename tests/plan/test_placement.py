"""Tests of swapper.plan.placement: placement rules and the fold arithmetic.

The arithmetic is checked against onnxruntime executing single Conv /
ConvTranspose / Gemm / MatMul nodes (ONNX operator spec): a folded layer run
on x must equal the original layer's output with the affine map applied.
"""
from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from onnx import helper
from testkit import float_model, init, run

from swapper import functions
from swapper.core.graph import GraphIndex
from swapper.errors import UsageError
from swapper.plan.placement import decide_placement
from swapper.rewrite.folding import input_offset, input_scale, scale_shift_output
from swapper.scan.sites import Site


def _model(nodes, inits, x_shape, outs, extra_inputs=()):
    return float_model(nodes, [("X", list(x_shape)), *extra_inputs], [(o, None) for o in outs], inits, infer=True)


def _site(model, x, y, nodes, axis=1, channels=4):
    index = GraphIndex.of(model)
    return Site(id="s1", function="silu", params={}, input=x, output=y, nodes=tuple(nodes), form="op",
                shape=index.shape(x), channel_axis=axis, channels=channels, producer=None, consumers=(),
                role="pointwise", elements=None, cost=0.0, cost_share=0.0)


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
    assert placement == {"a": "consumers", "b": "producer", "c": "producer", "d": "held"}
    assert any(n.startswith("d held") for n in notes)


def test_conv_chain_unpadded_folds_everything_even_without_bias():
    placement, _ = place(*conv_model(pads=0, bias2=False))
    assert placement == {"a": "consumers", "b": "producer", "c": "producer", "d": "consumers"}


def test_homogeneous_target_moves_a_inside():
    # relu is positively homogeneous (relu(s·z) = s·relu(z), s > 0): a joins b, c in the producer
    placement, notes = place(*conv_model(pads=1), target="relu")
    assert placement["a"] == "inner" and any("a > 0" in n for n in notes)
    placement, _ = place(*conv_model(pads=1, residual=True), target="relu")
    assert placement["a"] == "consumers"  # b is held (not folded), so a cannot go inside


@pytest.mark.parametrize("policy, d", [("approximate", "approx"), ("nodes", "nodes"), ("exact", "held")])
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
    placement, notes = place(*conv_model(pads=0, residual=True), policy="nodes")
    assert placement["b"] == placement["c"] == "nodes"
    assert any("outside the site" in n for n in notes)


def test_graph_output_or_nonlinear_consumer_blocks_a_and_d():
    placement, _ = place(*conv_model(pads=0, y_is_output=True))
    assert placement["a"] == placement["d"] == "held"
    placement, notes = place(*conv_model(after="Relu"))
    assert placement["a"] == placement["d"] == "held" and any("not a linear layer" in n for n in notes)


def test_matmul_without_bias_folds_b_but_not_c():
    placement, notes = place(*mm_model(with_add=False))
    assert placement["b"] == "producer" and placement["c"] == "held"
    assert placement["a"] == "consumers" and placement["d"] == "held"  # MatMul consumer without bias Add
    placement, _ = place(*mm_model(with_add=False), policy="nodes")
    assert placement["c"] == "nodes"


def test_matmul_add_producer_and_its_limits():
    placement, _ = place(*mm_model())
    assert placement["b"] == placement["c"] == "producer"
    placement, notes = place(*mm_model(mm_shared=True))
    assert placement["b"] == "held" and any("outside its bias Add" in n for n in notes)
    placement, notes = place(*mm_model(channel_axis=1))  # channels on the wrong axis for a MatMul
    assert placement["b"] == "held" and placement["a"] == "held"


def test_gemm_consumer_with_transposed_input_does_not_fold():
    placement, notes = place(*mm_model(consumer_transA=True))
    assert placement["a"] == "held" and any("transA" in n for n in notes)


def test_unknown_channels_fold_as_scalars():
    model, site = conv_model(pads=0)
    scalar = Site(**{**site.__dict__, "channel_axis": None, "channels": None})
    placement, _ = place(model, scalar)
    assert placement == {"a": "consumers", "b": "producer", "c": "producer", "d": "consumers"}


def test_unknown_policy_is_a_usage_error():
    with pytest.raises(UsageError, match="fold policy"):
        place(*conv_model(), policy="sometimes")


# ------------------------------------------------------------- arithmetic
def _run_node(node, inits, feeds):
    names = [i for i in node.input if i and i not in {t.name for t in inits}]
    model = float_model([node], [(n, list(feeds[n].shape)) for n in names], [(node.output[0], None)], inits)
    return run(model, feeds)[0].astype(np.float64)


def _conv(op, w, bias, x, **attrs):
    inits = [init("W", w)] + ([init("B", bias)] if bias is not None else [])
    node = helper.make_node(op, ["X", "W"] + (["B"] if bias is not None else []), ["Y"], **attrs)
    return _run_node(node, inits, {"X": x.astype(np.float32)})


@settings(max_examples=20, deadline=None)
@given(op=st.sampled_from(["Conv", "ConvTranspose"]), group=st.sampled_from([1, 2]),
       pads=st.sampled_from([0, 1]), scalar=st.booleans(), seed=st.integers(0, 2**16))
def test_output_scale_shift_matches_onnxruntime(op, group, pads, scalar, seed):
    # source: ONNX operator spec, Conv / ConvTranspose weight layouts, executed by onnxruntime
    rng = np.random.default_rng(seed)
    c_in, m = 4, 6
    shape = (m, c_in // group, 3, 3) if op == "Conv" else (c_in, m // group, 3, 3)
    w, bias, x = rng.normal(size=shape), rng.normal(size=m), rng.normal(size=(1, c_in, 5, 5))
    b = rng.uniform(0.5, 2.0, 1 if scalar else m) * rng.choice([-1, 1], 1 if scalar else m)
    c = rng.normal(size=1 if scalar else m)
    kind = "conv" if op == "Conv" else "convtranspose"
    node = helper.make_node(op, ["X", "W", "B"], ["Y"], group=group)
    new_w, new_b = scale_shift_output(kind, node, w, bias, b, c)
    assert new_b.shape == (m,)
    attrs = {"group": group, "pads": [pads] * 4}
    want = _conv(op, w, bias, x, **attrs) * b.reshape(-1, 1, 1) + c.reshape(-1, 1, 1)
    np.testing.assert_allclose(_conv(op, new_w, new_b, x, **attrs), want, rtol=1e-4, atol=1e-4)


@settings(max_examples=20, deadline=None)
@given(group=st.sampled_from([1, 2, 4]), seed=st.integers(0, 2**16))
def test_conv_input_scale_and_offset_match_onnxruntime(group, seed):
    # source: ONNX operator spec, Conv (grouped, no padding) executed by onnxruntime:
    # Conv(W, a∘x + d) = Conv(W∘a, x) + Σ W·d
    rng = np.random.default_rng(seed)
    c_in, m = 4, 8
    w, x = rng.normal(size=(m, c_in // group, 3, 3)), rng.normal(size=(1, c_in, 5, 5))
    a, d = rng.normal(size=c_in), rng.normal(size=c_in)
    node = helper.make_node("Conv", ["X", "W"], ["Y"], group=group)
    got = _conv("Conv", input_scale("conv", node, w, a), input_offset("conv", node, w, d), x, group=group)
    want = _conv("Conv", w, None, x * a.reshape(-1, 1, 1) + d.reshape(-1, 1, 1), group=group)
    np.testing.assert_allclose(got, want, rtol=1e-4, atol=1e-4)


@pytest.mark.parametrize("trans_b", [0, 1])
def test_gemm_folds_match_onnxruntime(trans_b):
    # source: ONNX operator spec, Gemm: Y = alpha·A'·B' + beta·C, executed by onnxruntime
    rng = np.random.default_rng(trans_b)
    k, n = 5, 3
    w = rng.normal(size=(n, k) if trans_b else (k, n))
    cb, x = rng.normal(size=(1, n)), rng.normal(size=(4, k))
    node = helper.make_node("Gemm", ["X", "W", "C"], ["Y"], transB=trans_b, alpha=0.7, beta=1.3)

    def gemm(w_, c_, x_):
        return _run_node(node, [init("W", w_), init("C", c_)], {"X": x_.astype(np.float32)})

    b, c = rng.normal(size=n), rng.normal(size=n)
    new_w, new_c = scale_shift_output("gemm", node, w, cb, b, c)
    np.testing.assert_allclose(gemm(new_w, new_c, x), gemm(w, cb, x) * b + c, rtol=1e-4, atol=1e-4)
    a, d = rng.normal(size=k), rng.normal(size=k)
    shifted = cb + input_offset("gemm", node, w, d) / 1.3
    np.testing.assert_allclose(gemm(input_scale("gemm", node, w, a), shifted, x), gemm(w, cb, x * a + d),
                               rtol=1e-4, atol=1e-4)


def test_matmul_folds_match_numpy():
    # source: ONNX operator spec, MatMul (numpy.matmul semantics), executed by onnxruntime
    rng = np.random.default_rng(9)
    w, x = rng.normal(size=(5, 3)), rng.normal(size=(2, 4, 5))
    a, d = rng.normal(size=5), rng.normal(size=5)
    node = helper.make_node("MatMul", ["X", "W"], ["Y"])
    got = _run_node(node, [init("W", input_scale("matmul", node, w, a))], {"X": x.astype(np.float32)})
    got = got + input_offset("matmul", node, w, d)
    want = _run_node(node, [init("W", w)], {"X": (x * a + d).astype(np.float32)})
    np.testing.assert_allclose(got, want, rtol=1e-4, atol=1e-4)
