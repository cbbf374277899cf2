"""The `swapper` command line: parses options, calls the API, maps errors to exit codes.

Exit codes (swapper/errors.py): 0 done / approved, 1 rejected by the gate, 2 bad
input or usage, 3 the validation data cannot judge the model.
"""
from __future__ import annotations

import json
import logging
import sys
from pathlib import Path
from typing import Annotated, Optional

import typer
from rich.console import Console

from swapper import api, functions
from swapper.errors import SwapperError, UsageError

app = typer.Typer(
    add_completion=False,
    no_args_is_help=True,
    pretty_exceptions_enable=False,
    help="Find costly activations in an ONNX model, swap them for cheap calibrated ones, and check the cost.",
)
out = Console(soft_wrap=True)
err = Console(stderr=True, soft_wrap=True)
if not out.is_terminal:  # pipes and CI logs: wide enough that tables keep one row per line
    out.width = max(out.width, 160)


def _fail(exc: SwapperError) -> None:
    err.print(f"[bold red]{exc.label}:[/] {exc}", highlight=False, soft_wrap=True)
    raise typer.Exit(exc.exit_code)


# The gate's options, shared by `swap` and `check`; gathered into one GateRule by _gate_rule.
MetricOpt = Annotated[Optional[str], typer.Option(
    help="What decides: top1 | agreement | cosine | sqnr | rmse (default: from the outputs and the data).")]
MinCosineOpt = Annotated[Optional[float], typer.Option(
    help="Least mean per-sample cosine similarity to the original's output (default 0.995).")]
MinCosineP5Opt = Annotated[Optional[float], typer.Option(
    "--min-cosine-p5", help="Least cosine of the worst 5% of samples (default 1 - 2*(1 - min-cosine)).")]
MinSqnrOpt = Annotated[Optional[float], typer.Option(
    help="Least SQNR of each output against the original's, in dB (default 20).")]
StrictDataOpt = Annotated[bool, typer.Option(
    "--strict-data", help="Refuse data files holding arrays the model does not read (default: ignore them).")]


def _gate_rule(budget: float, strict: bool, min_agreement: float | None, metric: str | None,
               min_cosine: float | None, min_cosine_p5: float | None, min_sqnr: float | None):
    """The one place the gate options become a GateRule (UsageError, exit 2, when they contradict)."""
    from swapper.check.gate import Budget, GateRule

    return GateRule(Budget(max_drop_pp=budget, strict=strict, min_agreement=min_agreement), metric=metric,
                    min_cosine=min_cosine, min_cosine_p5=min_cosine_p5, min_sqnr_db=min_sqnr)


def _split(value: str | None) -> list[str] | None:
    return [v.strip() for v in value.split(",") if v.strip()] if value else None


# Data options shared by every command that reads data (see swapper/data/source.py for the file format).
DataSpec = Annotated[Optional[Path], typer.Option("--data-spec", help="JSON data description: batch axes, constant inputs, image preprocessing.")]
BatchAxis = Annotated[Optional[list[str]], typer.Option("--batch-axis", help="NAME=AXIS: the axis of input NAME that counts samples (repeatable).")]
Constant = Annotated[Optional[list[str]], typer.Option("--constant", help="NAME=VALUE fed unchanged in every batch: a number, numbers a,b,c, zeros, or FILE.npy (repeatable).")]
Prep = Annotated[Optional[list[str]], typer.Option("--prep", help="KEY=VALUE preprocessing of image folders: size=48x192, resize=stretch|crop|pad, channels=RGB|BGR|gray, layout, scale, mean, std (repeatable).")]


def _source(path: Path | None, data_spec, batch_axis, constant, prep):
    from swapper.data.source import data_source

    return data_source(path, description=data_spec, batch_axes=batch_axis, constants=constant, prep=prep)


@app.callback()
def main(verbose: Annotated[bool, typer.Option("--verbose", "-v", help="Log debug details.")] = False) -> None:
    logging.basicConfig(level=logging.DEBUG if verbose else logging.WARNING, format="%(name)s: %(message)s")


