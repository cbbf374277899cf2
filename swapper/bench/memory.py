"""Peak memory of calibration, each measurement in a fresh Python process.

Transformation: (model file, calibration set, replication factor) -> one
fresh interpreter (``python -m swapper.bench.memory SPEC``) that loads the
model and data, replicates the set lazily (``swapper.data.dataset.replicate``), reads
its resident set size right before calibrating (``VmRSS`` in
/proc/self/status), runs the calibration of the spec's rung (``rung``: the
sequential + bias-corrected one by default, or ``refit``), then
reads ``resource.getrusage(RUSAGE_SELF).ru_maxrss`` (KiB on Linux) and prints
one JSON line. A fresh process per factor means no allocator state, page or
session cache carries over from one measurement to the next.

``peak - baseline`` is what calibration itself added; across factors
1x, 4x, 16x it should stay flat (streaming to an on-disk cache) while the
wall time grows roughly linearly.
"""
from __future__ import annotations

import json
import logging
import os
import subprocess
import sys
import time

logger = logging.getLogger(__name__)

TIMEOUT_S = 3600


def _rss_kib() -> int:
    """Current resident set size in KiB (Linux /proc), or 0 where unavailable."""
    try:
        with open("/proc/self/status") as fh:
            for line in fh:
                if line.startswith("VmRSS:"):
                    return int(line.split()[1])
    except OSError:
        pass
    return 0


def _child(spec: dict) -> dict:
    """Run one calibration as described by ``spec`` and report its memory and time."""
    import resource

    from swapper import api
    from swapper.bench.rungs import family_options, rung_options
    from swapper.core.model_io import load_model
    from swapper.data.dataset import replicate, subset

    loaded = load_model(spec["model"])
    if spec.get("calib"):
        ds = api.load_data(spec["calib"], loaded)
    else:
        from swapper.bench.scale_model import scale_data

        ds = scale_data(spec["synthetic_n"], seed=spec["synthetic_seed"])
    if spec.get("base"):
        ds = subset(ds, spec["base"])
    ds = replicate(ds, spec["times"])
    baseline = _rss_kib()
    peak_before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    t0 = time.perf_counter()
    family = family_options(spec.get("to"), batch_size=spec["batch_size"], **({"target": spec["target"]}
                                                                                if "target" in spec else {}))
    api.swap(loaded, calib=ds, options=rung_options(spec.get("rung", "sequential_bias"), family))
    wall = time.perf_counter() - t0
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return {"times": spec["times"], "samples": ds.n, "baseline_kib": baseline, "peak_before_kib": peak_before,
            "peak_kib": peak, "delta_kib": max(0, peak - baseline), "wall_s": wall}


def measure_memory(spec: dict) -> dict:
    """Run :func:`_child` for ``spec`` in a fresh interpreter and return its JSON result."""
    env = dict(os.environ, OMP_NUM_THREADS="1")
    proc = subprocess.run([sys.executable, "-m", "swapper.bench.memory", json.dumps(spec, sort_keys=True)],
                          capture_output=True, text=True, timeout=TIMEOUT_S, env=env)
    lines = [ln for ln in proc.stdout.splitlines() if ln.startswith("{")]
    if proc.returncode != 0 or not lines:
        tail = (proc.stderr.strip().splitlines() or ["no output"])[-1]
        raise RuntimeError(f"memory measurement failed ({spec['times']}x{_rung_word(spec)}): {tail}")
    return json.loads(lines[-1])


def _rung_word(spec: dict) -> str:
    return ", +refit" if spec.get("rung") == "refit" else ""


def memory_section(spec: dict, factors: list[int], log=None) -> dict:
    """Memory and time at each replication factor, plus the ratios largest/1x."""
    out: dict = {"factors": factors, "method": "fresh process per factor; peak = ru_maxrss, baseline = VmRSS "
                 "right before calibrating; delta = peak - baseline (KiB)"}
    for times in factors:
        try:
            row = measure_memory(dict(spec, times=times))
        except (RuntimeError, subprocess.TimeoutExpired, json.JSONDecodeError) as exc:
            row = {"times": times, "error": str(exc)}
        out[str(times)] = row
        if log:
            log(f"memory {times}x{_rung_word(spec)}: " + (f"+{row['delta_kib'] / 1024:.1f} MiB, {row['wall_s']:.2f}s"
                                         if "delta_kib" in row else row["error"]))
    return out | memory_ratios(out, factors)


def memory_ratios(rows: dict, factors: list[int]) -> dict:
    """Largest factor over the first: memory delta, peak RSS and wall time (None unless both ran).

    ``ratio_16_1`` is ``ratio_last_1`` under the name the bench schema documents
    for the full run, so it is null unless the largest factor is 16. No factors
    (a model with nothing to swap) gives every ratio as None.
    """
    first = rows.get(str(factors[0]), {}) if factors else {}
    last = rows.get(str(factors[-1]), {}) if factors else {}
    ok = "delta_kib" in first and "delta_kib" in last

    def ratio(key: str) -> float | None:
        return last[key] / first[key] if ok and first[key] > 0 else None

    last_1 = ratio("delta_kib")
    return {"ratio_last_1": last_1, "ratio_16_1": last_1 if factors and factors[-1] == 16 else None,
            "peak_ratio_last_1": ratio("peak_kib"), "time_ratio_last_1": ratio("wall_s")}


if __name__ == "__main__":  # the fresh process side of measure_memory
    logging.basicConfig(level=logging.WARNING)
    print(json.dumps(_child(json.loads(sys.argv[1]))), flush=True)
