"""The `sweep` command and `swap --plan auto`: measure every single-site swap, then plan from the figures.

Each function prints a short summary on the given console and returns the exit
code (0 done / approved, 1 rejected); bad input raises SwapperError (exit 2),
data that cannot judge the model CannotJudge (exit 3) before any work. The
input model is never overwritten; outputs are written atomically.
"""
from __future__ import annotations

import json
import logging
import sys
from pathlib import Path

from swapper import api
from swapper.autoplan import auto_swap
from swapper.check.gate import GateRule, preflight
from swapper.cli.run import load_with_places, print_check, progress_for, record_in_model
from swapper.core.files import check_report_dir
from swapper.core.model_io import atomic_write_bytes, check_output_path, load_model, save_model, saved_size
from swapper.errors import EXIT_OK, EXIT_REJECTED, BadDataError, CannotJudge, SwapperError
from swapper.options import SwapOptions
from swapper.report.build import site_rows, write_report
from swapper.report.paths import default_report_dir
from swapper.report.search import search_entry, sweep_png, sweep_table
from swapper.report.tables import swap_table
from swapper.sweep.run import SweepSettings
from swapper.sweep.schema import read_sweep, write_sweep

logger = logging.getLogger(__name__)


def _plot_next_to(payload: dict, json_path: Path, console, chosen: set[str] = frozenset()) -> Path | None:
    """The Pareto plot as ``<json stem>.png`` beside the JSON; a note instead when matplotlib is missing."""
    png = sweep_png(payload, chosen)
    if png is None:
        if console is not None:
            console.print("note: no Pareto plot: matplotlib is not installed (pip install 'swapper[plots]')",
                          highlight=False)
        return None
    return atomic_write_bytes(png, json_path.with_suffix(".png"))


def run_sweep(model: Path, *, calib, val, rule: GateRule, options: SwapOptions, settings: SweepSettings,
              console=None, output: Path | None = None, as_json: bool = False, strict_data: bool = False) -> int:
    """`swapper sweep`: the sweep's table (or its JSON on stdout), the JSON file and the Pareto plot."""
    loaded = load_model(model)
    inputs = [("the input model", Path(model)), ("the calibration set", _path_of(calib)),
              ("the validation set", _path_of(val))]
    if output is None:  # a new report folder, created when the sweep is written
        folder = default_report_dir(Path(model))
        check_report_dir(folder, inputs=inputs)
        out = folder / "sweep.json"
    else:
        out = check_output_path(Path(output), inputs=inputs)
    val_ds = api.load_data(val, loaded, strict=strict_data)
    preflight(loaded.model, val_ds, rule, batch_size=options.batch_size, threads=options.threads)
    payload = api.sweep(loaded, calib=calib, val=val, rule=rule, options=options, settings=settings,
                        progress=progress_for(None if as_json else console))
    out.parent.mkdir(parents=True, exist_ok=True)
    png = _plot_next_to(payload, out, None if as_json else console)
    write_sweep(payload, out)
    if as_json:
        sys.stdout.write(json.dumps(payload, indent=1) + "\n")
        return EXIT_OK
    if console is not None:
        console.print(sweep_table(payload))
        run = payload["run"]
        console.print(f"  {run['candidates']} candidates ({run['failed']} failed) in {run['total_s']:.1f} s on "
                      f"{run['workers']} worker(s) ({run['backend']}); the original's site tensors recorded once "
                      f"in {run['record_s']:.2f} s", highlight=False)
        for note in payload.get("notes", []):
            console.print(f"note: {note}", highlight=False, markup=False)
        console.print(f"sweep: {out}" + (f"\nplot: {png}" if png else ""), highlight=False)
    return EXIT_OK


