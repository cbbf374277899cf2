"""Plain helpers shared by the test files of every tests/ subfolder.

Import with ``from testkit import ...`` (pyproject.toml puts tests/ on pytest's
path). Everything here is a plain function or constant, so it can be used at
import time: in parametrize lists, module constants and model builders.
Run-time conveniences that need pytest (the CLI runner, tmp folders) are the
fixtures in tests/conftest.py.

Nothing here asks swapper for an expected value. The references carried here
come from outside the package: the ONNX operator spec (executed by onnxruntime
and onnx.reference.ReferenceEvaluator) and the published formulas of the cheap
functions. swapper is used only to build a test's inputs the way the package
receives them (a Dataset; nodes named as load_model names them).
"""
from __future__ import annotations

import copy
import functools
import hashlib
import json
from pathlib import Path
from typing import Callable

import numpy as np
import onnx
import onnxruntime as ort
from onnx import TensorProto, helper, numpy_helper
from onnx.reference import ReferenceEvaluator

from swapper.core.model_io import name_unnamed_nodes
from swapper.data.dataset import Dataset

# ------------------------------------------------------------ the demo models
DEMO = Path(__file__).resolve().parents[1] / "demo_models"  # built by demo_models/build.py, see its README.md
CALIB, VAL = DEMO / "calib.npz", DEMO / "val.npz"


@functools.cache
def manifest() -> dict:
    """demo_models/manifest.json (hashes, sizes, accuracies and activation patterns of the demo models)."""
    return json.loads((DEMO / "manifest.json").read_text())


def sha256(path: Path) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def one_line_error(result, *fragments: str) -> str:
    """The command line's answer to bad input (README "Exit codes"; house rule: one line naming the file and
    the cause, no traceback): exit code 2 and exactly one line, on stderr, containing every one of
    ``fragments``. ``result`` is what the ``cli`` fixture returns; the line is returned."""
    assert result.exit_code == 2, (result.exit_code, result.output)
    text = result.stderr.strip()
    assert text and "\n" not in text, repr(result.output)
    assert not result.stdout.strip(), repr(result.output)  # nothing else printed
    assert "Traceback" not in result.output
    for fragment in fragments:
        assert fragment in text, (fragment, text)
    return text


# ------------------------------------------------------------ building models
OPSET = 17


def init(name: str, value, dtype=np.float32) -> onnx.TensorProto:
    """``value`` as an initializer called ``name`` (float32 unless ``dtype`` says otherwise)."""
    return numpy_helper.from_array(np.asarray(value, dtype=dtype), name)


