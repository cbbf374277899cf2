"""The `swapper` command line: parses options, calls the API, maps errors to exit codes.

Exit codes (swapper/errors.py): 0 done / approved, 1 rejected by the gate, 2 bad
input or usage, 3 the validation data cannot judge the model, 4 internal error
(cli/guard.py turns any other exception into one line; ``--verbose`` shows the
traceback). User text (paths, names, messages) is never read as console markup:
both consoles have markup off.
"""
from __future__ import annotations

import json
import logging
import sys
from pathlib import Path
from typing import Annotated, Optional

import typer
from rich.console import Console
from rich.text import Text

from swapper import api
from swapper.cli.guard import OneLineGroup, configure_logging
from swapper.cli.opts import (
    BUDGET_HELP,
    FOLD_HELP,
    MAX_LATENCY_RUNS,
    STRICT_HELP,
    TARGET_HELP,
    BatchAxis,
    BatchOpt,
    BudgetOpt,
    Constant,
    DataSpec,
    JobsOpt,
    LatencyRunsOpt,
    MetricOpt,
    MinAgreementOpt,
    MinCosineOpt,
    MinCosineP5Opt,
    MinSqnrOpt,
    NoLatencyOpt,
    Prep,
    SchedulerOpt,
    SeedOpt,
    StrictDataOpt,
    ThreadsOpt,
    data_source_of,
    finite,
    fold_option,
    gate_rule,
    plan_word,
    split_ids,
    swap_epilog,
    sweep_settings,
    target_name,
)
from swapper.errors import SwapperError, UsageError
from swapper.options import MAX_CACHE_MB

logger = logging.getLogger(__name__)

app = typer.Typer(
    cls=OneLineGroup,
    add_completion=False,
    no_args_is_help=True,
    pretty_exceptions_enable=False,
    rich_markup_mode=None,  # plain help: whole option names at any width (a boxed table cuts them at 80 columns)
    help="Find costly activations in an ONNX model, swap them for cheap calibrated ones, and check the cost.",
)
out = Console(soft_wrap=True, markup=False)
err = Console(stderr=True, soft_wrap=True, markup=False)
if not out.is_terminal:  # pipes and CI logs: wide enough that tables keep one row per line
    out.width = max(out.width, 160)


def _fail(exc: SwapperError) -> None:
    err.print(Text.assemble((f"{exc.label}:", "bold red"), " ", str(exc)), highlight=False, soft_wrap=True)
    raise typer.Exit(exc.exit_code)


def _print_version(value: bool) -> None:
    if value:
        from swapper import __version__

        out.print(f"swapper {__version__}", highlight=False)
        raise typer.Exit(0)


@app.callback(epilog="Exit codes: 0 done or approved, 1 rejected by the gate, 2 bad input or usage, 3 the data "
                     "cannot judge the model, 4 internal error.")
def main(
    verbose: Annotated[bool, typer.Option(
        "--verbose", "-v", help="Log debug details; on an internal error, show the traceback.")] = False,
    version: Annotated[bool, typer.Option(
        "--version", callback=_print_version, is_eager=True, help="Print swapper's version and exit.")] = False,
) -> None:
    configure_logging(verbose)


@app.command(short_help="List the activation sites of a model and what they cost.")
def scan(
    model: Annotated[Path, typer.Argument(help="The .onnx model to inspect.")],
    as_json: Annotated[bool, typer.Option("--json", help="Print the inventory as JSON (schema swapper.scan/1).")] = False,
    calib: Annotated[Optional[Path], typer.Option(help="Data set whose first sample gives concrete sizes for cost shares.")] = None,
    input_shape: Annotated[Optional[list[str]], typer.Option("--input-shape", help="NAME=1x3x48x320: an input's shape for cost shares (repeatable).")] = None,
    data_spec: DataSpec = None, batch_axis: BatchAxis = None, constant: Constant = None, prep: Prep = None,
) -> None:
    """List every activation site: function, role, channels and cost share."""
    from swapper.report.tables import sites_table
    from swapper.scan.shapes import parse_input_shapes
    from swapper.scan.sites import sites_to_json

    try:
        if calib is not None and input_shape:
            raise UsageError("--calib and --input-shape exclude each other (both give the sizes for cost shares)")
        result = api.scan(model, calib=data_source_of(calib, data_spec, batch_axis, constant, prep),
                          input_shapes=parse_input_shapes(input_shape))
    except SwapperError as exc:
        _fail(exc)
    if as_json:
        sys.stdout.write(json.dumps(sites_to_json(result.sites, str(model), result.loaded.opset), indent=2) + "\n")
        return
    if not result.sites:
        out.print(f"{model}: no activation sites found", highlight=False)
        return
    out.print(sites_table(result.sites, f"{model} (opset {result.loaded.opset}): {len(result.sites)} activation sites"))
    if any(s.cost_share is None for s in result.sites):
        out.print("cost share ?: sizes are symbolic; give --calib DATA or --input-shape NAME=DIMS", highlight=False)
    idle = [s.id for s in result.sites if s.body and s.elements == 0]
    if idle:  # body sites are costed by running their bodies on the measured sample
        out.print(f"cost 0 for {', '.join(idle)}: their body did not run on the measured sample "
                  "(an If branch it did not take)", highlight=False)