def run_auto_swap(model: Path, output: Path, *, calib, val, rule: GateRule, options: SwapOptions,
                  settings: SweepSettings, console=None, sweep_file: Path | None = None, force: bool = False,
                  report: Path | None = None, strict_data: bool = False, latency_runs: int = 10) -> int:
    """`swapper swap --plan auto`: the fastest plan within the gate, verified; nothing written when nothing pays."""
    path = Path(model)
    folder = report or default_report_dir(path)
    loaded, inputs = load_with_places(path, output, folder, [
        ("the input model", path), ("the calibration set", _path_of(calib)), ("the validation set", _path_of(val))])
    calib_ds = api.load_data(calib, loaded, strict=strict_data)
    val_ds = api.load_data(val, loaded, strict=strict_data)
    try:
        preflight(loaded.model, val_ds, rule, batch_size=options.batch_size, threads=options.threads)
    except SwapperError as exc:
        raise (exc.naming(_path_of(val)) if isinstance(exc, (BadDataError, CannotJudge)) else exc.naming(path)) \
            from None
    given = read_sweep(sweep_file) if sweep_file is not None else None
    calib_in = calib if given is not None else _source_or_data(calib, calib_ds)
    val_in = val if given is not None else _source_or_data(val, val_ds)
    auto = auto_swap(loaded, calib=calib_in if given is None else calib_ds,
                         val=val_in if given is None else val_ds, rule=rule, options=options, settings=settings,
                         sweep_payload=given, sweep_path=sweep_file, progress=progress_for(console),
                         latency_runs=latency_runs)
    target = options.target or "no target"
    chosen = {s["chosen"] for s in auto.sites if s["chosen"]}
    if console is not None:
        run = auto.sweep["run"]
        console.print(f"sweep: {run['candidates']} candidates at {len(auto.sweep['sites'])} sites "
                      f"({run['failed']} failed), {run['total_s']:.1f} s on {run['workers']} worker(s)"
                      + (f" (from {sweep_file})" if given is not None else ""), highlight=False)
        for note in auto.sweep.get("notes", []):
            console.print(f"note: {note}", highlight=False, markup=False)
        for s in auto.sites:
            console.print(f"  {s['site_id']}: {s['chosen'] or '-'}  {s['why']}", highlight=False)
        for i, a in enumerate(auto.search.attempts, 1):
            console.print(f"  verification {i}: {len(a.chosen)} site(s) "
                          f"{'passed' if a.verification.passed else 'failed'}: {a.verification.detail}"
                          + (f"; dropping {a.dropped}" if a.dropped else ""), highlight=False)
    if auto.swap is None:
        if console is not None:
            reason = auto.reason if auto.sweep["sites"] else \
                "no site was eligible to sweep (`swapper scan` lists the sites and their roles)"
            console.print(f"nothing pays on {target} within the budget: {reason}; no model written",
                          highlight=False, markup=False)
            _say_lacking(console, loaded.model, options.target)
        return EXIT_OK
    result, check, timing = auto.swap, auto.check, auto.timing
    candidate = result.candidate
    if timing is not None:
        record_in_model(candidate, "swapper.target", timing.record())  # how it was timed; figures in the report
        if check.latency is not None:
            check.latency["target"] = timing.to_dict()
    record_in_model(candidate, "swapper.verdict", check.verdict.to_dict())
    if console is not None:
        console.print(swap_table(site_rows(result.plan, result.rewrite.records, result.calibration)))
        if timing is not None:
            console.print(f"  {timing.line()}", highlight=False, markup=False)
        if auto.lacking:
            console.print(f"  ops {target} cannot run, still in the model: "
                          + ", ".join(f"{op} ×{k}" for op, k in auto.lacking.items()), highlight=False)
        print_check(console, check)
    approved = check.verdict.approved
    check.size["original"]["bytes"] = loaded.file_bytes
    if approved or force:
        save_model(candidate, output, inputs=inputs)
        check.size["candidate"]["bytes"] = saved_size(output)  # what was written, external data included
        if console is not None:
            console.print(f"wrote {output}" + ("" if approved else " (rejected; written because of --force)"),
                          highlight=False, markup=False)
    elif console is not None:
        console.print(f"not written: {output} (rejected)", highlight=False, markup=False)
    paths = write_report(folder, original=loaded, candidate_path=output if (approved or force) else None,
                         candidate=candidate, check=check, swap=result, val_path=val, calib_path=calib,
                         search=search_entry(auto, auto.sweep),
                         settings={"command": "swap", "plan": "auto", "force": force, "latency_runs": latency_runs,
                                   "strict_data": strict_data, "sweep": None if sweep_file is None else str(sweep_file),
                                   "jobs": settings.jobs, "scheduler": settings.scheduler})
    folder.mkdir(parents=True, exist_ok=True)
    write_sweep(auto.sweep, folder / "sweep.json")
    _plot_next_to(auto.sweep, folder / "sweep.json", None, chosen)
    if console is not None:
        console.print(f"report: {paths[1]}", highlight=False, markup=False)
    return EXIT_OK if approved else EXIT_REJECTED


def _say_lacking(console, model, target) -> None:
    """On a declared target, name the ops of the unchanged model it cannot run, and where to look next."""
    from swapper.check.on_target import lacking_ops

    profile = api.resolve_target(target)
    if profile is None or profile.costs_from == "measured":
        return
    lacking = lacking_ops(model, profile)
    if lacking:
        console.print(f"  the model keeps ops {profile.name} cannot run: "
                      + ", ".join(f"{op} ×{k}" for op, k in lacking.items())
                      + "; `swapper swap --plan all` says why each such site stays (gates need --include-gates; "
                      "a form whose b, c cannot fold needs --fold exact+nodes)", highlight=False, markup=False)


def _path_of(source) -> Path | None:
    """The file or folder behind a data source (None for data given as arrays)."""
    where = getattr(source, "path", source)
    return Path(where) if isinstance(where, (str, Path)) else None


def _source_or_data(source, dataset):
    """What sweep workers should load: the source when it names a file, else the loaded data set."""
    return source if source is not None and getattr(source, "path", source) is not None else dataset
