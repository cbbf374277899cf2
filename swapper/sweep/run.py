"""Run a sensitivity sweep: every candidate at every eligible site, swapped alone, in parallel.

Transformation: (model, calibration set, validation set, target, gate rule,
settings) -> the ``swapper.sweep/1`` payload (:mod:`swapper.sweep.schema`).

1. Sites and candidates (:mod:`swapper.sweep.candidates`).
2. One recording of the original's site inputs and outputs on the
   calibration set, to ``.npy`` files in the work folder
   (:func:`swapper.calibrate.recorded.record_sites`); the model planned on is
   saved beside it. Every candidate reads these instead of running the
   original again.
3. Candidates go out in groups (one calibration serves the refit variants of
   one swap, :mod:`swapper.sweep.worker`) through joblib: sequentially in this
   process for one job; ``jobs`` worker processes (loky) on this machine; or,
   with ``scheduler``, the workers of an existing dask.distributed cluster
   through dask's joblib backend (the ``cluster`` extra; the work folder and
   the data paths must be readable by the workers). Results come back as
   they finish (a progress bar counts them); a candidate that fails is
   recorded with its reason; a worker that dies fails the candidates still
   out, and the sweep keeps what came back.
4. Savings (:mod:`swapper.sweep.savings`) and the Pareto front.

Timings of candidates run side by side share the machine: on a measured
target they use the calling thread's CPU time (:mod:`swapper.check.on_target`),
which other processes do not inflate, but caches and memory bandwidth are
shared; use ``jobs=1`` when the savings matter more than the wall time.
"""
from __future__ import annotations

import logging
import shutil
import tempfile
import time
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path

import onnx

from swapper.calibrate.recorded import record_sites
from swapper.check.gate import GateRule, preflight
from swapper.core.jsonable import json_safe
from swapper.core.model_io import sha256_file
from swapper.data.dataset import Dataset
from swapper.data.source import DataSource
from swapper.errors import UsageError, first_line
from swapper.progress import Silent
from swapper.scan.sites import Site
from swapper.sweep.candidates import PLACEMENTS, SiteCandidates, site_candidates, spec_dict
from swapper.sweep.cost import UNITS, allowance
from swapper.sweep.savings import fill_savings, pareto_front
from swapper.sweep.schema import SCHEMA, validate_sweep
from swapper.sweep.worker import SweepJob, run_group
from swapper.targets import TargetProfile

logger = logging.getLogger(__name__)


@dataclass(frozen=True)
class SweepSettings:
    """What a sweep tries and how it runs (the ``swapper sweep`` options)."""

    surrogates: tuple[str, ...] | None = None  # None: every candidate surrogate of each function
    placements: tuple[str, ...] = PLACEMENTS
    refit: tuple[bool, ...] = (False, True)
    paying_only: bool = False  # only surrogates the profile's prior says are cheaper than the site's ops
    site_ids: tuple[str, ...] | None = None
    only: str | None = None
    include_gates: bool = False
    include_outputs: bool = False
    batch_size: int = 64
    seed: int = 0
    repeats: int = 20  # timed runs per model on a measured target (savings are pooled over sites)
    timing_scope: str = "neighbourhood"  # or "model": what is timed per candidate (swapper.sweep.timing)
    bias_correction: bool = True
    jobs: int = 1
    scheduler: str | None = None  # a dask.distributed scheduler address (or a Client / cluster object)
    work_dir: str | None = None  # where the recording goes (default: a temporary folder, removed after)
    strict_data: bool = False
    extra: dict = field(default_factory=dict)


def _where(data) -> str | None:
    path = getattr(data, "path", None)
    return None if path is None else str(path)


def _backend(settings: SweepSettings):
    """(joblib config context, backend name, workers, dask client or None)."""
    from joblib import parallel_config

    if settings.scheduler is not None:
        try:
            from distributed import Client
        except ImportError:
            raise UsageError("--scheduler needs dask.distributed: pip install 'swapper[cluster]'") from None
        target = settings.scheduler
        try:
            client = target if isinstance(target, Client) else Client(target, timeout="20s")
        except (OSError, TimeoutError, ValueError) as exc:
            raise UsageError(f"cannot reach the dask scheduler at {target}: {first_line(exc)}") from None
        workers = max(1, sum(client.nthreads().values()))
        return parallel_config(backend="dask", n_jobs=workers), "dask", workers, client
    if settings.jobs > 1:
        return parallel_config(backend="loky", n_jobs=settings.jobs), "loky", settings.jobs, None
    return parallel_config(backend="sequential", n_jobs=1), "sequential", 1, None


