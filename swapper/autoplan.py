"""The automatic plan: the fastest swap within the gate, from a sweep of single-site swaps, verified.

Transformation: (model, calibration set, validation set, gate rule, target)
-> :class:`AutoResult`: the sweep (:func:`swapper.api.sweep`, or a payload
given), the per-site search under the rule's allowance
(:mod:`swapper.plan.search`) and the verified swap. Each verification is a
full :func:`swapper.api.swap` of the chosen sites (per-site choices, sequential
calibration, the consumer refit when a chosen candidate used it), the full
gate (:func:`swapper.api.check`) and, on a measured target, the timing against
the original (:func:`swapper.api.time_on_target`); the search backs off until
a plan passes and is faster, and a plan that is not faster is never returned.
On a declared target the savings are the profile's; the ops it cannot run
that remain in the result are named (``AutoResult.lacking``).
"""
from __future__ import annotations

import logging
from dataclasses import dataclass
from pathlib import Path

import onnx

from swapper.api import CheckResult, SwapResult, check, data_pair, resolve_target, swap, sweep, time_on_target
from swapper.core.model_io import LoadedModel, load_model
from swapper.options import SwapOptions
from swapper.progress import Silent

logger = logging.getLogger(__name__)


@dataclass
class AutoResult:
    """The automatic plan: the sweep it came from, the search, and the verified swap (None when nothing)."""

    sweep: dict
    search: object  # swapper.plan.search.SearchResult
    sites: list[dict]  # per site: candidates tried, chosen, why (swapper.sweep.auto.site_outcomes)
    swap: SwapResult | None
    check: CheckResult | None
    timing: object | None  # TargetTiming of the final plan on a measured target
    lacking: dict | None  # declared target: ops of the final candidate it cannot run
    reason: str


def _loaded(model) -> LoadedModel:
    """A LoadedModel from a path, a LoadedModel or an in-memory ModelProto (no file: no sha256 to check)."""
    if isinstance(model, LoadedModel):
        return model
    if isinstance(model, onnx.ModelProto):
        opset = next((o.version for o in model.opset_import if o.domain in ("", "ai.onnx")), 0)
        return LoadedModel(model, None, opset, model.ByteSize())
    return load_model(model)


def auto_swap(model: str | Path | LoadedModel | onnx.ModelProto, *, calib, val, rule=None, options: SwapOptions | None = None,
              settings=None, sweep_payload: dict | None = None, sweep_path: str | Path | None = None,
              progress=None, latency_runs: int = 10) -> AutoResult:
    """The fastest plan within the gate: sweep (or ``sweep_payload``), search, verify and back off.

    Each verification is a full swap of the chosen sites (``options`` with per-site
    choices, sequential calibration, the consumer refit when a chosen candidate used
    it), the full gate on ``val`` and, on a measured target, the timing against the
    original: a plan that is not faster is never returned (:mod:`swapper.plan.search`).
    ``latency_runs`` timed runs per model in each verification's check (0: no latency in the report).
    """
    from swapper.check.gate import GateRule
    from swapper.check.on_target import lacking_ops
    from swapper.core.model_io import sha256_file
    from swapper.plan.search import Verification, search
    from swapper.sweep.auto import check_matches, plan_choices, search_options, site_outcomes
    from swapper.sweep.cost import allowance

    options = options or SwapOptions()
    rule = rule or GateRule()
    progress = progress or Silent()
    loaded = _loaded(model)
    profile = resolve_target(options.target)
    calib_src, calib_ds = data_pair(calib, loaded)
    val_src, val_ds = data_pair(val, loaded)
    if sweep_payload is None:
        sweep_payload = sweep(loaded, calib=calib_src, val=val_src, rule=rule, options=options, settings=settings,
                              progress=progress)
    else:
        from swapper.check.gate import preflight

        metric = preflight(loaded.model, val_ds, rule, batch_size=options.batch_size).metric
        check_matches(sweep_payload, sha256=sha256_file(loaded.path) if loaded.path else None,
                      target=None if profile is None else profile.name, metric=metric,
                      where=str(sweep_path or "the sweep"))
    metric = sweep_payload["metric"]["name"]
    opts, by_id, required = search_options(sweep_payload)
    measured = profile is not None and profile.costs_from == "measured"
    done: dict[frozenset, tuple] = {}

    def verify(chosen: dict) -> Verification:
        from threadpoolctl import threadpool_limits  # installed with scikit-learn

        with threadpool_limits(limits=options.threads):  # BLAS as many threads as onnxruntime (sweep/worker.py)
            return _verify(chosen)

    def _verify(chosen: dict) -> Verification:
        picked = {sid: by_id[o.key] for sid, o in chosen.items()} | required
        choices, refit = plan_choices(picked)
        result = swap(loaded, calib=calib_ds, options=options.replace(
            to=None, site_ids=tuple(choices), choices=choices, refit_consumers=refit), progress=progress)
        checked = check(loaded.model, result.candidate, val_ds, budget=rule, batch_size=options.batch_size,
                        threads=options.threads, latency_repeats=latency_runs, progress=progress)
        timing = None
        if measured and checked.verdict.approved:
            timing = time_on_target(loaded.model, result.candidate, profile, calib=calib_ds,
                                    batch_size=options.batch_size)
        done[frozenset(picked)] = (result, checked, timing)
        detail = checked.verdict.reason + (f"; {timing.ratio:.3f}× the original on {timing.target}" if timing else "")
        return Verification(checked.verdict.approved, None if timing is None else timing.is_faster, detail,
                            {"ratio": None if timing is None else timing.ratio})

    spent = sum(max(0.0, c["metric"]["cost"]) for c in required.values())
    outcome = search(opts, max(0.0, allowance(rule, metric) - spent), verify)
    final = frozenset(outcome.chosen) | frozenset(required)
    if final and final not in done:  # only the required sites are left: verify them alone
        verify({})
    result, checked, timing = done.get(final, (None, None, None)) if final else (None, None, None)
    lacking = None
    if result is not None and profile is not None and not measured:
        lacking = lacking_ops(result.candidate, profile)
    return AutoResult(sweep_payload, outcome, site_outcomes(sweep_payload, outcome, required), result, checked,
                      timing, lacking, outcome.reason)