def float_model(nodes, inputs, outputs, inits=(), *, opset: int = OPSET, ir_version: int | None = 8,
                infer: bool = False, name: str = "g", **model_fields) -> onnx.ModelProto:
    """A model of ``nodes`` with float32 graph inputs and outputs.

    ``inputs`` and ``outputs`` are (name, shape) pairs, the shape a list of
    sizes / symbols or None when unknown. ``ir_version`` None keeps the onnx
    default; ``infer`` runs ONNX shape inference; ``model_fields`` go to
    ``helper.make_model`` (producer_name, ...).
    """
    graph = helper.make_graph(
        list(nodes), name,
        [helper.make_tensor_value_info(n, TensorProto.FLOAT, s) for n, s in inputs],
        [helper.make_tensor_value_info(n, TensorProto.FLOAT, s) for n, s in outputs],
        list(inits),
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", opset)], **model_fields)
    if ir_version is not None:
        model.ir_version = ir_version
    return onnx.shape_inference.infer_shapes(model) if infer else model


def as_loaded(model: onnx.ModelProto) -> onnx.ModelProto:
    """The preparation swapper.core.model_io.load_model gives a file, without the file: checked (full
    check), shapes inferred with type checks and data propagation, every node named."""
    onnx.checker.check_model(model, full_check=True)
    model = onnx.shape_inference.infer_shapes(model, check_type=True, data_prop=True)
    name_unnamed_nodes(model)
    return model


def conv_classifier(weights: dict[str, np.ndarray], *, size: int, activations=("Relu", "Relu"), opset: int = OPSET,
                    ir_version: int = 8) -> onnx.ModelProto:
    """x [N, 3, size, size] -> Conv 3x3 (pad 1) -> act -> Conv 3x3 (pad 1) -> act -> GlobalAveragePool -> Flatten
    -> Gemm (transB) -> y [N, classes], checked with onnx.checker.

    ``weights`` holds w1, w2, wf (float32) and optionally the biases b1, b2, bf; any other entry becomes an
    initializer no node reads. ``activations`` names the op after each Conv (None: no activation there).
    Nodes are named (conv1, act1, conv2, act2, gap, flat, fc) so int8 weights can be matched to them.
    """
    def reads(data: str, weight: str, bias: str) -> list[str]:
        return [data, weight] + ([bias] if bias in weights else [])

    nodes, x = [], "x"
    for k, act in enumerate(activations, start=1):
        nodes.append(helper.make_node("Conv", reads(x, f"w{k}", f"b{k}"), [f"c{k}"], pads=[1, 1, 1, 1],
                                      name=f"conv{k}"))
        x = f"c{k}"
        if act is not None:
            nodes.append(helper.make_node(act, [x], [f"a{k}"], name=f"act{k}"))
            x = f"a{k}"
    nodes += [
        helper.make_node("GlobalAveragePool", [x], ["g"], name="gap"),
        helper.make_node("Flatten", ["g"], ["f"], name="flat"),
        helper.make_node("Gemm", reads("f", "wf", "bf"), ["y"], transB=1, name="fc"),
    ]
    classes = weights["wf"].shape[0]
    model = float_model(nodes, [("x", ["N", 3, size, size])], [("y", ["N", classes])],
                        [numpy_helper.from_array(value, name) for name, value in weights.items()],
                        opset=opset, ir_version=ir_version, name="cnn")
    onnx.checker.check_model(model, full_check=True)
    return model


def conv_tanh(tail, tail_inits, outputs, *, extra_inputs=(), hw: int = 6, channels: int = 4) -> onnx.ModelProto:
    """X [N, 3, hw, hw] -> Conv "c1" (3x3, pads 1, ``channels`` out, weights W1/B1) -> Tanh "act" -> y -> ``tail``.

    A Tanh site in front of whatever pools, reshapes, gates and layers ``tail``
    reads y through; ``outputs`` are names (shapes left to inference),
    ``extra_inputs`` (name, shape) pairs of further float graph inputs.
    """
    rng = np.random.default_rng(0)
    head = [helper.make_node("Conv", ["X", "W1", "B1"], ["h"], name="c1", pads=[1] * 4),
            helper.make_node("Tanh", ["h"], ["y"], name="act")]
    inits = [init("W1", rng.normal(size=(channels, 3, 3, 3)) * 0.5), init("B1", rng.normal(size=channels) * 0.2)]
    return float_model(head + list(tail), [("X", ["N", 3, hw, hw]), *extra_inputs], [(o, None) for o in outputs],
                       inits + list(tail_inits), infer=True)


# ------------------------------------------------------------ timing without a clock
def fixed_timer(ratio: float):
    """A stand-in for swapper.check.latency.measure_latency (same call): the model named "original" takes
    1 ms, every other ``ratio`` ms (median, p10 and p90 alike), whatever the models are, so no test depends
    on the machine's speed. ``timer.calls`` records each call's models, feeds and settings."""
    from swapper.check.latency import LatencyStats

    calls = []

    def timer(models, feeds, **settings):
        calls.append({"models": dict(models), "feeds": dict(feeds), **settings})
        runs = settings.get("repeats", 30)
        return {name: LatencyStats(*(3 * [1.0 if name == "original" else ratio]), runs) for name in sorted(models)}

    timer.calls = calls
    return timer


# ------------------------------------------------------------ running models
def run(model, feeds: dict[str, np.ndarray], outputs: list[str] | None = None) -> list[np.ndarray]:
    """``model`` (a ModelProto, its bytes or a path) run by onnxruntime on the CPU, one thread.

    ``outputs`` (default: the graph outputs) may also name internal tensors of
    a ModelProto: they are added to a copy as extra graph outputs, typed from
    the graph's value_info (float when shape inference left them out).
    """
    if outputs and isinstance(model, onnx.ModelProto):
        graph_outputs = {o.name for o in model.graph.output}
        extra = [name for name in dict.fromkeys(outputs) if name not in graph_outputs]
        if extra:
            typed = {v.name: v for v in list(model.graph.value_info) + list(model.graph.input)}
            model = copy.deepcopy(model)
            model.graph.output.extend(typed[n] if n in typed else helper.make_tensor_value_info(
                n, TensorProto.FLOAT, None) for n in extra)
    options = ort.SessionOptions()
    options.intra_op_num_threads = 1
    source = model.SerializeToString() if isinstance(model, onnx.ModelProto) else \
        str(model) if isinstance(model, Path) else model
    session = ort.InferenceSession(source, options, providers=["CPUExecutionProvider"])
    return session.run(outputs, feeds)


def reference_op(op: str, dtype=np.float64, **attrs) -> Callable[[np.ndarray], np.ndarray]:
    """``z -> op(z)`` as onnx.reference.ReferenceEvaluator executes a one-node ``op`` graph (the ONNX operator
    spec in numpy), computed in ``dtype`` and returned as float64."""
    elem = helper.np_dtype_to_tensor_dtype(np.dtype(dtype))
    graph = helper.make_graph([helper.make_node(op, ["z"], ["y"], **attrs)], "g",
                              [helper.make_tensor_value_info("z", elem, None)],
                              [helper.make_tensor_value_info("y", elem, None)])
    evaluator = ReferenceEvaluator(helper.make_model(graph, opset_imports=[helper.make_opsetid("", OPSET)]))
    return lambda z: evaluator.run(None, {"z": np.asarray(z, dtype=dtype)})[0].astype(np.float64)


def in_memory(arrays: dict[str, np.ndarray], labels=None, expected=None) -> Dataset:
    """A data set of the given input arrays (one row per sample), as swapper.data would load it."""
    arrays = {k: np.asarray(v) for k, v in arrays.items()}
    return Dataset(path=Path("<memory>"), arrays=arrays, labels=labels, expected=expected,
                   n=len(next(iter(arrays.values()))), dtypes={k: v.dtype for k, v in arrays.items()})


def held_arrays(obj, seen=None) -> list[np.ndarray]:
    """Every numpy array reachable from ``obj`` through dicts, lists, tuples and the instance __dict__s of
    swapper's own classes: what an object keeps alive, found from the outside."""
    seen = set() if seen is None else seen
    if id(obj) in seen:
        return []
    seen.add(id(obj))
    if isinstance(obj, np.ndarray):
        return [obj]
    found = []
    if isinstance(obj, dict):
        for k, v in obj.items():
            found += held_arrays(k, seen) + held_arrays(v, seen)
    elif isinstance(obj, (list, tuple, set)):
        for v in obj:
            found += held_arrays(v, seen)
    elif hasattr(obj, "__dict__") and not isinstance(obj, type) and type(obj).__module__.startswith("swapper"):
        found += held_arrays(vars(obj), seen)
    return found


# ------------------------------------------------------------ activation functions from their definitions
# Independent of swapper.functions on purpose: the tests compare the package against these.
def relu(z):
    # source: ONNX operator spec, Relu: y = max(0, x)
    return np.maximum(z, 0.0)


def drelu(z):
    return (z > 0).astype(np.float64)


def leaky_relu(z, alpha=0.01):
    # source: ONNX operator spec, LeakyRelu: x if x >= 0 else alpha·x (default alpha 0.01)
    return np.where(z >= 0, z, alpha * z)


def hard_swish(z):
    # source: ONNX operator spec, HardSwish: y = x · max(0, min(1, x/6 + 1/2)) (Howard et al. 2019, h-swish)
    return z * np.clip(z / 6.0 + 0.5, 0.0, 1.0)


def dhard_swish(z):
    return np.where(z < -3, 0.0, np.where(z > 3, 1.0, (2 * z + 3) / 6.0))


def hard_sigmoid(z, alpha=0.2, beta=0.5):
    # source: ONNX operator spec, HardSigmoid: max(0, min(1, alpha·x + beta)), defaults alpha 0.2, beta 0.5
    return np.clip(alpha * z + beta, 0.0, 1.0)


def hard_tanh(z):
    # hard tanh (Collobert 2004): clip(z, -1, 1), what Clip(min=-1, max=1) computes (ONNX operator spec, Clip)
    return np.clip(z, -1.0, 1.0)


def dhard_tanh(z):
    return ((z > -1) & (z < 1)).astype(np.float64)


def sigmoid(z):
    # source: ONNX operator spec, Sigmoid: 1 / (1 + exp(-x))
    return 1.0 / (1.0 + np.exp(-z))


def silu(z):
    # source: Elfwing et al. 2018 / ONNX function spec of Swish with alpha=1: x·sigmoid(x)
    return z * sigmoid(z)


# registry name -> g(z, **params), for the surrogate formula a·g(b·x + c) + d written out in numpy
FORMULAS = {"relu": relu, "leaky_relu": leaky_relu, "hard_swish": hard_swish, "hard_sigmoid": hard_sigmoid,
            "hard_tanh": hard_tanh, "sigmoid": sigmoid, "tanh": np.tanh, "silu": silu}


def wmse(y, yhat, w=None) -> float:
    """Weighted mean squared error Σw(y − ŷ)² / Σw (plain mean without weights)."""
    w = np.ones_like(y) if w is None else w
    return float(np.sum(w * (y - yhat) ** 2) / np.sum(w))


# ------------------------------------------------------------ sweep / automatic plan
def two_elu_model() -> onnx.ModelProto:
    """Two ELU sites by construction: ``za = x·x + 0.5`` is always positive, where ELU(z) = z = Relu(z)
    (ONNX Elu: z for z > 0), so swapping it to relu costs nothing; ``zb = Gemm(x)`` takes both signs, where
    relu cannot follow ELU's α·(exp(z) − 1). Output: a Gemm over both, [N, 5]."""
    rng = np.random.default_rng(3)
    nodes = [helper.make_node("Mul", ["x", "x"], ["sq"]), helper.make_node("Add", ["sq", "half"], ["za"]),
             helper.make_node("Elu", ["za"], ["ya"]),
             helper.make_node("Gemm", ["x", "w2", "b2"], ["zb"]), helper.make_node("Elu", ["zb"], ["yb"]),
             helper.make_node("Concat", ["ya", "yb"], ["cat"], axis=1),
             helper.make_node("Gemm", ["cat", "w3", "b3"], ["out"])]
    inits = [init("half", np.full((1, 4), 0.5)), init("w2", rng.normal(size=(4, 4))), init("b2", np.zeros(4)),
             init("w3", rng.normal(size=(8, 5))), init("b3", rng.normal(size=5))]
    return as_loaded(float_model(nodes, [("x", ["N", 4])], [("out", ["N", 5])], inits, opset=17))


def two_elu_data(n: int, seed: int) -> np.ndarray:
    return np.random.default_rng(seed).normal(size=(n, 4)).astype(np.float32)


# ------------------------------------------------------------ a token model
def token_model(vocab: int = 12, d: int = 4, hidden: int = 6, *, seed: int = 0, mask_name: str = "attention_mask",
                ids_name: str = "input_ids") -> onnx.ModelProto:
    """A small sentence encoder, written as ONNX text: token ids [N, T] -> Gather embedding -> MatMul+Add ->
    exact GELU (the Erf form, 0.5·x·(1 + erf(x/√2))) -> MatMul+Add -> mean over the tokens the mask keeps.

    Like demo_models/status_encoder_gelu.onnx without attention: each position is computed on its own, so the
    real tokens' activations do not depend on what the padding positions hold.
    """
    rng = np.random.default_rng(seed)
    text = f"""
    <ir_version: 8, opset_import: ["" : {OPSET}]>
    encoder (int64[N, T] {ids_name}, int64[N, T] {mask_name}) => (float[N, {d}] embedding) {{
        x = Gather <axis = 0> (table, {ids_name})
        h0 = MatMul (x, w1)
        h = Add (h0, b1)
        hs = Div (h, sqrt2)
        e = Erf (hs)
        e1 = Add (e, one)
        g0 = Mul (h, e1)
        g = Mul (g0, half)
        z0 = MatMul (g, w2)
        z = Add (z0, b2)
        m = Cast <to = 1> ({mask_name})
        axes = Constant <value = int64[1] {{2}}> ()
        m3 = Unsqueeze (m, axes)
        zm = Mul (z, m3)
        one_axis = Constant <value = int64[1] {{1}}> ()
        total = ReduceSum <keepdims = 0> (zm, one_axis)
        count = ReduceSum <keepdims = 0> (m3, one_axis)
        embedding = Div (total, count)
    }}
    """
    model = onnx.parser.parse_model(text)
    model.graph.initializer.extend([
        init("table", rng.normal(size=(vocab, d))), init("w1", rng.normal(size=(d, hidden))),
        init("b1", rng.normal(size=hidden) * 0.5), init("w2", rng.normal(size=(hidden, d)) / np.sqrt(hidden)),
        init("b2", rng.normal(size=d) * 0.1), init("sqrt2", np.sqrt(2.0)), init("one", 1.0), init("half", 0.5)])
    return as_loaded(model)


def token_batch(n: int, t: int, vocab: int = 12, *, seed: int = 0, pad_id: int = 0) -> dict[str, np.ndarray]:
    """``n`` sentences of 1..t real tokens (ids 1..vocab−1), padded with ``pad_id`` to ``t``: input_ids and
    attention_mask, int64 [n, t]."""
    rng = np.random.default_rng(seed)
    lengths = rng.integers(1, t + 1, size=n)
    mask = (np.arange(t)[None, :] < lengths[:, None]).astype(np.int64)
    ids = np.where(mask == 1, rng.integers(1, vocab, size=(n, t)), pad_id).astype(np.int64)
    return {"input_ids": ids, "attention_mask": mask}
