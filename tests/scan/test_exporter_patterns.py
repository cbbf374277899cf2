"""Activation forms other exporters write: each built with onnx.helper in every operand order.

For every form: find_sites finds exactly one site with the expected function,
role and parameters; the site's own nodes, cut out into a model, run in
onnxruntime and in onnx.reference.ReferenceEvaluator (two executions of the
ONNX operator spec) and both equal the registry's numpy reference
``functions.get(name).ref(x, **params)`` within float32 tolerance. A decline
case per form checks that a wrong constant or a tensor read outside the form
is refused with a reason.
"""
from __future__ import annotations

import itertools
import math

import numpy as np
import onnx
import onnxruntime as ort
import pytest
from onnx import TensorProto, helper, numpy_helper
from onnx.reference import ReferenceEvaluator

from swapper import functions
from swapper.core.model_io import name_unnamed_nodes
from swapper.scan.sites import find_sites

X_SHAPE = [2, 3, 4, 5]
BOOLS = [False, True]


def n(op, ins, out, **attrs):
    return helper.make_node(op, list(ins), [out], **attrs)


def binop(op, a, b, out, swap):
    return n(op, (b, a) if swap else (a, b), out)


def make(nodes, consts=None, const_mode="init", opset=17, elem=TensorProto.FLOAT, outputs=()):
    """Input X -> nodes -> Y; Z = Y² + 1 is the graph output (Pow computes new values, so a site ending at Y
    is "hidden"; Y + 1 alone would hand Y's values on, swapper/scan/roles.py).

    Constants become initializers or Constant nodes (``const_mode``); ``outputs``
    names extra graph outputs (to make an intermediate readable from outside).
    """
    np_type = helper.tensor_dtype_to_np_dtype(elem)
    consts = {**(consts or {}), "tail_one": 1.0, "tail_two": 2.0}
    inits, protos = [], []
    for name, value in sorted(consts.items()):
        tensor = numpy_helper.from_array(np.asarray(value, dtype=np_type), name)
        if const_mode == "init":
            inits.append(tensor)
        else:
            protos.append(helper.make_node("Constant", [], [name], value=tensor))
    protos += nodes + [n("Pow", ["Y", "tail_two"], "Y2"), n("Add", ["Y2", "tail_one"], "Z")]
    graph = helper.make_graph(
        protos, "t", [helper.make_tensor_value_info("X", elem, X_SHAPE)],
        [helper.make_tensor_value_info(o, elem, X_SHAPE) for o in ("Z", *outputs)], inits)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", opset)])
    model.ir_version = 8
    onnx.checker.check_model(model, full_check=True)
    model = onnx.shape_inference.infer_shapes(model, check_type=True, data_prop=True)
    name_unnamed_nodes(model)
    return model


def site_model(model: onnx.ModelProto, site) -> onnx.ModelProto:
    """The site's own nodes (and the constants they read) as a model: site.input -> site.output."""
    g = model.graph
    names = set(site.nodes)
    nodes = [node for node in g.node if node.name in names]
    assert len(nodes) == len(names)
    needed = {i for node in nodes for i in node.input}
    consts = [node for node in g.node if node.op_type == "Constant" and node.output[0] in needed]
    elem = g.input[0].type.tensor_type.elem_type
    graph = helper.make_graph(
        consts + nodes, "site", [helper.make_tensor_value_info(site.input, elem, None)],
        [helper.make_tensor_value_info(site.output, elem, None)], [t for t in g.initializer if t.name in needed])
    sub = helper.make_model(graph, opset_imports=list(model.opset_import))
    sub.ir_version = model.ir_version
    return sub


def one_site(model, function, form, params=None, role="hidden"):
    sites = find_sites(model)
    assert [(s.function, s.form, s.role) for s in sites] == [(function, form, role)], sites
    site = sites[0]
    for key, value in (params or {}).items():
        assert site.params[key] == pytest.approx(value, rel=1e-6), key
    return site


