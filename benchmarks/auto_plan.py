"""Benchmark of the automatic plan and the sweep (not a test: it times things).

    python benchmarks/auto_plan.py [--quick] [--out reports/bench]

Writes reports/bench/<UTC time>/auto_plan.json and auto_plan.md:

1. every demo model, ``swap --plan auto --budget 0.5`` on ort-cpu (the
   encoder judged by cosine, its gate's own metric): the written model's time
   against the original (median of ``RATIO_RUNS`` target timings, each the
   ratio of medians of 50 interleaved runs), the accuracy change, and on
   meter_resnet_silu the share of the identity floor's saving reached (floor:
   every swapped site replaced by Identity, ``rewrite_identity_floor``);
2. the SiLU models on ort-cpu-int8: swapped int8 / original int8;
3. the sweep's wall time on meter_resnet_silu with 1 and 2 workers against
   ceil(candidates / workers) × one calibrated single-site swap + one recording.
"""
from __future__ import annotations

import argparse
import json
import math
import statistics
import sys
import time
from datetime import datetime, timezone
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from swapper import api
from swapper.autoplan import auto_swap
from swapper.bench.run import machine_info
from swapper.check.gate import Budget, GateRule
from swapper.core.model_io import load_model
from swapper.data.demo import DEMO_DIR, demo_inputs
from swapper.data.source import DataSource
from swapper.options import SwapOptions
from swapper.report.numbers import signed
from swapper.rewrite.apply import rewrite_identity_floor
from swapper.sweep.run import SweepSettings

RATIO_RUNS = 3
SILU = ("meter_cnn_silu", "meter_resnet_silu")


def _ratio(original, candidate, target, calib) -> list[float]:
    return [api.time_on_target(original, candidate, target, calib=calib).ratio for _ in range(RATIO_RUNS)]


def auto_row(model: Path, calib: Path, val: Path, target: str, settings: SweepSettings, floor: bool) -> dict:
    loaded = load_model(model)
    t0 = time.perf_counter()
    res = auto_swap(loaded, calib=DataSource(calib), val=DataSource(val), rule=GateRule(Budget(0.5)),
                    options=SwapOptions(target=target), settings=settings)
    row = {"model": model.stem, "target": target, "seconds": time.perf_counter() - t0, "reason": res.reason,
           "sweep_run": res.sweep["run"], "candidates": res.sweep["run"]["candidates"],
           "chosen": {s["site_id"]: s["chosen"] for s in res.sites}, "written": res.swap is not None}
    if res.swap is None:
        return row
    calib_ds = api.load_data(calib, loaded)
    ratios = _ratio(loaded.model, res.swap.candidate, target, calib_ds)
    c = res.check.comparison
    row.update(ratios=ratios, ratio=statistics.median(ratios), metric=res.check.verdict.metric,
               drop_pp=None if c.drop() is None else c.drop()[0], agreement=c.agreement, approved=res.check.verdict.approved,
               cosine={k: v.get("cosine_mean") for k, v in c.output_errors.items()},
               swapped=[s.site_id for s in res.swap.plan.swaps])
    if floor:
        chosen = [s for s in res.swap.sites if s.id in {s.site_id for s in res.swap.plan.swaps}]
        every = [s for s in res.swap.sites if s.function == "silu"]
        fl = rewrite_identity_floor(loaded.model, every)
        floor_ratios = _ratio(loaded.model, fl, target, calib_ds)
        row.update(floor_ratio=statistics.median(floor_ratios), floor_ratios=floor_ratios,
                   floor_share=(1 - row["ratio"]) / (1 - statistics.median(floor_ratios)),
                   floor_sites=len(every), swapped_sites=len(chosen))
    return row


def single_swap_seconds(model: Path, calib: Path, blas_threads: int | None = 1) -> dict:
    """Wall time of one calibrated single-site swap (api.swap), per placement and refit, two sites each;
    BLAS limited to ``blas_threads`` as in a sweep worker (None: the library default)."""
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=blas_threads):
        return _single_swap_seconds(model, calib)


def _single_swap_seconds(model: Path, calib: Path) -> dict:
    loaded = load_model(model)
    calib_ds = api.load_data(calib, loaded)
    api.swap(loaded, calib=calib_ds, site_ids=["s1"], choices={"s1": "relu"})  # warm the start-parameter memo
    out = {}
    for fold in ("exact", "nodes"):
        for refit in (False, True):
            times = []
            for sid in ("s2", "s9"):
                t0 = time.perf_counter()
                api.swap(loaded, calib=calib_ds, site_ids=[sid], choices={sid: f"relu:Relu@{fold}"},
                         refit_consumers=refit)
                times.append(time.perf_counter() - t0)
            out[f"{fold}{'+refit' if refit else ''}"] = statistics.mean(times)
    return out


