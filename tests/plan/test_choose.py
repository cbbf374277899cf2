"""Choosing surrogate and form per site on a target: eligibility, the cheapest form, never slower, reasons.

Oracle: hand arithmetic from the numbers written in the built-in profile files
(read with plain json, not through the loader), the ONNX operator spec for
which opset has which op (HardSwish since 14), and the rules as README
"Targets" states them.
"""
from __future__ import annotations

import json
from importlib import resources
from pathlib import Path

import numpy as np
import onnx
import onnx.parser
import pytest
from onnx import numpy_helper

from swapper.core.model_io import load_model
from swapper.errors import UsageError
from swapper.plan.plan import make_plan
from swapper.scan.sites import find_sites
from swapper.targets import load_target

BUILTIN = resources.files("swapper.targets") / "builtin"


def raw(name: str) -> dict:
    return json.loads((BUILTIN / f"{name}.json").read_text(encoding="utf-8"))


def op(doc: dict, name: str) -> float:
    return float(doc["ops"][name]["cost"])


def fused(doc: dict, after: str, ops: list[str]) -> float:
    (hit,) = [f["cost"] for f in doc["fusions"] if f["ops"] == ops and (f["after"] == "*" or after in f["after"])]
    return float(hit)


# x·Sigmoid(x) between two 1x1 Convs: b, c fold into the first, a, d into the second
CONV_SILU = """
<ir_version: 8, opset_import: ["" : {opset}]>
conv_silu (float[N, 2, 4, 4] X) => (float[N, 2, 4, 4] Y) {{
    H = Conv <kernel_shape = [1, 1]> (X, W1, B1)
    S = Sigmoid(H)
    T = Mul(H, S)
    Y = Conv <kernel_shape = [1, 1]> (T, W2, B2)
}}
"""

# the same SiLU also read by a residual Add: a has nowhere to fold, so it is held
RESIDUAL_SILU = """
<ir_version: 8, opset_import: ["" : 13]>
residual_silu (float[N, 2, 4, 4] X) => (float[N, 2, 4, 4] Y) {
    H = Conv <kernel_shape = [1, 1]> (X, W1, B1)
    S = Sigmoid(H)
    T = Mul(H, S)
    U = Conv <kernel_shape = [1, 1]> (T, W2, B2)
    Y = Add(U, T)
}
"""

# Sigmoid on the graph input: no producer, so b and c are held
INPUT_SIGMOID = """
<ir_version: 8, opset_import: ["" : 13]>
input_sigmoid (float[N, 2, 4, 4] X) => (float[N, 2, 4, 4] Y) {
    S = Sigmoid(X)
    Y = Conv <kernel_shape = [1, 1]> (S, W2, B2)
}
"""

# exact GELU as exporters write it (Hendrycks & Gimpel 2016: 0.5·x·(1 + erf(x/√2))) between two Gemms
GEMM_GELU = """
<ir_version: 8, opset_import: ["" : 13]>
gemm_gelu (float[N, 2] X) => (float[N, 2] Y) {
    H = Gemm <transB = 1> (X, W1, B1)
    D = Div(H, SQRT2)
    E = Erf(D)
    A = Add(E, ONE)
    M = Mul(H, A)
    G = Mul(M, HALF)
    Y = Gemm <transB = 1> (G, W2, B2)
}
"""

# the same GELU after a MatMul and its bias Add (a token MLP)
MATMUL_GELU = GEMM_GELU.replace("H = Gemm <transB = 1> (X, W1, B1)", "P = MatMul(X, WM)\n    H = Add(P, B1)") \
    .replace("gemm_gelu", "matmul_gelu")

# a squeeze-excite style gate: Sigmoid(Conv(X)) multiplies X itself
GATE = """
<ir_version: 8, opset_import: ["" : 13]>
gate (float[N, 2, 4, 4] X) => (float[N, 2, 4, 4] Y) {
    H = Conv <kernel_shape = [1, 1]> (X, W1, B1)
    S = Sigmoid(H)
    G = Mul(X, S)
    Y = Conv <kernel_shape = [1, 1]> (G, W2, B2)
}
"""

RNG = np.random.default_rng(3)
WEIGHTS = {"W1": RNG.normal(size=(2, 2, 1, 1)), "B1": RNG.normal(size=2), "W2": RNG.normal(size=(2, 2, 1, 1)),
           "B2": RNG.normal(size=2), "SQRT2": np.array(np.sqrt(2.0)), "ONE": np.array(1.0),
           "HALF": np.array(0.5), "WM": RNG.normal(size=(2, 2))}
