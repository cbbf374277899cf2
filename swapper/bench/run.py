"""`swapper bench`: how much accuracy the swap recovers, what the tool costs, how fast the result runs.

Transformation: models + calibration/validation sets (or the bundled demo
models, plus a generated 16-block scale model) -> ``OUT/<UTC YYYYmmddTHHMMSSZ>/``
holding ``results.json``, ``results.md`` and, with matplotlib, ``ladder.png``
and ``speed.png``. Every model is benchmarked per surrogate *family*: the
surrogate the target's plan gives each site (named after it when all sites share one, e.g.
``hard_swish`` for SiLU/GELU/Mish models; ``default`` otherwise, e.g.
hard_tanh + hard_sigmoid) and ``relu``. ``--quick`` keeps only the first family.

results.json, schema ``swapper.bench.run/1``:

- ``schema``: "swapper.bench/1"; ``created_utc``: the folder's timestamp.
- ``machine``: ``cpu`` (model name from /proc/cpuinfo), ``cores`` (os.cpu_count),
  ``python``, ``onnxruntime``, ``numpy`` (versions), ``platform``.
- ``settings``: ``command`` (reproduces the run), ``quick``, ``repeats`` (timed
  latency runs), ``batch_size`` (calibration/evaluation batch), ``latency_batches``,
  ``threads`` (1), ``graph_optimization`` ("all"), ``memory_factors``,
  ``rungs``, ``family_rule``, ``target`` (the profile the plans are made for, null:
  none), ``scale`` (generator settings or null).
- ``models``: list, one object per model:
  - ``name``, ``path``, ``synthetic`` (bool: the generated scale model),
    ``calib_samples``, ``val_samples``, ``sites`` (ids swapped by the default plan);
  - ``families``: list of objects:
    - ``family`` ("hard_swish", "relu", "default"...), ``surrogates`` (site id -> surrogate);
    - ``ladder``: ``metric``, the gate's default figure (``swapper.bench.measure.metric_for``):
      "accuracy" (labels + class scores), "agreement" (top-1 agreement with the
      original), "cosine" (mean per-sample cosine to the original's output; the
      worst judged output), "sqnr" (dB; the original's is null), "rmse" (``expected`` values),
      or null when the data cannot judge the model; the figure for ``original``,
      ``naive`` (starting parameters, no calibration), ``local`` (local mode, no
      bias correction), ``sequential`` (no bias correction), ``sequential_bias``,
      ``refit`` (+ consumer refit); null when the rung was not run; ``drop_pp``
      (rung -> original − rung in points, accuracy and agreement only; negative when
      the rung scores higher), ``n`` (validation samples);
    - ``cost`` (sequential + bias rung): ``plain_pass_s`` (one onnxruntime pass of
      the original over the calibration set, median of 3), ``record_s``,
      ``segments_s``, ``fit_s``, ``bias_correction_s``, ``total_s`` (calibration
      wall time), ``ratio_total``, ``ratio_record``, ``ratio_fit`` (÷ plain pass),
      ``refit_s`` / ``ratio_refit`` (null here);
    - ``cost_refit``: the same for the + consumer refit rung (``refit_s``: the
      refit's part of ``total_s``), or null when that rung was not run;
    - ``speed``: batch size (string) -> ``original_ms``, ``swapped_ms``,
      ``floor_ms`` (medians), p10/p90 of original and swapped, ``ratio``
      (swapped/original), ``saving_fraction`` ((orig − swapped)/(orig − floor),
      null when orig − floor < 2% of orig), ``note``;
    - ``int8``: ``metric`` (as the ladder's), ``original``, ``swapped`` (the int8 models'
      figure against the fp32 original), ``drop_pp`` (original − swapped), ``speed``: batch ->
      ``original_ms``, ``swapped_ms``, ``ratio``; null if quantization failed;
    - ``notes``: list of strings.
  - ``memory`` (sequential + bias calibration of the first family, fresh process
    per factor): ``factors``, ``method``, one object per factor (string key):
    ``times``, ``samples``, ``baseline_kib``, ``peak_before_kib``, ``peak_kib``,
    ``delta_kib`` (peak − baseline), ``wall_s`` (or ``error``); ``ratio_16_1``
    (delta 16×/1×, null when 16× was not run), ``ratio_last_1``,
    ``peak_ratio_last_1``, ``time_ratio_last_1``; ``base_samples``.
  - ``memory_refit``: the same for the + consumer refit rung (the default
    ``swapper swap --calib``), or null when that rung is not run (``--quick``).
- ``goals``: list of {``goal``, ``where``, ``measured``, ``met`` (bool|null)}: the
  project's own performance goals (:mod:`swapper.bench.goals`).

Renamed in schema /1 (same values): ``targets`` -> ``goals`` (and its rows'
``target`` -> ``goal``), a family's ``targets`` -> ``surrogates``; ``delta_pp``
(rung − original) -> ``drop_pp`` (original − rung), so "target" means a target
profile only and every figure uses one sign.
"""
from __future__ import annotations

