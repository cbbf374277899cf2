"""Render ``swapper.bench.run/1`` results as Markdown tables (and, optionally, PNG plots).

Transformation: the results dict built by swapper/bench/run.py -> ``results.md``
(machine line, reproducing command, one table per section, target checks) and,
when matplotlib is importable, ``ladder.png`` and ``speed.png``.
"""
from __future__ import annotations

import logging
from pathlib import Path

from swapper.bench.measure import RUNGS
from swapper.core.model_io import atomic_write_bytes
from swapper.report.numbers import num, signed

logger = logging.getLogger(__name__)

RUNG_TITLES = {"naive": "naive", "local": "local", "sequential": "sequential", "sequential_bias": "seq+bias",
               "refit": "+refit"}


def _pct(x) -> str:
    return "–" if x is None else f"{100 * x:.2f}"


def _pp(x) -> str:
    return signed(x)  # a drop that rounds to zero reads 0.00, never -0.00


def _score(x, metric: str | None) -> str:
    """A ladder figure: percent for accuracy and agreement, the cosine itself, dB for SQNR, RMSE as is."""
    if metric in ("accuracy", "agreement"):
        return _pct(x)
    return num(x, {"cosine": ".5f", "sqnr": ".1f"}.get(metric, ".4g"))


def _table(header: list[str], rows: list[list[str]]) -> list[str]:
    lines = ["| " + " | ".join(header) + " |", "|" + "|".join("---" for _ in header) + "|"]
    lines += ["| " + " | ".join(r) + " |" for r in rows]
    return lines + [""]


def _model_label(m: dict) -> str:
    return m["name"] + (" (synthetic)" if m["synthetic"] else "")


def _ladder(results: dict) -> list[str]:
    rows = []
    for m in results["models"]:
        for f in m["families"]:
            lad = f["ladder"]
            metric = lad["metric"]
            cells = [_model_label(m), f["family"], metric or "–", _score(lad["original"], metric)]
            for r in RUNGS:
                cells.append("–" if lad[r] is None else f"{_score(lad[r], metric)} ({_pp(lad['drop_pp'][r])})")
            rows.append(cells)
    head = ["model", "family", "metric", "original"] + [f"{RUNG_TITLES[r]} (drop pp)" for r in RUNGS]
    lines = ["## Quality ladder", "", "The gate's default figure: validation top-1 accuracy % with labels, top-1 "
             "agreement % with the original for class scores without labels, mean per-sample cosine to the "
             "original's output for embeddings and dense maps (SQNR in dB or RMSE for other outputs); drop = original − rung "
             "in points for the percentages (negative: the rung scores higher).", ""] + _table(head, rows)
    if any(m["synthetic"] for m in results["models"]):
        lines += ["Synthetic models have random, untrained weights and a head scaled to unit-variance scores, so "
                  "their top-1 is fragile (compare the int8 original's agreement below): use them for cost and "
                  "speed, not for quality.", ""]
    return lines


# Columns of the tool-cost table: (results key, header, format); times in seconds unless scaled.
COST_COLUMNS = [("plain_pass_s", "plain pass ms", ".3f"), ("record_s", "record s", ".3f"),
                ("segments_s", "segments s", ".3f"), ("fit_s", "fit s", ".3f"),
                ("bias_correction_s", "bias corr. s", ".3f"), ("refit_s", "refit s", ".3f"), ("total_s", "total s", ".3f"),
                ("ratio_record", "record ×pass", ".1f"), ("ratio_fit", "fit ×pass", ".1f"),
                ("ratio_total", "total ×pass", ".1f")]


def _cost_cells(cost: dict | None) -> list[str]:
    """One row of the tool-cost table; dashes for a family whose cost was not measured (cost null)."""
    cost = cost or {}
    cells = []
    for key, _, spec in COST_COLUMNS:
        value = cost.get(key)
        if key == "plain_pass_s" and value is not None:
            value = 1e3 * value  # one pass is milliseconds, not seconds
        cells.append(num(value, spec))
    return cells


def _cost(results: dict) -> list[str]:
    rows = []
    for m in results["models"]:
        for f in m["families"]:
            rows.append([_model_label(m), f["family"], RUNG_TITLES["sequential_bias"]] + _cost_cells(f["cost"]))
            if f.get("cost_refit"):
                rows.append([_model_label(m), f["family"], RUNG_TITLES["refit"]] + _cost_cells(f["cost_refit"]))
    head = ["model", "family", "rung"] + [title for _, title, _ in COST_COLUMNS]
    lines = ["## Tool cost", "", "Calibration over the calibration set (sequential + bias correction, and with the "
             "consumer refit where that rung ran), against one plain onnxruntime pass of the original over the same "
             "set (1 thread, same batch, median of 3).", ""]
    return lines + _table(head, rows) + _memory(results)


def _memory(results: dict) -> list[str]:
    """The memory table, over the models whose memory was measured (a model with nothing to swap has no factors)."""
    measured = [(m, key) for m in results["models"] for key in ("memory", "memory_refit")
                if m.get(key) and m[key]["factors"]]
    if not measured:
        return []
    factors = measured[0][0][measured[0][1]]["factors"]
    rows = []
    for m, key in measured:
        mem = m[key]
        cells = [_model_label(m), RUNG_TITLES["refit" if key == "memory_refit" else "sequential_bias"]]
        for k in mem["factors"]:
            r = mem.get(str(k), {})
            cells.append(f"{r['samples']}: +{r['delta_kib'] / 1024:.1f} MiB, {r['wall_s']:.2f} s"
                         if "delta_kib" in r else r.get("error", "–"))
        cells += [num(mem["ratio_last_1"], ".3f"), num(mem["peak_ratio_last_1"], ".3f"),
                  num(mem["time_ratio_last_1"], ".2f")]
        rows.append(cells)
    head = ["model", "rung"] + [f"{k}× (samples: peak−baseline, time)" for k in factors] + [
        f"mem {factors[-1]}×/1×", f"peak RSS {factors[-1]}×/1×", f"time {factors[-1]}×/1×"]
    return ["Peak memory of calibration, each factor in a fresh process (peak = ru_maxrss, baseline = RSS "
            "right before calibrating).", ""] + _table(head, rows)


