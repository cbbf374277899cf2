"""Regenerate the built-in onnxruntime target profiles ort-cpu and ort-cpu-int8.

What it measures, on this machine, with the installed onnxruntime:

1. Per-op priors. Every op in ``OPS`` as a single-op graph on one
   [64, 32, 32, 32] tensor: float32 (X -> op -> Y), and int8 as the op sits in
   a QDQ model (uint8 X -> DequantizeLinear -> op -> QuantizeLinear -> uint8 Y,
   scales and zero points set by min/max of the data as MinMax calibration
   does). Full graph optimisation (ORT_ENABLE_ALL), one intra-op thread,
   CPUExecutionProvider; models interleaved (each sweep runs every model:
   warm-up, then back-to-back timed runs); statistic = the smallest of the
   per-sweep medians of thread CPU time (the least disturbed sweep: on a shared
   machine other processes inflate even CPU time through caches and memory
   bandwidth), divided by the same statistic of the Relu graph of the same
   precision. float32 costs that the project's op_costs.json already has
   (swapper/resources/, or wherever the package keeps it) are taken from there
   (it is the project's measured table); this run's own values for those ops are
   kept in the profile notes as a cross-check.
2. Fusion facts. Each activation pattern after each producer (Conv,
   ConvTranspose, Gemm, MatMul, MatMul+Add), and alone, is optimised by
   onnxruntime with ``SessionOptions.optimized_model_filepath`` set; the saved
   graph's node types say what was fused (float32 as built; int8 after
   onnxruntime.quantization.quantize_static, QDQ, uint8 activations, int8
   per-channel weights, MinMax). A pattern is fused when only the producer (or
   one fused node) is left, layout nodes aside; a standalone pattern is
   rewritten when the runtime replaced it by fewer nodes (x*Sigmoid(x) ->
   QuickGelu).
3. Fused costs (float32): (time of producer + pattern - time of producer) /
   time of a standalone Relu on the same number of elements. int8 patterns that
   fuse are removed outright by quantize_static (the graph is the producer's
   alone), so their cost is 0.

Writes swapper/targets/builtin/ort-cpu.json and ort-cpu-int8.json (``--out``
to write elsewhere).

Run:  python benchmarks/measure_target_ops.py [--repeats 20] [--sweeps 7] [--all-measured] [--out DIR]
"""
from __future__ import annotations

import argparse
import datetime as dt
import json
import logging
import os
import statistics
import tempfile
import time
from pathlib import Path

import numpy as np
import onnx
import onnxruntime as ort
from onnx import TensorProto, helper, numpy_helper
from onnxruntime.quantization import CalibrationDataReader, CalibrationMethod, QuantFormat, QuantType, quantize_static

logger = logging.getLogger(__name__)

