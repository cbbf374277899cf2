"""One unit of sweep work, run in a worker process: the candidates of one swap, calibrated, compared, timed.

Transformation: (:class:`SweepJob`, the candidates of one group: the same site,
surrogate, form and placement, without and with the consumer refit) -> one
result dict per candidate (the ``candidates`` entries of
:mod:`swapper.sweep.schema`, less the savings the parent fills in).

Per group: the single-site plan (``make_plan`` with the candidate's choice),
one calibration from the shared recording of the original's site tensors
(:func:`swapper.calibrate.recorded.calibrate_recorded`, the same result as
calibrating that site alone), then per candidate: the consumer refit when
asked, the rewrite, the comparison with the original's outputs on the
validation set, the accuracy cost in the gate metric's units
(:mod:`swapper.sweep.cost`) and, on a measured target, the candidate timed
against the original (:mod:`swapper.sweep.timing`: in the site's
neighbourhood by default, or in the whole model); a refit that leaves the
graph's ops as they were reuses its sibling's timing (weights do not change
the time). A candidate that raises is returned as failed with the first line
of the error; the others go on.

Each worker process loads the model, the data, the original's validation
outputs and the recording once per sweep folder and keeps them
(:func:`context`), so a worker pays for them once, not per candidate.
"""
from __future__ import annotations

import logging
import threading
import time
import traceback
from collections import Counter
from dataclasses import dataclass
from pathlib import Path

import onnx

from swapper.calibrate.recorded import Recording, calibrate_recorded
from swapper.check.compare import Reference, compare, reference
from swapper.check.gate import GateRule, MetricChoice, preflight
from swapper.core.model_io import load_model
from swapper.data.dataset import Dataset, batches, input_specs, load_dataset
from swapper.data.source import DataSource
from swapper.errors import first_line
from swapper.plan.plan import make_plan
from swapper.rewrite.apply import rewrite
from swapper.scan.sites import Site, find_sites
from swapper.sweep.cost import metric_cost
from swapper.sweep.timing import time_candidate
from swapper.targets import TargetProfile, load_target

logger = logging.getLogger(__name__)


@dataclass(frozen=True)
class SweepJob:
    """What every worker needs, small enough to send with each task (data go by path when they have one)."""

    folder: str  # the sweep's work folder: original.onnx and the recording
    calib: DataSource | Dataset
    val: DataSource | Dataset
    target: str | None  # a built-in name or a profile path; None: no target
    rule: GateRule
    batch_size: int = 64
    seed: int = 0
    bias_correction: bool = True
    repeats: int = 20
    timing_scope: str = "neighbourhood"  # or "model" (swapper.sweep.timing)
    threads: int = 1
    strict_data: bool = False


@dataclass
class Context:
    """A worker's loaded copy of the sweep's inputs."""

    model: onnx.ModelProto
    sites: list[Site]
    calib: Dataset
    val: Dataset
    reference: Reference
    metric: MetricChoice
    profile: TargetProfile | None
    recording: Recording
    timing_batches: list[dict]


_CONTEXTS: dict[str, Context] = {}
_LOCK = threading.Lock()  # dask workers may run several tasks of one process in threads


def _data(source: DataSource | Dataset, model: onnx.ModelProto, strict: bool) -> Dataset:
    if isinstance(source, Dataset):
        return source
    return load_dataset(source.path, input_specs(model), layout=source.layout, images=source.images, model=model,
                        strict=strict)


def context(job: SweepJob) -> Context:
    """The worker's context for ``job.folder``, loaded on first use."""
    with _LOCK:
        ctx = _CONTEXTS.get(job.folder)
        if ctx is None:
            model = load_model(Path(job.folder) / "original.onnx").model
            calib, val = _data(job.calib, model, job.strict_data), _data(job.val, model, job.strict_data)
            ref = reference(model, val, batch_size=job.batch_size, threads=job.threads)
            profile = None if job.target is None else load_target(job.target)
            ctx = Context(model, find_sites(model), calib, val, ref,
                          preflight(ref, val, job.rule, batch_size=job.batch_size),
                          profile, Recording.open(Path(job.folder) / "recording"),
                          [b.feeds for b in batches(calib, job.batch_size, limit=256)])
            _CONTEXTS.clear()  # one sweep at a time per process: drop an older sweep's data
            _CONTEXTS[job.folder] = ctx
        return ctx


