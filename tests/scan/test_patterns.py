"""Pattern matchers: every decomposed form in every operand order, declines, single ops.

Each detected site is also checked numerically: its own nodes are cut out into a
small model, run by onnxruntime, and compared with a numpy reference of the
function written here from the published formula.
"""
from __future__ import annotations

import itertools
import math

import numpy as np
import onnx
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from onnx import TensorProto, helper
from scipy.special import erf, expit
from testkit import as_loaded, float_model, init, run

from swapper.scan.sites import find_sites

X_SHAPE = [2, 4, 3, 3]
MS = "com.microsoft"


# ----------------------------------------------------------------- references
def softplus(x):
    return np.logaddexp(0.0, x)  # source: ONNX operator spec, Softplus: ln(exp(x) + 1)


SELU_A, SELU_G = 1.67326319217681884765625, 1.05070102214813232421875  # source: ONNX operator spec, Selu defaults

REFERENCES = {
    "sigmoid": lambda x, p: expit(x),  # source: ONNX operator spec, Sigmoid
    "tanh": lambda x, p: np.tanh(x),  # source: ONNX operator spec, Tanh
    "relu": lambda x, p: np.maximum(x, 0.0),  # source: ONNX operator spec, Relu
    "leaky_relu": lambda x, p: np.where(x >= 0, x, p["alpha"] * x),  # source: ONNX operator spec, LeakyRelu
    # source: ONNX operator spec, Elu: alpha·(exp(x) − 1) for x < 0
    "elu": lambda x, p: np.where(x > 0, x, p["alpha"] * np.expm1(x)),
    # source: ONNX operator spec, Selu: gamma·(alpha·e^x − alpha) for x <= 0
    "selu": lambda x, p: p["gamma"] * np.where(x > 0, x, p["alpha"] * np.expm1(x)),
    # source: ONNX operator spec, Celu: max(0,x) + min(0, alpha·(exp(x/alpha) − 1))
    "celu": lambda x, p: np.maximum(x, 0) + np.minimum(0, p["alpha"] * np.expm1(x / p["alpha"])),
    "softplus": lambda x, p: softplus(x),
    "softsign": lambda x, p: x / (1 + np.abs(x)),  # source: ONNX operator spec, Softsign
    # source: ONNX operator spec, HardSigmoid: max(0, min(1, alpha·x + beta))
    "hard_sigmoid": lambda x, p: np.clip(p["alpha"] * x + p["beta"], 0, 1),
    # source: Howard et al. 2019 (MobileNetV3) h-swish; ONNX operator spec, HardSwish (alpha=1/6, beta=0.5)
    "hard_swish": lambda x, p: x * np.clip(x / 6 + 0.5, 0, 1),
    # source: Hendrycks & Gimpel 2016, GELU = x·Φ(x) = 0.5·x·(1 + erf(x/√2))
    "gelu": lambda x, p: 0.5 * x * (1 + erf(x / math.sqrt(2))),
    # source: Hendrycks & Gimpel 2016, tanh approximation
    "gelu_tanh": lambda x, p: 0.5 * x * (1 + np.tanh(math.sqrt(2 / math.pi) * (x + 0.044715 * x**3))),
    "mish": lambda x, p: x * np.tanh(softplus(x)),  # source: Misra 2019, Mish
    "silu": lambda x, p: x * expit(x),  # source: Elfwing et al. 2018, SiLU
    "swish": lambda x, p: x * expit(p["beta"] * x),  # source: Ramachandran et al. 2017, Swish
    # source: Hendrycks & Gimpel 2016, sigmoid approximation x·σ(1.702x) (com.microsoft QuickGelu default alpha)
    "quick_gelu": lambda x, p: x * expit(1.702 * x),
}