ROOT = Path(__file__).resolve().parents[1]
SHAPE = (64, 32, 32, 32)
OPSET = 22  # as benchmarks/measure_op_costs.py
SELU = {"alpha": 1.67326319217681884765625, "gamma": 1.05070102214813232421875}  # ONNX operator spec defaults
# op -> (number of X inputs, attributes, extra float constants, input domain)
OPS = {
    "Relu": (1, {}, [], "any"), "Clip": (1, {}, [0.0, 6.0], "any"), "LeakyRelu": (1, {"alpha": 0.01}, [], "any"),
    "PRelu": (1, {}, [np.full((SHAPE[1], 1, 1), 0.25)], "any"),
    "HardSigmoid": (1, {"alpha": 0.2, "beta": 0.5}, [], "any"), "HardSwish": (1, {}, [], "any"),
    "Sigmoid": (1, {}, [], "any"), "Tanh": (1, {}, [], "any"), "Erf": (1, {}, [], "any"),
    "Exp": (1, {}, [], "any"), "Log": (1, {}, [], "positive"), "Softplus": (1, {}, [], "any"),
    "Softsign": (1, {}, [], "any"), "Elu": (1, {"alpha": 1.0}, [], "any"), "Selu": (1, SELU, [], "any"),
    "Celu": (1, {"alpha": 1.0}, [], "any"), "Gelu": (1, {}, [], "any"), "Mish": (1, {}, [], "any"),
    "Mul": (2, {}, [], "any"), "Add": (2, {}, [], "any"), "Sub": (2, {}, [], "any"),
    "Div": (2, {}, [], "any"), "Pow": (1, {}, [3.0], "any"), "Max": (2, {}, [], "any"),
    "Min": (2, {}, [], "any"), "Where": (2, {}, [], "any"), "Abs": (1, {}, [], "any"),
    "Neg": (1, {}, [], "any"), "Sqrt": (1, {}, [], "positive"), "Reciprocal": (1, {}, [], "any"),
}
# op type -> (function, form) in the project's op_costs.json
OP_COSTS_FORMS = {
    "Relu": ("relu", "op"), "LeakyRelu": ("leaky_relu", "op"), "PRelu": ("prelu", "op"),
    "Sigmoid": ("sigmoid", "op"), "Tanh": ("tanh", "op"), "Elu": ("elu", "op"), "Selu": ("selu", "op"),
    "Celu": ("celu", "op"), "Softplus": ("softplus", "op"), "Softsign": ("softsign", "op"),
    "HardSigmoid": ("hard_sigmoid", "op"), "HardSwish": ("hard_swish", "op"), "Gelu": ("gelu", "op"),
    "Mish": ("mish", "op"), "Clip": ("relu6", "emitted"),
}
# activation patterns as exporters write them: name -> list of (op, inputs from "x"/previous, attrs, consts)
PATTERNS = {
    "Relu": [("Relu", {}, [])], "Clip": [("Clip", {}, [0.0, 6.0])], "LeakyRelu": [("LeakyRelu", {"alpha": 0.01}, [])],
    "Sigmoid": [("Sigmoid", {}, [])], "Tanh": [("Tanh", {}, [])],
    "HardSigmoid": [("HardSigmoid", {"alpha": 0.2, "beta": 0.5}, [])], "HardSwish": [("HardSwish", {}, [])],
    "Elu": [("Elu", {"alpha": 1.0}, [])], "Softplus": [("Softplus", {}, [])], "Selu": [("Selu", SELU, [])],
    "Gelu": [("Gelu", {}, [])], "PRelu": [("PRelu", {}, [[0.25]])],
    "x*Sigmoid(x)": "silu", "x*Sigmoid(b*x)": "swish", "x*HardSigmoid(x)": "hswish", "gelu/erf": "gelu_erf",
    "x*Tanh(Softplus(x))": "mish",
}
PRODUCERS = ("Conv", "ConvTranspose", "Gemm", "MatMul", "MatMul+Add")
LAYOUT_NODES = {"ReorderInput", "ReorderOutput", "Transpose", "QuantizeLinear", "DequantizeLinear"}


class Graph:
    """Minimal builder: named float/uint8 inputs, float32 constants, one output Y."""

    def __init__(self):
        self.nodes, self.inits, self.inputs, self.k = [], [], [], 0

    def c(self, value, dtype=np.float32) -> str:
        name = f"c{len(self.inits)}"
        self.inits.append(numpy_helper.from_array(np.asarray(value, dtype=dtype), name))
        return name

    def op(self, op_type: str, inputs: list[str], **attrs) -> str:
        self.k += 1
        out = f"t{self.k}"
        self.nodes.append(helper.make_node(op_type, inputs, [out], name=f"n{self.k}", **attrs))
        return out

    def model(self, out: str, out_type=TensorProto.FLOAT) -> onnx.ModelProto:
        last = self.nodes[-1]
        assert last.output[0] == out, "the graph output must be the last node's"
        last.output[0] = "Y"
        graph = helper.make_graph(self.nodes, "g", self.inputs, [helper.make_tensor_value_info("Y", out_type, None)],
                                  self.inits)
        m = helper.make_model(graph, opset_imports=[helper.make_opsetid("", OPSET)])
        m.ir_version = 10
        return m