@app.command()
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
        result = api.scan(model, calib=_source(calib, data_spec, batch_axis, constant, prep),
                          input_shapes=parse_input_shapes(input_shape))
    except SwapperError as exc:
        _fail(exc)
    if as_json:
        sys.stdout.write(json.dumps(sites_to_json(result.sites, str(model), result.loaded.opset), indent=2) + "\n")
        return
    if not result.sites:
        out.print(f"{model}: no activation sites found")
        return
    out.print(sites_table(result.sites, f"{model} (opset {result.loaded.opset}): {len(result.sites)} activation sites"))
    if any(s.cost_share is None for s in result.sites):
        out.print("cost share ?: sizes are symbolic; give --calib DATA or --input-shape NAME=DIMS", highlight=False)


@app.command("functions")
def list_functions() -> None:
    """List the functions swapper knows: costly sources and cheap surrogates."""
    for name in sorted(functions.REGISTRY):
        fn = functions.REGISTRY[name]
        kind = "surrogate" if fn.is_cheap else "source"
        default = functions.DEFAULT_TARGET.get(name, "")
        out.print(f"{name:12s} {kind:9s} cost {fn.cost:5.2f}" + (f"  default → {default}" if default else ""))


@app.command()
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
    fold: Annotated[str, typer.Option(help="exact | nodes | approximate | off (see README).")] = "exact",
    mode: Annotated[str, typer.Option(help="sequential | local calibration.")] = "sequential",
    bias_correction: Annotated[bool, typer.Option("--bias-correction/--no-bias-correction", help="Correct consumer mean shifts.")] = True,
    refit_consumers: Annotated[Optional[bool], typer.Option(
        "--refit-consumers/--no-refit-consumers",
        help="Ridge-refit linear consumers (default: with --calib, kept per site where held-out samples agree).")] = None,
    val: Annotated[Optional[Path], typer.Option(help="Validation set; enables the accuracy gate.")] = None,
    budget: Annotated[float, typer.Option(help="Largest accepted accuracy drop, in percentage points.")] = 1.0,
    strict: Annotated[bool, typer.Option("--strict", help="Gate on the interval's upper end, not the point estimate.")] = False,
    min_agreement: Annotated[Optional[float], typer.Option(help="Also require this top-1 agreement (0..1).")] = None,
    metric: MetricOpt = None,
    min_cosine: MinCosineOpt = None,
    min_cosine_p5: MinCosineP5Opt = None,
    min_sqnr: MinSqnrOpt = None,
    strict_data: StrictDataOpt = False,
    force: Annotated[bool, typer.Option("--force", help="Write the model even when rejected (verdict kept in metadata).")] = False,
    int8: Annotated[bool, typer.Option("--int8", help="Also compare int8-quantized versions.")] = False,
    report: Annotated[Optional[Path], typer.Option(help="Report folder (default reports/<model>-<UTC time>/).")] = None,
    seed: Annotated[int, typer.Option(help="Seed for sampling; same inputs + seed = same bytes.")] = 0,
    batch_size: Annotated[int, typer.Option(min=1, help="Samples per onnxruntime call.")] = 64,
    threads: Annotated[int, typer.Option(min=1, help="onnxruntime intra-op threads.")] = 1,
    cache_mb: Annotated[Optional[float], typer.Option(min=0, help="Recorded tensors kept in RAM up to this many MiB (default 8), on disk beyond.")] = None,
    data_spec: DataSpec = None, batch_axis: BatchAxis = None, constant: Constant = None, prep: Prep = None,
) -> None:
    """Swap costly activations for cheap surrogates, calibrate them, and (with --val) gate the result."""
    from swapper.cli.run import run_swap
    from swapper.options import SwapOptions

    try:
        calib, val = (_source(p, data_spec, batch_axis, constant, prep) for p in (calib, val))
        if calib is None and not no_calibrate:
            raise UsageError("give a calibration set with --calib, or --no-calibrate for the uncalibrated swap")
        if calib is not None and no_calibrate:
            raise UsageError("--calib and --no-calibrate exclude each other")
        rule = _gate_rule(budget, strict, min_agreement, metric, min_cosine, min_cosine_p5, min_sqnr)
        if val is None and (metric, min_cosine, min_cosine_p5, min_sqnr) != (None,) * 4:
            raise UsageError("--metric, --min-cosine, --min-cosine-p5 and --min-sqnr judge a validation set: add --val")
        options = SwapOptions(
            to=to, site_ids=_split(sites), only=only, include_gates=include_gates, include_outputs=include_outputs,
            fold=fold, mode=mode, bias_correction=bias_correction, refit_consumers=refit_consumers, seed=seed,
            batch_size=batch_size, threads=threads, cache_mb=cache_mb,
        )
        code = run_swap(model, output, options=options, console=out, calib=calib, val=val, rule=rule,
                        strict_data=strict_data, force=force, int8=int8, report=report)
    except SwapperError as exc:
        _fail(exc)
    raise typer.Exit(code)


