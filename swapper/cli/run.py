"""The commands' work, shared by the CLI and the demo: swap, gate, write, report.

Each function prints a short summary on the given console and returns the exit
code: 0 done or approved, 1 rejected. Bad input raises SwapperError (exit 2); data
that cannot judge the model raises CannotJudge (exit 3), found from one batch of
the original before any calibration or timing. Every output location (model and
report folder) is checked before any work: it must be writable and must not be,
or resolve to, any file the run reads (the model, its external data, the data
sets and the files in data folders). Models and reports are written atomically.
Names and paths are printed as they are, never read as console markup.
"""
from __future__ import annotations

import logging
from pathlib import Path

import onnx
from rich.text import Text

from swapper import api
from swapper.check.gate import CAUTION, Budget, GateRule, preflight
from swapper.check.on_target import MIN_SAVING
from swapper.core.files import check_report_dir
from swapper.core.model_io import LoadedModel, check_output_path, load_model, save_model, saved_size
from swapper.errors import EXIT_OK, EXIT_REJECTED, BadDataError, CannotJudge, SwapperError
from swapper.options import SwapOptions
from swapper.progress import RichBars, Silent
from swapper.report.build import site_rows, write_report
from swapper.report.numbers import pct, signed
from swapper.report.paths import default_report_dir
from swapper.report.tables import skipped_lines, swap_table, target_lines, unrun_lines

logger = logging.getLogger(__name__)


def _progress(console):
    return RichBars() if console is not None and console.is_terminal else Silent()


def _print_notes(console, *datasets) -> None:
    """Each data set's notes (arrays left out), once, when it is loaded."""
    if console is None:
        return
    notes = [note for ds in datasets if ds is not None for note in ds.notes]
    for note in dict.fromkeys(notes):  # the same file given twice says it once
        console.print(f"note: {note}", highlight=False, markup=False)


def _figures(name: str, kind, errs: dict) -> str:
    """One output's figures: its kind, per-sample cosine, SQNR, largest difference."""
    parts = []
    if errs.get("cosine_mean") is not None:
        parts.append(f"per-sample cosine mean {errs['cosine_mean']:.5f}, worst 5% {errs['cosine_p5']:.5f}, "
                     f"min {errs['cosine_min']:.5f}")
    if errs.get("sqnr_db") is not None:
        parts.append(f"SQNR {errs['sqnr_db']:.1f} dB")
    if errs.get("max_abs") is not None:
        parts.append(f"max |diff| {errs['max_abs']:.3g}")
    what = f" ({kind.kind}: {kind.cue})" if kind is not None else ""
    return f"  output {name}{what}: " + ", ".join(parts)