import json
import logging
import os
import platform
from pathlib import Path

import numpy as np
import onnxruntime as ort

from swapper import api
from swapper.bench.goals import check_goals
from swapper.bench.markdown import write_markdown, write_plots
from swapper.bench.measure import (
    RUNGS,
    FamilyRun,
    floor_model,
    int8_original,
    int8_view,
    original_reference,
    plain_pass_seconds,
    quality_ladder,
    speed,
    tool_cost,
)
from swapper.bench.memory import memory_ratios, memory_section
from swapper.bench.rungs import family_options
from swapper.check.compare import Reference
from swapper.core.files import ensure_folder
from swapper.core.jsonable import json_safe
from swapper.core.model_io import (
    LoadedModel,
    atomic_write_bytes,
    load_model,
    save_model,
)
from swapper.data.dataset import Dataset, batches, subset
from swapper.data.demo import DEMO_DIR, demo_inputs
from swapper.errors import SwapperError, UsageError
from swapper.options import DEFAULT_TARGET
from swapper.plan.plan import Plan, make_plan
from swapper.progress import RichBars, Silent
from swapper.report.paths import utc_stamp

logger = logging.getLogger(__name__)

SCHEMA = "swapper.bench/1"
BATCH = 64
SEED = 0
SCALE = {"blocks": 16, "widths": [16, 32], "size": 32, "model_seed": 0, "calib": 256, "calib_seed": 1,
         "val": 128, "val_seed": 2, "memory_base": 64}
FULL = {"calib": None, "val": None, "memory_factors": [1, 4, 16], "rungs": list(RUNGS)}
QUICK = {"calib": 32, "val": 64, "memory_factors": [1, 2], "rungs": [r for r in RUNGS if r != "refit"],
         "repeats": 3, "scale_calib": 32, "scale_val": 32}


def machine_info() -> dict:
    """CPU model, core count and the versions that decide the timings."""
    cpu = platform.processor() or platform.machine()
    try:
        with open("/proc/cpuinfo") as fh:
            cpu = next((ln.split(":", 1)[1].strip() for ln in fh if ln.startswith("model name")), cpu)
    except OSError:
        pass
    return {"cpu": cpu, "cores": os.cpu_count(), "python": platform.python_version(),
            "onnxruntime": ort.__version__, "numpy": np.__version__, "platform": platform.platform()}


def families_for(plan: Plan, *, quick: bool) -> list[tuple[str, str | None]]:
    """(family name, ``to`` for api.swap): the default plan's per-site surrogates, then relu."""
    surrogates = sorted({s.surrogate for s in plan.swaps})
    if not surrogates:
        return []
    first = (surrogates[0], surrogates[0]) if len(surrogates) == 1 else ("default", None)
    fams = [first] + ([("relu", "relu")] if first[0] != "relu" else [])
    return fams[:1] if quick else fams