@app.command("functions", short_help="List swappable functions and surrogates, with costs.")
def list_functions() -> None:
    """List the functions swapper knows: swappable (costly) ones with their default surrogate, and the surrogates
    with their emission forms; costs relative to Relu = 1.0, measured on onnxruntime's CPU provider."""
    from swapper.report.tables import functions_listing

    header, table, words = functions_listing()
    out.print(header, highlight=False)
    out.print(table)
    for line in words:
        out.print(line, highlight=False)


@app.command("targets", short_help="List the built-in target profiles.")
def list_targets(
    as_json: Annotated[bool, typer.Option("--json", help="Print the profiles as JSON.")] = False,
) -> None:
    """List the built-in target profiles: name, precision, where costs come from, opsets, description."""
    from swapper.targets import builtin_targets, load_target

    try:
        rows = [load_target(name) for name in builtin_targets()]
    except SwapperError as exc:
        _fail(exc)
    if as_json:
        sys.stdout.write(json.dumps([{"name": p.name, "precision": p.precision, "costs_from": p.costs_from,
                                      "opset": {"min": p.opset_min, "max": p.opset_max},
                                      "description": p.description} for p in rows], indent=2) + "\n")
        return
    for p in rows:
        out.print(f"{p.name:13s} {p.precision:8s} {p.costs_from:9s} opsets {p.opset_min}..{p.opset_max}  "
                  f"{p.description}", highlight=False)


