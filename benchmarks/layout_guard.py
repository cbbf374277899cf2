"""Byte-identical guard for refactors: hash what `swapper swap` writes on fixed inputs.

    python benchmarks/layout_guard.py > before.json      # on the old code
    python benchmarks/layout_guard.py > after.json       # on the new code
    python benchmarks/layout_guard.py --compare before.json after.json

For every demo model x {default surrogates, --to relu, --to relu --refit-consumers}
and the synthetic scale model (default, relu), it runs the CLI's swap with a
calibration and a validation set and records the sha256 of the swapped model
and of report.json with the fields that change from run to run removed
(creation time, timings, latency, absolute paths). A pure move of code must
leave every hash unchanged.
"""
from __future__ import annotations

import argparse
import hashlib
import json
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "demo_models"
RUNS = {"default": [], "relu": ["--to", "relu"], "relu_refit": ["--to", "relu", "--refit-consumers"]}
VOLATILE = {"created_utc", "timings_s", "latency", "tool", "path", "refit_s"}


def _strip(value):
    """``value`` without the keys that change between identical runs."""
    if isinstance(value, dict):
        return {k: _strip(v) for k, v in value.items() if k not in VOLATILE}
    if isinstance(value, list):
        return [_strip(v) for v in value]
    return value


def _sha(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def _scale_inputs(work: Path) -> tuple[Path, Path, Path]:
    """The synthetic scale model and its data, written as files the CLI reads."""
    import numpy as np
    import onnx

    try:  # the module's home before and after the layout move
        from swapper.bench.scale_model import build_scale_model, scale_data
    except ImportError:
        from swapper.bench.scale_model import build_scale_model, scale_data
    model = build_scale_model()
    path = work / "scale.onnx"
    onnx.save(model, path)
    calib, val = scale_data(64, seed=1), scale_data(64, seed=2)
    np.savez(work / "scale_calib.npz", **calib.arrays)
    np.savez(work / "scale_val.npz", **val.arrays)
    return path, work / "scale_calib.npz", work / "scale_val.npz"


def run(work: Path) -> dict:
    cases = [(m, DEMO / "calib.npz", DEMO / "val.npz", name, extra)
             for m in sorted(DEMO.glob("meter_*.onnx")) for name, extra in RUNS.items()]
    scale, s_calib, s_val = _scale_inputs(work)
    cases += [(scale, s_calib, s_val, name, RUNS[name]) for name in ("default", "relu")]
    out = {}
    for model, calib, val, name, extra in cases:
        key = f"{model.stem}/{name}"
        dest = work / f"{model.stem}-{name}.onnx"
        report = work / f"{model.stem}-{name}-report"
        cmd = [sys.executable, "-c", "from swapper.cli.app import app; app()", "swap", str(model), "-o", str(dest), "--calib", str(calib),
               "--val", str(val), "--budget", "100", "--report", str(report), *extra]
        proc = subprocess.run(cmd, capture_output=True, text=True, cwd=work)
        if proc.returncode not in (0, 1):
            raise SystemExit(f"{key}: exit {proc.returncode}\n{proc.stderr}")
        payload = json.loads((report / "report.json").read_text())
        out[key] = {
            "model": _sha(dest.read_bytes()) if dest.exists() else None,
            "report": _sha(json.dumps(_strip(payload), sort_keys=True).encode()),
        }
        print(f"{key}: {out[key]['model']} {out[key]['report']}", file=sys.stderr)
    return out


def compare(a: Path, b: Path) -> int:
    before, after = json.loads(a.read_text()), json.loads(b.read_text())
    bad = 0
    for key in sorted(set(before) | set(after)):
        x, y = before.get(key), after.get(key)
        for part in ("model", "report"):
            same = x is not None and y is not None and x[part] == y[part]
            print(f"{'same' if same else 'DIFF'}  {key:45s} {part}")
            bad += not same
    print(f"{bad} difference(s)")
    return 1 if bad else 0


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--compare", nargs=2, type=Path, metavar=("BEFORE", "AFTER"))
    args = ap.parse_args()
    if args.compare:
        return compare(*args.compare)
    with tempfile.TemporaryDirectory() as tmp:
        print(json.dumps(run(Path(tmp)), indent=1, sort_keys=True))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