def _dispatch(job: SweepJob, groups: list[list[dict]], settings: SweepSettings, progress) -> tuple[list, dict]:
    """Run every group; returns (results, run facts). Never raises for a candidate or a worker that dies."""
    from joblib import Parallel, delayed

    config, backend, workers, client = _backend(settings)
    total = sum(len(g) for g in groups)
    results, done = [], set()
    t0 = time.perf_counter()
    try:
        with config, progress.task(f"sweep: {total} candidates on {workers} worker(s)", total) as advance:
            runner = Parallel(return_as="generator_unordered")
            try:
                for out in runner(delayed(run_group)(job, g) for g in groups):
                    results.extend(out)
                    done.update(r["id"] for r in out)
                    advance(len(out))
            except Exception as exc:  # noqa: BLE001 - a dead worker fails what was still out, not the sweep
                why = f"worker lost: {type(exc).__name__}: {first_line(exc)}"
                logger.warning("sweep: %s", why)
                results += [{**s, "status": "failed", "reason": why, "metric": None, "timing": None, "seconds": 0.0}
                            for g in groups for s in g if s["id"] not in done]
    finally:
        if client is not None and client is not settings.scheduler:
            client.close()
    return results, {"workers": workers, "backend": backend, "sweep_s": time.perf_counter() - t0,
                     "scheduler": None if settings.scheduler is None else str(settings.scheduler)}


def _original_ms(model: onnx.ModelProto, profile: TargetProfile, calib: Dataset, settings: SweepSettings) -> float:
    """The original's median time on the measured target (the whole model, the calibration batch)."""
    from swapper.check.on_target import time_on_target
    from swapper.data.dataset import batches

    feeds = [b.feeds for b in batches(calib, settings.batch_size, limit=256)]
    timing = time_on_target(model, model, profile, feeds[0], calib_batches=feeds, repeats=settings.repeats)
    return timing.original.median_ms


def _groups(entries: list[SiteCandidates]) -> tuple[list[list[dict]], list[dict]]:
    """(groups to run, candidates that copy another's results)."""
    groups: dict[str, list[dict]] = {}
    copies = []
    for entry in entries:
        for spec in entry.candidates:
            d = spec_dict(spec)
            if spec.same_as is not None:
                copies.append(d)
            else:
                groups.setdefault(spec.group(), []).append(d)
    return list(groups.values()), copies


def _complete(c: dict) -> dict:
    """A result with every key of the schema (failed ones lack some)."""
    return {"nonfinite": False, "timing_reused": False, "mse_fit": None, "notes": [], "metric": None,
            "timing": None, "seconds": 0.0, **c}