# ------------------------------------------------------------------ builders
def make(nodes, consts=None, const_mode="init", opset=17, outputs=("Y",), ms=False, x_shape=None):
    """A checked, shape-inferred model: input X, the given nodes, constants as initializers or Constant nodes.

    ``nodes`` are (op_type, inputs, output, attrs) tuples; the same preparation as
    swapper.core.model_io.load_model (check, infer shapes, name nodes).
    """
    consts = consts or {}
    inits, protos = [], []
    for name, value in sorted(consts.items()):
        tensor = init(name, value)
        if const_mode == "init":
            inits.append(tensor)
        else:
            protos.append(helper.make_node("Constant", [], [name], value=tensor))
    for op, ins, out, attrs in nodes:
        domain = MS if op in ("QuickGelu", "FastGelu", "BiasGelu", "MsGelu") else ""
        protos.append(helper.make_node("Gelu" if op == "MsGelu" else op, ins, [out], domain=domain, **attrs))
    shape = x_shape or X_SHAPE
    model = float_model(protos, [("X", shape)], [(o, shape) for o in outputs], inits, opset=opset, name="t")
    if ms:
        model.opset_import.append(helper.make_opsetid(MS, 1))
    return as_loaded(model)


def n(op, ins, out, **attrs):
    return (op, list(ins), out, attrs)


def binop(op, a, b, out, swap):
    return n(op, (b, a) if swap else (a, b), out)


def site_model(model: onnx.ModelProto, site) -> onnx.ModelProto:
    """The site's own nodes (and the constants they read) as a model: site.input -> site.output."""
    g = model.graph
    names = set(site.nodes)
    nodes = [node for node in g.node if node.name in names]
    assert len(nodes) == len(names)
    needed = {i for node in nodes for i in node.input}
    consts = [node for node in g.node if node.op_type == "Constant" and node.output[0] in needed]
    inits = [t for t in g.initializer if t.name in needed]
    graph = helper.make_graph(
        consts + nodes, "site", [helper.make_tensor_value_info(site.input, TensorProto.FLOAT, None)],
        [helper.make_tensor_value_info(site.output, TensorProto.FLOAT, None)], inits,
    )
    sub = helper.make_model(graph, opset_imports=list(model.opset_import))
    sub.ir_version = model.ir_version
    return sub


def check_numerics(model, site, seed=0):
    """onnxruntime running the site's nodes == numpy reference of site.function (atol 1e-5)."""
    rng = np.random.default_rng(seed)
    x = (rng.standard_normal(X_SHAPE) * 3).astype(np.float32)
    got = run(site_model(model, site), {site.input: x})[0]
    want = REFERENCES[site.function](x.astype(np.float64), site.params)
    np.testing.assert_allclose(got, want, atol=1e-5, rtol=1e-5)


def only(model, function):
    sites = [s for s in find_sites(model) if s.function == function]
    assert len(sites) == 1, [(s.function, s.form) for s in find_sites(model)]
    return sites[0]


# --------------------------------------------------------------- SiLU / Swish
@pytest.mark.parametrize("const_mode", ["init", "node"])
@pytest.mark.parametrize("swap", [False, True])
def test_silu_either_order(swap, const_mode):
    # silu(x) = x·σ(x)
    m = make([n("Sigmoid", ["X"], "S"), binop("Mul", "X", "S", "Y", swap)], const_mode=const_mode)
    sites = find_sites(m)
    assert [(s.function, s.form) for s in sites] == [("silu", "silu/mul-sigmoid")]
    s = sites[0]
    assert (s.input, s.output, len(s.nodes)) == ("X", "Y", 2)
    check_numerics(m, s)


@pytest.mark.parametrize("const_mode", ["init", "node"])
@pytest.mark.parametrize("swap_beta,swap_mul", list(itertools.product([False, True], repeat=2)))
def test_swish_every_order(swap_beta, swap_mul, const_mode):
    # swish(x; β) = x·σ(β·x)
    m = make([binop("Mul", "X", "beta", "Z", swap_beta), n("Sigmoid", ["Z"], "S"),
              binop("Mul", "X", "S", "Y", swap_mul)], {"beta": 1.5}, const_mode)
    s = only(m, "swish")
    assert s.params["beta"] == pytest.approx(1.5)
    assert len(find_sites(m)) == 1 and len(s.nodes) == 3
    check_numerics(m, s)


