"""End-to-end tests of the `swapper` command line: scan, swap, bad input, demo.

Everything runs in-process through ``typer.testing.CliRunner``; every file the
commands write goes under pytest's tmp_path. The expected site inventory comes
from the demo models' own description (demo_models/README.md and
manifest.json, written by demo_models/build.py) and from the ONNX graphs
themselves, not from swapper.
"""
from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np
import onnx
import pytest
from onnx import numpy_helper
from onnx.reference import ReferenceEvaluator
from testkit import CALIB, DEMO, VAL, manifest, one_line_error, run, sha256

MODELS = ("meter_cnn_silu", "meter_gelu_mlp", "meter_mlp_mish_gelutanh", "meter_mlp_tanh_sigmoid", "meter_resnet_silu")
MANIFEST = manifest()

# Site inventory per model, in graph order: (function, role, channels).
# source: demo_models/README.md "Models" table (architectures and the activations as written in the graph).
EXPECTED_SITES = {
    # 3x Conv+SiLU (1->16, 16->32, 32->32), SE: 1x1 Conv 32->8 -> ReLU -> 1x1 Conv 8->32 -> Sigmoid gate
    "meter_cnn_silu": [("silu", "hidden", 16), ("silu", "hidden", 32), ("silu", "hidden", 32),
                       ("relu", "hidden", 8), ("sigmoid", "gate", 32)],
    # Gemm 64->64 -> GELU -> Gemm 64->32 -> GELU
    "meter_gelu_mlp": [("gelu", "hidden", 64), ("gelu", "hidden", 32)],
    # Gemm 64->48 -> BatchNorm1d -> Mish -> Gemm 48->32 -> GELU(tanh)
    "meter_mlp_mish_gelutanh": [("mish", "hidden", 48), ("gelu_tanh", "hidden", 32)],
    # Gemm 64->48 -> Tanh -> Gemm 48->32 -> Sigmoid
    "meter_mlp_tanh_sigmoid": [("tanh", "hidden", 48), ("sigmoid", "hidden", 32)],
    # stem SiLU (16), 3 blocks at 16 ch and 3 at 32 ch, each with a SiLU after its first Conv and after its Add
    "meter_resnet_silu": [("silu", "hidden", 16)] * 7 + [("silu", "hidden", 32)] * 6,
}
# manifest.json "activations" pattern name -> (registry function, role, decomposed?)
# source: demo_models/README.md "manifest.json" section (pattern names) and "Models" table (forms).
PATTERN_TO_SITE = {
    "silu_decomposed": ("silu", "hidden", True), "sigmoid_gate": ("sigmoid", "gate", False),
    "sigmoid": ("sigmoid", "hidden", False), "relu": ("relu", "hidden", False),
    "gelu_erf": ("gelu", "hidden", True), "gelu_tanh": ("gelu_tanh", "hidden", True),
    "mish_decomposed": ("mish", "hidden", True), "tanh": ("tanh", "hidden", False),
}
SURROGATES = ("relu", "relu6", "leaky_relu", "hard_sigmoid", "hard_swish", "hard_tanh", "pwl", "poly_gelu")
# Costly ops that must be gone once every hidden site is swapped (the CNN keeps its Sigmoid gate).
# source: demo_models/manifest.json op_types and README "Models" table.
COSTLY_LEFT = {
    "meter_cnn_silu": {"Sigmoid": 1, "Erf": 0, "Tanh": 0, "Softplus": 0},
    "meter_gelu_mlp": {"Erf": 0, "Div": 0, "Sigmoid": 0, "Tanh": 0},
    "meter_mlp_mish_gelutanh": {"Softplus": 0, "Tanh": 0, "Erf": 0, "Sigmoid": 0},
    "meter_mlp_tanh_sigmoid": {"Tanh": 0, "Sigmoid": 0, "Erf": 0},
    "meter_resnet_silu": {"Sigmoid": 0, "Erf": 0, "Tanh": 0},
}