def sweep(model: onnx.ModelProto, sites: list[Site], calib: DataSource | Dataset, val: DataSource | Dataset, *,
          calib_data: Dataset, val_data: Dataset, profile: TargetProfile | None, rule: GateRule,
          settings: SweepSettings = SweepSettings(), model_path: str | Path | None = None,
          progress=None) -> dict:
    """Sweep ``model`` (module docstring) and return the ``swapper.sweep/1`` payload.

    ``calib``/``val`` are what workers load (a DataSource with a path, or an
    in-memory Dataset sent along); ``calib_data``/``val_data`` the same sets
    loaded here (the recording and the metric are made from them).
    """
    progress = progress or Silent()
    t_start = time.perf_counter()
    choice = preflight(model, val_data, rule, batch_size=settings.batch_size)
    entries = site_candidates(model, sites, profile, surrogates=list(settings.surrogates or []) or None,
                              refit=settings.refit, placements=settings.placements,
                              paying_only=settings.paying_only, site_ids=list(settings.site_ids or []) or None,
                              only=settings.only, include_gates=settings.include_gates,
                              include_outputs=settings.include_outputs)
    groups, copies = _groups(entries)
    folder = Path(settings.work_dir or tempfile.mkdtemp(prefix="swapper-sweep-"))
    folder.mkdir(parents=True, exist_ok=True)
    try:
        (folder / "original.onnx").write_bytes(model.SerializeToString())
        t0 = time.perf_counter()
        if entries:
            with progress.task("recording the original's site tensors", None):
                recording = record_sites(model, [e.site for e in entries], calib_data, folder / "recording",
                                         batch_size=settings.batch_size)
        record_s = time.perf_counter() - t0
        measured = profile is not None and profile.costs_from == "measured"
        elements = {}
        for e in entries:
            x = recording.array(e.site.id, "x")
            elements[e.site.id] = int(x[0].size) if x.shape[0] else e.site.elements
        job = SweepJob(str(folder), calib, val, None if profile is None else (profile.path or profile.name), rule,
                       batch_size=settings.batch_size, seed=settings.seed, bias_correction=settings.bias_correction,
                       repeats=settings.repeats, timing_scope=settings.timing_scope,
                       strict_data=settings.strict_data)
        original_ms = _original_ms(model, profile, calib_data, settings) if measured and groups else None
        results, run = _dispatch(job, groups, settings, progress) if groups else \
            ([], {"workers": 0, "backend": "sequential", "sweep_s": 0.0, "scheduler": None})
    finally:
        if settings.work_dir is None:
            shutil.rmtree(folder, ignore_errors=True)
    by_id = {r["id"]: _complete(r) for r in results}
    for c in copies:  # the same model as another candidate: its results, under this id and placement policy
        twin = by_id.get(c["same_as"])
        by_id[c["id"]] = _complete({**(twin or {}), **c, "status": twin["status"] if twin else "failed",
                                    "reason": twin["reason"] if twin else "its twin did not run",
                                    "timing_reused": True})  # counted once where savings are pooled
    sites_out = []
    for e in entries:
        entry = e.header() | {"elements": elements[e.site.id], "candidates": [by_id[s.id] for s in e.candidates]}
        sites_out.append(entry)
    fill_savings(sites_out, None if profile is None else profile.costs_from, original_ms)
    points = [(c["id"], c["saving"]["value"], c["metric"]["cost"]) for s in sites_out for c in s["candidates"]
              if c["status"] == "ok" and c["saving"]["value"] is not None and c["metric"]["cost"] is not None]
    scope = ("in the site's neighbourhood (its producer, the site, the layers reading it)"
             if settings.timing_scope == "neighbourhood" else "in the whole graph")
    payload = {
        "schema": SCHEMA,
        "created_utc": datetime.now(timezone.utc).isoformat(timespec="seconds"),
        "model": {"path": None if model_path is None else str(model_path),
                  "sha256": sha256_file(model_path) if model_path is not None and Path(model_path).is_file() else None,
                  "opset": next((o.version for o in model.opset_import if o.domain in ("", "ai.onnx")), None)},
        "calibration": {"path": _where(calib), "samples": calib_data.n},
        "validation": {"path": _where(val), "samples": val_data.n},
        "target": {"name": None if profile is None else profile.name,
                   "costs_from": None if profile is None else profile.costs_from,
                   "original_ms": original_ms,
                   "how": (f"measured in context: each candidate timed against the original {scope} at the "
                           "profile's settings; savings pooled over sites with the same chains") if measured else
                          ("declared by the profile: its cost per element of the site's chain and the candidate's, "
                           "times the site's elements") if profile is not None else
                          "no target: the registry's relative costs times the site's elements"},
        "metric": {"name": choice.metric, "outputs": list(choice.outputs), "unit": UNITS[choice.metric],
                   "allowance": allowance(rule, choice.metric)},
        "settings": {"surrogates": None if settings.surrogates is None else list(settings.surrogates),
                     "placements": list(settings.placements), "refit": list(settings.refit),
                     "paying_only": settings.paying_only, "batch_size": settings.batch_size, "seed": settings.seed,
                     "repeats": settings.repeats, "timing_scope": settings.timing_scope,
                     "bias_correction": settings.bias_correction},
        "run": {**run, "record_s": record_s, "total_s": time.perf_counter() - t_start,
                "candidates": sum(len(e.candidates) for e in entries), "groups": len(groups),
                "failed": sum(c["status"] == "failed" for c in by_id.values())},
        "sites": sites_out,
        "pareto": pareto_front(points),
        "notes": [],
    }
    in_bodies = [site.id for site in sites if getattr(site, "body", ()) and site.supported]
    notes: list[str] = [] if not in_bodies else [
        f"not swept: {', '.join(in_bodies)} inside If/Loop/Scan bodies (the sweep records the main graph only); "
        "`swapper swap --plan all` swaps them"]
    payload = json_safe(payload, notes, "sweep")
    payload["notes"] += notes
    validate_sweep(payload)
    return payload