def test_silu_declined_when_sigmoid_read_elsewhere():
    # the Sigmoid output also leaves the graph: rewriting x·σ(x) would remove it
    m = make([n("Sigmoid", ["X"], "S"), n("Mul", ["X", "S"], "Y")], outputs=("Y", "S"))
    declines = []
    sites = find_sites(m, declines=declines)
    assert [s.function for s in sites] == ["sigmoid"]
    assert declines and "S" in declines[0].reason
    check_numerics(m, sites[0])


def test_sigmoid_gate_is_not_silu():
    # σ(x) multiplied by a different tensor is a gate, not SiLU
    m = make([n("Relu", ["X"], "R"), n("Sigmoid", ["X"], "S"), n("Mul", ["R", "S"], "Y")])
    declines = []
    got = sorted((s.function, s.role) for s in find_sites(m, declines=declines))
    assert got == [("relu", "gate"), ("sigmoid", "gate")]
    assert declines == []


# ------------------------------------------------------------------ exact GELU
ERF_ARGS = ["div", "mul", "mul_swapped"]
GROUPINGS = ["(x·u)·h", "(x·h)·u", "h·(x·u)", "x·(h·u)", "(x·u)/2", "(x/2)·u"]


def gelu_erf_graph(erf_arg, add_swap, grouping, swaps, half=0.5, scale=None):
    """0.5·x·(1 + erf(x/√2)) written one of the ways exporters do."""
    nodes = []
    if erf_arg == "div":
        nodes.append(n("Div", ["X", "k"], "D"))
        k = scale if scale is not None else math.sqrt(2)
    else:
        nodes.append(binop("Mul", "X", "k", "D", erf_arg == "mul_swapped"))
        k = scale if scale is not None else 1 / math.sqrt(2)
    nodes += [n("Erf", ["D"], "E"), binop("Add", "E", "one", "U", add_swap)]
    s1, s2 = swaps
    consts = {"k": k, "one": 1.0, "h": half}
    if grouping == "(x·u)·h":
        nodes += [binop("Mul", "X", "U", "P", s1), binop("Mul", "P", "h", "Y", s2)]
    elif grouping == "(x·h)·u":
        nodes += [binop("Mul", "X", "h", "P", s1), binop("Mul", "P", "U", "Y", s2)]
    elif grouping == "h·(x·u)":
        nodes += [binop("Mul", "U", "X", "P", s1), binop("Mul", "h", "P", "Y", s2)]
    elif grouping == "x·(h·u)":
        nodes += [binop("Mul", "h", "U", "P", s1), binop("Mul", "X", "P", "Y", s2)]
    elif grouping == "(x·u)/2":
        nodes += [binop("Mul", "X", "U", "P", s1), n("Div", ["P", "two"], "Y")]
        consts["two"] = 1.0 / half
    else:
        nodes += [n("Div", ["X", "two"], "P"), binop("Mul", "P", "U", "Y", s2)]
        consts["two"] = 1.0 / half
    return nodes, consts


@pytest.mark.parametrize("const_mode", ["init", "node"])
@pytest.mark.parametrize("erf_arg,add_swap,grouping,swaps", list(itertools.product(
    ERF_ARGS, [False, True], GROUPINGS, itertools.product([False, True], repeat=2))))
def test_gelu_erf_every_variant(erf_arg, add_swap, grouping, swaps, const_mode):
    # gelu(x) = 0.5·x·(1 + erf(x/√2))
    nodes, consts = gelu_erf_graph(erf_arg, add_swap, grouping, swaps)
    m = make(nodes, consts, const_mode)
    sites = find_sites(m)
    assert [(s.function, s.form, s.input, s.output) for s in sites] == [("gelu", "gelu/erf", "X", "Y")]
    assert len(sites[0].nodes) == len(nodes)


