"""Check ``swapper.bench.run/1`` results against the project's performance goals.

Transformation: results dict -> list of {goal, where, measured, met}. The
goals are the project's own (not a standard); a missed goal is reported,
never raised: the benchmark measures, it does not gate. (Called "targets"
before target profiles existed; that word now means a profile only.)
"""
from __future__ import annotations

import logging

from swapper.report.numbers import signed

logger = logging.getLogger(__name__)

MAX_DROP_PP = 1.0  # calibrated swap within 1 point of the original
MIN_SAVING = 0.80  # scale model, SiLU -> relu: at least 80% of the possible saving
MAX_COST_RATIO = 3.0  # calibration wall time <= 3x one plain pass
MAX_REFIT_COST_RATIO = 10.0  # with the consumer refit (the default swap with --calib): <= 10x one plain pass
MAX_MEMORY_RATIO = 1.10  # peak memory at 16x within +10% of 1x


def _row(goal: str, where: str, measured: str, met: bool | None) -> dict:
    return {"goal": goal, "where": where, "measured": measured, "met": met}


def check_goals(results: dict) -> list[dict]:
    """One row per (goal, model[, family]) that the results can speak to."""
    rows = []
    for m in results["models"]:
        for f in m["families"]:
            where = f"{m['name']} [{f['family']}]"
            drop = f["ladder"]["drop_pp"].get("sequential_bias")
            if not m["synthetic"] and drop is not None:
                rows.append(_row(f"calibrated swap within {MAX_DROP_PP:g} point of original", where,
                                 f"drop {signed(drop)} pp ({f['ladder']['metric']})", drop <= MAX_DROP_PP))
            for bs, s in sorted(f["speed"].items(), key=lambda kv: int(kv[0])):
                spread = ""
                if s["ratio"] > 1.0 and s.get("original_p90_ms") is not None and \
                        s["swapped_ms"] <= s["original_p90_ms"]:
                    spread = f" (inside the original's p10-p90 {s['original_p10_ms']:.4f}-{s['original_p90_ms']:.4f} ms)"
                rows.append(_row("swapped fp32 not slower than original", f"{where} batch {bs}",
                                 f"ratio {s['ratio']:.3f}{spread}", s["ratio"] <= 1.0))
                if m["synthetic"] and f["family"] == "relu":
                    frac = s["saving_fraction"]
                    rows.append(_row(f">= {MIN_SAVING:.0%} of possible saving (SiLU->relu, scale model)",
                                     f"{where} batch {bs}", "null (within noise)" if frac is None else f"{frac:.2f}",
                                     None if frac is None else frac >= MIN_SAVING))
            cost = f["cost"]
            if cost and cost["ratio_total"] is not None:
                rows.append(_row(f"calibration wall time <= {MAX_COST_RATIO:g}x one plain pass", where,
                                 f"{cost['ratio_total']:.1f}x ({cost['total_s']:.2f}s vs {cost['plain_pass_s']:.4f}s)",
                                 cost["ratio_total"] <= MAX_COST_RATIO))
            cost = f.get("cost_refit")
            if cost and cost["ratio_total"] is not None:
                rows.append(_row(f"calibration with consumer refit <= {MAX_REFIT_COST_RATIO:g}x one plain pass",
                                 where, f"{cost['ratio_total']:.1f}x ({cost['total_s']:.2f}s, refit "
                                 f"{cost['refit_s'] or 0:.2f}s, vs {cost['plain_pass_s']:.4f}s)",
                                 cost["ratio_total"] <= MAX_REFIT_COST_RATIO))
        for key, word in (("memory", ""), ("memory_refit", " (with consumer refit)")):
            mem = m.get(key) or {}
            if mem.get("ratio_last_1") is not None:
                last = mem["factors"][-1]
                rows.append(_row(f"peak memory at {last}x within +{MAX_MEMORY_RATIO - 1:.0%} of 1x{word}", m["name"],
                                 f"{mem['ratio_last_1']:.3f} (peak-baseline), time x{mem['time_ratio_last_1']:.2f}",
                                 mem["ratio_last_1"] <= MAX_MEMORY_RATIO))
    return rows
