"""Target profiles: the built-in files load, broken files fail in one line, chain costs add up.

Oracles: the ONNX operator registry (onnx.defs) for op names, onnxruntime's own
optimised graphs for the ort-cpu fusion facts, and hand arithmetic from the
numbers written in the profile files (read here with plain json, not through
the loader under test).
"""
from __future__ import annotations

import json
import re
from importlib import resources
from pathlib import Path

import numpy as np
import onnx
import onnx.defs
import onnxruntime as ort
import pytest
from onnx import TensorProto, helper, numpy_helper

from swapper.errors import SwapperError
from swapper.targets import BadTargetError, builtin_targets, load_target

BUILTIN = resources.files("swapper.targets") / "builtin"
EXPECTED = {"ort-cpu", "ort-cpu-int8", "mcu-int8", "npu-int8", "tosa-int8"}


def raw(name: str) -> dict:
    """A built-in profile as plain JSON, independent of the loader."""
    return json.loads((BUILTIN / f"{name}.json").read_text(encoding="utf-8"))


def op_cost(doc: dict, op: str) -> float:
    return float(doc["ops"][op]["cost"])


def fusion_cost(doc: dict, after: str, ops: list[str]) -> float:
    (hit,) = [f["cost"] for f in doc["fusions"] if f["ops"] == ops and (f["after"] == "*" or after in f["after"])]
    return float(hit)


# ----------------------------------------------------------------------------- built-in profiles
def test_the_builtin_set_is_complete():
    assert EXPECTED <= set(builtin_targets())


@pytest.mark.parametrize("name", sorted(EXPECTED))
def test_builtin_profile_loads_and_matches_its_file(name):
    profile = load_target(name)
    doc = raw(name)
    assert profile.name == name == doc["name"]
    assert profile.cost("Relu") == 1.0
    assert profile.opset_min <= profile.opset_max
    assert profile.sources and all(s.url.startswith("https://") for s in profile.sources)
    for op, entry in doc["ops"].items():
        assert profile.support(op) == entry["support"]
        assert profile.cost(op) == (None if entry["support"] == "none" else entry["cost"])
    assert (profile.costs_from == "measured") == (profile.measurement is not None)


@pytest.mark.parametrize("name", sorted(EXPECTED))
def test_builtin_ops_are_onnx_default_domain_ops(name):
    # ONNX operator spec as registered in onnx.defs: every op a built-in profile names exists there
    doc = raw(name)
    named = set(doc["ops"])
    for fusion in doc.get("fusions", []):
        named |= set(fusion["ops"]) | (set() if fusion["after"] == "*" else set(fusion["after"]))
    assert [op for op in sorted(named) if not onnx.defs.has(op, "")] == []


@pytest.mark.parametrize("name", ["mcu-int8", "npu-int8", "tosa-int8"])
def test_declared_sources_are_cited_and_exist(name):
    # every "[n]" a source string cites must be one of the file's sources, and every entry cites one
    # or says it is recalled (from_memory) or common practice
    doc = raw(name)
    entries = list(doc["ops"].values()) + doc.get("fusions", [])
    for entry in entries:
        cited = [int(n) for n in re.findall(r"\[(\d+)\]", entry["source"])]
        assert all(1 <= n <= len(doc["sources"]) for n in cited), entry["source"]
        assert cited or entry.get("from_memory") or "no source" in entry.get("note", ""), entry


# onnxruntime's optimised graph is the oracle: what ort-cpu lists as fused after Conv/Gemm must fuse
def _conv_or_gemm_then(producer: str, ops: list[str]) -> onnx.ModelProto:
    rng = np.random.default_rng(0)
    inits = [numpy_helper.from_array(rng.standard_normal((8, 8, 1, 1) if producer == "Conv" else (8, 8))
                                     .astype(np.float32), "W"),
             numpy_helper.from_array(np.zeros(8, np.float32), "B")]
    nodes = [helper.make_node(producer, ["X", "W", "B"], ["t0"])]
    for i, op in enumerate(ops):
        extra = []
        if op == "Clip":
            inits += [numpy_helper.from_array(np.array(v, np.float32), f"c{i}{k}") for k, v in enumerate((0.0, 6.0))]
            extra = [f"c{i}0", f"c{i}1"]
        nodes.append(helper.make_node(op, [f"t{i}"] + extra, [f"t{i + 1}"]))
    nodes[-1].output[0] = "Y"
    shape = [1, 8, 4, 4] if producer == "Conv" else [4, 8]
    graph = helper.make_graph(nodes, "g", [helper.make_tensor_value_info("X", TensorProto.FLOAT, shape)],
                              [helper.make_tensor_value_info("Y", TensorProto.FLOAT, None)], inits)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 22)])
    model.ir_version = 10
    return model


