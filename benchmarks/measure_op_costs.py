"""Measure the relative CPU cost of every activation swapper knows.

Each function is built the way swapper meets it in a graph (the single op, and
where exporters write it as a subgraph, that subgraph too), run by onnxruntime
on one [64, 32, 32, 32] float32 tensor with one intra-op thread, warmed up,
then timed ``--repeats`` times in each of ``--sweeps`` passes over all
models. Cost = median time / median time of Relu, timed as the calling
thread's CPU time (onnxruntime computes on it with one thread; unlike wall
time this does not grow while other processes hold a shared CPU).

Writes swapper/functions/op_costs.json:

    {"schema": "swapper.op_costs/1",
     "measured": {date, onnxruntime, onnx, cpu, shape, dtype, opset, threads,
                  warmup, repeats, sweeps, statistic, optimization, baseline,
                  load_average_1min},
     "costs": {function: relative cost of its canonical form},
     "forms": {function: {form: relative cost}},
     "median_ms": {function: {form: CPU milliseconds}},
     "median_wall_ms": {function: {form: wall milliseconds}}}

The canonical form is the single op when the default domain has one at the
opset we build with, else the decomposed subgraph exporters write. Functions
only swapper writes (surrogates such as relu6, pwl) are built with the
registry's own emitter, with the parameters they get when they replace a SiLU
(``functions.surrogate_params("silu", {}, name)``: e.g. the 6-segment
piecewise-linear fit), form "emitted".

Run:  python benchmarks/measure_op_costs.py [--repeats 20] [--sweeps 5] [--out PATH]
"""
from __future__ import annotations

import argparse
import datetime as dt
import json
import logging
import os
import platform
import statistics
import time
from pathlib import Path

import numpy as np
import onnx
import onnxruntime as ort
from onnx import TensorProto, helper, numpy_helper

logger = logging.getLogger(__name__)

SHAPE = (64, 32, 32, 32)
OPSET = 22  # newest default-domain opset swapper reads (swapper.core.model_io.MAX_OPSET)
MS_DOMAIN = "com.microsoft"
SQRT_2_OVER_PI = float(np.sqrt(2.0 / np.pi))


class _G:
    """Minimal builder: one input X, one output Y, float32 constants."""

    def __init__(self):
        self.nodes: list[onnx.NodeProto] = []
        self.inits: list[onnx.TensorProto] = []
        self.k = 0

    def c(self, value) -> str:
        name = f"c{len(self.inits)}"
        self.inits.append(numpy_helper.from_array(np.asarray(value, dtype=np.float32), name))
        return name

    def op(self, op_type: str, inputs: list[str], out: str | None = None, domain: str = "", **attrs) -> str:
        self.k += 1
        out = out or f"t{self.k}"
        self.nodes.append(helper.make_node(op_type, inputs, [out], name=f"n{self.k}", domain=domain, **attrs))
        return out

    def model(self) -> onnx.ModelProto:
        graph = helper.make_graph(
            self.nodes,
            "bench",
            [helper.make_tensor_value_info("X", TensorProto.FLOAT, SHAPE)],
            [helper.make_tensor_value_info("Y", TensorProto.FLOAT, SHAPE)],
            self.inits,
        )
        opsets = [helper.make_opsetid("", OPSET)]
        if any(n.domain == MS_DOMAIN for n in self.nodes):
            opsets.append(helper.make_opsetid(MS_DOMAIN, 1))
        m = helper.make_model(graph, opset_imports=opsets)
        m.ir_version = 10
        return m


def single(op_type: str, domain: str = "", extra_inputs=(), **attrs):
    def build():
        g = _G()
        ins = ["X"] + [g.c(v) for v in extra_inputs]
        g.op(op_type, ins, "Y", domain=domain, **attrs)
        return g.model()

    return build


def silu():
    g = _G()
    s = g.op("Sigmoid", ["X"])
    g.op("Mul", ["X", s], "Y")
    return g.model()


def swish(beta: float):
    def build():
        g = _G()
        z = g.op("Mul", ["X", g.c(beta)])
        s = g.op("Sigmoid", [z])
        g.op("Mul", ["X", s], "Y")
        return g.model()

    return build


def gelu_erf():
    # 0.5·x·(1 + erf(x/√2)), as torch's exporter writes it
    g = _G()
    e = g.op("Erf", [g.op("Div", ["X", g.c(np.sqrt(2.0))])])
    u = g.op("Add", [e, g.c(1.0)])
    g.op("Mul", [g.op("Mul", ["X", u]), g.c(0.5)], "Y")
    return g.model()