def check_numerics(model, site, tol=1e-5, seed=0):
    """onnxruntime and ReferenceEvaluator running the site's nodes == the registry's reference."""
    elem = model.graph.input[0].type.tensor_type.elem_type
    x = (np.random.default_rng(seed).standard_normal(X_SHAPE) * 4).astype(helper.tensor_dtype_to_np_dtype(elem))
    x[0, 0, 0, :] = [-3.0, 3.0, 0.0, -6.0, 6.0]  # the kinks of the hard forms
    sub = site_model(model, site)
    got_ort = ort.InferenceSession(sub.SerializeToString(), providers=["CPUExecutionProvider"]).run(
        None, {site.input: x})[0]
    got_ref = ReferenceEvaluator(sub).run(None, {site.input: x})[0]
    params = {k: v for k, v in site.params.items() if isinstance(v, float)}
    want = functions.get(site.function).ref(x.astype(np.float64), **params)
    np.testing.assert_allclose(got_ort, want, rtol=tol, atol=tol)
    np.testing.assert_allclose(got_ref, want, rtol=tol, atol=tol)


def declined(model, needle):
    declines = []
    sites = find_sites(model, declines=declines)
    assert any(needle in d.reason for d in declines), declines
    return sites


# ----------------------------------------------------------------- clamps
def clamp(kind, z, out, lo="lo", hi="hi", swap=False):
    """min(max(z, lo), hi) as Clip or as a Min/Max/Relu pair (ONNX operator spec, Clip, Min, Max, Relu)."""
    if kind == "clip":
        return [n("Clip", [z, lo, hi], out)]
    if kind == "max_min":
        return [binop("Max", z, lo, "cl_in", swap), binop("Min", "cl_in", hi, out, swap)]
    if kind == "min_max":
        return [binop("Min", z, hi, "cl_in", swap), binop("Max", "cl_in", lo, out, swap)]
    return [n("Relu", [z], "cl_in"), binop("Min", "cl_in", hi, out, swap)]  # relu_min


CLAMPS = ["clip", "max_min", "min_max", "relu_min"]
SIXTHS = ["div_after", "mul_after", "div_before", "mul_before"]


def hard_swish_graph(kind, sixth, swaps, shift=3.0, hi=6.0, six=6.0):
    """x·Clip(x + 3, 0, 6)/6 with the /6 as Div 6 or Mul 1/6, before or after the multiplication by x."""
    s_add, s_clamp, s_mul, s_six = swaps
    nodes = [binop("Add", "X", "three", "A", s_add), *clamp(kind, "A", "C", swap=s_clamp)]
    if sixth == "div_after":
        nodes += [binop("Mul", "X", "C", "M", s_mul), n("Div", ["M", "six"], "Y")]
    elif sixth == "mul_after":
        nodes += [binop("Mul", "X", "C", "M", s_mul), binop("Mul", "M", "sixth", "Y", s_six)]
    elif sixth == "div_before":
        nodes += [n("Div", ["C", "six"], "H"), binop("Mul", "X", "H", "Y", s_mul)]
    else:
        nodes += [binop("Mul", "C", "sixth", "H", s_six), binop("Mul", "X", "H", "Y", s_mul)]
    return nodes, {"three": shift, "lo": 0.0, "hi": hi, "six": six, "sixth": 1.0 / six}


def hard_swish_cases():
    """Every operand order that exists: a Clip has one, a Div has one."""
    for kind, sixth in itertools.product(CLAMPS, SIXTHS):
        for s_add, s_clamp, s_mul, s_six in itertools.product(BOOLS, repeat=4):
            if (s_clamp and kind == "clip") or (s_six and sixth.startswith("div")):
                continue
            yield kind, sixth, (s_add, s_clamp, s_mul, s_six)


# Clip takes min/max as inputs from opset 11 (ONNX operator spec, Clip-11); the loader accepts 11..22
@pytest.mark.parametrize("opset,const_mode", [(11, "init"), (17, "node")])
@pytest.mark.parametrize("kind,sixth,swaps", list(hard_swish_cases()))
def test_hard_swish_with_clip(kind, sixth, swaps, const_mode, opset):
    # hard_swish(x) = x·ReLU6(x + 3)/6   (Howard et al. 2019)
    nodes, consts = hard_swish_graph(kind, sixth, swaps)
    m = make(nodes, consts, const_mode, opset)
    check_numerics(m, one_site(m, "hard_swish", "hard_swish/mul-clip"))