def _command(models: list[Path], demo: bool, calib, val, out_root: Path, scale: bool, quick: bool,
             repeats: int, target: str | None) -> str:
    parts = ["swapper", "bench"] + [str(m) for m in models]
    parts += ["--demo"] if demo else []
    parts += [f"--calib {calib}"] if calib else []
    parts += [f"--val {val}"] if val else []
    parts += [f"--out {out_root}", "--scale" if scale else "--no-scale"]
    parts += ["--quick"] if quick else []
    parts += [f"--latency-runs {repeats}"] if repeats else ["--no-latency"]
    parts += [f"--target {target or 'none'}"]
    return " ".join(parts)


def _folder(out_root: Path) -> tuple[Path, str]:
    stamp = utc_stamp()
    ensure_folder(out_root, "results folder")
    folder, k = Path(out_root) / stamp, 0
    while folder.exists():  # two runs in one second: keep both
        k += 1
        folder = Path(out_root) / f"{stamp}-{k}"
    return ensure_folder(folder, "results folder"), stamp


def _bench_model(name: str, loaded: LoadedModel, calib: Dataset, val: Dataset, *, synthetic: bool,
                 calib_path: Path | None, settings: dict, log, memory_extra: dict, progress=None) -> dict:
    """Every measurement for one model (all families, then memory)."""
    plan = make_plan(loaded.model, api.scan(loaded).sites, target=api.resolve_target(settings["target"]))
    fams = families_for(plan, quick=settings["quick"])
    entry = {"name": name, "path": str(loaded.path), "synthetic": synthetic, "calib_samples": calib.n,
             "val_samples": val.n, "sites": [s.site_id for s in plan.swaps], "families": [], "memory": None,
             "memory_refit": None}
    if not fams:
        log(f"{name}: nothing to swap, skipped")
        entry["memory"] = {"factors": [], **memory_ratios({}, [])}
        return entry
    batch = settings["batch_size"]
    lat_batches = sorted({1, min(batch, val.n)})
    # The original runs over val once; every rung and int8 model of every family is compared with that pass.
    original = original_reference(loaded.model, val, batch_size=batch)
    plain = plain_pass_seconds(original.session, calib, batch_size=batch)
    log(f"{name}: plain pass over {calib.n} calibration samples {plain:.4f}s")
    int8_cache: dict = {}  # the int8 original, quantized and scored once per model
    for family, to in fams:
        flog = lambda msg, f=family: log(f"{name} [{f}] {msg}")  # noqa: E731
        run = quality_ladder(loaded, calib, val, original=original, rungs=tuple(settings["rungs"]),
                             family=family_options(to, batch_size=batch, seed=SEED, target=settings["target"]),
                             log=flog)
        fam = {"family": family, "surrogates": {}, "ladder": run.ladder, "cost": None, "cost_refit": None,
               "speed": {}, "int8": None, "notes": run.notes}
        if run.refit_result is not None:
            fam["cost_refit"] = tool_cost(run.refit_result, plain)
            flog(f"cost with refit: calibration {fam['cost_refit']['total_s']:.3f}s = "
                 f"{fam['cost_refit']['ratio_total']:.1f}x plain pass")
        entry["families"].append(fam)
        if run.swap_result is None:
            fam["notes"].append("no sequential + bias candidate: cost and speed not measured")
            continue
        fam["surrogates"] = {s.site_id: s.surrogate for s in run.swap_result.plan.swaps}
        fam["cost"] = tool_cost(run.swap_result, plain)
        flog(f"cost: calibration {fam['cost']['total_s']:.3f}s = {fam['cost']['ratio_total']:.1f}x plain pass")
        if settings["repeats"]:
            floor = floor_model(loaded, run.swap_result)
            fam["speed"] = speed(original.session, run.swapped, floor, val, batch_sizes=lat_batches,
                                 repeats=settings["repeats"], progress=progress)
            flog("speed: " + ", ".join(f"batch {b} ratio {s['ratio']:.3f}" for b, s in fam["speed"].items()))
        else:
            fam["notes"].append("latency not measured (--no-latency)")
        _bench_int8(fam, run, loaded, original, int8_cache, calib, val, batch=batch,
                    lat_batches=lat_batches if settings["repeats"] else [], repeats=settings["repeats"], log=flog,
                    progress=progress)
    spec = {"model": str(loaded.path), "calib": str(calib_path) if calib_path else None, "batch_size": batch,
            "to": fams[0][1], "target": settings["target"], **memory_extra}
    sections = ["memory"] + (["memory_refit"] if "refit" in settings["rungs"] else [])
    for key in sections:
        rung = {"rung": "refit"} if key == "memory_refit" else {}
        entry[key] = memory_section(spec | rung, settings["memory_factors"], log=lambda m: log(f"{name} {m}"))
        entry[key]["base_samples"] = memory_extra.get("base") or calib.n
    return entry