@pytest.fixture(scope="module")
def workspace(tmp_path_factory) -> Path:
    """Copies of the demo models (so a bug cannot touch the checkout); their hashes are checked at the end."""
    root = tmp_path_factory.mktemp("cli")
    for name in MODELS:
        shutil.copyfile(DEMO / f"{name}.onnx", root / f"{name}.onnx")
    yield root
    for name in MODELS:
        # source: demo_models/manifest.json sha256 written by build.py; no command may modify an input model
        assert sha256(root / f"{name}.onnx") == MANIFEST["models"][f"{name}.onnx"]["sha256"]


@pytest.fixture(scope="module")
def val_x() -> np.ndarray:
    return np.load(VAL)["pixels"][:32]


# ----------------------------------------------------------------------------- scan


def _out_channels(model: onnx.ModelProto, tensor: str) -> int:
    """Channel count of ``tensor`` read from its producer's weights in the graph itself."""
    inits = {t.name: numpy_helper.to_array(t) for t in model.graph.initializer}
    node = next(n for n in model.graph.node if tensor in n.output)
    if node.op_type == "Add":  # residual Add of two same-shaped maps (source: ONNX operator spec, Add)
        return _out_channels(model, node.input[0])
    attrs = {a.name: onnx.helper.get_attribute_value(a) for a in node.attribute}
    w = inits[node.input[1]]
    if node.op_type == "Conv":  # source: ONNX operator spec, Conv: W is (M, C/group, kH, kW), M = output channels
        return int(w.shape[0])
    if node.op_type == "Gemm":  # source: ONNX operator spec, Gemm: B is (K, N), or (N, K) when transB=1
        return int(w.shape[0] if attrs.get("transB", 0) else w.shape[1])
    if node.op_type == "BatchNormalization":  # source: ONNX operator spec, BatchNormalization: scale is (C,)
        return int(w.shape[0])
    raise AssertionError(f"unexpected producer {node.op_type}")


@pytest.mark.parametrize("name", MODELS)
def test_scan_json_lists_the_documented_sites(cli, workspace, name):
    path = workspace / f"{name}.onnx"
    result = cli("scan", path, "--json")
    assert result.exit_code == 0, result.output
    doc = json.loads(result.stdout)
    model = onnx.load(str(path))

    # source: swapper/scan/sites.py module docstring, JSON schema "swapper.scan/1"
    assert set(doc) == {"schema", "model", "opset", "total_cost", "sites"}
    assert doc["schema"] == "swapper.scan/1"
    assert doc["model"] == str(path)
    # source: demo_models/manifest.json opset per model
    assert doc["opset"] == MANIFEST["models"][f"{name}.onnx"]["opset"]
    assert isinstance(doc["total_cost"], float)
    sites = doc["sites"]
    assert [(s["function"], s["role"], s["channels"]) for s in sites] == EXPECTED_SITES[name]
    assert [s["id"] for s in sites] == [f"s{i}" for i in range(1, len(sites) + 1)]

    # the counts agree with the build script's own pattern count in manifest.json
    counted: dict = {}
    for pattern, n in MANIFEST["models"][f"{name}.onnx"]["activations"].items():
        if pattern == "batchnorm":
            continue  # a BatchNormalization node is not an activation
        key = PATTERN_TO_SITE[pattern][:2]
        counted[key] = counted.get(key, 0) + n
    found: dict = {}
    for s in sites:
        found[(s["function"], s["role"])] = found.get((s["function"], s["role"]), 0) + 1
    assert found == counted

    decomposed = {PATTERN_TO_SITE[p][0]: PATTERN_TO_SITE[p][2] for p in MANIFEST["models"][f"{name}.onnx"]["activations"]
                  if p in PATTERN_TO_SITE}
    node_names = {n.name for n in model.graph.node}
    producers = {o: n.op_type for n in model.graph.node for o in n.output}
    readers: dict = {}
    for n in model.graph.node:
        for i in n.input:
            readers.setdefault(i, []).append(n.op_type)
    graph_outputs = {o.name for o in model.graph.output}
    fields = {"id": str, "function": str, "params": dict, "input": str, "output": str, "nodes": list, "form": str,
              "shape": (list, type(None)), "channel_axis": (int, type(None)), "channels": (int, type(None)),
              "producer": (str, type(None)), "consumers": list, "role": str, "elements": (int, type(None)),
              "cost": float, "cost_share": float, "supported": bool, "reason": (str, type(None)), "domain": str,
                  "body": list}
    for s in sites:
        assert set(s) == set(fields), sorted(set(s) ^ set(fields))
        for key, typ in fields.items():
            assert isinstance(s[key], typ), (key, s[key])
        assert s["role"] in ("hidden", "gate", "output")
        assert s["supported"] is True and s["reason"] is None and s["domain"] == ""
        assert s["params"] == {}  # none of these functions has parameters of its own
        # decomposed forms name their pattern; single ops say "op" (README "Models" table)
        assert (s["form"] != "op") == decomposed[s["function"]], s["form"]
        assert set(s["nodes"]) <= node_names
        assert len(s["nodes"]) == 1 if s["form"] == "op" else len(s["nodes"]) >= 2
        # shape: README says input `pixels` is [batch,1,8,8] with `batch` a dynamic axis
        assert s["shape"][0] == "batch" and all(isinstance(d, int) for d in s["shape"][1:])
        assert s["channel_axis"] == 1  # rank 2 and rank 4 both use axis 1 (sites.py docstring)
        assert s["channels"] == s["shape"][1] == _out_channels(model, s["input"])
        assert s["elements"] == int(np.prod(s["shape"][1:]))
        assert s["producer"] == producers[s["input"]]
        expected_consumers = sorted(readers.get(s["output"], [])) + (["<output>"] if s["output"] in graph_outputs else [])
        assert sorted(s["consumers"]) == sorted(expected_consumers)
        assert s["cost"] > 0 and 0.0 <= s["cost_share"] <= 1.0
    assert doc["total_cost"] == pytest.approx(sum(s["cost"] for s in sites))
    assert sum(s["cost_share"] for s in sites) == pytest.approx(1.0)
    for s in sites:
        assert s["cost_share"] == pytest.approx(s["cost"] / doc["total_cost"])