def _optimised_compute_nodes(model: onnx.ModelProto, tmp_path: Path) -> list[str]:
    opts = ort.SessionOptions()
    opts.graph_optimization_level = ort.GraphOptimizationLevel.ORT_ENABLE_ALL
    opts.optimized_model_filepath = str(tmp_path / "optimised.onnx")
    opts.log_severity_level = 3
    ort.InferenceSession(model.SerializeToString(), opts, providers=["CPUExecutionProvider"])
    layout = {"ReorderInput", "ReorderOutput", "Transpose"}
    return [n.op_type for n in onnx.load(opts.optimized_model_filepath).graph.node if n.op_type not in layout]


@pytest.mark.parametrize("producer", ["Conv", "Gemm"])
def test_ort_cpu_fusions_agree_with_onnxruntime(producer, tmp_path):
    doc = raw("ort-cpu")
    listed = {f["ops"][0] for f in doc["fusions"] if f["after"] != "*" and producer in f["after"] and
              len(f["ops"]) == 1}
    assert listed  # the profile records some fusion for this producer
    for op in ("Relu", "Clip", "Sigmoid", "HardSigmoid", "Softplus"):
        fused = len(_optimised_compute_nodes(_conv_or_gemm_then(producer, [op]), tmp_path)) == 1
        assert fused == (op in listed), (producer, op)


# ----------------------------------------------------------------------------- broken files
def _good() -> dict:
    return {
        "schema": "swapper.target/1", "name": "tiny", "description": "a small valid profile", "precision": "int8",
        "opset": {"min": 11, "max": 22}, "costs_from": "declared",
        "ops": {"Relu": {"support": "native", "cost": 1.0, "source": "s"},
                "Sigmoid": {"support": "lookup_table", "cost": 2.0, "source": "s"},
                "Erf": {"support": "none", "source": "s"}},
        "fusions": [{"after": ["Conv"], "ops": ["Relu"], "cost": 0.0, "source": "s"}],
        "sources": [{"title": "t", "url": "https://example.org/doc", "supports": "everything"}],
    }


def _set(path: str, value):
    def edit(doc: dict) -> dict:
        *parents, last = path.split(".")
        node = doc
        for key in parents:
            node = node[int(key)] if isinstance(node, list) else node[key]
        if value is _DELETE:
            del node[last]
        elif isinstance(node, list):
            node[int(last)] = value
        else:
            node[last] = value
        return doc
    return edit


_DELETE = object()
MEASURED = {"runtime": "onnxruntime", "provider": "CPUExecutionProvider", "graph_optimization_level": "all",
            "threads": 1}