def _bench_int8(fam: dict, run: FamilyRun, loaded: LoadedModel, original: Reference, int8_cache: dict, calib: Dataset,
                val: Dataset, *, batch: int, lat_batches: list[int], repeats: int, log, progress=None) -> None:
    """Fill ``fam["int8"]``, or note why it could not be measured (quantization is allowed to fail)."""
    from swapper.check.int8 import quantize_int8

    feeds = lambda: (b.feeds for b in batches(calib, batch))  # noqa: E731
    try:
        if "original" not in int8_cache:  # stays unset after a failure: the next family tries again
            int8_cache["original"] = int8_original(original, quantize_int8(loaded.model, feeds()), val,
                                                   batch_size=batch)
        q_swapped = quantize_int8(run.swapped, feeds())
        fam["int8"] = int8_view(original, int8_cache["original"], q_swapped, val, batch_sizes=lat_batches,
                                repeats=repeats, batch_size=batch, progress=progress)
        log(f"int8: {fam['int8']['metric']} {_figure(fam['int8']['original'])} -> "
            f"{_figure(fam['int8']['swapped'])}")
    except SwapperError as exc:
        fam["notes"].append(f"int8 not measured: {exc}")
        log(f"int8 not measured: {exc}")


def _figure(value) -> str:
    """A ladder figure for a log line: fractions as percentages, dB and RMSE to 4 significant digits."""
    if value is None:
        return "n/a"
    return f"{100 * value:.2f}%" if 0.0 <= value <= 1.0 else f"{value:.4g}"


def _inputs(models: list[Path], demo: bool, calib: Path | None, val: Path | None) -> list[tuple[Path, Path, Path | None]]:
    """(model, calib, val) per model to benchmark."""
    todo = []
    if demo:
        todo += demo_inputs(DEMO_DIR)  # each model with the data files manifest.json names for it
    if models:
        if calib is None:
            raise UsageError("benchmarking your own models needs a calibration set (--calib)")
        todo += [(Path(m), Path(calib), Path(val) if val else None) for m in models]
    return todo