@settings(max_examples=20, deadline=None)
@given(erf_arg=st.sampled_from(ERF_ARGS), add_swap=st.booleans(), grouping=st.sampled_from(GROUPINGS),
       swaps=st.tuples(st.booleans(), st.booleans()), const_mode=st.sampled_from(["init", "node"]),
       seed=st.integers(0, 2**16))
def test_gelu_erf_site_computes_gelu(erf_arg, add_swap, grouping, swaps, const_mode, seed):
    nodes, consts = gelu_erf_graph(erf_arg, add_swap, grouping, swaps)
    m = make(nodes, consts, const_mode)
    check_numerics(m, only(m, "gelu"), seed)


def test_gelu_erf_tolerates_rounded_constants():
    # exporters round 1/√2 and 0.5; 1e-3 relative tolerance accepts 4 significant digits
    nodes, consts = gelu_erf_graph("mul", False, "(x·u)·h", (False, False), half=0.5004, scale=0.7071)
    assert only(make(nodes, consts), "gelu").form == "gelu/erf"


@pytest.mark.parametrize("half,scale,needle", [(0.6, None, "0.6"), (0.502, None, "0.502"), (0.5, 1.5, "erf")])
def test_gelu_erf_wrong_constant_declined(half, scale, needle):
    nodes, consts = gelu_erf_graph("div", False, "(x·u)·h", (False, False), half=half, scale=scale)
    declines = []
    sites = find_sites(make(nodes, consts), declines=declines)
    assert not any(s.function == "gelu" for s in sites)
    assert declines and needle in declines[0].reason


def test_gelu_erf_declined_when_intermediate_reused():
    nodes, consts = gelu_erf_graph("div", False, "(x·u)·h", (False, False))
    nodes.append(n("Relu", ["U"], "R"))  # 1 + erf(.) read by another node
    declines = []
    sites = find_sites(make(nodes, consts, outputs=("Y", "R")), declines=declines)
    assert [s.function for s in sites] == ["relu"]
    assert "'U'" in declines[0].reason


# ----------------------------------------------------------- tanh-approx GELU
CUBES = ["pow", "mul(xx)x", "x(mul xx)"]


def gelu_tanh_graph(cube, swaps, k=math.sqrt(2 / math.pi), c=0.044715):
    """0.5·x·(1 + tanh(√(2/π)·(x + 0.044715·x³))) with the given operand orders."""
    s_cube, s_w, s_add, s_k, s_one, s_p, s_y = swaps
    nodes = []
    if cube == "pow":
        nodes.append(n("Pow", ["X", "three"], "C3"))
    else:
        nodes.append(n("Mul", ["X", "X"], "SQ"))
        nodes.append(binop("Mul", "SQ", "X", "C3", (cube == "x(mul xx)") ^ s_cube))
    nodes += [
        binop("Mul", "c", "C3", "W", s_w), binop("Add", "X", "W", "I", s_add), binop("Mul", "k", "I", "T0", s_k),
        n("Tanh", ["T0"], "T"), binop("Add", "one", "T", "U", s_one),
        binop("Mul", "X", "U", "P", s_p), binop("Mul", "half", "P", "Y", s_y),
    ]
    return nodes, {"three": 3.0, "c": c, "k": k, "one": 1.0, "half": 0.5}


@settings(max_examples=40, deadline=None)
@given(cube=st.sampled_from(CUBES), swaps=st.tuples(*[st.booleans()] * 7),
       const_mode=st.sampled_from(["init", "node"]), seed=st.integers(0, 2**16))
def test_gelu_tanh_any_order(cube, swaps, const_mode, seed):
    # gelu_tanh(x) = 0.5·x·(1 + tanh(√(2/π)·(x + 0.044715·x³)))
    nodes, consts = gelu_tanh_graph(cube, swaps)
    m = make(nodes, consts, const_mode)
    sites = find_sites(m)
    assert [(s.function, s.input, s.output) for s in sites] == [("gelu_tanh", "X", "Y")]
    assert len(sites[0].nodes) == len(nodes)  # the Tanh is part of the site, not a site of its own
    check_numerics(m, sites[0], seed)


