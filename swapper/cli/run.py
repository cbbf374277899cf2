"""The commands' work, shared by the CLI and the demo: swap, gate, write, report.

Each function prints a short summary on the given console and returns the exit
code: 0 done or approved, 1 rejected. Bad input raises SwapperError (exit 2).
The input model is never overwritten; models and reports are written atomically.
"""
from __future__ import annotations

import logging
from pathlib import Path

import onnx

from swapper import api
from swapper.check.gate import Budget
from swapper.core.model_io import LoadedModel, check_output_path, load_model, save_model
from swapper.progress import RichBars, Silent
from swapper.report.build import site_rows, write_report
from swapper.report.numbers import pct
from swapper.report.paths import default_report_dir
from swapper.report.tables import skipped_lines, swap_table, target_lines

logger = logging.getLogger(__name__)


def _progress(console):
    return RichBars() if console is not None and console.is_terminal else Silent()


def _print_check(console, result: api.CheckResult) -> None:
    if console is None:
        return
    c, v = result.comparison, result.verdict
    word = "[bold green]APPROVED[/]" if v.approved else "[bold red]REJECTED[/]"
    console.print(f"{word}: {v.reason}")
    console.print(f"  rule: {v.rule}", highlight=False)
    if c.top1_original is not None and c.top1_candidate is not None:
        line = (f"  top-1 original {pct(c.top1_original)}  candidate {pct(c.top1_candidate)}"
                f"  delta {c.delta_pp:+.2f} pp")
        if c.interval is not None:
            line += f" [{c.interval.lo:+.2f}, {c.interval.hi:+.2f}] (95%, {c.interval.method})"
        if c.mcnemar_p is not None:
            line += f"  McNemar p={c.mcnemar_p:.3g} (n01={c.n01}, n10={c.n10})"
        console.print(line, highlight=False)
    if c.agreement is not None:
        console.print(f"  top-1 agreement {pct(c.agreement)} on {c.n} samples", highlight=False)
    lat = result.latency
    console.print(
        f"  latency (median, batch {lat['batch_size']}, {lat['threads']} thread): original "
        f"{lat['original']['median_ms']:.3f} ms, candidate {lat['candidate']['median_ms']:.3f} ms, "
        f"ratio {lat['ratio']:.2f}", highlight=False)
    s = result.size
    console.print(f"  nodes {s['original']['nodes']} → {s['candidate']['nodes']}, bytes "
                  f"{s['original']['bytes']} → {s['candidate']['bytes']}", highlight=False)
    on = result.latency.get("target")
    if on is not None:
        if "ratio" in on:
            console.print(f"  on {on['target']}: candidate {on['ratio']:.3f}× the original", highlight=False)
        lacking = on["lacking_ops"]["candidate"]
        if lacking:
            console.print(f"  ops {on['target']} cannot run, still in the candidate: "
                          + ", ".join(f"{op} ×{k}" for op, k in lacking.items()), highlight=False)
    if result.int8:
        q = result.int8["comparison"]
        console.print(f"  int8: top-1 original {pct(q.get('top1_original'))} candidate "
                      f"{pct(q.get('top1_candidate'))}, latency ratio {result.int8['latency']['ratio']:.2f}",
                      highlight=False)


def run_check(original: Path, candidate: Path, val: Path, *, console=None, budget: float = 1.0,
              strict: bool = False, min_agreement: float | None = None, int8: bool = False,
              calib: Path | None = None, report: Path | None = None, batch_size: int = 64,
              threads: int = 1, target: str | None = None) -> int:
    """`swapper check`: compare two model files; write the report; 0 approved, 1 rejected."""
    rule = Budget(max_drop_pp=budget, strict=strict, min_agreement=min_agreement)
    orig = load_model(original)
    cand = load_model(candidate)
    val_ds = api.load_data(val, orig)
    calib_ds = api.load_data(calib, orig) if calib is not None else None
    result = api.check(orig.model, cand.model, val_ds, budget=rule, int8=int8, calib=calib_ds,
                       batch_size=batch_size, threads=threads, progress=_progress(console), target=target)
    folder = report or default_report_dir(Path(original))
    paths = write_report(folder, original=orig, candidate_path=Path(candidate), candidate=cand.model,
                         check=result, val_path=val, calib_path=calib)
    _print_check(console, result)
    if console is not None:
        console.print(f"report: {paths[1]}", highlight=False)
    return 0 if result.verdict.approved else 1