def _apply_op(g: Graph, op: str, x: str, cond: str | None) -> str:
    n_x, attrs, consts, _ = OPS[op]
    if op == "Where":
        return g.op("Where", [cond, x, x])
    return g.op(op, [x] * n_x + [g.c(v) for v in consts], **attrs)


def float_op(op: str) -> onnx.ModelProto:
    g = Graph()
    g.inputs.append(helper.make_tensor_value_info("X", TensorProto.FLOAT, SHAPE))
    if op == "Where":
        g.inputs.append(helper.make_tensor_value_info("C", TensorProto.BOOL, SHAPE))
    return g.model(_apply_op(g, op, "X", "C"))


def minmax_params(values: np.ndarray) -> tuple[float, int]:
    """uint8 scale and zero point as MinMax calibration sets them (range widened to include 0)."""
    lo, hi = min(float(values.min()), 0.0), max(float(values.max()), 0.0)
    scale = (hi - lo) / 255.0 or 1.0
    return scale, int(np.clip(round(-lo / scale), 0, 255))


def int8_op(op: str, x: np.ndarray, cond: np.ndarray) -> tuple[onnx.ModelProto, np.ndarray]:
    """uint8 X -> DQ -> op -> Q -> uint8 Y, and the quantized input to feed it."""
    sx, zx = minmax_params(x)
    xq = np.clip(np.round(x / sx) + zx, 0, 255).astype(np.uint8)
    y = run_once(float_op(op), {"X": (xq.astype(np.float32) - zx) * sx, "C": cond})
    sy, zy = minmax_params(y[np.isfinite(y)])
    g = Graph()
    g.inputs.append(helper.make_tensor_value_info("X", TensorProto.UINT8, SHAPE))
    if op == "Where":
        g.inputs.append(helper.make_tensor_value_info("C", TensorProto.BOOL, SHAPE))
    xf = g.op("DequantizeLinear", ["X", g.c(sx), g.c(zx, np.uint8)])
    out = g.op("QuantizeLinear", [_apply_op(g, op, xf, "C"), g.c(sy), g.c(zy, np.uint8)])
    return g.model(out, TensorProto.UINT8), xq


def pattern_nodes(g: Graph, name: str, x: str) -> str:
    spec = PATTERNS[name]
    if spec == "silu":
        return g.op("Mul", [x, g.op("Sigmoid", [x])])
    if spec == "swish":
        return g.op("Mul", [x, g.op("Sigmoid", [g.op("Mul", [x, g.c(1.702)])])])
    if spec == "hswish":
        return g.op("Mul", [x, g.op("HardSigmoid", [x], alpha=1.0 / 6.0, beta=0.5)])
    if spec == "mish":
        return g.op("Mul", [x, g.op("Tanh", [g.op("Softplus", [x])])])
    if spec == "gelu_erf":  # 0.5·x·(1 + erf(x/√2)), as torch's exporter writes it
        e = g.op("Erf", [g.op("Div", [x, g.c(np.sqrt(2.0))])])
        return g.op("Mul", [g.op("Mul", [x, g.op("Add", [e, g.c(1.0)])]), g.c(0.5)])
    for op, attrs, consts in spec:
        x = g.op(op, [x] + [g.c(v) for v in consts], **attrs)
    return x


def producer_graph(producer: str | None, pattern: str | None, big: bool) -> tuple[onnx.ModelProto, tuple, list[str]]:
    """producer -> pattern model, its input shape, and the pattern's op types in execution order."""
    rng = np.random.default_rng(1)
    c = 32 if big else 8
    g = Graph()
    if producer in ("Conv", "ConvTranspose"):
        shape = (8, c, 32, 32) if big else (1, c, 8, 8)
        w = g.c(rng.standard_normal((c, c, 1, 1)) * 0.2)
        x = g.op(producer, ["X", w, g.c(np.zeros(c))])
    elif producer in ("Gemm", "MatMul", "MatMul+Add"):
        k = 2 * c if big else c
        shape = (4096, k) if big else (4, k)
        w = g.c(rng.standard_normal((k, k)) * 0.2)
        if producer == "Gemm":
            x = g.op("Gemm", ["X", w, g.c(np.zeros(k))])
        else:
            x = g.op("MatMul", ["X", w])
        if producer == "MatMul+Add":
            x = g.op("Add", [x, g.c(np.zeros(k))])
    else:
        shape = SHAPE if big else (1, c, 8, 8)
        x = "X"
    first = len(g.nodes)
    if pattern is not None:
        x = pattern_nodes(g, pattern, x)
    g.inputs.append(helper.make_tensor_value_info("X", TensorProto.FLOAT, shape))
    ops = [n.op_type for n in g.nodes[first:]]
    if producer == "MatMul+Add":
        ops = ["Add"] + ops
    return g.model(x), shape, ops