@pytest.mark.parametrize("name", MODELS)
def test_scan_table_names_every_site(cli, workspace, name):
    result = cli("scan", workspace / f"{name}.onnx")
    assert result.exit_code == 0, result.output
    lines = result.stdout.splitlines()
    for i, (function, role, channels) in enumerate(EXPECTED_SITES[name], start=1):
        row = next(line for line in lines if f" s{i} " in line)
        assert function in row and role in row and f" {channels} " in row, row


def test_scan_missing_model_is_bad_input(cli, tmp_path):
    text = one_line_error(cli("scan", tmp_path / "nothing.onnx"))
    assert "nothing.onnx" in text


# ----------------------------------------------------------------------------- swap --no-calibrate


@pytest.mark.parametrize("to", SURROGATES)
@pytest.mark.parametrize("name", MODELS)
def test_uncalibrated_swap_writes_a_valid_model(cli, workspace, tmp_path, val_x, name, to):
    out = tmp_path / "out.onnx"
    result = cli("swap", workspace / f"{name}.onnx", "-o", out, "--no-calibrate", "--to", to)
    assert result.exit_code == 0, result.output
    model = onnx.load(str(out))
    onnx.checker.check_model(model, full_check=True)  # source: ONNX checker (spec conformance + shape inference)
    y = run(out, {"pixels": val_x})[0]
    assert y.shape == (len(val_x), 10) and y.dtype == np.float32  # README: output logits float32 [batch,10]
    assert np.isfinite(y).all()
    # source: ONNX operator spec as executed by onnx.reference.ReferenceEvaluator; the written graph must mean
    # the same in the reference implementation (float32 rounding differences only; tolerance common practice)
    ref = ReferenceEvaluator(model).run(None, {"pixels": val_x})[0]
    np.testing.assert_allclose(y, ref, rtol=1e-4, atol=1e-3)
    ops = [n.op_type for n in model.graph.node]
    for op, count in COSTLY_LEFT[name].items():
        assert ops.count(op) == count, (op, ops)
    assert [o.name for o in model.graph.output] == ["logits"]


# ----------------------------------------------------------------------------- determinism