def run_swap(model: Path | LoadedModel, output: Path, *, console=None, calib: Path | None = None, val: Path | None = None,
             budget: float = 1.0, strict: bool = False, min_agreement: float | None = None, force: bool = False,
             int8: bool = False, report: Path | None = None, batch_size: int = 64, threads: int = 1,
             **swap_options) -> int:
    """`swapper swap`: plan, calibrate, rewrite; with ``val``, gate before writing ``output``.

    ``model`` is a path or an already loaded model (the demo has loaded it to show its sites).
    """
    path = model.path if isinstance(model, LoadedModel) else Path(model)
    check_output_path(output, inputs=(path,))  # before any work: a bad output path is a usage error
    rule = Budget(max_drop_pp=budget, strict=strict, min_agreement=min_agreement)
    loaded = model if isinstance(model, LoadedModel) else load_model(path)
    calib_ds = api.load_data(calib, loaded) if calib is not None else None
    val_ds = api.load_data(val, loaded) if val is not None else None
    progress = _progress(console)
    result = api.swap(loaded, calib=calib_ds, batch_size=batch_size, threads=threads, progress=progress,
                      **swap_options)
    if console is not None:
        if result.plan.swaps:
            console.print(swap_table(site_rows(result.plan, result.rewrite.records, result.calibration)))
        for line in skipped_lines(result.plan):
            console.print(f"  {line}", highlight=False)
        for line in target_lines(result.plan):
            console.print(f"  {line}", highlight=False)
        console.print(f"  nodes {result.rewrite.nodes_before} → {result.rewrite.nodes_after}", highlight=False)
        if result.calibration is not None:
            t = result.calibration.timings
            console.print("  calibration time: " + ", ".join(f"{k[:-2]} {v:.2f}s" for k, v in t.items()),
                          highlight=False)
    if not result.plan.swaps:
        if console is not None:
            console.print(f"{path}: nothing to swap; no model written")
        return 0
    candidate = result.candidate
    timing = None
    if result.target is not None and result.target.costs_from == "measured":
        timing = api.time_on_target(loaded.model, candidate, result.target, calib=calib_ds, batch_size=batch_size)
        _set_metadata(candidate, "swapper.target", timing.to_dict())
        if console is not None:
            console.print(f"  {timing.line()}", highlight=False, markup=False)
        if not timing.is_faster and not force:
            if console is not None:
                console.print(f"nothing pays on {timing.target}: candidate {timing.ratio:.2f}× the original; "
                              "no model written", highlight=False)
            return 0
    check = None
    if val_ds is not None:
        check = api.check(loaded.model, candidate, val_ds, budget=rule, int8=int8, calib=calib_ds,
                          batch_size=batch_size, threads=threads, progress=progress)
        _record_verdict(candidate, check)
        _print_check(console, check)
    approved = check is None or check.verdict.approved
    if approved or force:
        save_model(candidate, output, inputs=(path,))
        if console is not None:
            slower = timing is not None and not timing.is_faster
            note = "" if approved and not slower else \
                f" ({'rejected' if not approved else 'not faster on ' + timing.target}; written because of --force)"
            console.print(f"wrote {output}{note}", highlight=False)
    elif console is not None:
        console.print(f"not written: {output} (rejected)", highlight=False)
    if check is not None or report is not None:
        folder = report or default_report_dir(path)
        paths = write_report(folder, original=loaded, candidate_path=output if (approved or force) else None,
                             candidate=candidate, check=check, swap=result, val_path=val, calib_path=calib)
        if console is not None:
            console.print(f"report: {paths[1]}", highlight=False)
    return 0 if approved else 1


def _record_verdict(candidate: onnx.ModelProto, check: api.CheckResult) -> None:
    """Keep the verdict with the model, so a forced write still says it was rejected."""
    entry = {"approved": check.verdict.approved, "reason": check.verdict.reason, "rule": check.verdict.rule}
    _set_metadata(candidate, "swapper.verdict", entry)


def _set_metadata(model: onnx.ModelProto, key: str, entry: dict) -> None:
    """Store ``entry`` as JSON under ``key`` in the model's metadata (replacing an older value)."""
    import json

    from swapper.core.jsonable import json_safe

    value = json.dumps(json_safe(entry, [], key), sort_keys=True)
    for prop in model.metadata_props:
        if prop.key == key:
            prop.value = value
            return
    model.metadata_props.add(key=key, value=value)