def _speed(results: dict) -> list[str]:
    rows, qrows = [], []
    for m in results["models"]:
        for f in m["families"]:
            for bs, s in f["speed"].items():
                rows.append([_model_label(m), f["family"], bs, num(s["original_ms"], ".4f"),
                             num(s["swapped_ms"], ".4f"), num(s["floor_ms"], ".4f"), num(s["ratio"], ".3f"),
                             num(s["saving_fraction"], ".2f") if s["saving_fraction"] is not None else "– (noise)"])
            q = f.get("int8")
            if q:
                for bs, s in q["speed"].items():
                    qrows.append([_model_label(m), f["family"], bs, q["metric"] or "–", _score(q["original"], q["metric"]),
                                  _score(q["swapped"], q["metric"]), _pp(q["drop_pp"]), num(s["original_ms"], ".4f"),
                                  num(s["swapped_ms"], ".4f"), num(s["ratio"], ".3f")])
    head = ["model", "family", "batch", "original ms", "swapped ms", "floor ms", "swapped/original",
            "saving achieved"]
    lines = ["## Model speed", "", "Median latency, onnxruntime CPU, full graph optimisation, 1 thread, "
             "interleaved runs. Floor = every swapped site replaced by Identity; saving achieved = "
             "(orig − swapped)/(orig − floor).", ""] + _table(head, rows)
    if qrows:
        head = ["model", "family", "batch", "metric", "int8 original", "int8 swapped", "drop pp",
                "int8 original ms", "int8 swapped ms", "ratio"]
        lines += ["### int8 (QDQ, U8S8, MinMax on the calibration set)", "",
                  "The ladder's figure, measured against the fp32 original.", ""] + _table(head, qrows)
    return lines


def _goals(results: dict) -> list[str]:
    rows = [[t["goal"], t["where"], t["measured"], {True: "met", False: "missed", None: "n/a"}[t["met"]]]
            for t in results.get("goals", [])]
    return ["## Goals", ""] + _table(["goal", "where", "measured", "status"], rows) if rows else []


def write_markdown(results: dict, path: Path) -> Path:
    """Write results.md for ``results`` at ``path``."""
    mc = results["machine"]
    lines = [
        f"# swapper bench — {results['created_utc']}", "",
        f"Machine: {mc['cpu']}, {mc['cores']} cores; Python {mc['python']}, onnxruntime {mc['onnxruntime']}, "
        f"numpy {mc['numpy']}.", "",
        f"Reproduce: `{results['settings']['command']}`", "",
    ]
    if results["settings"]["quick"]:
        lines += ["**Quick run: tiny settings, a smoke test, not a measurement.**", ""]
    lines += _ladder(results) + _cost(results) + _speed(results) + _goals(results)
    return atomic_write_bytes("\n".join(lines).encode("utf-8"), path)


def write_plots(results: dict, folder: Path) -> list[Path]:
    """ladder.png and speed.png when matplotlib is importable; [] otherwise."""
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:
        logger.info("matplotlib not installed: no plots")
        return []
    rows = [(f"{m['name']}\n{f['family']}", f) for m in results["models"] for f in m["families"]
            if f["ladder"]["metric"] in ("accuracy", "agreement", "cosine")]  # figures on one 0..100 scale
    if not rows:
        return []
    written = []
    fig, ax = plt.subplots(figsize=(max(6, 1.6 * len(rows)), 4))
    width = 0.8 / (len(RUNGS) + 1)
    for k, rung in enumerate(("original",) + RUNGS):
        vals = [f["ladder"][rung] for _, f in rows]
        ax.bar([i + k * width for i in range(len(rows))], [100 * v if v is not None else 0 for v in vals],
               width, label=RUNG_TITLES.get(rung, rung))
    ax.set_xticks([i + 0.4 for i in range(len(rows))], [r for r, _ in rows], fontsize=7)
    ax.set_ylabel("top-1 % (accuracy or agreement), or cosine × 100")
    ax.set_ylim(bottom=max(0.0, min(100 * (f["ladder"]["naive"] or 1) for _, f in rows) - 10))
    ax.legend(fontsize=7, ncol=3)
    fig.tight_layout()
    written.append(folder / "ladder.png")
    fig.savefig(written[-1], dpi=110)
    plt.close(fig)

    fig, ax = plt.subplots(figsize=(max(6, 1.6 * len(rows)), 4))
    batch_keys = sorted({bs for _, f in rows for bs in f["speed"]}, key=int)
    for k, bs in enumerate(batch_keys):
        vals = [f["speed"].get(bs, {}).get("ratio") for _, f in rows]
        ax.bar([i + k * 0.4 for i in range(len(rows))], [v or 0 for v in vals], 0.4, label=f"batch {bs}")
    ax.axhline(1.0, color="black", linewidth=0.8)
    ax.set_xticks([i + 0.2 for i in range(len(rows))], [r for r, _ in rows], fontsize=7)
    ax.set_ylabel("swapped / original latency")
    ax.legend(fontsize=7)
    fig.tight_layout()
    written.append(folder / "speed.png")
    fig.savefig(written[-1], dpi=110)
    plt.close(fig)
    return written