# (edit of the good profile or raw text, key path expected in the message, cause expected in the message)
BROKEN = {
    "unknown top-level key": (_set("colour", "blue"), "colour", "unknown key"),
    "wrong type": (_set("precision", 8), "precision", "expected a string"),
    "unknown precision": (_set("precision", "int4"), "precision", "unknown precision"),
    "unknown support word": (_set("ops.Sigmoid.support", "fast"), "ops.Sigmoid.support", "unknown support word"),
    "zero cost": (_set("ops.Sigmoid.cost", 0), "ops.Sigmoid.cost", "must be > 0"),
    "negative cost": (_set("ops.Sigmoid.cost", -2.5), "ops.Sigmoid.cost", "must be > 0"),
    "boolean cost": (_set("ops.Sigmoid.cost", True), "ops.Sigmoid.cost", "expected a number"),
    "cost out of range": (_set("ops.Sigmoid.cost", 1e9), "ops.Sigmoid.cost", "out of range"),
    "missing cost": (_set("ops.Sigmoid.cost", _DELETE), "ops.Sigmoid.cost", "missing"),
    "cost for unsupported op": (_set("ops.Erf.cost", 3.0), "ops.Erf.cost", "support none"),
    "unknown entry key": (_set("ops.Sigmoid.speed", 3), "ops.Sigmoid.speed", "unknown key"),
    "op name not an identifier": (_set("ops.2Sigmoid", {"support": "native", "cost": 1.0, "source": "s"}),
                                  "ops.2Sigmoid", "not an ONNX op identifier"),
    "opset reversed": (_set("opset", {"min": 22, "max": 11}), "opset", "range reversed"),
    "opset out of range": (_set("opset.min", 0), "opset.min", "out of range"),
    "opset not integer": (_set("opset.max", 22.5), "opset.max", "expected an integer"),
    "wrong schema": (_set("schema", "swapper.target/2"), "schema", "expected 'swapper.target/1'"),
    "no Relu": (_set("ops.Relu", _DELETE), "ops.Relu", "missing"),
    "Relu not the unit": (_set("ops.Relu.cost", 2.0), "ops.Relu.cost", "must be 1.0"),
    "missing required key": (_set("sources", _DELETE), "sources", "missing"),
    "two-line description": (_set("description", "one\ntwo"), "description", "one line"),
    "measured without settings": (_set("costs_from", "measured"), "measurement", "missing"),
    "declared with settings": (_set("measurement", MEASURED), "measurement", "given but costs_from is declared"),
    "fusion uses unsupported op": (_set("fusions.0.ops", ["Erf"]), "fusions[0].ops[0]", "support none"),
    "fusion negative cost": (_set("fusions.0.cost", -1), "fusions[0].cost", "must be >= 0"),
    "fusion empty pattern": (_set("fusions.0.ops", []), "fusions[0].ops", "empty array"),
    "duplicate fusion": (_set("fusions.1", {"after": ["Gemm", "Conv"], "ops": ["Relu"], "cost": 0.5, "source": "s"}),
                         "fusions[1]", "same producer 'Conv' and ops as fusions[0]"),
    "source url not http": (_set("sources.0.url", "ftp://example.org/doc"), "sources[0].url", "not an http(s) URL"),
    "from_memory not boolean": (_set("ops.Sigmoid.from_memory", "yes"), "ops.Sigmoid.from_memory", "true or false"),
}
# (edit of the good profile's JSON text, key path, cause): things a dict cannot hold
BROKEN_TEXT = {
    "NaN cost": (lambda t: t.replace('"cost": 2.0', '"cost": NaN'), "ops.Sigmoid.cost", "finite"),
    "duplicate op": (lambda t: t.replace('"Erf": {', '"Sigmoid": {"support": "native", "cost": 1.0, "source": "s"}, '
                                         '"Erf": {'), "ops.Sigmoid", "listed twice"),
    "duplicate top-level key": (lambda t: t.replace('"name": "tiny",', '"name": "tiny", "name": "other",'), "name",
                                "key written twice"),
    "malformed JSON": (lambda t: t.replace('"schema": "swapper.target/1",', '"schema": "swapper.target/1"'),
                       "line 3 column 3", "malformed JSON"),
    "top level not an object": (lambda t: "[1, 2]", "(top level)", "expected an object"),
}


def _profile_text() -> str:
    doc = _good()
    doc["fusions"].append({"after": ["Gemm"], "ops": ["Sigmoid"], "cost": 0.5, "source": "s"})
    return json.dumps(doc, indent=2)


@pytest.mark.parametrize("case", sorted(BROKEN) + sorted(BROKEN_TEXT))
def test_broken_profile_gives_one_line_naming_file_key_and_cause(case, tmp_path):
    path = tmp_path / f"{case.replace(' ', '_')}.json"
    if case in BROKEN:
        edit, key, cause = BROKEN[case]
        text = json.dumps(edit(json.loads(_profile_text())), indent=2)
    else:
        edit, key, cause = BROKEN_TEXT[case]
        text = edit(_profile_text())
        assert text != _profile_text()  # the edit found its target
    path.write_text(text, encoding="utf-8")
    with pytest.raises(BadTargetError) as info:
        load_target(path)
    message = str(info.value)
    assert "\n" not in message
    assert message.startswith(f"{path}: {key}: "), message
    assert cause in message, message
    assert isinstance(info.value, SwapperError) and info.value.exit_code == 2