def _print_check(console, result: api.CheckResult) -> None:
    if console is None:
        return
    c, v = result.comparison, result.verdict
    word = ("APPROVED", "bold green") if v.approved else ("REJECTED", "bold red")
    console.print(Text.assemble(word, f": {v.reason}"), highlight=False)
    say = lambda line: console.print(line, highlight=False, markup=False)  # noqa: E731 - names come from the model
    say(f"  {CAUTION}")  # beside the verdict, not after pages of figures
    if v.metric is not None:
        say(f"  decided by: {v.metric} on {', '.join(v.outputs) or 'the class scores'}")
    say(f"  rule: {v.rule}")
    kinds = {k.name: k for k in c.output_kinds}
    for name, errs in c.output_errors.items():
        say(_figures(name, kinds.get(name), errs))
    cls = kinds.get(c.class_output)
    show_classes = v.metric in ("top1", "agreement") or cls is None or cls.kind == "scores"
    if show_classes and c.top1_original is not None and c.top1_candidate is not None:
        drop, lo, hi = c.drop()
        line = f"  top-1 original {pct(c.top1_original)}  candidate {pct(c.top1_candidate)}  drop {signed(drop)} pp"
        if lo is not None:
            line += (f", {100 * c.interval.level:g}% interval [{signed(lo)}, {signed(hi)}] pp "
                     f"({c.interval.method})")
        if c.mcnemar_p is not None:
            line += f"  McNemar p={c.mcnemar_p:.3g}: {c.n10} sample(s) now wrong, {c.n01} now right"
        say(line)
    if show_classes and c.agreement is not None:
        moved = (c.changed or {}).get("count", 0)
        say(f"  top-1 agreement {pct(c.agreement)} on {c.n} samples"
            + (f"; {moved} changed class (listed by index in report.html)" if moved else ""))
    for note in c.notes:
        say(f"  note: {note}")
    lat = result.latency
    if lat is None:
        say("  latency: not measured (--no-latency)")
    else:
        say(f"  latency (median, batch {lat['batch_size']}, {lat['threads']} thread, {lat.get('clock', 'wall time')}): original "
            f"{lat['original']['median_ms']:.3f} ms, candidate {lat['candidate']['median_ms']:.3f} ms, "
            f"ratio {lat['ratio']:.2f}")
    s = result.size
    say(f"  nodes {s['original']['nodes']} → {s['candidate']['nodes']}, bytes "
        f"{s['original']['bytes']} → {s['candidate']['bytes']}")
    on = (lat or {}).get("target")
    if on is not None:
        if "ratio" in on:
            say(f"  on {on['target']}: candidate {on['ratio']:.3f}× the original")
        if "lacking_ops" in on:  # a declared target: which ops each model has that it cannot run
            def ops(counts):
                return ", ".join(f"{op} ×{k}" for op, k in counts.items()) or "none"
            say(f"  ops {on['target']} cannot run: original {ops(on['lacking_ops'].get('original') or {})}; "
                f"candidate {ops(on['lacking_ops'].get('candidate') or {})}")
    if result.int8:
        q = result.int8["comparison"]
        ratio = "not measured" if result.int8["latency"] is None else f"{result.int8['latency']['ratio']:.2f}"
        say(f"  int8: top-1 original {pct(q.get('top1_original'))} candidate {pct(q.get('top1_candidate'))}, "
            f"latency ratio {ratio}")


def _named(exc: SwapperError, val, original, candidate) -> SwapperError:
    """A checking error with the file it is about: the data set for data errors, else the model it names."""
    if isinstance(exc, (BadDataError, CannotJudge)):
        return exc.naming(val)
    return exc.naming(original if "original" in str(exc) else candidate)


def run_check(original: Path, candidate: Path, val: Path, *, console=None, budget: float = 1.0,
              strict: bool = False, min_agreement: float | None = None, int8: bool = False,
              calib: Path | None = None, report: Path | None = None, batch_size: int = 64,
              threads: int = 1, rule: GateRule | None = None, strict_data: bool = False,
              latency_runs: int = 30, target: str | None = None) -> int:
    """`swapper check`: compare two model files; write the report; 0 approved, 1 rejected.

    ``rule`` (metric, floors and budget) replaces ``budget``/``strict``/``min_agreement`` when given.
    ``latency_runs`` timed runs per model (0: latency not measured).
    """
    rule = rule or GateRule(Budget(max_drop_pp=budget, strict=strict, min_agreement=min_agreement))
    inputs = [("the original model", original), ("the candidate model", candidate), ("the validation set", val),
              ("the calibration set", calib)]
    folder = report or default_report_dir(Path(original))
    check_report_dir(folder, inputs=inputs)  # before any work: an unwritable report folder is bad input
    orig = load_model(original)
    cand = load_model(candidate)
    check_report_dir(folder, inputs=inputs + orig.files() + cand.files())
    val_ds = api.load_data(val, orig, strict=strict_data)
    calib_ds = api.load_data(calib, orig, strict=strict_data) if calib is not None else None
    _print_notes(console, val_ds, calib_ds)
    try:
        preflight(orig.model, val_ds, rule, batch_size=batch_size, threads=threads)  # CannotJudge before the work
        result = api.check(orig.model, cand.model, val_ds, budget=rule, int8=int8, calib=calib_ds,
                           batch_size=batch_size, threads=threads, progress=_progress(console),
                           latency_repeats=latency_runs, target=target)
    except SwapperError as exc:
        raise _named(exc, val, original, candidate) from None
    result.size["original"]["bytes"] = orig.file_bytes  # the files as they are on disk (external data included)
    result.size["candidate"]["bytes"] = cand.file_bytes
    paths = write_report(folder, original=orig, candidate_path=Path(candidate), candidate=cand.model,
                         check=result, val_path=val, calib_path=calib,
                         settings={"command": "check", "batch_size": batch_size, "threads": threads, "int8": int8,
                                   "latency_runs": latency_runs, "target": target, "strict_data": strict_data})
    _print_check(console, result)
    if console is not None:
        console.print(f"report: {paths[1]}", highlight=False, markup=False)
    return EXIT_OK if result.verdict.approved else EXIT_REJECTED