def session(model: onnx.ModelProto, save_to: str | None = None) -> ort.InferenceSession:
    opts = ort.SessionOptions()
    opts.graph_optimization_level = ort.GraphOptimizationLevel.ORT_ENABLE_ALL
    opts.intra_op_num_threads = opts.inter_op_num_threads = 1
    opts.execution_mode = ort.ExecutionMode.ORT_SEQUENTIAL
    opts.log_severity_level = 3  # the NCHWc "hardware specific" warning on saving, once per model
    if save_to:
        opts.optimized_model_filepath = save_to
    return ort.InferenceSession(model.SerializeToString(), opts, providers=["CPUExecutionProvider"])


def run_once(model: onnx.ModelProto, feeds: dict) -> np.ndarray:
    sess = session(model)
    names = {i.name for i in sess.get_inputs()}
    return sess.run(None, {k: v for k, v in feeds.items() if k in names})[0]


def optimized_ops(model: onnx.ModelProto) -> list[str]:
    """Node types of the graph onnxruntime runs (domain and fused activation shown)."""
    with tempfile.TemporaryDirectory() as tmp:
        path = os.path.join(tmp, "optimized.onnx")
        session(model, path)
        out = onnx.load(path)
    names = []
    for n in out.graph.node:
        act = next((a.s.decode() for a in n.attribute if a.name == "activation"), None)
        dom = "" if n.domain in ("", "ai.onnx") else f"@{n.domain}"
        names.append(f"{n.op_type}{dom}" + (f"[{act}]" if act else ""))
    return names


class _Batches(CalibrationDataReader):
    def __init__(self, shape):
        rng = np.random.default_rng(2)
        self.it = iter([{"X": (rng.standard_normal(shape) * 2).astype(np.float32)} for _ in range(4)])

    def get_next(self):
        return next(self.it, None)


def quantized(model: onnx.ModelProto, shape) -> onnx.ModelProto:
    with tempfile.TemporaryDirectory() as tmp:
        src, dst = os.path.join(tmp, "f.onnx"), os.path.join(tmp, "q.onnx")
        onnx.save(model, src)
        quantize_static(src, dst, _Batches(shape), quant_format=QuantFormat.QDQ, activation_type=QuantType.QUInt8,
                        weight_type=QuantType.QInt8, per_channel=True, calibrate_method=CalibrationMethod.MinMax)
        return onnx.load(dst)


def compute_nodes(ops: list[str]) -> list[str]:
    return [o for o in ops if o.split("@")[0].split("[")[0] not in LAYOUT_NODES]


def discover_fusions() -> list[dict]:
    """One row per (precision, producer, pattern): node types after optimisation, and whether it fused."""
    rows = []
    for producer in (None,) + PRODUCERS:
        # MatMul -> Add alone is the bias fold of MatMul+Add (pattern None: the chain is just ["Add"])
        for pattern in list(PATTERNS) + ([None] if producer == "MatMul+Add" else []):
            model, shape, ops = producer_graph(producer, pattern, big=False)
            for precision in ("float32", "int8"):
                m = model if precision == "float32" else quantized(model, shape)
                got = optimized_ops(m)
                left = compute_nodes(got)
                if producer is None:
                    fused = len(left) < len(ops) and not set(left) <= set(ops)
                else:
                    fused = len(left) == 1
                rows.append({"precision": precision, "producer": producer, "pattern": pattern, "ops": ops,
                             "optimized": got, "fused": fused})
                logger.info("%-8s %-11s %-20s fused=%-5s %s", precision, producer, pattern, fused, got)
    return rows