def test_good_profile_loads(tmp_path):
    # the base of the tables above is itself valid, so each broken case fails for its own edit
    path = tmp_path / "tiny.json"
    path.write_text(_profile_text(), encoding="utf-8")
    assert load_target(str(path)).support("Sigmoid") == "lookup_table"


@pytest.mark.parametrize("kind", ["missing", "directory", "too large", "not utf-8"])
def test_unreadable_profile_files(kind, tmp_path):
    path = tmp_path / "p.json"
    cause = {"missing": "file not found", "directory": "not a regular file", "too large": "1 MiB",
             "not utf-8": "not UTF-8"}[kind]
    if kind == "directory":
        path.mkdir()
    elif kind == "too large":
        path.write_text(" " * (1 << 20) + "{}", encoding="utf-8")
    elif kind == "not utf-8":
        path.write_bytes(b'{"name": "\xff"}')
    with pytest.raises(BadTargetError) as info:
        load_target(path)
    message = str(info.value)
    assert "\n" not in message and message.startswith(str(path)) and cause in message, message


def test_unknown_target_name_lists_the_builtins():
    with pytest.raises(BadTargetError) as info:
        load_target("toaster")
    message = str(info.value)
    assert "'toaster'" in message and "mcu-int8" in message and "\n" not in message


# ----------------------------------------------------------------------------- allows, cost_of, opsets
def test_mcu_rejects_erf_and_npu_rejects_gelu():
    # mcu-int8: no ERF builtin in TFLite Micro's resolver; npu-int8: GELU not in Vela's operator table
    assert load_target("mcu-int8").allows(["Relu", "Erf", "Mul", "Erf"]) == (False, ["Erf"])
    assert load_target("npu-int8").allows(["Gelu"]) == (False, ["Gelu"])
    assert load_target("mcu-int8").allows(["Relu", "Clip", "Mul"]) == (True, [])
    assert load_target("ort-cpu").allows(["Erf"]) == (True, [])


def test_cost_of_matches_hand_arithmetic_from_the_files():
    # every expected value below is hand arithmetic on the numbers written in the profile files
    cpu, mcu, tosa = raw("ort-cpu"), raw("mcu-int8"), raw("tosa-int8")
    ort_cpu, mcu_p, tosa_p = load_target("ort-cpu"), load_target("mcu-int8"), load_target("tosa-int8")
    # x*Sigmoid(x) after a Conv: onnxruntime rewrites the pair to one op wherever it appears
    assert ort_cpu.cost_of(["Sigmoid", "Mul"], after="Conv") == pytest.approx(
        fusion_cost(cpu, "*", ["Sigmoid", "Mul"]))
    # Relu folds into a Conv; nothing folds into a ConvTranspose, so Relu costs its own 1.0 there
    assert ort_cpu.cost_of(["Relu"], after="Conv") == pytest.approx(fusion_cost(cpu, "Conv", ["Relu"]))
    assert ort_cpu.cost_of(["Relu"], after="ConvTranspose") == pytest.approx(op_cost(cpu, "Relu"))
    # a runtime fuses whether or not it pays: Softplus inside FusedGemm costs the fused figure
    assert ort_cpu.cost_of(["Softplus"], after="Gemm") == pytest.approx(fusion_cost(cpu, "Gemm", ["Softplus"]))
    # MatMul + bias Add + Relu becomes one fused Gemm
    assert ort_cpu.cost_of(["Add", "Relu"], after="MatMul") == pytest.approx(
        fusion_cost(cpu, "MatMul", ["Add", "Relu"]))
    # Relu then a per-channel Mul: the Relu folds only when the caller says the chain is linear
    assert ort_cpu.cost_of(["Relu", "Mul"], after="Conv", linear=True) == pytest.approx(
        fusion_cost(cpu, "Conv", ["Relu"]) + op_cost(cpu, "Mul"))
    assert ort_cpu.cost_of(["Relu", "Mul"], after="Conv") == pytest.approx(op_cost(cpu, "Relu") + op_cost(cpu, "Mul"))
    # x*HardSigmoid(x): the Mul reads the Conv output again, so nothing folds into the Conv
    assert ort_cpu.cost_of(["HardSigmoid", "Mul"], after="Conv") == pytest.approx(
        op_cost(cpu, "HardSigmoid") + op_cost(cpu, "Mul"))
    # microcontroller: Sigmoid then Mul, no fusion covers the pair
    assert mcu_p.cost_of(["Sigmoid", "Mul"], after="Conv") == pytest.approx(
        op_cost(mcu, "Sigmoid") + op_cost(mcu, "Mul"))
    assert mcu_p.cost_of(["Clip"], after="Gemm") == pytest.approx(fusion_cost(mcu, "Gemm", ["Clip"]))
    assert mcu_p.cost_of(["HardSigmoid", "Mul"], after="Conv") is None  # no HARD_SIGMOID kernel
    # TOSA int8: a TABLE then an int8 MUL with its rescale
    assert tosa_p.cost_of(["Tanh", "Mul"]) == pytest.approx(op_cost(tosa, "Tanh") + op_cost(tosa, "Mul"))
    assert ort_cpu.cost_of([]) == 0.0