GEMM_WEIGHTS = {**WEIGHTS, "W1": RNG.normal(size=(2, 2)), "W2": RNG.normal(size=(2, 2))}


def _plan(text: str, tmp_path: Path, target: str | None, weights=None, **options):
    model = onnx.parser.parse_model(text)
    names = {i for n in model.graph.node for i in n.input}
    model.graph.initializer.extend(numpy_helper.from_array(np.asarray(v, dtype=np.float32), k)
                                   for k, v in (weights or WEIGHTS).items() if k in names)
    path = tmp_path / "m.onnx"
    onnx.save(model, path)
    loaded = load_model(path)
    sites = find_sites(loaded.model)
    profile = None if target is None else (load_target(target) if isinstance(target, str) else target)
    return make_plan(loaded.model, sites, target=profile, **options)


def _custom(tmp_path: Path, base: str, edit) -> object:
    doc = raw(base)
    edit(doc)
    doc["name"] = f"{base}-edited"
    path = tmp_path / "edited.json"
    path.write_text(json.dumps(doc), encoding="utf-8")
    return load_target(path)


# ----------------------------------------------------------------------------- never slower, then cheapest
def test_silu_after_conv_on_ort_cpu_goes_to_relu_because_hard_swish_is_slower(tmp_path):
    cpu = raw("ort-cpu")
    plan = _plan(CONV_SILU.format(opset=13), tmp_path, "ort-cpu")
    (swap,) = plan.swaps
    # the original: x·Sigmoid(x) fuses to QuickGelu anywhere; relu fuses into the Conv
    assert swap.cost["original"] == pytest.approx(fused(cpu, "*", ["Sigmoid", "Mul"]))
    assert (swap.surrogate, swap.form) == ("relu", "Relu")
    assert swap.cost["candidate"] == pytest.approx(fused(cpu, "Conv", ["Relu"]))
    # the default did not pay: its cheapest form at opset 13, HardSigmoid then Mul, costs more than QuickGelu
    assert op(cpu, "HardSigmoid") + op(cpu, "Mul") > fused(cpu, "*", ["Sigmoid", "Mul"])
    assert any("ort-cpu: relu as Relu" in n for n in swap.notes)


def test_a_cheaper_original_is_kept_with_a_one_line_reason(tmp_path):
    def cheap_quick_gelu(doc):  # QuickGelu at 0.5: below every surrogate's own op cost (Relu is the unit)
        for f in doc["fusions"]:
            if f["ops"] == ["Sigmoid", "Mul"]:
                f["cost"] = 0.5
        doc["fusions"] = [f for f in doc["fusions"] if f["after"] == "*"]
    profile = _custom(tmp_path, "ort-cpu", cheap_quick_gelu)
    plan = _plan(CONV_SILU.format(opset=13), tmp_path, profile)
    assert not plan.swaps
    (kept,) = plan.skipped
    assert kept.reason.startswith("kept: x·Sigmoid(x) fuses to QuickGelu on ort-cpu-edited (0.5) and no allowed "
                                  "surrogate is cheaper here")
    assert "\n" not in kept.reason


def test_a_tie_does_not_pay(tmp_path):
    npu = raw("npu-int8")
    # npu-int8: Sigmoid fuses into a Gemm at 0 and so does Clip: hard_sigmoid cannot be cheaper
    assert fused(npu, "Gemm", ["Sigmoid"]) == fused(npu, "Gemm", ["Clip"]) == 0.0
    text = GEMM_GELU.replace("""    D = Div(H, SQRT2)
    E = Erf(D)
    A = Add(E, ONE)
    M = Mul(H, A)
    G = Mul(M, HALF)""", "    G = Sigmoid(H)")
    plan = _plan(text, tmp_path, "npu-int8", GEMM_WEIGHTS)
    assert not plan.swaps and plan.skipped[0].reason.startswith("kept: Sigmoid fuses into the Gemm on npu-int8 (0)")