@pytest.mark.parametrize("sixth", SIXTHS)
def test_hard_swish_with_clip_attributes_below_opset_11(sixth):
    # Clip-6 takes min/max as attributes (ONNX operator spec, Clip-6); find_sites reads them too
    nodes, consts = hard_swish_graph("clip", sixth, (False,) * 4)
    nodes[1] = n("Clip", ["A"], "C", min=0.0, max=6.0)
    m = make(nodes, {k: v for k, v in consts.items() if k not in ("lo", "hi")}, opset=10)
    check_numerics(m, one_site(m, "hard_swish", "hard_swish/mul-clip"))


@pytest.mark.parametrize("shift,hi,six,needle", [
    (2.0, 6.0, 6.0, "hard-swish needs x·Clip(x + 3, 0, 6)/6"),
    (3.0, 6.0, 5.0, "outer factor"),
])
def test_hard_swish_clip_wrong_constant_declined(shift, hi, six, needle):
    nodes, consts = hard_swish_graph("clip", "div_after", (False,) * 4, shift, hi, six)
    assert not [s for s in declined(make(nodes, consts), needle) if s.function == "hard_swish"]


def test_hard_swish_clip_declined_when_the_clamp_is_read_elsewhere():
    nodes, consts = hard_swish_graph("clip", "div_after", (False,) * 4)
    assert declined(make(nodes, consts, outputs=("C",)), "'C' is a graph output") == []


def hard_sigmoid_graph(form, swaps, kind="clip", alpha=0.2, beta=0.5, top=1.0):
    s_scale, s_shift, s_clamp = swaps
    if form == "x+3/6":  # Clip(x + 3, 0, 6)/6, the /6 as a Div or a Mul by 1/6
        nodes = [binop("Add", "X", "three", "A", s_shift), *clamp(kind, "A", "C", swap=s_clamp)]
        nodes.append(binop("Mul", "C", "sixth", "Y", s_scale) if s_scale else n("Div", ["C", "six"], "Y"))
        return nodes, {"three": 3.0, "lo": 0.0, "hi": 6.0, "six": 6.0, "sixth": 1 / 6}
    # Clip(α·x + β, 0, 1), the scale and shift in either operand order
    nodes = [binop("Mul", "X", "alpha", "S", s_scale), binop("Add", "S", "beta", "A", s_shift),
             *clamp(kind, "A", "Y", swap=s_clamp)]
    return nodes, {"alpha": alpha, "beta": beta, "lo": 0.0, "hi": top}


@pytest.mark.parametrize("const_mode", ["init", "node"])
@pytest.mark.parametrize("form,want", [("x+3/6", (1 / 6, 0.5)), ("affine", (0.2, 0.5))])
@pytest.mark.parametrize("kind", CLAMPS)
@pytest.mark.parametrize("swaps", list(itertools.product(BOOLS, repeat=3)))
def test_hard_sigmoid_with_clip(form, want, kind, swaps, const_mode):
    # hard_sigmoid(x; α, β) = max(0, min(1, α·x + β))   (ONNX operator spec, HardSigmoid)
    nodes, consts = hard_sigmoid_graph(form, swaps, kind)
    m = make(nodes, consts, const_mode)
    site = one_site(m, "hard_sigmoid", "hard_sigmoid/clip", {"alpha": want[0], "beta": want[1]})
    check_numerics(m, site)


def test_hard_sigmoid_clip_with_wrong_upper_end_declined():
    nodes, consts = hard_sigmoid_graph("affine", (False,) * 3, top=2.0)
    assert declined(make(nodes, consts), "hard-sigmoid needs its upper end at 1") == []


