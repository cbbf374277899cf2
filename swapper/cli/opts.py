"""Option types and small parsers shared by the `swapper` commands (cli/app.py).

Each ``...Opt`` alias is one option as typer declares it (range, help text), so
`swap`, `sweep`, `check` and `bench` spell a shared option the same way; the
functions turn parsed option values into the API's objects.
"""
from __future__ import annotations

import math
from pathlib import Path
from typing import Annotated, Optional

import typer

from swapper.errors import UsageError
from swapper.options import MAX_BATCH_SIZE, MAX_SEED, MAX_THREADS

MAX_LATENCY_RUNS = 100_000  # timed calls per model; more measures nothing new (common practice, no source)




def finite(value: float | None) -> float | None:
    """Option callback: NaN and infinities pass click's ranges (every comparison with NaN is false)."""
    if value is not None and not math.isfinite(value):
        raise typer.BadParameter(f"{value} is not a finite number")
    return value


def fold_option(value: str) -> str:
    """Option callback for --fold: today's spelling of the policy; an older one works with a one-line note."""
    from swapper.options import fold_note, fold_word

    note = fold_note(value)
    try:
        word = fold_word(value)
    except UsageError as exc:  # a usage error of the parser: one line, exit 2
        raise typer.BadParameter(str(exc)) from None
    if note:
        typer.echo(f"note: {note}", err=True)
    return word


FOLD_HELP = ("Where a, b, c, d of y = a·g(b·x + c) + d go. exact: folded into neighbouring layers where that is "
             "exact, the rest fixed at neutral values (adds no node); exact+nodes: the same folds, the rest as "
             "Mul/Add nodes (older spelling: nodes); approximate: like exact, d also into zero-padded Conv biases "
             "(inexact at borders); off: every parameter as a node.")


def swap_epilog() -> str:
    """The words of the swapped-sites table, for `swap --help` (lines kept under 80 columns)."""
    import textwrap

    from swapper.plan.placement import LEGEND

    lines = ["The swapped-sites table says where a, b, c, d of y = a·g(b·x + c) + d live:"]
    for word, text in LEGEND.items():
        lines += textwrap.wrap(f"{word}: {text}", 76, initial_indent="  ", subsequent_indent="      ")
    lines.append("nodes column: the site's nodes in the original -> in the swapped model.")
    return "\b\n" + "\n".join(lines)  # \b: click keeps these lines as they are


# Running settings, shared by `swap`, `check` (and `bench` for latency).
SeedOpt = Annotated[int, typer.Option(min=0, max=MAX_SEED, help="Seed for sampling; same inputs + seed = same bytes.")]
BatchOpt = Annotated[int, typer.Option(min=1, max=MAX_BATCH_SIZE, help="Samples per onnxruntime call.")]
ThreadsOpt = Annotated[int, typer.Option(min=1, max=MAX_THREADS, help="onnxruntime intra-op threads.")]
LatencyRunsOpt = Annotated[int, typer.Option(
    "--latency-runs", min=1, max=MAX_LATENCY_RUNS, help="Timed runs per model for the latency figures.")]
NoLatencyOpt = Annotated[bool, typer.Option(
    "--no-latency", help="Skip the latency measurement (the report says it was not measured).")]
BUDGET_HELP = ("The allowance, read by the metric that decides: top1: the largest top-1 drop (original - candidate) "
               "in percentage points; agreement: top-1 agreement with the original must be at least 100 - BUDGET "
               "percent; rmse: the candidate's RMSE may exceed the original's by BUDGET percent of it. cosine and "
               "sqnr do not read it (--min-cosine, --min-sqnr).")
BudgetOpt = Annotated[float, typer.Option(min=0, callback=finite, help=BUDGET_HELP)]
STRICT_HELP = ("top1: judge the upper end of the 95% interval for the drop instead of the measured drop "
               "(non-inferiority).")
MinAgreementOpt = Annotated[Optional[float], typer.Option(callback=finite, help="Also require this top-1 agreement (0..1).")]