@app.command(short_help="Swap costly activations, calibrate, and gate the result.", epilog=swap_epilog())
def swap(
    model: Annotated[Path, typer.Argument(help="The .onnx model to rewrite (never modified).")],
    output: Annotated[Path, typer.Option("--output", "-o", help="Where to write the swapped model.")],
    calib: Annotated[Optional[Path], typer.Option(help="Calibration set: .npz, a folder of .npy files, or a folder of images.")] = None,
    no_calibrate: Annotated[bool, typer.Option("--no-calibrate", help="Write the uncalibrated swap (starting parameters).")] = False,
    to: Annotated[Optional[str], typer.Option(help="Surrogate for every chosen site (default: per function).")] = None,
    sites: Annotated[Optional[str], typer.Option(help="Comma-separated site ids to swap (see `swapper scan`).")] = None,
    only: Annotated[Optional[str], typer.Option(help="Swap only sites computing this function.")] = None,
    include_gates: Annotated[bool, typer.Option("--include-gates", help="Also swap gate sites.")] = False,
    include_outputs: Annotated[bool, typer.Option("--include-outputs", help="Also swap sites that are graph outputs.")] = False,
    fold: Annotated[str, typer.Option(callback=fold_option, help=FOLD_HELP)] = "exact",
    mode: Annotated[str, typer.Option(help="sequential | local calibration.")] = "sequential",
    bias_correction: Annotated[bool, typer.Option("--bias-correction/--no-bias-correction", help="Correct consumer mean shifts.")] = True,
    refit_consumers: Annotated[Optional[bool], typer.Option(
        "--refit-consumers/--no-refit-consumers",
        help="Ridge-refit linear consumers (default: with --calib, kept per site where held-out samples agree).")] = None,
    mask_input: Annotated[str, typer.Option("--mask-input", help="Attention-mask input whose zero positions token sites' statistics skip: auto (found by name, dtype, shape), none, or the input's name.")] = "auto",
    val: Annotated[Optional[Path], typer.Option(help="Validation set; enables the accuracy gate.")] = None,
    budget: BudgetOpt = 1.0,
    strict: Annotated[bool, typer.Option("--strict", help=STRICT_HELP)] = False,
    min_agreement: MinAgreementOpt = None,
    metric: MetricOpt = None,
    min_cosine: MinCosineOpt = None,
    min_cosine_p5: MinCosineP5Opt = None,
    min_sqnr: MinSqnrOpt = None,
    strict_data: StrictDataOpt = False,
    force: Annotated[bool, typer.Option("--force", help="Write the model even when rejected or not faster on the target (verdict kept in metadata).")] = False,
    int8: Annotated[bool, typer.Option("--int8", help="Also compare int8-quantized versions.")] = False,
    report: Annotated[Optional[Path], typer.Option(help="Report folder (default reports/<model>-<UTC time>/).")] = None,
    target: Annotated[str, typer.Option(help=TARGET_HELP)] = "ort-cpu",
    opset: Annotated[Optional[int], typer.Option(help="Convert the model to this ONNX opset first (checked and compared; recorded in the report).")] = None,
    seed: SeedOpt = 0,
    batch_size: BatchOpt = 64,
    threads: ThreadsOpt = 1,
    cache_mb: Annotated[Optional[float], typer.Option(min=0, max=MAX_CACHE_MB, callback=finite, help="Recorded tensors kept in RAM up to this many MiB (default 8), on disk beyond.")] = None,
    latency_runs: LatencyRunsOpt = 30,
    no_latency: NoLatencyOpt = False,
    plan: Annotated[Optional[str], typer.Option(help="auto: the fastest plan within the budget, from a sweep of every single-site swap (default with --val); all: every eligible site.")] = None,
    sweep_file: Annotated[Optional[Path], typer.Option("--sweep", help="Plan from this sweep JSON (`swapper sweep -o`) instead of sweeping again.")] = None,
    jobs: JobsOpt = 1,
    scheduler: SchedulerOpt = None,
    data_spec: DataSpec = None, batch_axis: BatchAxis = None, constant: Constant = None, prep: Prep = None,
) -> None:
    """Swap costly activations for cheap surrogates, calibrate them, and (with --val) gate the result."""
    from swapper.cli.run import run_swap
    from swapper.options import SwapOptions

    try:
        plan = plan_word(plan, val, calib)
        if plan == "auto" and (no_calibrate or calib is None):
            raise UsageError("--plan auto calibrates every candidate: give --calib (or use --plan all)")
        if plan != "auto" and sweep_file is not None:
            raise UsageError("--sweep feeds the automatic plan: add --plan auto (and --val)")
        calib, val = (data_source_of(p, data_spec, batch_axis, constant, prep) for p in (calib, val))
        if calib is None and not no_calibrate:
            raise UsageError("give a calibration set with --calib, or --no-calibrate for the uncalibrated swap")
        if calib is not None and no_calibrate:
            raise UsageError("--calib and --no-calibrate exclude each other")
        rule = gate_rule(budget, strict, min_agreement, metric, min_cosine, min_cosine_p5, min_sqnr)
        if val is None and (metric, min_cosine, min_cosine_p5, min_sqnr) != (None,) * 4:
            raise UsageError("--metric, --min-cosine, --min-cosine-p5 and --min-sqnr judge a validation set: add --val")
        options = SwapOptions(
            to=to, site_ids=split_ids(sites), only=only, include_gates=include_gates, include_outputs=include_outputs,
            fold=fold, mode=mode, bias_correction=bias_correction, refit_consumers=refit_consumers, seed=seed,
            mask_input=mask_input, batch_size=batch_size, threads=threads, cache_mb=cache_mb,
            target=target_name(target), opset=opset,
        )
        latency = 0 if no_latency else latency_runs
        if plan == "auto":
            from swapper.cli.auto_run import run_auto_swap

            # the sweep tries the surrogates (--to narrows its settings) and decides the refit per site
            code = run_auto_swap(model, output, calib=calib, val=val, rule=rule,
                                 options=options.replace(to=None, refit_consumers=None),
                                 settings=sweep_settings(jobs, scheduler, to), console=out, sweep_file=sweep_file,
                                 force=force, report=report, strict_data=strict_data, latency_runs=latency)
        else:
            code = run_swap(model, output, options=options, console=out, calib=calib, val=val, rule=rule,
                            strict_data=strict_data, force=force, int8=int8, report=report, latency_runs=latency)
    except SwapperError as exc:
        _fail(exc)
    raise typer.Exit(code)