def load_with_places(model: Path | LoadedModel, output: Path, folder: Path | None,
                     inputs: list) -> tuple[LoadedModel, list]:
    """Load ``model`` between two checks of the output model path and the report folder (None: no report).

    Before any work, so a bad place is found in a second and not after calibration or a sweep: neither may be
    unwritable or overwrite one of ``inputs`` ((role, path) pairs), and, once the model is loaded, one of its
    external data files. Returns the model and every input the run reads.
    """
    def check(reads: list) -> None:
        check_output_path(output, inputs=reads)
        if folder is not None:
            check_report_dir(folder, inputs=reads + [("the output model", output)])

    check(inputs)
    loaded = model if isinstance(model, LoadedModel) else load_model(model)
    inputs = inputs + loaded.files()
    check(inputs)  # its external data files are known now
    return loaded, inputs


def run_swap(model: Path | LoadedModel, output: Path, *, options: SwapOptions | None = None, console=None,
             calib: Path | None = None, val: Path | None = None, budget: float = 1.0, strict: bool = False,
             min_agreement: float | None = None, force: bool = False, int8: bool = False,
             report: Path | None = None, rule: GateRule | None = None, strict_data: bool = False,
             latency_runs: int = 30) -> int:
    """`swapper swap`: plan, calibrate, rewrite; with ``val``, gate before writing ``output``.

    ``model`` is a path or an already loaded model (the demo has loaded it to show its sites);
    ``options`` say what to swap and how (default ``SwapOptions()``; its batch size and threads also
    serve the check). ``rule`` (metric, floors and budget) replaces ``budget``/``strict``/``min_agreement``
    when given. ``latency_runs`` timed runs per model in the check (0: latency not measured).
    """
    options = options or SwapOptions()
    path = model.path if isinstance(model, LoadedModel) else Path(model)
    folder = (report or default_report_dir(path)) if val is not None or report is not None else None
    loaded, inputs = load_with_places(model, output, folder, [("the input model", path), ("the calibration set", calib),
                                                              ("the validation set", val)])
    rule = rule or GateRule(Budget(max_drop_pp=budget, strict=strict, min_agreement=min_agreement))
    calib_ds = api.load_data(calib, loaded, strict=strict_data) if calib is not None else None
    val_ds = api.load_data(val, loaded, strict=strict_data) if val is not None else None
    _print_notes(console, calib_ds, val_ds)
    if val_ds is not None:  # CannotJudge now, not after minutes of calibration
        try:
            preflight(loaded.model, val_ds, rule, batch_size=options.batch_size, threads=options.threads)
        except SwapperError as exc:
            raise _named(exc, val, path, path) from None
    progress = _progress(console)
    try:
        result = api.swap(loaded, calib=calib_ds, options=options, progress=progress)
    except SwapperError as exc:  # data errors are about the calibration set, the rest about the model
        raise (exc.naming(calib) if isinstance(exc, BadDataError) else exc.naming(path)) from None
    if console is not None:
        if result.plan.swaps:
            console.print(swap_table(site_rows(result.plan, result.rewrite.records, result.calibration)))
        for line in skipped_lines(result.plan):
            console.print(f"  {line}", highlight=False, markup=False)
        for line in target_lines(result.plan):
            console.print(f"  {line}", highlight=False, markup=False)
        console.print(f"  nodes {result.rewrite.nodes_before} → {result.rewrite.nodes_after}", highlight=False)
        if result.calibration is not None:
            t = result.calibration.timings
            if result.calibration.tokens and _has_token_sites(result):  # a CNN has nothing a mask could mark
                console.print(f"  token positions: {result.calibration.tokens}", highlight=False)
            console.print("  calibration time: " + ", ".join(f"{k[:-2]} {v:.2f}s" for k, v in t.items()),
                          highlight=False)
        for line in unrun_lines(result.calibration):  # sites inside If/Loop/Scan bodies the data never ran
            console.print(line, highlight=False)
    if not result.plan.swaps:
        if console is not None:
            console.print(f"{path}: nothing to swap; no model written", highlight=False, markup=False)
        return EXIT_OK
    candidate = result.candidate
    timing = None
    if result.target is not None and result.target.costs_from == "measured":
        try:
            timing = api.time_on_target(loaded.model, candidate, result.target, calib=calib_ds,
                                        batch_size=options.batch_size)
        except SwapperError as exc:  # the model (or its swap) does not run on the timing batch
            raise exc.naming(path) from None
        _set_metadata(candidate, "swapper.target", timing.record())
        if console is not None:
            console.print(f"  {timing.line()}", highlight=False, markup=False)
        if not timing.is_faster and not force:
            if console is not None:
                console.print(f"nothing pays on {timing.target}: candidate {timing.ratio:.3f}× the original, not "
                              f"measurably faster (needs <= {1 - MIN_SAVING:.2f}×); no model written",
                              highlight=False, markup=False)
            return EXIT_OK
    check = None
    if val_ds is not None:
        try:
            check = api.check(loaded.model, candidate, val_ds, budget=rule, int8=int8, calib=calib_ds,
                              batch_size=options.batch_size, threads=options.threads, progress=progress,
                              latency_repeats=latency_runs)
        except SwapperError as exc:
            raise _named(exc, val, path, output) from None
        _record_verdict(candidate, check)
        check.size["original"]["bytes"] = loaded.file_bytes
        if timing is not None and check.latency is not None:  # the target timing (printed above) in the report
            check.latency["target"] = timing.to_dict()
    approved = check is None or check.verdict.approved
    if approved or force:
        save_model(candidate, output, inputs=inputs)
        if check is not None:  # the size of what was written (with external data: every file)
            check.size["candidate"]["bytes"] = saved_size(output)
    if check is not None:
        _print_check(console, check)
    if console is not None and (approved or force):
        slower = timing is not None and not timing.is_faster
        note = "" if approved and not slower else \
            f" ({'rejected' if not approved else 'not faster on ' + timing.target}; written because of --force)"
        console.print(f"wrote {output}{note}", highlight=False, markup=False)
    elif console is not None:
        console.print(f"not written: {output} (rejected)", highlight=False, markup=False)
    if folder is not None:
        paths = write_report(folder, original=loaded, candidate_path=output if (approved or force) else None,
                             candidate=candidate, check=check, swap=result, val_path=val, calib_path=calib,
                             settings={"command": "swap", "plan": "all", "force": force, "int8": int8,
                                       "latency_runs": latency_runs, "strict_data": strict_data})
        if console is not None:
            console.print(f"report: {paths[1]}", highlight=False, markup=False)
    return EXIT_OK if approved else EXIT_REJECTED


def _has_token_sites(result: api.SwapResult) -> bool:
    """Whether any swapped site is shaped [batch, tokens, channels], the positions an attention mask marks."""
    from swapper.calibrate.tokens import is_token_site

    swapped = {s.site_id for s in result.plan.swaps}
    return any(is_token_site(s) for s in result.sites if s.id in swapped)


def _record_verdict(candidate: onnx.ModelProto, check: api.CheckResult) -> None:
    """Keep the verdict with the model, so a forced write still says it was rejected."""
    _set_metadata(candidate, "swapper.verdict", check.verdict.to_dict())  # the same entry as report.json's verdict


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


# Public names for the other command modules (cli/auto_run.py).
print_check = _print_check
progress_for = _progress
record_in_model = _set_metadata