def test_plain_relu6_is_not_a_hard_sigmoid():
    # Clip(x, 0, 6) alone (ReLU6) is a cheap clamp, not an activation site; nothing is declined either
    m = make([n("Clip", ["X", "lo", "hi"], "Y")], {"lo": 0.0, "hi": 6.0})
    declines = []
    assert find_sites(m, declines=declines) == [] and declines == []


# ----------------------------------------------------------------- leaky max
@pytest.mark.parametrize("const_mode", ["init", "node"])
@pytest.mark.parametrize("swap_mul,swap_max", list(itertools.product(BOOLS, repeat=2)))
def test_leaky_relu_as_max(swap_mul, swap_max, const_mode):
    # leaky_relu(x; α) = max(x, α·x), 0 < α < 1   (Maas et al. 2013; ONNX operator spec, LeakyRelu)
    m = make([binop("Mul", "X", "alpha", "S", swap_mul), binop("Max", "X", "S", "Y", swap_max)],
             {"alpha": 0.1}, const_mode)
    check_numerics(m, one_site(m, "leaky_relu", "leaky_relu/max-scaled", {"alpha": np.float32(0.1)}))


def test_leaky_max_with_slope_above_one_declined():
    m = make([n("Mul", ["X", "alpha"], "S"), n("Max", ["X", "S"], "Y")], {"alpha": 1.5})
    assert declined(m, "only for 0 < α < 1") == []


def test_leaky_max_declined_when_the_scaled_x_is_read_elsewhere():
    m = make([n("Mul", ["X", "alpha"], "S"), n("Max", ["X", "S"], "Y")], {"alpha": 0.1}, outputs=("S",))
    assert declined(m, "'S'") == []


# ----------------------------------------------------------------- sigmoid via exp
def sigmoid_exp_graph(neg, swap_add, recip, one=1.0, k=-1.0):
    """1/(1 + exp(−x)) with −x as Neg, Mul by −1 (either order) or Sub(0, x); 1/· as Reciprocal or Div."""
    nodes = {"neg": [n("Neg", ["X"], "N")], "mul": [n("Mul", ["X", "minus"], "N")],
             "mul_swapped": [n("Mul", ["minus", "X"], "N")], "sub": [n("Sub", ["zero", "X"], "N")]}[neg]
    nodes += [n("Exp", ["N"], "E"), binop("Add", "E", "one", "D", swap_add)]
    nodes.append(n("Reciprocal", ["D"], "Y") if recip == "reciprocal" else n("Div", ["one_num", "D"], "Y"))
    return nodes, {"minus": k, "zero": 0.0, "one": one, "one_num": 1.0}


@pytest.mark.parametrize("const_mode", ["init", "node"])
@pytest.mark.parametrize("neg", ["neg", "mul", "mul_swapped", "sub"])
@pytest.mark.parametrize("swap_add", BOOLS)
@pytest.mark.parametrize("recip", ["reciprocal", "div"])
def test_sigmoid_as_reciprocal_of_one_plus_exp(neg, swap_add, recip, const_mode):
    # sigmoid(x) = 1/(1 + exp(−x))   (ONNX operator spec, Sigmoid)
    nodes, consts = sigmoid_exp_graph(neg, swap_add, recip)
    m = make(nodes, consts, const_mode)
    check_numerics(m, one_site(m, "sigmoid", "sigmoid/exp-reciprocal"))


@pytest.mark.parametrize("one,k,needle", [(2.0, -1.0, "offset by 2"), (1.0, -2.0, "sigmoid needs −x")])
def test_sigmoid_exp_wrong_constant_declined(one, k, needle):
    nodes, consts = sigmoid_exp_graph("mul", False, "reciprocal", one=one, k=k)
    assert declined(make(nodes, consts), needle) == []


def test_sigmoid_exp_declined_when_exp_is_read_elsewhere():
    nodes, consts = sigmoid_exp_graph("neg", False, "reciprocal")
    assert declined(make(nodes, consts, outputs=("E",)), "'E'") == []


