"""Tests of swapper.rewrite.apply: folded and explicit surrogates against independent executors.

References: onnxruntime and onnx.reference.ReferenceEvaluator execute the ONNX
operator spec; the surrogate formulas are written out in numpy from their
published definitions (tests/testkit.py); the tail of each original graph
(after the site) is cut out with onnx.utils.Extractor and run by onnxruntime
on the numpy surrogate output.
"""
from __future__ import annotations

import numpy as np
import onnx
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from onnx import helper, numpy_helper
from onnx.reference import ReferenceEvaluator
from onnx.utils import Extractor
from testkit import FORMULAS, float_model, init, run

from swapper import functions
from swapper.core.graph import GraphIndex
from swapper.errors import UsageError
from swapper.functions.params import NEUTRAL, PARAMS
from swapper.plan.placement import decide_placement
from swapper.plan.plan import Plan, SiteSwap
from swapper.rewrite.apply import PLAN_KEY, rewrite, rewrite_identity_floor
from swapper.scan.sites import Site

TPARAMS = {"hard_sigmoid": {"alpha": 0.2, "beta": 0.5}}  # source: ONNX operator spec, HardSigmoid defaults


# ------------------------------------------------------------- model helpers
def _activation(kind, x, y, prefix):
    """The source activation as an exporter writes it; returns (nodes, node names)."""
    if kind == "silu":  # x·sigmoid(x), the decomposed form
        nodes = [helper.make_node("Sigmoid", [x], [f"{prefix}_s"], name=f"{prefix}_sig"),
                 helper.make_node("Mul", [x, f"{prefix}_s"], [y], name=f"{prefix}_mul")]
    else:
        nodes = [helper.make_node({"tanh": "Tanh", "sigmoid": "Sigmoid"}[kind], [x], [y], name=f"{prefix}_act")]
    return nodes, tuple(n.name for n in nodes)


def _model(nodes, inits, x_shape, out_names):
    model = float_model(nodes, [("X", list(x_shape))], [(o, None) for o in out_names], inits, producer_name="test")
    model.metadata_props.add(key="owner", value="tests")
    return onnx.shape_inference.infer_shapes(model)


def _site(model, kind, names, x, y, axis, channels, sid="s1"):
    index = GraphIndex.of(model)
    prod = index.producer.get(x)
    return Site(id=sid, function=kind, params={}, input=x, output=y, nodes=names, form="op",
                shape=index.shape(x), channel_axis=axis, channels=channels,
                producer=prod.op_type if prod is not None else None,
                consumers=tuple(n.op_type for n in index.users(y)), role="hidden",
                elements=None, cost=0.0, cost_share=0.0)


