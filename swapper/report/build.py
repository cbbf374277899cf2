"""report.json and report.html: what was swapped, what it cost, and the verdict.

report.json (schema ``swapper.report.build/1``; every key is always present, ``null``
when a part did not run):

- ``schema``: "swapper.report/1"; ``created_utc``: ISO 8601 time.
- ``tool``: versions of swapper, python, onnx, onnxruntime, numpy, scipy, scikit-learn.
- ``inputs``: ``original``, ``candidate``, ``calibration``, ``validation``: each
  ``{"path", "sha256", "bytes"}`` or null (candidate path is null when not written);
  an image folder with class sub-folders also gives ``classes`` (folder name ->
  integer label).
- ``plan``: the plan (see swapper/plan/plan.py) or null for `swapper check`:
  ``fold, swaps, skipped, target, opset, conversion`` (the opset conversion
  record or null), ``remaining``, ``hints``. Each swap names ``function`` (what
  the site computes) and ``surrogate`` (what is written instead), with their
  ``function_params`` / ``surrogate_params``.
- ``sites``: one entry per swapped site: ``site_id, function, surrogate, form``
  (the emission form written), ``placement {a,b,c,d}`` (words of
  swapper/plan/placement.py: producer, consumers, consumers-via-max,
  in-surrogate, nodes, fixed, approx, through-add), ``nodes_added`` (how many nodes the graph
  gained at the site: the nodes written there minus the original's nodes they
  replace, 0 when it gained none, also when it shrank), ``site_nodes``
  ``{"original", "written"}`` (both counts), ``folded_into, mse_start, mse_fit,
  level, bias_corrected, refit, notes`` (mse values null without calibration;
  ``refit``: ``{refitted, held_out_samples, mse_current, mse_refit,
  consumers}``, the consumer refit's decision for the site, or null when none
  was weighed).
- ``calibration``: ``{"samples", "tokens", "timings_s", "sites"}`` (``tokens``: which attention mask the
  statistics of token-shaped sites honoured and how many tokens they read, or why none; per-site fit details,
  with the recorded input range ``x_min`` / ``x_max`` per channel) or null.
- ``comparison``: see ``swapper.check.compare.Comparison.to_dict`` (with
  ``output_kinds``: output -> ``{kind, cue, sample_shape, dtype}``, and per output in
  ``output_errors`` the per-sample ``cosine_mean``, ``cosine_p5``, ``cosine_min``).
  One sign convention for people: the top-1 *drop* = original − candidate, in
  points: ``drop_pp`` and ``drop_interval_pp`` ``[lo, hi]`` (the interval for the
  drop, at ``interval.level``); ``delta_pp`` and ``interval.lo_pp/hi_pp`` keep the
  older candidate − original difference for readers of earlier reports.
  ``n01``: samples only the candidate gets right, ``n10``: only the original.
  ``changed``: the samples whose top-1 class changed, ``{"count", "discordant",
  "shown", "samples"}`` (``discordant`` = n01 + n10, null without labels;
  ``samples``: the first 100 by index, each ``{"index", "original", "candidate",
  "label"}`` with classes as integers, ``label`` null without labels), or null
  when no class scores were compared;
  ``budget``: ``{"max_drop_pp", "strict", "min_agreement"}`` (``max_drop_pp`` is
  the ``--budget`` value whatever the metric reads it as); ``verdict``:
  ``{"approved", "reason", "rule", "metric", "outputs", "thresholds", "caution"}`` (``metric``:
  top1 | agreement | cosine | sqnr | rmse, null when the candidate was refused for
  NaN/Inf or a changed signature; ``outputs``: the outputs the rule judged;
  ``thresholds``: the floors applied, by name; ``caution``: the text of the
  top-level ``caution``, so the model's ``swapper.verdict`` metadata, which holds
  this same entry, carries it too); ``latency``: per model ``{median_ms, p10_ms, p90_ms,
  runs}`` plus ``ratio``, ``clock`` ("thread CPU time" with one thread, else "wall time"), ``batch_size``, ``threads`` and, with a target,
  ``target`` (see ``swapper.api.check``), or null when latency was not measured
  (``--no-latency``); ``size``: per model ``{bytes, nodes, op_counts,
  initializer_bytes}`` (``bytes``: the model file as written or read, external data
  files included; a candidate that was not written counts its serialised bytes);
  ``int8``: the same figures for quantized versions or null. All null when no
  validation ran.
- ``search``: the automatic plan (``swap --plan auto``), null otherwise:
  ``{"target": {"name", "costs_from", "how"}`` (how savings were obtained:
  measured in context on the target / declared by the profile),
  ``"metric": {"name", "outputs", "unit", "allowance"}``, ``"reason"`` (one
  line), ``"sites"``: per swept site ``{"site_id", "function", "chosen"`` (a
  sweep candidate id or null), ``"why"``, ``"candidates"``: each tried alone
  ``{"id", "surrogate", "form", "fold", "refit", "status", "reason", "cost",
  "saving", "saving_ms", "on_front"}}``, ``"attempts"``: the verifications of
  the combined plan ``{"chosen", "passed", "faster", "detail", "dropped",
  "why_dropped"}``, ``"first_estimate"`` ``{"saving", "cost", "sites"}``,
  ``"pareto"`` (candidate ids), ``"saving_label"``, ``"sweep_run"`` (the
  sweep's ``run`` entry, :mod:`swapper.sweep.schema`), ``"lacking_ops"``
  (declared target: ops of the written model it cannot run, or null)}``.
  Added in schema /1: no earlier field changed meaning.
- ``options``: what the run was asked to do: ``{"swap", "gate", "run"}``:
  ``swap`` the :class:`~swapper.options.SwapOptions` fields (null for `swapper
  check`), ``gate`` ``{"metric", "max_drop_pp", "strict", "min_agreement",
  "min_cosine", "min_cosine_p5", "min_sqnr_db"}`` as given (null: the default;
  null entry without a validation set), ``run`` the command's own settings
  (``command``, ``plan``, ``force``, ``int8``, ``latency_runs``...).
- ``caution``: the safety caution, verbatim.

Added later in schema /1: ``options``, ``verdict.caution``,
``comparison.drop_pp``, ``comparison.drop_interval_pp``, ``comparison.changed``,
``sites[].site_nodes``. Renamed, same values, so that "target" means a target
profile only and "source" a citation only: ``sites[].source`` -> ``function``,
``sites[].target`` -> ``surrogate``, and in ``plan.swaps`` also
``source_params`` -> ``function_params``, ``target_params`` ->
``surrogate_params``. Placement words renamed: ``held`` -> ``fixed``,
``inner`` -> ``in-surrogate``, ``consumers+`` -> ``consumers-via-max``; fold
``nodes`` -> ``exact+nodes``. Changed meaning: ``sites[].nodes_added`` counted
every node written at the site (the surrogate op itself included, so a
one-for-one swap read 1); it now counts what the graph gained there.

report.html is self-contained (styles inline, plots as data: URIs): the verdict
and its reason first with the caution directly under it, then what was judged
(every input's path and sha256, the settings), accuracy and agreement, latency
and size side by side, the samples that changed class, the per-site table, and
plots when matplotlib (the ``plots`` extra) is installed.
"""
from __future__ import annotations