def _ops(model: onnx.ModelProto) -> Counter:
    return Counter((n.domain, n.op_type) for n in model.graph.node)


def _failed(spec: dict, exc: BaseException, t0: float) -> dict:
    logger.debug("candidate %s failed:\n%s", spec["id"], "".join(traceback.format_exception(exc)))
    return {**spec, "status": "failed", "reason": f"{type(exc).__name__}: {first_line(exc)}",
            "metric": None, "timing": None, "seconds": time.perf_counter() - t0}


def run_group(job: SweepJob, group: list[dict]) -> list[dict]:
    """Calibrate, compare and time the candidates of one group (module docstring); never raises for one of them.

    BLAS runs on ``job.threads`` threads here, as onnxruntime does: a worker is one core's worth of work
    (loky's workers are limited so already; dask's and this process are not). On a loaded 2-core machine
    a refit's ridge solves took 5.5 s with OpenBLAS's 2 threads and 0.32 s with one.
    """
    from threadpoolctl import threadpool_limits  # installed with scikit-learn

    with threadpool_limits(limits=job.threads):
        return _run_group(job, group)


def _run_group(job: SweepJob, group: list[dict]) -> list[dict]:
    t0 = time.perf_counter()
    try:
        ctx = context(job)
        spec = group[0]
        plan = make_plan(ctx.model, ctx.sites, site_ids=[spec["site_id"]], fold=spec["fold"], target=ctx.profile,
                         choices={spec["site_id"]: f"{spec['surrogate']}:{spec['form']}@{spec['fold']}"})
        if len(plan.swaps) != 1:
            raise RuntimeError(f"the plan for {spec['id']} swaps {len(plan.swaps)} sites, not 1")
        calibration = calibrate_recorded(ctx.model, ctx.sites, plan, ctx.recording,
                                         bias_correction=job.bias_correction, batch_size=job.batch_size,
                                         seed=job.seed)
    except Exception as exc:  # noqa: BLE001 - a failing candidate is recorded, never aborts the sweep
        return [_failed(s, exc, t0) for s in group]
    shared = time.perf_counter() - t0
    results, timed = [], []  # timed: (op counts, timing) of this group's candidates so far
    for spec in group:
        t1 = time.perf_counter()
        try:
            result = calibration
            if spec["refit"]:
                from swapper.calibrate.refit import refit_consumers

                # as swap refits (swapper.api.swap): layers producing graph outputs are left alone
                refit = refit_consumers(ctx.model, calibration.model, ctx.sites, calibration.plan, ctx.calib,
                                        batch_size=job.batch_size, seed=job.seed, threads=job.threads, outputs=False)
                result = refit.apply_to(calibration)
            candidate = rewrite(result.model, ctx.sites, result.plan).model
            comparison = compare(ctx.reference, candidate, ctx.val, batch_size=job.batch_size)
            cost = metric_cost(comparison, ctx.metric)
            timing, reused = None, False
            if ctx.profile is not None and ctx.profile.costs_from == "measured":
                ops = _ops(candidate)
                timing = next((t for o, t in timed if o == ops), None)
                reused = timing is not None
                if timing is None:
                    site = next(s for s in ctx.sites if s.id == spec["site_id"])
                    timing = time_candidate(ctx.model, candidate, site, ctx.profile, feeds=ctx.timing_batches[0],
                                            calib_batches=ctx.timing_batches, scope=job.timing_scope,
                                            repeats=job.repeats, batch=job.batch_size)
                    timed.append((ops, timing))
            notes = list(dict.fromkeys(n for s in result.sites for n in s.notes))
            results.append({**spec, "status": "ok", "reason": None, "metric": cost.to_dict(),
                            "nonfinite": comparison.has_nonfinite, "timing": timing, "timing_reused": reused,
                            "mse_fit": result.sites[0].mse_fit if result.sites else None,
                            "placement": dict(result.plan.swaps[0].placement), "notes": notes,
                            "seconds": time.perf_counter() - t1 + shared / len(group)})
        except Exception as exc:  # noqa: BLE001 - recorded with its reason; the sweep goes on
            results.append(_failed(spec, exc, t1))
    return results