# ----------------------------------------------------------------------------- eligibility and forms
def test_mcu_has_no_hardsigmoid_so_hard_swish_is_written_with_clip(tmp_path):
    mcu = raw("mcu-int8")
    assert mcu["ops"]["HardSigmoid"]["support"] == "none"
    plan = _plan(CONV_SILU.format(opset=13), tmp_path, "mcu-int8")
    (swap,) = plan.swaps
    # z·Clip(z + 3, 0, 6)/6 with the 1/6 folded into a, which folds into the second Conv
    assert (swap.surrogate, swap.form) == ("hard_swish", "Mul-Clip") and swap.placement["a"] == "consumers"
    assert swap.cost["candidate"] == pytest.approx(op(mcu, "Add") + op(mcu, "Clip") + op(mcu, "Mul"))
    assert swap.cost["original"] == pytest.approx(op(mcu, "Sigmoid") + op(mcu, "Mul"))
    # from opset 14 the HardSwish op exists (ONNX operator spec, HardSwish-14); at the same cost the form
    # listed first wins
    assert op(mcu, "HardSwish") == pytest.approx(swap.cost["candidate"])
    (swap14,) = _plan(CONV_SILU.format(opset=14), tmp_path, "mcu-int8").swaps
    assert (swap14.surrogate, swap14.form) == ("hard_swish", "HardSwish")


def test_a_form_that_moves_a_held_parameter_is_not_used_and_the_opset_hint_says_why(tmp_path):
    plan = _plan(RESIDUAL_SILU, tmp_path, "mcu-int8")
    (swap,) = plan.swaps
    # a is held (the residual Add reads y), so Mul-Clip cannot fold its 1/6; HardSwish needs opset 14;
    # Mul-HardSigmoid uses HardSigmoid, which mcu-int8 lacks: hard_swish is not eligible, relu is
    assert swap.placement["a"] == "in-surrogate" and (swap.surrogate, swap.form) == ("relu", "Relu")
    assert plan.hints == ["HardSwish needs opset 14; this model is opset 13; rerun with --opset 14 (sites s1)"]


def test_clip_form_of_hard_sigmoid_needs_b_and_c_to_move(tmp_path):
    # ort-cpu: Clip (0.99) is cheaper than HardSigmoid (1.0) alone, but on the graph input b, c are held
    cpu = raw("ort-cpu")
    assert op(cpu, "Clip") < op(cpu, "HardSigmoid") < op(cpu, "Sigmoid")
    (swap,) = _plan(INPUT_SIGMOID, tmp_path, "ort-cpu").swaps
    assert swap.placement["b"] == swap.placement["c"] == "fixed"
    assert (swap.surrogate, swap.form) == ("hard_sigmoid", "HardSigmoid")
    plan = _plan(INPUT_SIGMOID, tmp_path, "ort-cpu", fold="exact+nodes")
    # under --fold exact+nodes b and c are a Mul and an Add before the surrogate: with them no form is cheaper
    # than the Sigmoid alone, so the site is kept
    assert op(cpu, "Mul") + op(cpu, "Add") + op(cpu, "Clip") > op(cpu, "Sigmoid")
    assert not plan.swaps and plan.skipped[0].reason.startswith("kept: Sigmoid costs 1.18 on ort-cpu")


def test_forced_surrogate_the_target_cannot_run_names_the_op(tmp_path):
    with pytest.raises(UsageError, match=r"site s1: hard_sigmoid cannot be used on mcu-int8: .*HardSigmoid.*"
                                         r"mcu-int8 does not run.*form Clip moves b, c, which this site keeps fixed"):
        _plan(INPUT_SIGMOID, tmp_path, "mcu-int8", to="hard_sigmoid")
    with pytest.raises(UsageError, match="HardSwish needs opset 14"):
        _plan(CONV_SILU.format(opset=13), tmp_path, "ort-cpu", choices={"s1": "hard_swish:HardSwish"})


def test_forced_and_pinned_surrogates_take_their_cheapest_usable_form(tmp_path):
    cpu = raw("ort-cpu")
    (swap,) = _plan(CONV_SILU.format(opset=17), tmp_path, "ort-cpu", to="hard_swish").swaps
    # HardSwish runs as HardSigmoid + Mul in onnxruntime and costs more than writing that pair directly
    assert op(cpu, "HardSwish") > op(cpu, "HardSigmoid") + op(cpu, "Mul")
    assert swap.form == "Mul-HardSigmoid"
    (swap,) = _plan(CONV_SILU.format(opset=17), tmp_path, "ort-cpu", choices={"s1": "hard_swish:Mul-Clip"}).swaps
    assert (swap.surrogate, swap.form) == ("hard_swish", "Mul-Clip")


def test_without_a_target_the_registry_default_and_its_own_form_are_taken(tmp_path):
    # README "What gets swapped": silu -> hard_swish; the registry emitter writes HardSwish from opset 14
    for opset, form in ((13, "Mul-HardSigmoid"), (17, "HardSwish")):
        plan = _plan(CONV_SILU.format(opset=opset), tmp_path, None)
        assert [(s.surrogate, s.form, s.cost) for s in plan.swaps] == [("hard_swish", form, None)]
        assert plan.target is None and plan.opset == opset


