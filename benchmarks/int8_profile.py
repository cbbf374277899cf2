"""Where the time goes in int8: onnxruntime's own per-node profile of an original and its swapped model.

    python benchmarks/int8_profile.py ORIGINAL.onnx SWAPPED.onnx --calib demo_models/calib.npz [--runs 200]

Both models are QDQ-quantized as the ort-cpu-int8 profile says (swapper.check.int8.quantize_int8 on the
calibration set), run at its settings (full optimisation, one thread) with onnxruntime's profiler on
(SessionOptions.enable_profiling), and the kernel times of the optimised graph are summed per op type. The
share of what a swap can remove (the activation ops) bounds the int8 ratio from below.
"""
from __future__ import annotations

import argparse
import json
import sys
from collections import defaultdict
from pathlib import Path

import numpy as np
import onnx
import onnxruntime as ort

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from swapper.check.int8 import quantize_int8


def profile(model: onnx.ModelProto, feeds: dict, runs: int, folder: Path, tag: str) -> dict:
    so = ort.SessionOptions()
    so.intra_op_num_threads = 1
    so.inter_op_num_threads = 1
    so.graph_optimization_level = ort.GraphOptimizationLevel.ORT_ENABLE_ALL
    so.enable_profiling = True
    so.profile_file_prefix = str(folder / tag)
    sess = ort.InferenceSession(model.SerializeToString(), so, providers=["CPUExecutionProvider"])
    for _ in range(runs):
        sess.run(None, feeds)
    events = json.loads(Path(sess.end_profiling()).read_text())
    per_op = defaultdict(float)
    for e in events:
        if e.get("cat") == "Node" and e["name"].endswith("_kernel_time"):
            per_op[e["args"]["op_name"]] += e["dur"] / runs / 1000.0  # ms per run
    return dict(sorted(per_op.items(), key=lambda kv: -kv[1]))


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("original", type=Path)
    ap.add_argument("swapped", type=Path)
    ap.add_argument("--calib", type=Path, required=True)
    ap.add_argument("--runs", type=int, default=200)
    ap.add_argument("--batch", type=int, default=64)
    ap.add_argument("--out", type=Path, default=Path("/tmp/swapper-int8-profile"))
    args = ap.parse_args()
    args.out.mkdir(parents=True, exist_ok=True)
    data = np.load(args.calib)
    name = onnx.load(args.original).graph.input[0].name
    x = data[data.files[0]]
    batches = [{name: x[i:i + args.batch]} for i in range(0, min(len(x), 256), args.batch)]
    rows = {}
    for tag, path in (("original", args.original), ("swapped", args.swapped)):
        q = quantize_int8(onnx.load(path), iter(batches))
        rows[tag] = profile(q, batches[0], args.runs, args.out, tag)
    ops = sorted(set(rows["original"]) | set(rows["swapped"]), key=lambda o: -rows["original"].get(o, 0.0))
    total = {k: sum(v.values()) for k, v in rows.items()}
    print("| op (optimised int8 graph) | original ms | swapped ms |")
    print("|---|---|---|")
    for op in ops:
        print(f"| {op} | {rows['original'].get(op, 0.0):.4f} | {rows['swapped'].get(op, 0.0):.4f} |")
    print(f"| total kernel time | {total['original']:.4f} | {total['swapped']:.4f} |")
    print(f"ratio of kernel totals: {total['swapped'] / total['original']:.3f}")


if __name__ == "__main__":
    main()