def runner(model: onnx.ModelProto, feeds: dict):
    sess = session(model)
    binding = sess.io_binding()
    for i in sess.get_inputs():
        binding.bind_cpu_input(i.name, feeds[i.name])
    out = run_once(model, feeds)
    binding.bind_ortvalue_output("Y", ort.OrtValue.ortvalue_from_numpy(np.empty_like(out)))
    return lambda: sess.run_with_iobinding(binding)


def time_all(runs: dict, warmup: int, repeats: int, sweeps: int) -> dict:
    """Thread CPU seconds per run of each callable: the smallest per-sweep median over interleaved sweeps."""
    best = {k: float("inf") for k in runs}
    for _ in range(sweeps):
        for key, run in runs.items():
            for _ in range(warmup):
                run()
            times = []
            for _ in range(repeats):
                c0 = time.thread_time()
                run()
                times.append(time.thread_time() - c0)
            best[key] = min(best[key], statistics.median(times))
    return best


def accepted_opsets() -> tuple[int, int]:
    """The contiguous default-domain opset range in which onnxruntime loads each probe op."""
    ok = []
    for v in range(1, onnx.defs.onnx_opset_version() + 1):
        try:
            for op in ("Relu", "Sigmoid", "Tanh", "Mul", "Add", "LeakyRelu", "HardSigmoid"):
                g = helper.make_graph([helper.make_node(op, ["X", "X"][: 2 if op in ("Mul", "Add") else 1], ["Y"])],
                                      "g", [helper.make_tensor_value_info("X", TensorProto.FLOAT, [2])],
                                      [helper.make_tensor_value_info("Y", TensorProto.FLOAT, [2])])
                m = helper.make_model(g, opset_imports=[helper.make_opsetid("", v)])
                m.ir_version = 10 if v >= 21 else 7
                session(m)
            ok.append(v)
        except Exception as exc:  # noqa: BLE001 - onnxruntime raises several types for an unknown opset
            logger.debug("opset %d not loaded: %s", v, str(exc).splitlines()[0])
    return min(ok), max(v for v in ok if all(u in ok for u in range(min(ok), v + 1)))


def op_costs_path() -> Path:
    """The project's measured cost table (swapper/resources/ or, after the package moves, swapper/functions/)."""
    found = sorted(ROOT.glob("swapper/**/op_costs.json"))
    if not found:
        raise SystemExit("op_costs.json not found under swapper/; run benchmarks/measure_op_costs.py first")
    return found[0]


def timing_base(producer: str | None) -> str | None:
    """The graph a fused pattern's time is compared with: the producer alone (MatMul for MatMul+Add)."""
    return "MatMul" if producer == "MatMul+Add" else producer


def cpu_model() -> str:
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return "unknown CPU"


def _show(ops: list[str]) -> str:
    return ", ".join(ops)


def noise_note(costs: dict) -> str:
    """How noisy the fused costs are, judged from two fusions that do the same work (a clamp in the Conv)."""
    try:
        ref = costs[("ref", None, None)]
        conv = costs[("producer", "Conv", None)]
        relu, clip = ((costs[("fused", "Conv", p)] - conv) / ref for p in ("Relu", "Clip"))
    except KeyError:  # this onnxruntime fused neither into the Conv
        return "A fused cost is the difference of two medians (producer + pattern, producer alone), clamped at 0."
    return (f"A fused cost is the difference of two ~{conv * 1e3:.2f} ms medians, in units of a standalone Relu on "
            f"the same 262144 elements ({ref * 1e3:.3f} ms), clamped at 0. Conv+Relu and Conv+Clip(0, 6) fold the "
            f"same clamp into the Conv yet came out at {relu:.2f} and {clip:.2f}: differences of that size are "
            "noise on this machine.")