@pytest.mark.parametrize("k,c,needle", [(0.7, 0.044715, "√(2/π)"), (math.sqrt(2 / math.pi), 0.05, "cubic")])
def test_gelu_tanh_wrong_constant_leaves_plain_tanh(k, c, needle):
    nodes, consts = gelu_tanh_graph("pow", (False,) * 7, k=k, c=c)
    declines = []
    sites = find_sites(make(nodes, consts), declines=declines)
    assert [s.function for s in sites] == ["tanh"]
    assert needle in declines[0].reason


def test_gelu_tanh_reused_inner_leaves_plain_tanh():
    nodes, consts = gelu_tanh_graph("mul(xx)x", (False,) * 7)
    nodes.append(n("Neg", ["I"], "R"))  # x + 0.044715·x³ also read elsewhere
    m = make(nodes, consts, outputs=("Y", "R"))
    assert [s.function for s in find_sites(m)] == ["tanh"]
    check_numerics(m, find_sites(m)[0])


# ------------------------------------------------------------------------ Mish
@pytest.mark.parametrize("swap", [False, True])
def test_mish_softplus_form(swap):
    # mish(x) = x·tanh(softplus(x))
    m = make([n("Softplus", ["X"], "SP"), n("Tanh", ["SP"], "T"), binop("Mul", "X", "T", "Y", swap)])
    s = only(m, "mish")
    assert len(find_sites(m)) == 1 and s.form == "mish/softplus-tanh"
    check_numerics(m, s)


@pytest.mark.parametrize("const_mode", ["init", "node"])
@pytest.mark.parametrize("swaps", list(itertools.product([False, True], repeat=2)))
def test_mish_exp_log_form(swaps, const_mode):
    # mish(x) = x·tanh(ln(1 + eˣ))
    m = make([n("Exp", ["X"], "E"), binop("Add", "E", "one", "A", swaps[0]), n("Log", ["A"], "L"),
              n("Tanh", ["L"], "T"), binop("Mul", "X", "T", "Y", swaps[1])], {"one": 1.0}, const_mode)
    s = only(m, "mish")
    assert len(find_sites(m)) == 1 and s.form == "mish/exp-log-tanh"
    check_numerics(m, s)


def test_mish_with_reused_softplus_splits_into_ops():
    m = make([n("Softplus", ["X"], "SP"), n("Tanh", ["SP"], "T"), n("Mul", ["X", "T"], "Y")], outputs=("Y", "SP"))
    assert sorted(s.function for s in find_sites(m)) == ["softplus", "tanh"]


# ------------------------------------------------------------------ HardSwish
@pytest.mark.parametrize("swap", [False, True])
def test_hard_swish_decomposed(swap):
    m = make([n("HardSigmoid", ["X"], "H", alpha=1 / 6, beta=0.5), binop("Mul", "X", "H", "Y", swap)])
    s = only(m, "hard_swish")
    assert s.form == "hard_swish/mul-hardsigmoid"
    check_numerics(m, s)


def test_x_times_default_hard_sigmoid_is_not_hard_swish():
    # ONNX HardSigmoid defaults alpha=0.2, beta=0.5 (source: ONNX operator spec): not h-swish's 1/6
    m = make([n("HardSigmoid", ["X"], "H"), n("Mul", ["X", "H"], "Y")])
    declines = []
    sites = find_sites(m, declines=declines)
    assert [(s.function, s.params) for s in sites] == [("hard_sigmoid", {"alpha": pytest.approx(0.2), "beta": 0.5})]
    assert "alpha" in declines[0].reason
    check_numerics(m, sites[0])