def test_calibrated_swap_is_byte_identical_for_the_same_seed(cli, workspace, tmp_path):
    # README "Calibration": same inputs and --seed give the same output bytes
    model = workspace / "meter_cnn_silu.onnx"
    a, b = tmp_path / "a.onnx", tmp_path / "b.onnx"
    for out in (a, b):
        result = cli("swap", model, "-o", out, "--calib", CALIB, "--seed", 7)
        assert result.exit_code == 0, result.output
    assert a.read_bytes() == b.read_bytes()
    # and calibration did change the parameters (the comparison above is not trivially true)
    c = tmp_path / "c.onnx"
    assert cli("swap", model, "-o", c, "--no-calibrate").exit_code == 0
    assert c.read_bytes() != a.read_bytes()


# ----------------------------------------------------------------------------- bad input


@pytest.fixture(scope="module")
def bad_data(tmp_path_factory) -> dict:
    root = tmp_path_factory.mktemp("bad")
    pixels = np.load(CALIB)["pixels"]
    nan = pixels.copy()
    nan[37, 0, 3, 4] = np.nan
    np.savez(root / "nan.npz", pixels=nan)
    np.savez(root / "short.npz", pixels=pixels[:, :, :6, :])
    np.savez(root / "flat.npz", pixels=pixels.reshape(len(pixels), 64))
    return {"nan": root / "nan.npz", "short": root / "short.npz", "flat": root / "flat.npz"}


def test_unknown_surrogate_lists_valid_names(cli, workspace, tmp_path):
    out = tmp_path / "o.onnx"
    text = one_line_error(cli("swap", workspace / "meter_gelu_mlp.onnx", "-o", out, "--no-calibrate",
                              "--to", "relu7"))
    assert "relu7" in text
    for name in SURROGATES:
        assert name in text
    assert not out.exists()


def test_unknown_site_id_names_the_valid_ids(cli, workspace, tmp_path):
    out = tmp_path / "o.onnx"
    text = one_line_error(cli("swap", workspace / "meter_cnn_silu.onnx", "-o", out, "--no-calibrate",
                              "--sites", "s1,s9"))
    assert "s9" in text
    assert all(f"s{i}" in text for i in range(1, 6))  # the CNN has sites s1..s5
    assert not out.exists()


def test_missing_output_folder(cli, workspace, tmp_path):
    out = tmp_path / "no" / "such" / "o.onnx"
    text = one_line_error(cli("swap", workspace / "meter_gelu_mlp.onnx", "-o", out, "--no-calibrate"))
    assert "does not exist" in text and str(tmp_path / "no" / "such") in text


def test_output_equal_to_input_is_refused(cli, tmp_path):
    model = tmp_path / "model.onnx"
    shutil.copyfile(DEMO / "meter_gelu_mlp.onnx", model)
    before = sha256(model)
    (tmp_path / "sub").mkdir()
    link = tmp_path / "link.onnx"
    link.symlink_to(model)
    # the same file, spelled three ways
    for out in (model, tmp_path / "sub" / ".." / "model.onnx", link):
        text = one_line_error(cli("swap", model, "-o", out, "--no-calibrate"))
        assert "overwrite the input" in text
        assert sha256(model) == before


def test_nan_in_calibration_names_array_and_sample(cli, workspace, tmp_path, bad_data):
    out = tmp_path / "o.onnx"
    text = one_line_error(cli("swap", workspace / "meter_cnn_silu.onnx", "-o", out, "--calib", bad_data["nan"]))
    assert "'pixels'" in text and "NaN" in text and "37" in text and "nan.npz" in text
    assert not out.exists()


@pytest.mark.parametrize("which", ["short", "flat"])
def test_calibration_with_wrong_shape(cli, workspace, tmp_path, bad_data, which):
    out = tmp_path / "o.onnx"
    text = one_line_error(cli("swap", workspace / "meter_cnn_silu.onnx", "-o", out, "--calib", bad_data[which]))
    assert "'pixels'" in text and "shape" in text and f"{which}.npz" in text
    assert not out.exists()


def test_calib_and_no_calibrate_exclude_each_other(cli, workspace, tmp_path):
    out = tmp_path / "o.onnx"
    text = one_line_error(cli("swap", workspace / "meter_cnn_silu.onnx", "-o", out, "--calib",
                              CALIB, "--no-calibrate"))
    assert "--calib" in text and "--no-calibrate" in text
    assert not out.exists()


