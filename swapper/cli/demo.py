"""`swapper demo`: the whole job on the bundled meter-reader models.

For each model demo_models/manifest.json lists: scan, swap its costly
activations for their default surrogates, calibrate on the calibration file the
manifest names for it, gate on its validation file with a 1-point budget, write
the approved model and a report. Needs a source checkout (the demo models are
not in the wheel).
"""
from __future__ import annotations

import logging
from pathlib import Path

from rich.text import Text

from swapper.cli.run import run_swap
from swapper.core.files import ensure_folder
from swapper.core.model_io import load_model
from swapper.data.demo import DEMO_DIR, demo_inputs
from swapper.errors import BadDataError, SwapperError, first_line
from swapper.report.paths import utc_stamp
from swapper.report.tables import sites_table
from swapper.scan.sites import find_sites

logger = logging.getLogger(__name__)


def run_demo(out_dir: Path, *, console=None, models_dir: Path = DEMO_DIR, budget: float = 1.0) -> int:
    """Run scan + swap + check on every demo model; return 0 when all ran (verdicts are reported, not fatal).

    A model whose files swapper refuses does not stop the others; it is named in the summary,
    and afterwards one BadDataError lists every such model (exit 2).
    """
    todo = demo_inputs(models_dir)
    out_dir = ensure_folder(out_dir, "demo output folder")
    stamp = utc_stamp()
    summary = []
    failed = []
    for model, calib, val in todo:
        loaded = load_model(model)
        sites = find_sites(loaded.model)
        if console is not None:
            console.rule(Text(model.name))
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
            console.print(f"{name:32s} {verdict:9s} {detail}", highlight=False, markup=False)
    if failed:
        raise BadDataError(f"could not run {', '.join(failed)} (see the summary above)", models_dir)
    return 0