import json
import logging
import platform
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from swapper.check.gate import CAUTION
from swapper.core.files import ensure_folder
from swapper.core.model_io import atomic_write_bytes, sha256_file
from swapper.report.html import render_html

logger = logging.getLogger(__name__)

SCHEMA = "swapper.report/1"


VERDICT_KEYS = {"approved", "reason", "rule", "metric", "outputs", "thresholds", "caution"}
TOP_KEYS = ("schema", "created_utc", "tool", "inputs", "plan", "sites", "calibration", "comparison", "budget",
            "verdict", "latency", "size", "int8", "search", "options", "caution")


SITE_KEYS = ("site_id", "function", "surrogate", "form", "placement", "nodes_added", "site_nodes", "folded_into",
             "mse_start", "mse_fit", "level", "bias_corrected", "refit", "notes")


def _versions() -> dict:
    import onnx
    import onnxruntime
    import scipy
    import sklearn

    from swapper import __version__

    return {"swapper": __version__, "python": platform.python_version(), "onnx": onnx.__version__,
            "onnxruntime": onnxruntime.__version__, "numpy": np.__version__, "scipy": scipy.__version__,
            "scikit-learn": sklearn.__version__}


def _file_entry(path) -> dict | None:
    if path is None:
        return None
    p = Path(path)
    if p.is_dir():  # a folder of .npy files or of images: hash the sorted file list and contents
        import hashlib

        from swapper.data.images import holds_images, list_images
        from swapper.data.npy_files import npy_folder_files

        files, classes = npy_folder_files(p), None  # exactly the files the data set was read from
        if not files and holds_images(p):
            files, _, classes = list_images(p)
        digest = hashlib.sha256()
        total = 0
        for f in files:
            digest.update(f.relative_to(p).as_posix().encode())
            digest.update(bytes.fromhex(sha256_file(f)))
            total += f.stat().st_size
        entry = {"path": str(p), "sha256": digest.hexdigest(), "bytes": total}
        if classes:  # class sub-folders of an image folder: label k is the k-th name in sorted order
            entry["classes"] = {name: k for k, name in enumerate(classes)}
        return entry
    return {"path": str(p), "sha256": sha256_file(p), "bytes": p.stat().st_size}