def run_bench(models: list[Path], *, demo: bool, calib: Path | None, val: Path | None, out_root: Path,
              scale: bool, quick: bool, repeats: int, console=None, target: str | None = DEFAULT_TARGET) -> Path:
    """Benchmark ``models`` (and/or the demo and scale models); return the results folder.

    ``target`` (a profile name or path; None: no target) decides the default family's surrogates and
    forms, and every family's forms, as ``swapper swap --target`` does.
    """
    todo = _inputs(models, demo, calib, val)
    if not todo and not scale:
        raise UsageError("nothing to benchmark: give models, --demo, or --scale")
    mode = QUICK if quick else FULL
    repeats = min(repeats, QUICK["repeats"]) if quick else repeats  # 0: latency not measured
    settings = {
        "command": _command(models, demo, calib, val, out_root, scale, quick, repeats, target), "quick": quick,
        "target": target,
        "repeats": repeats, "batch_size": BATCH, "latency_batches": f"1 and min({BATCH}, validation samples)", "threads": 1,
        "graph_optimization": "all", "memory_factors": mode["memory_factors"], "rungs": mode["rungs"],
        "family_rule": "per-site surrogate the target's plan chooses (named after it when all sites share one, "
                       "else 'default'), then relu" + ("; --quick: first family only" if quick else ""),
        "calib_limit": mode["calib"], "val_limit": mode["val"], "seed": SEED, "scale": None,
    }
    progress = RichBars() if console is not None and console.is_terminal else Silent()

    def log(msg: str) -> None:
        logger.info(msg)
        if console is not None:
            console.print(msg, highlight=False, markup=False)

    folder, stamp = _folder(out_root)
    results = {"schema": SCHEMA, "created_utc": stamp, "machine": machine_info(), "settings": settings,
               "models": [], "goals": []}
    log(f"bench: {len(todo)} model(s){' + scale model' if scale else ''} -> {folder}")
    for model_path, calib_path, val_path in todo:
        loaded = load_model(model_path)
        calib_ds = api.load_data(calib_path, loaded)
        val_ds = api.load_data(val_path, loaded) if val_path else calib_ds
        calib_ds = subset(calib_ds, mode["calib"]) if mode["calib"] else calib_ds
        val_ds = subset(val_ds, mode["val"]) if mode["val"] else val_ds
        entry = _bench_model(model_path.stem, loaded, calib_ds, val_ds, synthetic=False, calib_path=calib_path,
                             settings=settings, log=log, progress=progress,
                             memory_extra={"base": mode["calib"]} if mode["calib"] else {})
        if val_path is None:
            for fam in entry["families"]:
                fam["notes"].append("no --val: scored on the calibration set")
        results["models"].append(entry)
    if scale:
        results["models"].append(_bench_scale(folder, settings, quick, log, progress))
    results["goals"] = check_goals(results)
    _write_json(results, folder / "results.json", log)
    write_markdown(results, folder / "results.md")
    for png in write_plots(results, folder):
        log(f"plot: {png}")
    log(f"bench: wrote {folder / 'results.json'} and results.md")
    return folder


def _bench_scale(folder: Path, settings: dict, quick: bool, log, progress=None) -> dict:
    """Generate the synthetic scale model into the results folder and benchmark it."""
    from swapper.bench.scale_model import build_scale_model, scale_data

    cfg = dict(SCALE)
    if quick:
        cfg.update(calib=QUICK["scale_calib"], val=QUICK["scale_val"], memory_base=QUICK["scale_calib"])
    settings["scale"] = cfg
    model = build_scale_model(blocks=cfg["blocks"], widths=tuple(cfg["widths"]), size=cfg["size"],
                              seed=cfg["model_seed"])
    path = save_model(model, folder / "scale_model.onnx")
    log(f"scale model: {cfg['blocks']} Conv3x3+SiLU blocks, widths {cfg['widths']}, written to {path}")
    calib = scale_data(cfg["calib"], size=cfg["size"], seed=cfg["calib_seed"])
    val = scale_data(cfg["val"], size=cfg["size"], seed=cfg["val_seed"])
    # The memory runs regenerate the same seeded inputs in the child and take the first memory_base of them:
    # 16x of the full 256 would stream ~20 GB of recorded tensors through the disk cache.
    extra = {"synthetic_n": cfg["calib"], "synthetic_seed": cfg["calib_seed"], "base": cfg["memory_base"]}
    return _bench_model("scale_16x_conv_silu", load_model(path), calib, val, synthetic=True, calib_path=None,
                        settings=settings, log=log, memory_extra=extra, progress=progress)


def _write_json(results: dict, path: Path, log) -> None:
    """Plain JSON types only, NaN/Inf as null (strict JSON; each replacement logged), written atomically."""
    notes: list[str] = []
    payload = json_safe(results, notes, "results")
    for note in notes:
        log(f"results.json: {note}")
    atomic_write_bytes((json.dumps(payload, indent=2, allow_nan=False) + "\n").encode("utf-8"), path)