@app.command(short_help="Measure every single-site swap: accuracy cost, saving.")
def sweep(
    model: Annotated[Path, typer.Argument(help="The .onnx model to sweep (never modified).")],
    calib: Annotated[Path, typer.Option(help="Calibration set: .npz, a folder of .npy files, or a folder of images.")],
    val: Annotated[Path, typer.Option(help="Validation set: what each single-site swap costs is measured on it.")],
    output: Annotated[Optional[Path], typer.Option("--output", "-o", help="Where to write the sweep JSON (default reports/<model>-<UTC time>/sweep.json); the Pareto plot goes beside it.")] = None,
    as_json: Annotated[bool, typer.Option("--json", help="Print the sweep JSON (schema swapper.sweep/1) on stdout.")] = False,
    target: Annotated[str, typer.Option(help=TARGET_HELP)] = "ort-cpu",
    jobs: JobsOpt = 1,
    scheduler: SchedulerOpt = None,
    to: Annotated[Optional[str], typer.Option(help="Only this surrogate (default: every candidate of each function).")] = None,
    paying_only: Annotated[bool, typer.Option("--paying-only", help="Only surrogates the target's profile says are cheaper than the site's own ops.")] = False,
    no_refit: Annotated[bool, typer.Option("--no-refit", help="Skip the candidates with the consumer refit.")] = False,
    repeats: Annotated[int, typer.Option(min=1, max=1000, help="Timed runs per model and candidate on a measured target.")] = 20,
    sites: Annotated[Optional[str], typer.Option(help="Comma-separated site ids to sweep.")] = None,
    only: Annotated[Optional[str], typer.Option(help="Sweep only sites computing this function.")] = None,
    include_gates: Annotated[bool, typer.Option("--include-gates", help="Also sweep gate sites.")] = False,
    include_outputs: Annotated[bool, typer.Option("--include-outputs", help="Also sweep sites that are graph outputs.")] = False,
    budget: Annotated[float, typer.Option(callback=finite, help=BUDGET_HELP + " Recorded as the allowance.")] = 1.0,
    metric: MetricOpt = None,
    min_cosine: MinCosineOpt = None,
    min_sqnr: MinSqnrOpt = None,
    opset: Annotated[Optional[int], typer.Option(help="Convert the model to this ONNX opset first.")] = None,
    seed: SeedOpt = 0,
    batch_size: BatchOpt = 64,
    strict_data: StrictDataOpt = False,
    data_spec: DataSpec = None, batch_axis: BatchAxis = None, constant: Constant = None, prep: Prep = None,
) -> None:
    """Swap every eligible site alone, per surrogate, placement and refit: accuracy cost and saving on the target."""
    from swapper.cli.auto_run import run_sweep
    from swapper.options import SwapOptions

    try:
        calib, val = (data_source_of(p, data_spec, batch_axis, constant, prep) for p in (calib, val))
        rule = gate_rule(budget, False, None, metric, min_cosine, None, min_sqnr)
        options = SwapOptions(site_ids=split_ids(sites), only=only, include_gates=include_gates,
                              include_outputs=include_outputs, seed=seed, batch_size=batch_size,
                              target=target_name(target), opset=opset)
        settings = sweep_settings(jobs, scheduler, to, paying_only=paying_only, repeats=repeats,
                                   refit=(False,) if no_refit else (False, True))
        code = run_sweep(model, calib=calib, val=val, rule=rule, options=options, settings=settings, console=out,
                         output=output, as_json=as_json, strict_data=strict_data)
    except SwapperError as exc:
        _fail(exc)
    raise typer.Exit(code)