def build_profiles(costs: dict, rows: list[dict], int8_forms: dict, float_forms: dict, opsets: tuple[int, int],
                   meta: dict, all_measured: bool = False) -> tuple[dict, dict]:
    """The two profile objects (swapper.target/1) from this run's numbers and facts."""
    table = json.loads(op_costs_path().read_text())
    today, ver = meta["date"], ort.__version__
    how = (f"benchmarks/measure_target_ops.py, {today}, onnxruntime {ver}, {meta['cpu']}: single-op graph on "
           f"{list(SHAPE)}, ORT_ENABLE_ALL, 1 thread, least per-sweep median thread CPU time / the Relu graph's")
    table_src = (f"{op_costs_path().relative_to(ROOT)} (benchmarks/measure_op_costs.py, {table['measured']['date']}, "
                 f"onnxruntime {table['measured']['onnxruntime']})")
    relu32, relu8 = costs[("float32", "Relu")], costs[("int8", "Relu")]
    fp_ops, q_ops, cross = {}, {}, []
    for op in OPS:
        fn_form = OP_COSTS_FORMS.get(op)
        here = round(costs[("float32", op)] / relu32, 3)
        if not all_measured and fn_form and fn_form[1] in table["forms"].get(fn_form[0], {}):
            fp_ops[op] = {"support": "native", "cost": table["forms"][fn_form[0]][fn_form[1]], "source": table_src}
            cross.append(f"{op} {here:g}")
        else:
            fp_ops[op] = {"support": "native", "cost": here, "source": how}
        if float_forms[op] != [op]:
            fp_ops[op]["note"] = f"onnxruntime runs it as {_show(float_forms[op])}"
        q_ops[op] = {"support": "native", "cost": round(costs[("int8", op)] / relu8, 3),
                     "source": how.replace("single-op graph", "uint8 DequantizeLinear -> op -> QuantizeLinear graph"),
                     "note": f"onnxruntime runs {_show(int8_forms[op])}"}
    fp_ops["Relu"]["cost"] = q_ops["Relu"]["cost"] = 1.0
    fp_fusions, q_fusions = [], []
    for row in rows:
        if not row["fused"]:
            continue
        after = "*" if row["producer"] is None else ["MatMul" if row["producer"] == "MatMul+Add" else row["producer"]]
        seen = f"onnxruntime {ver} optimised graph: {_show(row['optimized'])}"
        if row["precision"] == "int8":
            if row["producer"] is None:
                continue  # no standalone int8 rewrite was found; a future one would need timing first
            q_fusions.append({"after": after, "ops": row["ops"], "cost": 0.0, "source": how.split(":")[0],
                              "note": f"quantize_static drops the node (the producer's output range clamps); {seen}"})
            continue
        key = ("fused", row["producer"], row["pattern"])
        if row["producer"] is None:
            cost = round(costs[key] / relu32, 3)
            src = how
            known = {"x*Sigmoid(x)": ("silu", "silu/mul-sigmoid"), "x*Sigmoid(b*x)": ("swish", "swish/mul-sigmoid-scaled"),
                     "gelu/erf": ("gelu", "gelu/erf")}.get(row["pattern"])
            if known and known[1] in table["forms"].get(known[0], {}):
                cost, src = table["forms"][known[0]][known[1]], table_src
        else:
            extra = costs[key] - costs[("producer", timing_base(row["producer"]), None)]
            cost = max(0.0, round(extra / costs[("ref", None, None)], 2))
            src = how.replace("single-op graph", "producer + pattern minus producer alone, per element, in units of "
                              "a standalone Relu,")
            seen += f"; measured extra {extra * 1e3:.4f} ms over the producer"
        fp_fusions.append({"after": after, "ops": row["ops"], "cost": cost, "source": src, "note": seen})
    default = {"support": "native", "cost": 1.0, "from_memory": True,
               "source": "assumption, not measured: onnxruntime's CPU provider implements the default-domain ops",
               "note": "an unlisted op is taken as costing what Relu does until it is timed in context"}
    docs = [{"title": "Graph Optimizations in ONNX Runtime",
             "url": "https://onnxruntime.ai/docs/performance/model-optimizations/graph-optimizations.html",
             "supports": ("the fusion classes whose effect this file's fusions record as measured (Conv Activation, "
                          "GEMM Activation, Matmul Add, GELU fusions) and the optimisation levels")}]
    notes = [(f"Measured {today} on {meta['cpu']}, onnxruntime {ver}, onnx {onnx.__version__}; 1-minute load "
              f"average {meta['load'][0]:.2f} before, {meta['load'][1]:.2f} after (2 cores shared with other work); "
              f"{meta['repeats']} timed runs per model; statistic: the smallest per-sweep median."),
             ("opset range: the default-domain opsets in which onnxruntime loads Relu, Sigmoid, Tanh, Mul, Add, "
              "LeakyRelu and HardSigmoid models (probed 1..onnx's newest); loading is not a promise that every op "
              "has a kernel at the newest opsets."),
             ("Fusions were read from the optimised graph onnxruntime saves (SessionOptions.optimized_model_filepath); "
              "on this CPU the NCHWc layout transformer is active, so a fused Conv appears as com.microsoft.nchwc "
              "Conv with an activation attribute.")]
    unfused = {}
    for row in rows:
        if row["producer"] is not None and row["pattern"] is not None and not row["fused"]:
            unfused.setdefault((row["precision"], row["producer"]), []).append(row["pattern"])
    for precision in ("float32", "int8"):
        seen_not = "; ".join(f"after {prod}: {', '.join(pats)}" for (prec, prod), pats in unfused.items()
                             if prec == precision)
        notes.append(f"{precision}: seen not to fuse into the producer: {seen_not}.")
    kernels = sorted({n.split("@")[0] for form in int8_forms.values() for n in form if n.startswith("QLinear")})
    rewritten = [r["pattern"] for r in rows if r["precision"] == "int8" and r["producer"] is None and r["fused"]]

    def profile(name, precision, description, measurement, ops, fusions, sources, extra):
        return {"schema": "swapper.target/1", "name": name, "description": description, "precision": precision,
                "opset": {"min": opsets[0], "max": opsets[1]}, "costs_from": "measured",
                "measurement": measurement, "ops": ops, "default": default, "fusions": fusions,
                "sources": sources,
                "notes": [n for n in notes if not n.startswith(("float32:", "int8:")) or n.startswith(precision)]
                + extra}

    fp = profile(
        "ort-cpu", "float32", "onnxruntime CPUExecutionProvider, float32, full graph optimisation, one thread",
        {"runtime": "onnxruntime", "provider": "CPUExecutionProvider", "graph_optimization_level": "all",
         "threads": 1},
        fp_ops, fp_fusions, docs,
        [(f"Costs of {', '.join(op for op in OP_COSTS_FORMS)} come from op_costs.json, measured on "
          f"{table['measured']['cpu']}; the others from this run on {meta['cpu']}. This run's own values for the "
          f"op_costs.json ops (cross-check; ratios move between CPUs and under load): {', '.join(cross)}. "
          f"The float32 Relu baseline took {relu32 * 1e3:.3f} ms here against "
          f"{table['median_ms']['relu']['op']:.3f} ms in op_costs.json, so ratios from the two tables do not "
          "mix exactly (run with --all-measured for one machine's numbers throughout)."
          if not all_measured else "All float32 costs are from this run (--all-measured)."),
         noise_note(costs)])
    q = profile(
        "ort-cpu-int8", "int8",
        "onnxruntime CPUExecutionProvider, QDQ int8 (uint8 activations, int8 per-channel weights), one thread",
        {"runtime": "onnxruntime", "provider": "CPUExecutionProvider", "graph_optimization_level": "all",
         "threads": 1, "quantization": {"format": "QDQ", "activations": "uint8", "weights": "int8",
                                        "per_channel": True}},
        q_ops, q_fusions,
        docs + [{"title": "Quantize ONNX Models",
                 "url": "https://onnxruntime.ai/docs/performance/model-optimizations/quantization.html",
                 "supports": "the QDQ format and the uint8/int8 data types the measurement uses"}],
        [("int8 costs are relative to the int8 Relu graph, which onnxruntime reduces to DequantizeLinear -> "
          "QuantizeLinear (Relu folded into the output zero point): the unit is one requantisation pass."),
         ("An op without an integer kernel runs in float between DequantizeLinear and QuantizeLinear and its "
          f"cost includes both; integer kernels seen for the single ops: {', '.join(kernels)}."),
         f"Standalone patterns rewritten in QDQ form: {', '.join(rewritten) or 'none'}."])
    return fp, q


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=20, help="timed runs per model per sweep")
    ap.add_argument("--sweeps", type=int, default=7, help="passes over all models")
    ap.add_argument("--warmup", type=int, default=3)
    ap.add_argument("--out", type=Path, default=ROOT / "swapper/targets/builtin")
    ap.add_argument("--all-measured", action="store_true",
                    help="use this run's float32 costs for every op instead of op_costs.json's where it has them")
    args = ap.parse_args()
    logging.basicConfig(level=logging.INFO, format="%(message)s")
    ort.set_default_logger_severity(3)

    rows = discover_fusions()
    rng = np.random.default_rng(0)
    x = (rng.standard_normal(SHAPE) * 3.0).astype(np.float32)  # N(0, 3²): saturated and linear parts alike
    positive = np.abs(x) + 0.1
    cond = x > 0
    runs, float_forms, int8_forms = {}, {}, {}
    for op, (_, _, _, domain) in OPS.items():
        xo = positive if domain == "positive" else x
        model = float_op(op)
        float_forms[op] = compute_nodes(optimized_ops(model))
        runs[("float32", op)] = runner(model, {"X": xo, "C": cond})
        qmodel, xq = int8_op(op, xo, cond)
        int8_forms[op] = optimized_ops(qmodel)
        runs[("int8", op)] = runner(qmodel, {"X": xq, "C": cond})
    for row in rows:
        if row["precision"] == "float32" and row["fused"]:
            model, shape, _ = producer_graph(row["producer"], row["pattern"], big=True)
            feeds = {"X": rng.standard_normal(shape).astype(np.float32)}
            runs[("fused", row["producer"], row["pattern"])] = runner(model, feeds)
            base = timing_base(row["producer"])
            if row["producer"] is not None and ("producer", base, None) not in runs:
                runs[("producer", base, None)] = runner(producer_graph(base, None, True)[0], feeds)
    ref_shape = (8, 32, 32, 32)  # as many elements as the big Conv and Gemm outputs (262144)
    g = Graph()
    g.inputs.append(helper.make_tensor_value_info("X", TensorProto.FLOAT, ref_shape))
    runs[("ref", None, None)] = runner(g.model(g.op("Relu", ["X"])), {"X": rng.standard_normal(ref_shape)
                                                                     .astype(np.float32)})
    load_before = os.getloadavg()[0]
    costs = time_all(runs, args.warmup, args.repeats, args.sweeps)
    meta = {"date": dt.date.today().isoformat(), "cpu": cpu_model(), "repeats": args.repeats * args.sweeps,
            "load": (load_before, os.getloadavg()[0])}
    for key, sec in sorted(costs.items(), key=lambda kv: str(kv[0])):
        logger.info("%-45s %9.4f ms", " ".join(str(k) for k in key if k), sec * 1e3)
    fp, q = build_profiles(costs, rows, int8_forms, float_forms, accepted_opsets(), meta, args.all_measured)
    args.out.mkdir(parents=True, exist_ok=True)
    for prof in (fp, q):
        path = args.out / f"{prof['name']}.json"
        tmp = path.with_suffix(".json.tmp")
        tmp.write_text(json.dumps(prof, indent=2) + "\n", encoding="utf-8")
        os.replace(tmp, path)  # atomic: a reader never sees half a profile
        logger.info("wrote %s", path)


if __name__ == "__main__":
    main()