# ----------------------------------------------------------------------------- producers, declared targets
def test_matmul_bias_add_is_priced_as_the_runtime_fuses_it(tmp_path):
    cpu = raw("ort-cpu")
    (swap,) = _plan(MATMUL_GELU, tmp_path, "ort-cpu", GEMM_WEIGHTS).swaps
    # the bias Add heads both chains: MatMul+Add+Relu is one FusedGemm, the original Add stays beside Gelu
    assert swap.cost["original"] == pytest.approx(op(cpu, "Add") + fused(cpu, "*", ["Div", "Erf", "Add", "Mul",
                                                                                    "Mul"]))
    assert (swap.surrogate, swap.cost["candidate"]) == ("relu", pytest.approx(fused(cpu, "MatMul", ["Add", "Relu"])))


def test_an_op_the_declared_target_lacks_is_always_replaced(tmp_path):
    npu = raw("npu-int8")
    assert npu["ops"]["Erf"]["support"] == npu["ops"]["Div"]["support"] == "none"
    plan = _plan(GEMM_GELU, tmp_path, "npu-int8", GEMM_WEIGHTS)
    (swap,) = plan.swaps
    assert swap.cost["original"] is None and swap.surrogate == "hard_swish"
    assert swap.form in ("Mul-HardSigmoid", "Mul-Clip")  # equal cost here (3.0): the first listed wins
    assert swap.form == "Mul-HardSigmoid"
    # HardSwish (1.0) would be cheaper than either, from opset 14
    assert plan.hints == ["HardSwish needs opset 14; this model is opset 13; rerun with --opset 14 (sites s1)"]
    # narrowed away, the site stays, and the plan says what remains and why
    plan = _plan(GEMM_GELU, tmp_path, "npu-int8", GEMM_WEIGHTS, only="silu")
    assert not plan.swaps
    assert plan.remaining == ["s1 (gelu): Div, Erf cannot run on npu-int8; not selected (--sites / --only)"]


def test_an_unsupported_gate_is_swapped_with_a_note(tmp_path):
    def no_sigmoid(doc):
        doc["ops"]["Sigmoid"] = {"support": "none", "source": "edited for this test"}
    profile = _custom(tmp_path, "mcu-int8", no_sigmoid)
    plan = _plan(GATE, tmp_path, profile)
    (swap,) = plan.swaps
    assert swap.function == "sigmoid" and any("swapped although a gate" in n for n in swap.notes)
    # on the unedited profile the gate is left, as without a target
    plan = _plan(GATE, tmp_path, "mcu-int8")
    assert not plan.swaps and "gate" in plan.skipped[0].reason and not plan.remaining


# hard-swish as a Keras-style converter writes it: x·Clip(x + 3, 0, 6)·(1/6), between two 1x1 Convs
CONV_CLIP_HSWISH = """
<ir_version: 8, opset_import: ["" : 13]>
conv_hswish (float[N, 2, 4, 4] X) => (float[N, 2, 4, 4] Y) {
    H = Conv <kernel_shape = [1, 1]> (X, W1, B1)
    three = Constant <value = float {3.0}> ()
    zero = Constant <value = float {0.0}> ()
    six = Constant <value = float {6.0}> ()
    sixth = Constant <value = float {0.16666667}> ()
    P = Add(H, three)
    R = Clip(P, zero, six)
    M = Mul(H, R)
    T = Mul(M, sixth)
    Y = Conv <kernel_shape = [1, 1]> (T, W2, B2)
}
"""


def test_a_cheap_function_written_in_many_ops_is_priced_on_a_target(tmp_path):
    # Found trying a converter's model: its four-op hard-swish sites were "already cheap" on ort-cpu although
    # the measured profile prices those ops above what the candidates cost (Relu fuses into the Conv)
    cpu = raw("ort-cpu")
    four_ops = op(cpu, "Add") + op(cpu, "Clip") + 2 * op(cpu, "Mul")
    (swap,) = _plan(CONV_CLIP_HSWISH, tmp_path, "ort-cpu").swaps
    assert swap.cost["original"] == pytest.approx(four_ops) and swap.cost["candidate"] < swap.cost["original"]
    # without a target the registry's label stands: hard_swish is a surrogate, kept as it is
    plan = _plan(CONV_CLIP_HSWISH, tmp_path, None)
    assert not plan.swaps and plan.skipped[0].reason == "hard_swish is already cheap"