def conv_chain(kind="silu", c_in=3, ch=4, pads2=1, group2=1, bn=False, share=False, seed=0):
    """X -> Conv -> [BN] -> act -> Conv(pads2) -> Y. ``share``: a second conv reuses W1 (output Z)."""
    rng = np.random.default_rng(seed)
    inits = [init("W1", rng.normal(size=(ch, c_in, 3, 3)) * 0.4), init("B1", rng.normal(size=ch) * 0.1),
             init("W2", rng.normal(size=(5 * group2, ch // group2, 3, 3)) * 0.3),
             init("B2", rng.normal(size=5 * group2) * 0.1)]
    nodes = [helper.make_node("Conv", ["X", "W1", "B1"], ["h"], name="conv1", pads=[1, 1, 1, 1])]
    x = "h"
    if bn:
        inits += [init("g", rng.uniform(0.5, 1.5, ch)), init("beta", rng.normal(size=ch) * 0.1),
                  init("mu", rng.normal(size=ch) * 0.1), init("var", rng.uniform(0.5, 2.0, ch))]
        nodes.append(helper.make_node("BatchNormalization", ["h", "g", "beta", "mu", "var"], ["hb"], name="bn"))
        x = "hb"
    act, names = _activation(kind, x, "a", "act")
    nodes += act
    nodes.append(helper.make_node("Conv", ["a", "W2", "B2"], ["Y"], name="conv2", pads=[pads2] * 4, group=group2))
    outs = ["Y"]
    if share:
        nodes.append(helper.make_node("Conv", ["X", "W1"], ["Z"], name="conv_shared", pads=[1, 1, 1, 1]))
        outs.append("Z")
    model = _model(nodes, inits, (2, c_in, 6, 6), outs)
    return model, _site(model, kind, names, x, "a", 1, ch)


def gemm_chain(kind="tanh", k=5, n=6, m=4, trans=(0, 1), seed=1):
    """X[2, k] -> Gemm -> act -> Gemm -> Y."""
    rng = np.random.default_rng(seed)
    w1 = rng.normal(size=(k, n)) * 0.5
    w2 = rng.normal(size=(n, m)) * 0.5
    inits = [init("W1", w1.T if trans[0] else w1), init("C1", rng.normal(size=n) * 0.1),
             init("W2", w2.T if trans[1] else w2), init("C2", rng.normal(size=(1, m)) * 0.1)]
    act, names = _activation(kind, "h", "a", "act")
    nodes = [helper.make_node("Gemm", ["X", "W1", "C1"], ["h"], name="gemm1", transB=trans[0], alpha=0.9, beta=1.1),
             *act,
             helper.make_node("Gemm", ["a", "W2", "C2"], ["Y"], name="gemm2", transB=trans[1], alpha=1.2, beta=0.8)]
    model = _model(nodes, inits, (2, k), ["Y"])
    return model, _site(model, kind, names, "h", "a", 1, n)


def matmul_chain(kind="sigmoid", k=5, n=6, m=3, seed=2, bias1=True):
    """X[2, 3, k] -> MatMul[+Add] -> act -> MatMul+Add -> Y (channels on the last axis)."""
    rng = np.random.default_rng(seed)
    inits = [init("W1", rng.normal(size=(k, n)) * 0.5), init("B1", rng.normal(size=n) * 0.1),
             init("W2", rng.normal(size=(n, m)) * 0.5), init("B2", rng.normal(size=m) * 0.1)]
    act, names = _activation(kind, "h", "a", "act")
    first = [helper.make_node("MatMul", ["X", "W1"], ["p"], name="mm1"),
             helper.make_node("Add", ["p", "B1"], ["h"], name="add1")]
    if not bias1:
        first = [helper.make_node("MatMul", ["X", "W1"], ["h"], name="mm1")]
        inits = [t for t in inits if t.name != "B1"]
    nodes = [*first, *act,
             helper.make_node("MatMul", ["a", "W2"], ["q"], name="mm2"),
             helper.make_node("Add", ["B2", "q"], ["Y"], name="add2")]
    model = _model(nodes, inits, (2, 3, k), ["Y"])
    return model, _site(model, kind, names, "h", "a", 2, n)


def _pre_activation(model, site, feeds):
    """The site input as the original model computes it (read as an extra graph output)."""
    return run(model, feeds, [site.input])[0].astype(np.float64)


def _formula(site, swap, x):
    """a·g(b·x + c) + d per channel, in float64, g written out from its definition (testkit.FORMULAS)."""
    shape = [1] * x.ndim
    axis = site.channel_axis % x.ndim
    shape[axis] = -1
    p = {q: np.asarray(getattr(swap, q), dtype=np.float64).reshape(shape if getattr(swap, q).size > 1 else ())
         for q in PARAMS}
    return p["a"] * FORMULAS[swap.surrogate](p["b"] * x + p["c"], **swap.surrogate_params) + p["d"]


def _expected(model, site, swap, feeds, out="Y"):
    """The original graph's tail run by onnxruntime on the numpy surrogate output."""
    y = _formula(site, swap, _pre_activation(model, site, feeds)).astype(np.float32)
    tail = Extractor(model).extract_model([site.output], [out])
    return run(tail, {site.output: y})[0]


def _swap(site, target, placement, rng, positive_a=False):
    n = site.channels

    def draw(p):
        if placement[p] == "fixed":
            return np.full(n, NEUTRAL[p])
        if p in ("a", "b"):
            mag = rng.uniform(0.5, 1.5, n)
            return mag if (p == "a" and positive_a) else mag * rng.choice([-1.0, 1.0], n)
        return rng.uniform(-0.5, 0.5, n)

    vals = {p: draw(p) for p in PARAMS}
    return SiteSwap(site_id=site.id, function=site.function, function_params={}, surrogate=target,
                    surrogate_params=dict(TPARAMS.get(target, {})), channel_axis=site.channel_axis,
                    channels=n, placement=dict(placement), **vals)


def _with_placement(swap, placement):
    return SiteSwap(**{**swap.__dict__, "placement": dict(placement)})


def _checked(model, sites, plan):
    result = rewrite(model, sites, plan)
    # source: ONNX checker (onnx.checker.check_model, full_check runs strict shape inference)
    onnx.checker.check_model(result.model, full_check=True)
    return result


def _feeds(model, seed=3):
    shape = [d.dim_value for d in model.graph.input[0].type.tensor_type.shape.dim]
    return {"X": np.random.default_rng(seed).normal(size=shape).astype(np.float32)}


# ---------------------------------------------------------------- exactness
FOLDED = {
    "conv_pad1": (lambda: conv_chain("silu", pads2=1), "hard_swish",
                  {"a": "consumers", "b": "producer", "c": "producer", "d": "nodes"}),
    "conv_pad0_group": (lambda: conv_chain("silu", pads2=0, group2=2), "hard_swish",
                        {"a": "consumers", "b": "producer", "c": "producer", "d": "consumers"}),
    "conv_relu": (lambda: conv_chain("silu", pads2=0), "relu",
                  {"a": "in-surrogate", "b": "producer", "c": "producer", "d": "consumers"}),
    "bn": (lambda: conv_chain("silu", bn=True, pads2=1), "hard_swish",
           {"a": "consumers", "b": "producer", "c": "producer", "d": "nodes"}),
    "gemm": (lambda: gemm_chain("tanh", trans=(0, 1)), "hard_tanh",
             {"a": "consumers", "b": "producer", "c": "producer", "d": "consumers"}),
    "gemm_t": (lambda: gemm_chain("tanh", trans=(1, 0)), "hard_tanh",
               {"a": "consumers", "b": "producer", "c": "producer", "d": "consumers"}),
    "matmul_add": (lambda: matmul_chain("sigmoid"), "hard_sigmoid",
                   {"a": "consumers", "b": "producer", "c": "producer", "d": "consumers"}),
    "matmul_alone": (lambda: matmul_chain("silu", bias1=False), "hard_swish",
                     {"a": "consumers", "b": "producer", "c": "nodes", "d": "consumers"}),
}


@pytest.mark.parametrize("case", sorted(FOLDED))
def test_folded_equals_explicit_nodes_and_formula(case):
    build, target, placement = FOLDED[case]
    model, site = build()
    original = model.SerializeToString()
    rng = np.random.default_rng(7)
    swap = _swap(site, target, placement, rng, positive_a=placement["a"] == "in-surrogate")
    folded = _checked(model, [site], Plan("exact", [swap]))
    explicit = _checked(model, [site], Plan("off", [_with_placement(swap, {p: "nodes" for p in PARAMS})]))
    feeds = _feeds(model)
    y_fold, y_nodes = run(folded.model, feeds)[0], run(explicit.model, feeds)[0]
    y_ref = ReferenceEvaluator(folded.model).run(None, feeds)[0]
    expected = _expected(model, site, swap, feeds)
    # source: ONNX operator spec executed by onnxruntime vs onnx.reference (independent executor)
    np.testing.assert_allclose(y_fold, y_ref, rtol=1e-5, atol=1e-5)
    # source: the surrogate formula a·g(b·x + c) + d (numpy) fed through the original tail
    np.testing.assert_allclose(y_fold, y_nodes, rtol=1e-5, atol=1e-5)
    np.testing.assert_allclose(y_fold, expected, rtol=1e-5, atol=1e-5)
    assert model.SerializeToString() == original  # the input model is never mutated
    assert folded.nodes_after < explicit.nodes_after
    rec = folded.records[0]
    assert rec.placement == placement and rec.folded_into


def test_approximate_d_differs_only_at_borders():
    model, site = conv_chain("silu", pads2=1)
    rng = np.random.default_rng(11)
    exact_place = {"a": "consumers", "b": "producer", "c": "producer", "d": "nodes"}
    swap = _swap(site, "hard_swish", exact_place, rng)
    swap.d = np.full(site.channels, 0.4)  # a clearly non-zero offset, so the border error is visible
    approx = _checked(model, [site], Plan("approximate", [_with_placement(swap, {**exact_place, "d": "approx"})]))
    exact = _checked(model, [site], Plan("exact+nodes", [swap]))
    feeds = _feeds(model)
    ya, ye = run(approx.model, feeds)[0], run(exact.model, feeds)[0]
    # source: ONNX operator spec, Conv: zero padding means a constant input offset d reaches
    # the border outputs through fewer taps than the interior ones
    np.testing.assert_allclose(ya[:, :, 1:-1, 1:-1], ye[:, :, 1:-1, 1:-1], rtol=1e-5, atol=1e-5)
    border = np.ones(ya.shape[2:], bool)
    border[1:-1, 1:-1] = False
    assert np.abs(ya - ye)[:, :, border].min() > 1e-4
    assert approx.nodes_after < exact.nodes_after


@pytest.mark.parametrize("scalar_d", [False, True])
def test_zero_a_with_d_as_node_is_refused(scalar_d):
    # a in the consumers and d as a node is emitted as Add(d/a); the placement asks a != 0, and the
    # rewriter refuses values that break it instead of moving a (tests/test_placement_truth.py)
    model, site = conv_chain("silu", pads2=1)
    place = {"a": "consumers", "b": "producer", "c": "producer", "d": "nodes"}
    swap = _swap(site, "hard_swish", place, np.random.default_rng(2))
    swap.a[1], swap.d[1] = 0.0, 0.3
    if scalar_d:
        swap.d = np.array([0.3])
    with pytest.raises(UsageError, match="a != 0; channel 1 "):
        rewrite(model, [site], Plan("exact+nodes", [swap]))


def test_folded_relu_adds_no_nodes_and_keeps_model():
    model, site = conv_chain("silu", pads2=1)
    before = model.SerializeToString()
    fn = functions.get("relu")
    placement, _ = decide_placement(GraphIndex.of(model), site, fn, "exact")
    swap = _swap(site, "relu", placement, np.random.default_rng(5), positive_a=True)
    result = _checked(model, [site], Plan("exact", [swap]))
    assert result.nodes_after <= result.nodes_before  # common practice, no source: a fold must not grow the graph
    assert result.nodes_before == len(model.graph.node)
    assert model.SerializeToString() == before
    meta = {p.key: p.value for p in result.model.metadata_props}
    assert meta["owner"] == "tests" and Plan.from_json(meta[PLAN_KEY]).swaps[0].site_id == "s1"
    assert result.model.producer_name == "test" and result.model.ir_version == model.ir_version
    feeds = _feeds(model)
    np.testing.assert_allclose(run(result.model, feeds)[0], _expected(model, site, swap, feeds), rtol=1e-5, atol=1e-5)
    used = {t for n in result.model.graph.node for t in n.input}
    assert all(t.name in used for t in result.model.graph.initializer)  # unused weights dropped


@pytest.mark.parametrize("kind", ["sigmoid", "tanh"])
def test_self_swap_with_identity_params_reproduces_original(kind):
    model, site = gemm_chain(kind)
    ones, zeros = np.ones(site.channels), np.zeros(site.channels)
    swap = SiteSwap(site.id, kind, {}, kind, {}, 1, site.channels, ones, ones, zeros, zeros,
                    {p: "nodes" for p in PARAMS})
    result = _checked(model, [site], Plan("off", [swap]))
    assert result.records[0].nodes_added == 1  # identity parameters emit nothing
    feeds = _feeds(model)
    np.testing.assert_allclose(run(result.model, feeds)[0], run(model, feeds)[0], atol=1e-6)


def test_shared_initializer_is_not_modified_in_place():
    model, site = conv_chain("silu", pads2=1, share=True)
    swap = _swap(site, "hard_swish", {"a": "consumers", "b": "producer", "c": "producer", "d": "nodes"},
                 np.random.default_rng(3))
    result = _checked(model, [site], Plan("exact", [swap]))
    feeds = _feeds(model)
    z_new, z_old = run(result.model, feeds)[1], run(model, feeds)[1]
    np.testing.assert_array_equal(z_new, z_old)  # the other conv still reads the untouched W1
    conv1 = next(n for n in result.model.graph.node if n.name == "conv1")
    assert conv1.input[1] != "W1"
    np.testing.assert_allclose(run(result.model, feeds)[0], _expected(model, site, swap, feeds), rtol=1e-5, atol=1e-5)


def test_identity_floor_and_two_sites_fold_into_one_layer():
    # X -> Conv -> SiLU -> Conv(mid) -> Tanh -> Conv -> Y: conv "mid" takes a, d of s1 and b, c of s2.
    rng = np.random.default_rng(4)
    inits = [init(f"W{i}", rng.normal(size=(4, 4, 1, 1)) * 0.5) for i in range(3)]
    act1, n1 = _activation("silu", "h0", "a0", "s1")
    act2, n2 = _activation("tanh", "h1", "a1", "s2")
    nodes = [helper.make_node("Conv", ["X", "W0"], ["h0"], name="c0"), *act1,
             helper.make_node("Conv", ["a0", "W1"], ["h1"], name="mid"), *act2,
             helper.make_node("Conv", ["a1", "W2"], ["Y"], name="c2")]
    model = _model(nodes, inits, (2, 4, 3, 3), ["Y"])
    s1, s2 = _site(model, "silu", n1, "h0", "a0", 1, 4, "s1"), _site(model, "tanh", n2, "h1", "a1", 1, 4, "s2")
    index = GraphIndex.of(model)
    swaps = []
    for site, target in ((s1, "hard_swish"), (s2, "hard_tanh")):
        placement, _ = decide_placement(index, site, functions.get(target), "exact")
        assert "fixed" not in placement.values()
        swaps.append(_swap(site, target, placement, rng))
    result = _checked(model, [s1, s2], Plan("exact", swaps))
    assert "mid" in result.records[0].folded_into and "mid" in result.records[1].folded_into
    feeds = _feeds(model)
    # reference: numpy surrogates chained through the original 1x1 convs (onnxruntime)
    x0 = _pre_activation(model, s1, feeds)
    y0 = _formula(s1, swaps[0], x0).astype(np.float32)
    h1 = run(Extractor(model).extract_model(["a0"], ["h1"]), {"a0": y0})[0].astype(np.float64)
    y1 = _formula(s2, swaps[1], h1).astype(np.float32)
    expected = run(Extractor(model).extract_model(["a1"], ["Y"]), {"a1": y1})[0]
    np.testing.assert_allclose(run(result.model, feeds)[0], expected, rtol=1e-5, atol=1e-5)

    floor = rewrite_identity_floor(model, [s1, s2])
    onnx.checker.check_model(floor, full_check=True)
    assert [n.op_type for n in floor.graph.node] == ["Conv", "Identity", "Conv", "Identity", "Conv"]
    w = {t.name: numpy_helper.to_array(t) for t in model.graph.initializer}
    linear = np.einsum("ob,ba,aj,njhw->nohw", w["W2"][:, :, 0, 0], w["W1"][:, :, 0, 0], w["W0"][:, :, 0, 0],
                       feeds["X"])
    np.testing.assert_allclose(run(floor, feeds)[0], linear, rtol=1e-5, atol=1e-5)


def test_plan_errors_are_usage_errors():
    model, site = conv_chain("silu", pads2=1)
    place = {"a": "consumers", "b": "producer", "c": "producer", "d": "consumers"}  # d cannot fold (pads 1)
    swap = _swap(site, "hard_swish", place, np.random.default_rng(0))
    with pytest.raises(UsageError, match="s1"):
        rewrite(model, [site], Plan("exact", [swap]))
    held = _with_placement(swap, {**place, "d": "fixed"})
    with pytest.raises(UsageError, match="fixed"):
        rewrite(model, [site], Plan("exact", [held]))
    swap.site_id = "s9"
    with pytest.raises(UsageError, match="s9"):
        rewrite(model, [site], Plan("exact", [swap]))


# ------------------------------------------------------------ property test
@settings(max_examples=25, deadline=None)
@given(layer=st.sampled_from(["conv", "conv_bn", "conv_group", "gemm", "matmul", "matmul_nobias"]),
       kind=st.sampled_from(["silu", "tanh", "sigmoid"]),
       target=st.sampled_from(["relu", "hard_swish", "hard_sigmoid", "hard_tanh"]),
       policy=st.sampled_from(["exact", "exact+nodes", "off"]),
       pads=st.sampled_from([0, 1]), seed=st.integers(0, 2**16))
def test_random_chains_match_formula(layer, kind, target, policy, pads, seed):
    if layer.startswith("conv"):
        model, site = conv_chain(kind, pads2=pads, group2=2 if layer == "conv_group" else 1,
                                 bn=layer == "conv_bn", seed=seed)
    elif layer == "gemm":
        model, site = gemm_chain(kind, trans=(seed % 2, (seed // 2) % 2), seed=seed)
    else:
        model, site = matmul_chain(kind, seed=seed, bias1=layer == "matmul")
    placement, notes = decide_placement(GraphIndex.of(model), site, functions.get(target), policy)
    swap = _swap(site, target, placement, np.random.default_rng(seed), positive_a=placement["a"] == "in-surrogate")
    result = _checked(model, [site], Plan(policy, [swap]))
    feeds = _feeds(model, seed)
    # source: surrogate formula in numpy through the original tail, executed by onnxruntime
    np.testing.assert_allclose(run(result.model, feeds)[0], _expected(model, site, swap, feeds),
                               rtol=1e-5, atol=2e-5)