def sweep_walls(model: Path, calib: Path, val: Path, settings: SweepSettings) -> dict:
    loaded = load_model(model)
    singles = single_swap_seconds(model, calib)
    t_single = statistics.mean(singles.values())  # the sweep's candidates are these four kinds, equally many
    rows = {"blas_default_single_swap_s": single_swap_seconds(model, calib, None)}
    for jobs in (1, 2, "2 (warm)"):  # the third run finds loky's two worker processes started
        t0 = time.perf_counter()
        payload = api.sweep(loaded, calib=DataSource(calib), val=DataSource(val), rule=GateRule(Budget(0.5)),
                            settings=SweepSettings(**{**settings.__dict__, "jobs": int(str(jobs)[0])}))
        wall = time.perf_counter() - t0
        n = payload["run"]["candidates"]
        bound = math.ceil(n / int(str(jobs)[0])) * t_single + payload["run"]["record_s"]
        seconds = sum(c["seconds"] for s in payload["sites"] for c in s["candidates"])
        rows[jobs] = {"wall_s": wall, "candidates": n, "record_s": payload["run"]["record_s"],
                      "bound_s": bound, "met": wall <= bound, "failed": payload["run"]["failed"],
                      "candidate_seconds_sum": seconds}
    default = rows.pop("blas_default_single_swap_s")
    return {"single_swap_s": singles, "single_swap_s_blas_default": default, "t_single_s": t_single, "runs": rows}


def markdown(results: dict) -> str:
    lines = [f"# Automatic plan benchmark, {results['created_utc']}", "", f"machine: {results['machine']}", "",
             f"command: `{results['command']}`", "",
             "| model | target | candidates | swapped | metric | drop pp / cosine | ratio (median of 3) | floor share | s |",
             "|---|---|---|---|---|---|---|---|---|"]
    for r in results["auto"]:
        if not r["written"]:
            lines.append(f"| {r['model']} | {r['target']} | {r['candidates']} | nothing: {r['reason']} | | | | | "
                         f"{r['seconds']:.0f} |")
            continue
        acc = signed(r["drop_pp"]) if r.get("drop_pp") is not None else \
            ", ".join(f"{v:.5f}" for v in r["cosine"].values() if v is not None)
        share = f"{r['floor_share']:.2f} (floor {r['floor_ratio']:.3f})" if "floor_share" in r else ""
        lines.append(f"| {r['model']} | {r['target']} | {r['candidates']} | {len(r['swapped'])} | {r['metric']} | "
                     f"{acc} | {r['ratio']:.3f} ({', '.join(f'{x:.3f}' for x in r['ratios'])}) | {share} | "
                     f"{r['seconds']:.0f} |")
    w = results.get("sweep_walls")
    if w:
        lines += ["", f"single-site swap (s, mean of 2 sites, BLAS 1 thread): {json.dumps({k: round(v, 2) for k, v in w['single_swap_s'].items()})}",
                  "", f"same, BLAS default threads: {json.dumps({k: round(v, 2) for k, v in w['single_swap_s_blas_default'].items()})}",
                  "", "| workers | candidates | wall s | bound s | met | sum of candidates' own s |",
                  "|---|---|---|---|---|---|"]
        for jobs, r in w["runs"].items():
            lines.append(f"| {jobs} | {r['candidates']} | {r['wall_s']:.1f} | {r['bound_s']:.1f} | {r['met']} | "
                         f"{r['candidate_seconds_sum']:.1f} |")
    return "\n".join(lines) + "\n"


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--out", type=Path, default=ROOT / "reports" / "bench")
    ap.add_argument("--quick", action="store_true", help="relu only, no refit: a smoke run")
    ap.add_argument("--skip", default="", help="comma-separated parts to skip: auto,int8,walls")
    args = ap.parse_args()
    skip = set(filter(None, args.skip.split(",")))
    full = SweepSettings(jobs=2)
    if args.quick:
        full = SweepSettings(jobs=2, surrogates=("relu",), refit=(False,))
    stamp = datetime.now(timezone.utc).strftime("%Y%m%dT%H%M%SZ")
    folder = args.out / stamp
    folder.mkdir(parents=True, exist_ok=True)
    results = {"created_utc": stamp, "machine": machine_info(), "command": " ".join(["python"] + sys.argv),
               "auto": []}

    def save():
        (folder / "auto_plan.json").write_text(json.dumps(results, indent=1, default=str))
        (folder / "auto_plan.md").write_text(markdown(results))

    todo = demo_inputs(DEMO_DIR)
    if "auto" not in skip:
        for model, calib, val in todo:
            results["auto"].append(auto_row(model, calib, val, "ort-cpu", full, floor=model.stem == "meter_resnet_silu"))
            print(json.dumps(results["auto"][-1], default=str)[:400], flush=True)
            save()
    if "int8" not in skip:
        for model, calib, val in todo:
            if model.stem in SILU:
                results["auto"].append(auto_row(model, calib, val, "ort-cpu-int8", full, floor=False))
                print(json.dumps(results["auto"][-1], default=str)[:400], flush=True)
                save()
    if "walls" not in skip:
        model, calib, val = next(t for t in todo if t[0].stem == "meter_resnet_silu")
        results["sweep_walls"] = sweep_walls(model, calib, val, SweepSettings(surrogates=("relu",)))
        save()
    print(f"results: {folder}")


if __name__ == "__main__":
    main()