@app.command(short_help="Judge a swapped model against its original.")
def check(
    original: Annotated[Path, typer.Argument(help="The original .onnx model.")],
    candidate: Annotated[Path, typer.Argument(help="The swapped .onnx model.")],
    val: Annotated[Path, typer.Option(help="Validation set (.npz or .npy folder), with `labels` for accuracy.")],
    budget: BudgetOpt = 1.0,
    strict: Annotated[bool, typer.Option("--strict", help=STRICT_HELP)] = False,
    min_agreement: MinAgreementOpt = None,
    metric: MetricOpt = None,
    min_cosine: MinCosineOpt = None,
    min_cosine_p5: MinCosineP5Opt = None,
    min_sqnr: MinSqnrOpt = None,
    strict_data: StrictDataOpt = False,
    int8: Annotated[bool, typer.Option("--int8", help="Also compare int8-quantized versions.")] = False,
    calib: Annotated[Optional[Path], typer.Option(help="Calibration set for --int8 (default: the validation set).")] = None,
    report: Annotated[Optional[Path], typer.Option(help="Report folder (default reports/<model>-<UTC time>/).")] = None,
    batch_size: BatchOpt = 64,
    threads: ThreadsOpt = 1,
    target: Annotated[str, typer.Option(help=TARGET_HELP)] = "ort-cpu",
    latency_runs: LatencyRunsOpt = 30,
    no_latency: NoLatencyOpt = False,
    data_spec: DataSpec = None, batch_axis: BatchAxis = None, constant: Constant = None, prep: Prep = None,
) -> None:
    """Compare a candidate with its original on a validation set; exit 0 approved, 1 rejected, 3 cannot judge."""
    from swapper.cli.run import run_check

    try:
        rule = gate_rule(budget, strict, min_agreement, metric, min_cosine, min_cosine_p5, min_sqnr)
        calib, val = (data_source_of(p, data_spec, batch_axis, constant, prep) for p in (calib, val))
        code = run_check(original, candidate, val, console=out, rule=rule, strict_data=strict_data, int8=int8,
                         calib=calib, report=report, batch_size=batch_size, threads=threads,
                         latency_runs=0 if no_latency else latency_runs, target=target_name(target))
    except SwapperError as exc:
        _fail(exc)
    raise typer.Exit(code)


@app.command(short_help="Run the whole job on the bundled demo models.")
def demo(
    out_dir: Annotated[Path, typer.Option("--out", help="Where swapped demo models go.")] = Path("reports/demo"),
) -> None:
    """Run the whole job on the bundled demo models (scan, swap, calibrate, check, report)."""
    from swapper.cli.demo import run_demo

    try:
        code = run_demo(out_dir, console=out)
    except SwapperError as exc:
        _fail(exc)
    raise typer.Exit(code)


@app.command(short_help="Benchmark recovered accuracy, tool cost and speed.")
def bench(
    models: Annotated[Optional[list[Path]], typer.Argument(help="Models to benchmark (default with --demo: the demo models).")] = None,
    demo_models: Annotated[bool, typer.Option("--demo", help="Benchmark the bundled demo models.")] = False,
    calib: Annotated[Optional[Path], typer.Option(help="Calibration set for the given models.")] = None,
    val: Annotated[Optional[Path], typer.Option(help="Validation set for the given models.")] = None,
    out_root: Annotated[Path, typer.Option("--out", help="Results go to OUT/<UTC time>/.")] = Path("reports/bench"),
    scale: Annotated[bool, typer.Option("--scale/--no-scale", help="Include the synthetic 16-block scale model.")] = True,
    quick: Annotated[bool, typer.Option("--quick", help="Few repeats, small data: a smoke run, not a measurement.")] = False,
    repeats: Annotated[int, typer.Option(
        "--latency-runs", "--repeats", min=1, max=MAX_LATENCY_RUNS, help="Timed runs per model for latency.")] = 50,
    no_latency: NoLatencyOpt = False,
    target: Annotated[str, typer.Option(help=TARGET_HELP)] = "ort-cpu",
) -> None:
    """Measure accuracy recovered, the tool's own cost, and the swapped models' speed."""
    from swapper.bench.run import run_bench

    try:
        folder = run_bench(models or [], demo=demo_models, calib=calib, val=val, out_root=out_root, scale=scale,
                           quick=quick, repeats=0 if no_latency else repeats, console=out, target=target_name(target))
    except SwapperError as exc:
        _fail(exc)
    out.print(f"results: {folder}", highlight=False)


if __name__ == "__main__":  # pragma: no cover
    app(prog_name="swapper")