def test_cost_of_longest_match_and_tie_rules(tmp_path):
    # a profile written here, so the rules are checked on numbers chosen for them (hand arithmetic)
    doc = _good()
    doc["ops"].update({"Mul": {"support": "native", "cost": 3.0, "source": "s"},
                       "Add": {"support": "native", "cost": 5.0, "source": "s"}})
    doc["fusions"] = [
        {"after": "*", "ops": ["Sigmoid"], "cost": 0.25, "source": "s"},
        {"after": ["Conv"], "ops": ["Sigmoid"], "cost": 0.5, "source": "s"},
        {"after": "*", "ops": ["Sigmoid", "Mul"], "cost": 4.0, "source": "s"},
        {"after": ["Gemm"], "ops": ["Mul", "Add"], "cost": 7.0, "source": "s"},
    ]
    path = tmp_path / "rules.json"
    path.write_text(json.dumps(doc), encoding="utf-8")
    p = load_target(path)
    assert p.cost_of(["Sigmoid", "Mul"], after="Conv") == 4.0  # longest pattern, though dearer than 0.5 + 3
    assert p.cost_of(["Sigmoid"], after="Conv") == 0.5  # equal length: the producer's own fusion wins
    assert p.cost_of(["Sigmoid"]) == 0.25  # no producer: only "*" fusions
    assert p.cost_of(["Relu", "Sigmoid", "Mul"]) == 1.0 + 4.0  # "*" fusions match mid-chain
    assert p.cost_of(["Mul", "Add"], after="Gemm") == 7.0
    assert p.cost_of(["Relu", "Mul", "Add"], after="Gemm") == 1.0 + 3.0 + 5.0  # producer fusions only at the head
    assert p.cost_of(["Relu", "Erf"]) is None
    with pytest.raises(TypeError):
        p.cost_of("Relu")
    # cost_parts says which pattern priced which ops, and sums to cost_of (the same hand arithmetic)
    parts = p.cost_parts(["Relu", "Sigmoid", "Mul"])
    assert [(q.ops, q.cost) for q in parts] == [(("Relu",), 1.0), (("Sigmoid", "Mul"), 4.0)]
    assert parts[0].fusion is None and parts[1].fusion.anywhere
    assert p.cost_parts(["Relu", "Erf"]) is None and p.cost_parts([]) == []


@pytest.mark.parametrize("name", sorted(EXPECTED))
def test_accepts_opset_follows_the_file(name):
    lo, hi = raw(name)["opset"]["min"], raw(name)["opset"]["max"]
    p = load_target(name)
    assert p.accepts_opset(lo) and p.accepts_opset(hi)
    assert not p.accepts_opset(lo - 1) and not p.accepts_opset(hi + 1)