# ----------------------------------------------------------------- swish with β = 1
@pytest.mark.parametrize("const_mode", ["init", "node"])
@pytest.mark.parametrize("swap_beta,swap_mul", list(itertools.product(BOOLS, repeat=2)))
def test_swish_with_explicit_unit_beta(swap_beta, swap_mul, const_mode):
    # swish(x; β) = x·σ(β·x), here an exported Mul by β = 1   (Ramachandran et al. 2017)
    m = make([binop("Mul", "X", "beta", "B", swap_beta), n("Sigmoid", ["B"], "S"),
              binop("Mul", "X", "S", "Y", swap_mul)], {"beta": 1.0}, const_mode)
    check_numerics(m, one_site(m, "swish", "swish/mul-sigmoid-scaled", {"beta": 1.0}))


def test_swish_unit_beta_declined_when_the_scaled_x_is_read_elsewhere():
    m = make([n("Mul", ["X", "beta"], "B"), n("Sigmoid", ["B"], "S"), n("Mul", ["X", "S"], "Y")],
             {"beta": 1.0}, outputs=("B",))
    assert [s.function for s in declined(m, "'B'")] == ["sigmoid"]


# ----------------------------------------------------------------- SiLU across Casts (fp16 exports)
def silu_cast_graph(swap, wide=TensorProto.FLOAT, back=TensorProto.FLOAT16):
    return [n("Cast", ["X"], "W", to=wide), n("Sigmoid", ["W"], "S"), n("Cast", ["S"], "H", to=back),
            binop("Mul", "X", "H", "Y", swap)]


@pytest.mark.parametrize("const_mode", ["init", "node"])
@pytest.mark.parametrize("swap", BOOLS)
def test_silu_across_casts_in_an_fp16_model(swap, const_mode):
    # silu(x) = x·σ(x)   (Elfwing et al. 2018); σ computed in float32, the product in float16
    m = make(silu_cast_graph(swap), const_mode=const_mode, elem=TensorProto.FLOAT16)
    site = one_site(m, "silu", "silu/mul-cast-sigmoid")
    assert len(site.nodes) == 4
    check_numerics(m, site, tol=2e-3)  # float16 results: ~3 significant digits (IEEE 754 binary16)


def test_silu_across_a_narrowing_cast_declined():
    # float32 x, σ evaluated in float16: not the same function at float32 precision
    m = make(silu_cast_graph(False, wide=TensorProto.FLOAT16, back=TensorProto.FLOAT))
    assert [s.function for s in declined(m, "lose precision")] == ["sigmoid"]


def test_silu_across_an_integer_cast_declined():
    m = make([n("Cast", ["X"], "W", to=TensorProto.FLOAT), n("Sigmoid", ["W"], "S"),
              n("Cast", ["S"], "H", to=TensorProto.INT32), n("Cast", ["H"], "F", to=TensorProto.FLOAT),
              n("Mul", ["X", "F"], "Y")])
    assert find_sites(m)[0].function == "sigmoid"  # not claimed: the inner cast is not back to x's type


# ----------------------------------------------------------------- GELU spellings
@pytest.mark.parametrize("const_mode", ["init", "node"])
@pytest.mark.parametrize("arg", ["div_sqrt2", "mul_inv_sqrt2", "mul_rounded"])
@pytest.mark.parametrize("half", ["first", "last"])
@pytest.mark.parametrize("swaps", list(itertools.product(BOOLS, repeat=3)))
def test_gelu_erf_spellings(arg, half, swaps, const_mode):
    # gelu(x) = 0.5·x·(1 + erf(x/√2))   (Hendrycks & Gimpel 2016)
    s_arg, s_add, s_mul = swaps
    consts = {"sqrt2": math.sqrt(2), "inv": 1 / math.sqrt(2), "rounded": 0.70710678, "one": 1.0, "half": 0.5}
    nodes = [n("Div", ["X", "sqrt2"], "D") if arg == "div_sqrt2" else
             binop("Mul", "X", "inv" if arg == "mul_inv_sqrt2" else "rounded", "D", s_arg),
             n("Erf", ["D"], "E"), binop("Add", "E", "one", "U", s_add)]
    if half == "first":
        nodes += [binop("Mul", "X", "half", "H", s_mul), binop("Mul", "H", "U", "Y", s_mul)]
    else:
        nodes += [binop("Mul", "X", "U", "P", s_mul), binop("Mul", "P", "half", "Y", s_mul)]
    m = make(nodes, consts, const_mode)
    check_numerics(m, one_site(m, "gelu", "gelu/erf"))