def site_rows(plan, records, calibration) -> list[dict]:
    """One summary per swapped site: what was fitted, where its parameters live, what it cost.

    The ``sites`` entries of report.json, also what the terminal table shows.
    """
    by_record = {r.site_id: r for r in records or []}
    fits = {c.site_id: c for c in calibration.sites} if calibration is not None else {}
    rows = []
    for s in plan.swaps:
        rec, fit = by_record.get(s.site_id), fits.get(s.site_id)
        rows.append({
            "site_id": s.site_id, "function": s.function, "surrogate": s.surrogate,
            "form": rec.form if rec else s.form, "placement": dict(s.placement),
            # what the graph gained at the site: the written nodes against the original's nodes they replace
            "nodes_added": max(0, rec.nodes_added - rec.nodes_replaced) if rec else None,
            "site_nodes": {"original": rec.nodes_replaced, "written": rec.nodes_added} if rec else None,
            "folded_into": list(rec.folded_into) if rec else [],
            "mse_start": fit.mse_start if fit else None, "mse_fit": fit.mse_fit if fit else None,
            "level": fit.level if fit else None,
            "bias_corrected": list(fit.bias_corrected) if fit else [],
            "refit": dict(fit.refit) if fit and fit.refit else None,
            # plan, rewrite and fit may each record the same fact; keep the first of each, in order
            "notes": list(dict.fromkeys(list(s.notes) + (list(rec.notes) if rec else [])
                                        + (list(fit.notes) if fit else []))),
        })
    return rows


def options_entry(swap=None, check=None, settings: dict | None = None) -> dict:
    """What the run was asked to do: the swap's settings, the gate's rule, the command's own settings."""
    from dataclasses import asdict

    rule = getattr(check, "budget", None)
    gate = None
    if rule is not None:
        gate = {"metric": getattr(rule, "metric", None), **_budget(rule),
                **{k: getattr(rule, k, None) for k in ("min_cosine", "min_cosine_p5", "min_sqnr_db")}}
    return {"swap": asdict(swap.options) if swap is not None else None, "gate": gate, "run": dict(settings or {})}


def build_report(*, original, candidate_path=None, candidate=None, check=None, swap=None, val_path=None,
                 calib_path=None, search=None, settings: dict | None = None) -> dict:
    """Assemble the report.json payload (see the module docstring for its schema).

    ``settings``: the command's own settings beyond the swap options and the gate rule (recorded under
    ``options.run``), e.g. ``{"command": "swap", "plan": "all", "int8": False, "latency_runs": 30}``.
    """
    from swapper.core.jsonable import json_safe

    sites = site_rows(swap.plan, swap.rewrite.records, swap.calibration) if swap is not None else []
    payload = {
        "schema": SCHEMA,
        "created_utc": datetime.now(timezone.utc).isoformat(timespec="seconds"),
        "tool": _versions(),
        "inputs": {"original": _file_entry(original.path), "candidate": _file_entry(candidate_path),
                   "calibration": _file_entry(calib_path), "validation": _file_entry(val_path)},
        "plan": swap.plan.to_dict() if swap is not None else None,
        "sites": sites,
        "calibration": swap.calibration.to_dict() if swap is not None and swap.calibration else None,
        "comparison": check.comparison.to_dict() if check else None,
        "budget": _budget(check.budget) if check else None,
        "verdict": check.verdict.to_dict() if check else None,
        "latency": check.latency if check else None,
        "size": check.size if check else None,
        "int8": check.int8 if check else None,
        "search": search,
        "options": options_entry(swap, check, settings),
        "caution": CAUTION,
    }
    return json_safe(payload, [], "report")


def _budget(rule) -> dict:
    """The accuracy budget's fields; a GateRule holds its Budget (its floors are in ``verdict.thresholds``)."""
    budget = getattr(rule, "budget", rule)
    return {"max_drop_pp": budget.max_drop_pp, "strict": budget.strict, "min_agreement": budget.min_agreement}


def validate_report(payload: dict) -> None:
    """Raise ValueError if ``payload`` does not follow schema swapper.report/1."""
    if payload.get("schema") != SCHEMA:
        raise ValueError(f"schema is {payload.get('schema')!r}, expected {SCHEMA!r}")
    missing = [k for k in TOP_KEYS if k not in payload]
    if missing:
        raise ValueError(f"missing keys: {missing}")
    for key in ("original", "candidate", "calibration", "validation"):
        entry = payload["inputs"].get(key, "absent")
        if entry == "absent" or (entry is not None and set(entry) - {"classes"} != {"path", "sha256", "bytes"}):
            raise ValueError(f"inputs.{key} malformed")
    for site in payload["sites"]:
        if set(site) != set(SITE_KEYS):
            raise ValueError(f"site entry keys {sorted(site)} differ from {sorted(SITE_KEYS)}")
    if payload["verdict"] is not None and set(payload["verdict"]) != VERDICT_KEYS:
        raise ValueError("verdict malformed")
    if payload["verdict"] is not None and not isinstance(payload["verdict"]["approved"], bool):
        raise ValueError("verdict.approved must be a boolean")
    json.dumps(payload, allow_nan=False)  # strict JSON: no NaN / Infinity


def write_report(folder, **parts) -> tuple[Path, Path]:
    """Write report.json and report.html into ``folder`` (created); return both paths."""
    folder = ensure_folder(folder, "report folder")
    payload = build_report(**parts)
    validate_report(payload)
    json_path = atomic_write_bytes(json.dumps(payload, indent=2, allow_nan=False).encode(), folder / "report.json")
    html_path = atomic_write_bytes(render_html(payload).encode(), folder / "report.html")
    return json_path, html_path