# ------------------------------------------------------------------ single ops
SINGLE = [
    ("Sigmoid", {}, 17, "sigmoid", {}),
    ("Tanh", {}, 17, "tanh", {}),
    ("Relu", {}, 17, "relu", {}),
    ("LeakyRelu", {"alpha": 0.1}, 17, "leaky_relu", {"alpha": 0.1}),
    ("LeakyRelu", {}, 17, "leaky_relu", {"alpha": 0.01}),  # source: ONNX operator spec, LeakyRelu default alpha
    ("Elu", {"alpha": 0.5}, 17, "elu", {"alpha": 0.5}),
    ("Selu", {}, 17, "selu", {"alpha": SELU_A, "gamma": SELU_G}),
    ("Celu", {"alpha": 2.0}, 17, "celu", {"alpha": 2.0}),
    ("Softplus", {}, 17, "softplus", {}),
    ("Softsign", {}, 17, "softsign", {}),
    ("HardSigmoid", {"alpha": 0.25, "beta": 0.4}, 17, "hard_sigmoid", {"alpha": 0.25, "beta": 0.4}),
    ("HardSwish", {}, 17, "hard_swish", {}),
    ("Mish", {}, 18, "mish", {}),  # source: ONNX operator spec, Mish since opset 18
    ("Gelu", {}, 20, "gelu", {}),  # source: ONNX operator spec, Gelu since opset 20, approximate='none'
    ("Gelu", {"approximate": "tanh"}, 20, "gelu_tanh", {}),
    ("MsGelu", {}, 17, "gelu", {}),  # com.microsoft Gelu: exact erf form
    ("FastGelu", {}, 17, "gelu_tanh", {}),  # com.microsoft FastGelu: tanh approximation
    ("QuickGelu", {}, 17, "quick_gelu", {}),  # com.microsoft QuickGelu, default alpha 1.702
    ("QuickGelu", {"alpha": 1.5}, 17, "swish", {"beta": 1.5}),
]


@pytest.mark.parametrize("op,attrs,opset,function,params", SINGLE)
def test_single_ops(op, attrs, opset, function, params):
    m = make([n(op, ["X"], "Y", **attrs)], opset=opset, ms=op in ("MsGelu", "FastGelu", "QuickGelu"))
    (s,) = find_sites(m)
    assert (s.function, s.form, s.input, s.output, s.supported) == (function, "op", "X", "Y", True)
    assert s.params == pytest.approx(params)
    assert s.domain == (MS if op in ("MsGelu", "FastGelu", "QuickGelu") else "")
    check_numerics(m, s)


def test_prelu_records_slope_tensor():
    slope = np.linspace(0.1, 0.4, 4).reshape(4, 1, 1)
    m = make([n("PRelu", ["X", "slope"], "Y")], {"slope": slope})
    (s,) = find_sites(m)
    assert (s.function, s.params) == ("prelu", {"slope": "slope"})
    x = np.random.default_rng(0).standard_normal(X_SHAPE).astype(np.float32)
    got = run(site_model(m, s), {"X": x})[0]
    np.testing.assert_allclose(got, np.where(x >= 0, x, slope * x), atol=1e-6)  # source: ONNX operator spec, PRelu


@pytest.mark.parametrize("op", ["BiasGelu", "FastGelu"])
def test_bias_gelu_unsupported_with_bias(op):
    # com.microsoft BiasGelu(x, b) = gelu(x + b): x + b exists nowhere in the graph
    m = make([n(op, ["X", "b"], "Y")], {"b": np.arange(3.0)}, ms=True)
    (s,) = find_sites(m)
    assert s.supported is False and s.params["bias"] == "b" and "bias" in s.reason
    assert s.function == ("gelu" if op == "BiasGelu" else "gelu_tanh")


def test_non_activations_are_ignored():
    m = make([n("Exp", ["X"], "E"), n("Add", ["E", "X"], "A"), n("Abs", ["A"], "Y")])
    assert find_sites(m) == []