def gelu_tanh_decomposed():
    # 0.5·x·(1 + tanh(√(2/π)·(x + 0.044715·x³)))
    g = _G()
    cube = g.op("Mul", ["X", g.op("Mul", ["X", "X"])])
    inner = g.op("Add", ["X", g.op("Mul", [g.c(0.044715), cube])])
    t = g.op("Tanh", [g.op("Mul", [g.c(SQRT_2_OVER_PI), inner])])
    u = g.op("Add", [g.c(1.0), t])
    g.op("Mul", [g.c(0.5), g.op("Mul", ["X", u])], "Y")
    return g.model()


def mish_softplus():
    g = _G()
    t = g.op("Tanh", [g.op("Softplus", ["X"])])
    g.op("Mul", ["X", t], "Y")
    return g.model()


def mish_exp_log():
    g = _G()
    sp = g.op("Log", [g.op("Add", [g.op("Exp", ["X"]), g.c(1.0)])])
    g.op("Mul", ["X", g.op("Tanh", [sp])], "Y")
    return g.model()


def hard_swish_decomposed():
    g = _G()
    h = g.op("HardSigmoid", ["X"], alpha=1.0 / 6.0, beta=0.5)
    g.op("Mul", ["X", h], "Y")
    return g.model()


SELU_ALPHA = 1.67326319217681884765625  # ONNX operator spec, Selu defaults
SELU_GAMMA = 1.05070102214813232421875

# function -> [(form, builder)], canonical form first
BENCHES = {
    "relu": [("op", single("Relu"))],
    "leaky_relu": [("op", single("LeakyRelu", alpha=0.01))],
    "prelu": [("op", single("PRelu", extra_inputs=[np.full((SHAPE[1], 1, 1), 0.25)]))],
    "sigmoid": [("op", single("Sigmoid"))],
    "tanh": [("op", single("Tanh"))],
    "elu": [("op", single("Elu", alpha=1.0))],
    "selu": [("op", single("Selu", alpha=SELU_ALPHA, gamma=SELU_GAMMA))],
    "celu": [("op", single("Celu", alpha=1.0))],
    "softplus": [("op", single("Softplus"))],
    "softsign": [("op", single("Softsign"))],
    "hard_sigmoid": [("op", single("HardSigmoid", alpha=0.2, beta=0.5))],
    "hard_swish": [("op", single("HardSwish")), ("hard_swish/mul-hardsigmoid", hard_swish_decomposed)],
    "gelu": [
        ("op", single("Gelu", approximate="none")),
        ("op:com.microsoft", single("Gelu", domain=MS_DOMAIN)),
        ("gelu/erf", gelu_erf),
    ],
    "gelu_tanh": [
        ("op", single("Gelu", approximate="tanh")),
        ("op:com.microsoft", single("FastGelu", domain=MS_DOMAIN)),
        ("gelu_tanh/tanh-cubic", gelu_tanh_decomposed),
    ],
    "mish": [
        ("op", single("Mish")),
        ("mish/softplus-tanh", mish_softplus),
        ("mish/exp-log-tanh", mish_exp_log),
    ],
    "silu": [("silu/mul-sigmoid", silu)],
    "swish": [("swish/mul-sigmoid-scaled", swish(1.5))],
    "quick_gelu": [("op:com.microsoft", single("QuickGelu", domain=MS_DOMAIN, alpha=1.702)),
                   ("swish/mul-sigmoid-scaled", swish(1.702))],
}


def registry_emitted(name: str):
    """A function the registry emits: the nodes ``Function.emit`` writes, with the parameters a swap gives it."""

    def build():
        from swapper.core.emit import Emitter
        from swapper.functions.registry import get, surrogate_params

        fn = get(name)
        em = Emitter(f"bench/{name}", OPSET)
        # a surrogate's own parameters as a real swap sets them (pwl: several knots, not the default single one)
        params = surrogate_params("silu", {}, name) if fn.is_cheap and fn.params else dict(fn.params)
        fn.emit(em, "X", "Y", params)
        g = _G()
        g.nodes, g.inits = list(em.nodes), list(em.initializers)
        return g.model()

    return build


def add_registry_surrogates() -> None:
    """Measure every registry function without a hand-built entry, as swapper emits it."""
    try:
        from swapper.functions.registry import REGISTRY
    except ImportError as exc:  # the package is optional for this script
        logger.warning("swapper.functions not importable (%s); surrogates not measured", exc)
        return
    for name in sorted(REGISTRY):
        if name not in BENCHES:
            BENCHES[name] = [("emitted", registry_emitted(name))]


def cpu_model() -> str:
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or "unknown"


def runner(model: onnx.ModelProto, x: np.ndarray):
    """A zero-argument callable running ``model`` once on ``x`` (output buffer preallocated)."""
    opts = ort.SessionOptions()
    opts.intra_op_num_threads = 1
    opts.inter_op_num_threads = 1
    opts.execution_mode = ort.ExecutionMode.ORT_SEQUENTIAL
    sess = ort.InferenceSession(model.SerializeToString(), opts, providers=["CPUExecutionProvider"])
    binding = sess.io_binding()
    binding.bind_cpu_input("X", x)
    binding.bind_ortvalue_output("Y", ort.OrtValue.ortvalue_from_numpy(np.empty_like(x)))
    return lambda: sess.run_with_iobinding(binding)