def gelu_tanh_graph(spelling, swaps, k=0.7978845608, c=0.044715):
    """0.5·x·(1 + tanh(√(2/π)·(x + 0.044715·x³))) as exporters spell the cubic."""
    s_c, s_k, s_add = swaps
    consts = {"three": 3.0, "c": c, "k": k, "kc": k * c, "one": 1.0, "half": 0.5}
    if spelling == "distributed":  # √(2/π)·x + (√(2/π)·0.044715)·x³
        nodes = [n("Pow", ["X", "three"], "X3"), binop("Mul", "X3", "kc", "T", s_c),
                 binop("Mul", "X", "k", "KX", s_k), binop("Add", "KX", "T", "K", s_add)]
    else:
        nodes = {"pow": [n("Pow", ["X", "three"], "X3"), binop("Mul", "X3", "c", "T", s_c)],
                 "(x·x)·x": [n("Mul", ["X", "X"], "X2"), binop("Mul", "X2", "X", "X3", s_c),
                             binop("Mul", "X3", "c", "T", s_c)],
                 "x·(x·x)": [n("Mul", ["X", "X"], "X2"), binop("Mul", "X", "X2", "X3", s_c),
                             binop("Mul", "X3", "c", "T", s_c)],
                 # 0.044715 * x * x * x evaluated left to right
                 "c·x·x·x": [binop("Mul", "c", "X", "C1", s_c), binop("Mul", "C1", "X", "C2", s_c),
                             binop("Mul", "C2", "X", "T", s_c)]}[spelling]
        nodes += [binop("Add", "X", "T", "I", s_add), binop("Mul", "I", "k", "K", s_k)]
    nodes += [n("Tanh", ["K"], "Th"), binop("Add", "Th", "one", "U", s_add),
              binop("Mul", "X", "U", "P", s_k), n("Mul", ["P", "half"], "Y")]
    return nodes, consts


@pytest.mark.parametrize("const_mode", ["init", "node"])
@pytest.mark.parametrize("spelling", ["pow", "(x·x)·x", "x·(x·x)", "c·x·x·x", "distributed"])
@pytest.mark.parametrize("swaps", list(itertools.product(BOOLS, repeat=3)))
def test_gelu_tanh_spellings(spelling, swaps, const_mode):
    # gelu_tanh(x) = 0.5·x·(1 + tanh(√(2/π)·(x + 0.044715·x³)))   (Hendrycks & Gimpel 2016)
    nodes, consts = gelu_tanh_graph(spelling, swaps)
    m = make(nodes, consts, const_mode)
    check_numerics(m, one_site(m, "gelu_tanh", "gelu_tanh/tanh-cubic"))


@pytest.mark.parametrize("spelling", ["c·x·x·x", "distributed"])
@pytest.mark.parametrize("k,c,needle", [(0.7, 0.044715, "√(2/π)"), (0.7978845608, 0.05, "cubic coefficient")])
def test_gelu_tanh_spelling_with_wrong_constant_declined(spelling, k, c, needle):
    nodes, consts = gelu_tanh_graph(spelling, (False,) * 3, k=k, c=c)
    assert [s.function for s in declined(make(nodes, consts), needle)] == ["tanh"]


def test_gelu_erf_with_wrong_constant_declined():
    nodes = [n("Mul", ["X", "inv"], "D"), n("Erf", ["D"], "E"), n("Add", ["E", "one"], "U"),
             n("Mul", ["X", "U"], "P"), n("Mul", ["P", "half"], "Y")]
    m = make(nodes, {"inv": 0.6, "one": 1.0, "half": 0.5})
    assert [s.function for s in declined(m, "expected x/√2")] == []