def test_neither_calib_nor_no_calibrate(cli, workspace, tmp_path):
    out = tmp_path / "o.onnx"
    text = one_line_error(cli("swap", workspace / "meter_cnn_silu.onnx", "-o", out))
    assert "--calib" in text and "--no-calibrate" in text
    assert not out.exists()


def test_missing_calibration_file(cli, workspace, tmp_path):
    text = one_line_error(cli("swap", workspace / "meter_cnn_silu.onnx", "-o", tmp_path / "o.onnx",
                              "--calib", tmp_path / "absent.npz"))
    assert "absent.npz" in text


def test_not_an_onnx_file(cli, tmp_path):
    bogus = tmp_path / "bogus.onnx"
    bogus.write_bytes(b"this is not a protobuf")
    text = one_line_error(cli("swap", bogus, "-o", tmp_path / "o.onnx", "--no-calibrate"))
    assert "bogus.onnx" in text
    assert bogus.read_bytes() == b"this is not a protobuf"


# ----------------------------------------------------------------------------- demo


def test_demo_writes_one_report_per_model(cli, tmp_path, monkeypatch):
    from swapper.sweep.run import SweepSettings

    # the demo's automatic plan sweeps in two worker processes, where the session's stand-in clock
    # (conftest.no_target_timing) does not reach; here it sweeps in this process, fewer candidates
    monkeypatch.setattr("swapper.cli.demo.demo_sweep",
                        lambda: SweepSettings(surrogates=("relu",), placements=("exact",), refit=(False,)))
    out = tmp_path / "demo"
    result = cli("demo", "--out", out)
    # README "Exit codes": every demo model runs to a verdict, so the demo exits 0
    assert result.exit_code == 0, (result.stdout, result.stderr)
    # status_val.npz keeps its class ids as `classes` (demo_models/README.md): left out, said once
    assert result.stdout.count("ignored 1 array(s) the model does not read: 'classes'") == 1
    reports = sorted(out.glob("*/report.json"))
    ran = sorted(Path(name).stem for name in MANIFEST["models"])
    assert sorted(p.parent.name.rsplit("-", 1)[0] for p in reports) == ran
    for path in reports:
        payload = json.loads(path.read_text())
        assert payload["schema"] == "swapper.report/1"
        assert isinstance(payload["verdict"]["approved"], bool)
        assert (path.parent / "report.html").is_file()
        name = path.parent.name.rsplit("-", 1)[0]
        written = out / f"{name}.swapped.onnx"
        # the demo writes a model only when the gate approves it (README "Exit codes")
        assert written.exists() == payload["verdict"]["approved"]
        # the demo reads the checkout's demo models; they must stay as built
        assert payload["inputs"]["original"]["sha256"] == MANIFEST["models"][f"{name}.onnx"]["sha256"]
        # manifest.json "task": classifiers are judged by top-1 (val.npz has labels), the encoder by cosine
        task = MANIFEST["models"][f"{name}.onnx"]["task"]
        assert payload["verdict"]["metric"] == {"classification": "top1", "embedding": "cosine"}[task]
    for name in ran:
        assert name in result.stdout
    # the ResNet's report holds the automatic plan: per site the candidates tried and the choice
    search = json.loads(next(out.glob("meter_resnet_silu-*/report.json")).read_text())["search"]
    assert len(search["sites"]) == 13 and all(s["candidates"] for s in search["sites"])


@pytest.mark.parametrize("plan", ["all", "auto"])
def test_same_inputs_and_seed_give_the_same_model_bytes(cli, tmp_path, plan):
    # README "Calibration": same inputs and --seed give the same output bytes, whatever the machine's load
    # (timings measured on the target go to the report, never into the written model; the automatic
    # plan's choice follows its timings, here the session's stand-in clock)
    written = []
    for k in range(2):
        out = tmp_path / f"m{k}.onnx"
        result = cli("swap", DEMO / "meter_gelu_mlp.onnx", "-o", out, "--calib", CALIB, "--val", VAL,
                     "--plan", plan, "--report", tmp_path / f"r{k}")
        assert result.exit_code == 0, result.output
        written.append(out.read_bytes())
    assert written[0] == written[1]