def time_all(runs: dict[tuple[str, str], object], warmup: int, repeats: int, sweeps: int):
    """Median CPU seconds and median wall seconds per run of each callable, over sweeps x repeats runs.

    With one intra-op thread onnxruntime computes on the calling thread, so
    that thread's CPU time is the run's compute time, and unlike wall time it
    does not grow while other processes hold the CPU (this machine is shared).
    Each sweep times every model in a block (warm-up, then back-to-back runs,
    buffers as warm as in a steady pipeline); the sweeps spread each model's
    runs over the whole measurement.
    """
    keys = sorted(runs)
    cpu: dict[tuple[str, str], list[float]] = {k: [] for k in keys}
    wall: dict[tuple[str, str], list[float]] = {k: [] for k in keys}
    for _ in range(sweeps):
        for key in keys:
            run = runs[key]
            for _ in range(warmup):
                run()
            for _ in range(repeats):
                t0, c0 = time.perf_counter(), time.thread_time()
                run()
                cpu[key].append(time.thread_time() - c0)
                wall[key].append(time.perf_counter() - t0)
    return ({k: statistics.median(v) for k, v in cpu.items()}, {k: statistics.median(v) for k, v in wall.items()})


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=20, help="timed runs per model per sweep")
    ap.add_argument("--sweeps", type=int, default=5, help="passes over all models")
    ap.add_argument("--warmup", type=int, default=5)
    ap.add_argument("--out", type=Path, default=Path(__file__).resolve().parents[1] / "swapper/functions/op_costs.json")
    args = ap.parse_args()
    logging.basicConfig(level=logging.INFO, format="%(message)s")

    add_registry_surrogates()
    load_before = os.getloadavg()[0]
    rng = np.random.default_rng(0)
    # N(0, 3²) covers both saturated and linear parts of every function
    x = (rng.standard_normal(SHAPE) * 3.0).astype(np.float32)

    runs = {}
    for name in sorted(BENCHES):
        for form, build in BENCHES[name]:
            model = build()
            onnx.checker.check_model(model)
            runs[(name, form)] = runner(model, x)
    cpu_s, wall_s = time_all(runs, args.warmup, args.repeats, args.sweeps)
    median_ms: dict[str, dict[str, float]] = {}
    median_wall_ms: dict[str, dict[str, float]] = {}
    for (name, form), sec in sorted(cpu_s.items()):
        median_ms.setdefault(name, {})[form] = round(sec * 1e3, 4)
        median_wall_ms.setdefault(name, {})[form] = round(wall_s[(name, form)] * 1e3, 4)
        logger.info("%-12s %-28s %8.3f ms cpu %8.3f ms wall", name, form, sec * 1e3, wall_s[(name, form)] * 1e3)

    load_after = os.getloadavg()[0]
    if max(load_before, load_after) > 1.0:
        logger.warning("system load %.1f/%.1f: other processes share the CPU, costs may be noisy",
                       load_before, load_after)
    base = median_ms["relu"]["op"]
    forms = {n: {f: round(ms / base, 3) for f, ms in fm.items()} for n, fm in median_ms.items()}
    costs = {n: forms[n][BENCHES[n][0][0]] for n in sorted(BENCHES)}
    out = {
        "schema": "swapper.op_costs/1",
        "measured": {
            "date": dt.date.today().isoformat(),
            "onnxruntime": ort.__version__,
            "onnx": onnx.__version__,
            "cpu": cpu_model(),
            "shape": list(SHAPE),
            "dtype": "float32",
            "opset": OPSET,
            "threads": 1,
            "warmup": args.warmup,
            "repeats": args.repeats * args.sweeps,
            "sweeps": args.sweeps,
            "statistic": ("median thread CPU time of InferenceSession.run_with_iobinding over all runs "
                          "(each sweep: warm-up then back-to-back runs per model), divided by Relu's; "
                          "median wall times kept in median_wall_ms"),
            "optimization": "onnxruntime default (ORT_ENABLE_ALL): decomposed forms may be fused",
            "baseline": "relu",
            "load_average_1min": [round(load_before, 2), round(load_after, 2)],  # before, after
        },
        "costs": costs,
        "forms": forms,
        "median_ms": median_ms,
        "median_wall_ms": median_wall_ms,
    }
    args.out.parent.mkdir(parents=True, exist_ok=True)
    args.out.write_text(json.dumps(out, indent=2, sort_keys=False) + "\n")
    logger.info("wrote %s", args.out)


if __name__ == "__main__":
    main()
