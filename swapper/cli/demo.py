"""`swapper demo`: the whole job on the bundled meter-reader models.

For each model in demo_models/: scan, swap its costly activations for their
default surrogates, calibrate on demo_models/calib.npz, gate on
demo_models/val.npz with a 1-point budget, write the approved model and a
report. Needs a source checkout (the demo models are not in the wheel).
"""
from __future__ import annotations

import logging
from pathlib import Path

from swapper.cli.run import run_swap
from swapper.core.model_io import load_model
from swapper.data.demo import DEMO_DIR
from swapper.errors import BadDataError
from swapper.report.paths import utc_stamp
from swapper.report.tables import sites_table
from swapper.scan.sites import find_sites

logger = logging.getLogger(__name__)

def run_demo(out_dir: Path, *, console=None, models_dir: Path = DEMO_DIR, budget: float = 1.0) -> int:
    """Run scan + swap + check on every demo model; return 0 when all ran (verdicts are reported, not fatal)."""
    calib, val = models_dir / "calib.npz", models_dir / "val.npz"
    models = sorted(models_dir.glob("*.onnx"))
    if not models or not calib.exists() or not val.exists():
        raise BadDataError("demo models or data not found (run from a source checkout)", models_dir)
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    stamp = utc_stamp()
    summary = []
    for model in models:
        loaded = load_model(model)
        sites = find_sites(loaded.model)
        if console is not None:
            console.rule(f"{model.name}")
            console.print(sites_table(sites, f"{model.name}: {len(sites)} activation sites"))
        output = out_dir / f"{model.stem}.swapped.onnx"
        report = out_dir / f"{model.stem}-{stamp}"
        code = run_swap(loaded, output, console=console, calib=calib, val=val, budget=budget, report=report)
        summary.append((model.name, "approved" if code == 0 else "rejected", report / "report.html"))
    if console is not None:
        console.rule("summary")
        for name, verdict, path in summary:
            console.print(f"{name:32s} {verdict:9s} {path}", highlight=False)
    return 0
