"""`swapper demo`: the whole job on the bundled meter-reader models.

For each model demo_models/manifest.json lists: scan, swap its costly
activations for their default surrogates, calibrate on the calibration file the
manifest names for it, gate on its validation file with a 1-point budget, write
the approved model and a report. Needs a source checkout (the demo models are
not in the wheel).

meter_resnet_silu (13 SiLU sites) gets the automatic plan instead
(``swap --plan auto --budget 0.5``): a sweep of every single-site swap, then
the fastest combination within half a point, verified. To keep the demo to a
minute or two on 2 cores its sweep is narrowed (:data:`DEMO_SWEEP`): relu only,
zero-node placement only, with and without the consumer refit, on two worker
processes (26 candidates instead of 208); `swapper sweep` tries them all.
"""
from __future__ import annotations

import logging
from pathlib import Path

from rich.text import Text

from swapper.check.gate import Budget, GateRule
from swapper.cli.auto_run import run_auto_swap
from swapper.cli.run import run_swap
from swapper.core.files import ensure_folder
from swapper.core.model_io import load_model
from swapper.data.demo import DEMO_DIR, demo_inputs
from swapper.data.source import DataSource
from swapper.errors import BadDataError, SwapperError, first_line
from swapper.options import SwapOptions
from swapper.report.paths import utc_stamp
from swapper.report.tables import sites_table
from swapper.scan.sites import find_sites

logger = logging.getLogger(__name__)

AUTO_MODEL = "meter_resnet_silu.onnx"  # the demo model the automatic plan is shown on
AUTO_BUDGET = 0.5  # points of top-1


def demo_sweep():
    """The narrowed sweep of the demo (module docstring)."""
    from swapper.sweep.run import SweepSettings

    return SweepSettings(surrogates=("relu",), placements=("exact",), refit=(False, True), jobs=2)


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
            if model.name == AUTO_MODEL:
                if console is not None:
                    console.print(f"automatic plan, budget {AUTO_BUDGET} pt; demo sweep narrowed to relu, zero-node "
                                  "placement, with and without consumer refit (`swapper sweep` tries every "
                                  "surrogate and placement)", highlight=False)
                code = run_auto_swap(model, output, calib=DataSource(calib), val=DataSource(val),
                                     rule=GateRule(Budget(max_drop_pp=AUTO_BUDGET)), options=SwapOptions(),
                                     settings=demo_sweep(), console=console, report=report)
            else:
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