@app.command()
def check(
    original: Annotated[Path, typer.Argument(help="The original .onnx model.")],
    candidate: Annotated[Path, typer.Argument(help="The swapped .onnx model.")],
    val: Annotated[Path, typer.Option(help="Validation set (.npz or .npy folder), with `labels` for accuracy.")],
    budget: Annotated[float, typer.Option(help="Largest accepted accuracy drop, in percentage points.")] = 1.0,
    strict: Annotated[bool, typer.Option("--strict", help="Gate on the interval's upper end.")] = False,
    min_agreement: Annotated[Optional[float], typer.Option(help="Also require this top-1 agreement (0..1).")] = None,
    metric: MetricOpt = None,
    min_cosine: MinCosineOpt = None,
    min_cosine_p5: MinCosineP5Opt = None,
    min_sqnr: MinSqnrOpt = None,
    strict_data: StrictDataOpt = False,
    int8: Annotated[bool, typer.Option("--int8", help="Also compare int8-quantized versions.")] = False,
    calib: Annotated[Optional[Path], typer.Option(help="Calibration set for --int8 (default: the validation set).")] = None,
    report: Annotated[Optional[Path], typer.Option(help="Report folder (default reports/<model>-<UTC time>/).")] = None,
    batch_size: Annotated[int, typer.Option(min=1)] = 64,
    threads: Annotated[int, typer.Option(min=1)] = 1,
    data_spec: DataSpec = None, batch_axis: BatchAxis = None, constant: Constant = None, prep: Prep = None,
) -> None:
    """Compare a candidate with its original on a validation set; exit 0 approved, 1 rejected, 3 cannot judge."""
    from swapper.cli.run import run_check

    try:
        rule = _gate_rule(budget, strict, min_agreement, metric, min_cosine, min_cosine_p5, min_sqnr)
        calib, val = (_source(p, data_spec, batch_axis, constant, prep) for p in (calib, val))
        code = run_check(original, candidate, val, console=out, rule=rule, strict_data=strict_data, int8=int8,
                         calib=calib, report=report, batch_size=batch_size, threads=threads)
    except SwapperError as exc:
        _fail(exc)
    raise typer.Exit(code)


@app.command()
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


@app.command()
def bench(
    models: Annotated[Optional[list[Path]], typer.Argument(help="Models to benchmark (default with --demo: the demo models).")] = None,
    demo_models: Annotated[bool, typer.Option("--demo", help="Benchmark the bundled demo models.")] = False,
    calib: Annotated[Optional[Path], typer.Option(help="Calibration set for the given models.")] = None,
    val: Annotated[Optional[Path], typer.Option(help="Validation set for the given models.")] = None,
    out_root: Annotated[Path, typer.Option("--out", help="Results go to OUT/<UTC time>/.")] = Path("reports/bench"),
    scale: Annotated[bool, typer.Option("--scale/--no-scale", help="Include the synthetic 16-block scale model.")] = True,
    quick: Annotated[bool, typer.Option("--quick", help="Few repeats, small data: a smoke run, not a measurement.")] = False,
    repeats: Annotated[int, typer.Option(min=1, help="Timed runs per model for latency.")] = 50,
) -> None:
    """Measure accuracy recovered, the tool's own cost, and the swapped models' speed."""
    from swapper.bench.run import run_bench

    try:
        folder = run_bench(models or [], demo=demo_models, calib=calib, val=val, out_root=out_root, scale=scale,
                           quick=quick, repeats=repeats, console=out)
    except SwapperError as exc:
        _fail(exc)
    out.print(f"results: {folder}", highlight=False)


if __name__ == "__main__":  # pragma: no cover
    app()
