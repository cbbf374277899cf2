"""`swapper demo`: the whole job on the bundled meter-reader models.

For each model demo_models/manifest.json lists: scan, swap its costly
activations for their default surrogates, calibrate on the calibration file the
manifest names for it, gate on its validation file with a 1-point budget, write
the approved model and a report. Needs a source checkout (the demo models are
not in the wheel).
"""
from __future__ import annotations

import json
import logging
from pathlib import Path

from .errors import BadDataError, SwapperError, first_line
from .model_io import load_model
from .pipeline import run_swap, utc_stamp
from .sites import find_sites
from .tables import sites_table

logger = logging.getLogger(__name__)

DEMO_DIR = Path(__file__).resolve().parent.parent / "demo_models"


def demo_inputs(models_dir: Path = DEMO_DIR) -> list[tuple[Path, Path, Path]]:
    """(model, calibration file, validation file) for every model in manifest.json, by model name.

    Every ``*.onnx`` in the folder must be listed, and every listed file must exist,
    so no model is left out without a word.
    """
    manifest = models_dir / "manifest.json"
    if not manifest.exists():
        raise BadDataError("demo models or data not found (run from a source checkout)", models_dir)
    try:
        entries = json.loads(manifest.read_text())["models"]
        todo = [(models_dir / name, models_dir / entry["calib"], models_dir / entry["val"])
                for name, entry in sorted(entries.items())]
    except (ValueError, KeyError, TypeError, AttributeError) as exc:
        raise BadDataError(f"no model list with 'calib' and 'val' per model ({first_line(exc)})", manifest) from exc
    unlisted = sorted(p.name for p in models_dir.glob("*.onnx") if p.name not in entries)
    if unlisted:
        raise BadDataError(f"models not listed in manifest.json: {', '.join(unlisted)}", models_dir)
    missing = sorted({str(p) for row in todo for p in row if not p.exists()})
    if not todo or missing:
        raise BadDataError(f"demo files missing: {', '.join(missing) or 'no models'}", models_dir)
    return todo


def run_demo(out_dir: Path, *, console=None, models_dir: Path = DEMO_DIR, budget: float = 1.0) -> int:
    """Run scan + swap + check on every demo model; return 0 when all ran (verdicts are reported, not fatal).

    A model whose files swapper refuses does not stop the others; it is named in the summary,
    and afterwards one BadDataError lists every such model (exit 2).
    """
    todo = demo_inputs(models_dir)
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    stamp = utc_stamp()
    summary = []
    failed = []
    for model, calib, val in todo:
        loaded = load_model(model)
        sites = find_sites(loaded.model)
        if console is not None:
            console.rule(f"{model.name}")
            console.print(sites_table(sites, f"{model.name}: {len(sites)} activation sites"))
        output = out_dir / f"{model.stem}.swapped.onnx"
        report = out_dir / f"{model.stem}-{stamp}"
        try:
            code = run_swap(loaded, output, console=console, calib=calib, val=val, budget=budget, report=report)
        except SwapperError as exc:
            logger.info("%s: not run: %s", model.name, exc)  # the summary and the final error say it
            failed.append(model.name)
            summary.append((model.name, "error", first_line(exc)))
            continue
        summary.append((model.name, "approved" if code == 0 else "rejected", report / "report.html"))
    if console is not None:
        console.rule("summary")
        for name, verdict, detail in summary:
            console.print(f"{name:32s} {verdict:9s} {detail}", highlight=False)
    if failed:
        raise BadDataError(f"could not run {', '.join(failed)} (see the summary above)", models_dir)
    return 0