# The gate's options, shared by `swap` and `check`; gathered into one GateRule by gate_rule.
MetricOpt = Annotated[Optional[str], typer.Option(
    help="What decides: top1 | agreement | cosine | sqnr | rmse (default: from the outputs and the data).")]
MinCosineOpt = Annotated[Optional[float], typer.Option(
    callback=finite, help="Least mean per-sample cosine similarity to the original's output (default 0.995).")]
MinCosineP5Opt = Annotated[Optional[float], typer.Option(
    "--min-cosine-p5", callback=finite,
    help="Least cosine of the worst 5% of samples (default 1 - 2*(1 - min-cosine)).")]
MinSqnrOpt = Annotated[Optional[float], typer.Option(
    callback=finite, help="Least SQNR of each output against the original's, in dB (default 20).")]
StrictDataOpt = Annotated[bool, typer.Option(
    "--strict-data", help="Refuse data files holding arrays the model does not read (default: ignore them).")]


def gate_rule(budget: float, strict: bool, min_agreement: float | None, metric: str | None,
               min_cosine: float | None, min_cosine_p5: float | None, min_sqnr: float | None):
    """The one place the gate options become a GateRule (UsageError, exit 2, when they contradict)."""
    from swapper.check.gate import Budget, GateRule

    return GateRule(Budget(max_drop_pp=budget, strict=strict, min_agreement=min_agreement), metric=metric,
                    min_cosine=min_cosine, min_cosine_p5=min_cosine_p5, min_sqnr_db=min_sqnr)


def split_ids(value: str | None) -> list[str] | None:
    return [v.strip() for v in value.split(",") if v.strip()] if value else None


def target_name(value: str) -> str | None:
    """``--target none`` plans without a target (registry defaults, no speed check)."""
    return None if value.strip().lower() == "none" else value


TARGET_HELP = "Target profile: a built-in name (see `swapper targets`) or a .json file; `none` for no target."
JobsOpt = Annotated[int, typer.Option(min=1, max=64, help="Sweep candidates in this many worker processes on this machine.")]
SchedulerOpt = Annotated[Optional[str], typer.Option(help="Sweep on an existing dask.distributed cluster at this address (needs the `cluster` extra).")]


def plan_word(plan: str | None, val, calib) -> str:
    """--plan: auto | all; without it, auto when a validation set is given (and a calibration set: the
    sweep calibrates every candidate; an uncalibrated swap is one plan, all)."""
    word = plan if plan is not None else ("auto" if val is not None and calib is not None else "all")
    if word not in ("auto", "all"):
        raise UsageError(f"--plan {word}: expected auto or all")
    if word == "auto" and val is None:
        raise UsageError("--plan auto needs a validation set (--val) to measure what each swap costs")
    return word


def sweep_settings(jobs: int, scheduler: str | None, to: str | None = None, **more):
    from swapper.sweep.run import SweepSettings

    return SweepSettings(jobs=jobs, scheduler=scheduler, surrogates=None if to is None else (to,), **more)


# Data options shared by every command that reads data (see swapper/data/source.py for the file format).
DataSpec = Annotated[Optional[Path], typer.Option("--data-spec", help="JSON data description: batch axes, constant inputs, image preprocessing.")]
BatchAxis = Annotated[Optional[list[str]], typer.Option("--batch-axis", help="NAME=AXIS: the axis of input NAME that counts samples (repeatable).")]
Constant = Annotated[Optional[list[str]], typer.Option("--constant", help="NAME=VALUE fed unchanged in every batch: a number, numbers a,b,c, zeros, or FILE.npy (repeatable).")]
Prep = Annotated[Optional[list[str]], typer.Option("--prep", help="KEY=VALUE preprocessing of image folders: size=48x192, resize=stretch|crop|pad, channels=RGB|BGR|gray, layout, scale, mean, std (repeatable).")]


def data_source_of(path: Path | None, data_spec, batch_axis, constant, prep):
    from swapper.data.source import data_source

    return data_source(path, description=data_spec, batch_axes=batch_axis, constants=constant, prep=prep)
