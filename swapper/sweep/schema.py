"""The sweep's JSON (schema ``swapper.sweep/1``): what each single-site swap cost and saved.

Every key is always present; ``null`` where a figure does not apply.

- ``schema``: "swapper.sweep/1"; ``created_utc``: ISO 8601 time.
- ``model``: ``{"path", "sha256", "opset"}`` of the model as given (``opset``:
  the one planned at).
- ``calibration``, ``validation``: ``{"path", "samples"}`` (path null for
  in-memory data).
- ``target``: ``{"name", "costs_from", "how", "original_ms"}``: the profile
  (null name: no target); ``costs_from`` "measured" | "declared" | null;
  ``how``: in words, how savings were obtained (timed in context at the
  profile's settings / the profile's cost per element × elements);
  ``original_ms``: the whole original's median on a measured target, else null.
- ``metric``: ``{"name", "outputs", "unit", "allowance"}``: the gate metric
  the costs are in (:mod:`swapper.sweep.cost`), the outputs it judges, its
  cost unit in words, and the gate rule's budget in those units.
- ``settings``: ``{"surrogates", "placements", "refit", "paying_only",
  "batch_size", "seed", "repeats", "timing_scope", "bias_correction"}``
  (``timing_scope``: "neighbourhood" | "model", :mod:`swapper.sweep.timing`).
- ``run``: ``{"workers", "backend", "scheduler", "record_s", "sweep_s",
  "total_s", "candidates", "groups", "failed"}``: ``backend`` "sequential" |
  "loky" | "dask"; ``record_s`` the one recording of the original's site
  tensors shared by every candidate.
- ``sites``: per eligible site in graph order:
  ``{"site_id", "function", "role", "channels", "elements", "original_ops",
  "original_cost", "original_shown", "unusable", "candidates"}`` where
  ``elements`` is per sample, ``original_cost`` the profile's cost per element
  (null: the target cannot run it, or no target) and ``unusable`` lists
  ``{"surrogate", "placement", "why"}`` for surrogates with no usable form.
  Each candidate:

  - ``id`` ("s3/relu:Relu/exact/refit"), ``site_id``, ``surrogate``,
    ``form`` (emission form), ``fold`` ("exact": no node added, parameters
    that cannot fold are fixed at their neutral values; "exact+nodes": those
    become Mul/Add nodes; files written before read "nodes" for it),
    ``refit`` (consumer refit), ``placement`` ``{a, b, c, d}``, ``ops`` (the
    priced chain), ``prior_cost`` (the profile's cost of it per element),
    ``same_as`` (the id of a candidate that writes the same model, whose
    results these are, or null);
  - ``status`` "ok" | "failed", ``reason`` (one line, null when ok);
  - ``metric``: ``{"name", "original", "candidate", "delta", "cost",
    "interval"}`` (``cost``: what the candidate loses, larger = worse, the
    sign every table shows, e.g. the top-1 drop original − candidate;
    ``interval``: [lo, hi] of the cost where the metric has one, else null;
    ``delta``: the raw difference candidate − original, kept for readers of
    earlier files), null when failed; ``nonfinite``: the candidate produced
    NaN/Inf;
  - ``saving``: ``{"ms", "fraction", "units", "pooled_ms", "pooled_over",
    "value", "required", "how"}`` (:mod:`swapper.sweep.savings`);
  - ``timing``: the target timing (``swapper.check.on_target.TargetTiming``
    fields) or null; ``timing_reused``: taken from the sibling without refit
    (same ops);
  - ``mse_fit``, ``notes``, ``seconds`` (this candidate's share of the work).
- ``pareto``: ids of the ok candidates on the front of saving ``value``
  against metric ``cost``.
- ``notes``: free-text lines (e.g. the plot was skipped).
"""
from __future__ import annotations

import json
import logging
from pathlib import Path

from swapper.core.model_io import atomic_write_bytes
from swapper.errors import UsageError
from swapper.options import OLD_FOLD_WORDS
from swapper.plan.placement import canonical_placement

logger = logging.getLogger(__name__)

SCHEMA = "swapper.sweep/1"
TOP_KEYS = ("schema", "created_utc", "model", "calibration", "validation", "target", "metric", "settings", "run",
            "sites", "pareto", "notes")
SITE_KEYS = ("site_id", "function", "role", "channels", "elements", "original_ops", "original_cost",
             "original_shown", "unusable", "candidates")
CANDIDATE_KEYS = ("id", "site_id", "surrogate", "form", "fold", "refit", "placement", "ops", "prior_cost", "same_as",
                  "status", "reason", "metric", "nonfinite", "saving", "timing", "timing_reused", "mse_fit", "notes",
                  "seconds")
METRIC_KEYS = ("name", "original", "candidate", "delta", "cost", "interval")
SAVING_KEYS = ("ms", "fraction", "units", "pooled_ms", "pooled_over", "value", "required", "how")
STATUSES = ("ok", "failed")


def _keys(entry, keys: tuple, where: str) -> None:
    if not isinstance(entry, dict):
        raise ValueError(f"{where}: expected an object, got {type(entry).__name__}")
    missing, extra = [k for k in keys if k not in entry], sorted(set(entry) - set(keys))
    if missing or extra:
        raise ValueError(f"{where}: missing {missing}, unexpected {extra}")


def validate_sweep(payload: dict) -> None:
    """Raise ValueError when ``payload`` does not follow schema swapper.sweep/1 (module docstring)."""
    _keys(payload, TOP_KEYS, "sweep")
    if payload["schema"] != SCHEMA:
        raise ValueError(f"schema is {payload['schema']!r}, expected {SCHEMA!r}")
    ids = set()
    for i, site in enumerate(payload["sites"]):
        _keys(site, SITE_KEYS, f"sites[{i}]")
        for j, c in enumerate(site["candidates"]):
            where = f"sites[{i}].candidates[{j}]"
            _keys(c, CANDIDATE_KEYS, where)
            if c["status"] not in STATUSES:
                raise ValueError(f"{where}.status: {c['status']!r} is not one of {STATUSES}")
            if c["status"] == "failed" and not c["reason"]:
                raise ValueError(f"{where}: a failed candidate needs a reason")
            if c["status"] == "ok":
                _keys(c["metric"], METRIC_KEYS, f"{where}.metric")
            _keys(c["saving"], SAVING_KEYS, f"{where}.saving")
            if c["site_id"] != site["site_id"]:
                raise ValueError(f"{where}: site_id {c['site_id']} under site {site['site_id']}")
            ids.add(c["id"])
    for pid in payload["pareto"]:
        if pid not in ids:
            raise ValueError(f"pareto: unknown candidate {pid}")
    json.dumps(payload, allow_nan=False)  # strict JSON: no NaN / Infinity


def write_sweep(payload: dict, path: str | Path) -> Path:
    """Validate and write the sweep JSON atomically."""
    validate_sweep(payload)
    return atomic_write_bytes(json.dumps(payload, indent=1, allow_nan=False).encode(), path)


def read_sweep(path: str | Path) -> dict:
    """A sweep JSON written earlier (``--sweep``); UsageError naming the file when it is not one."""
    try:
        payload = json.loads(Path(path).read_text(encoding="utf-8"))
        validate_sweep(payload)
    except (OSError, ValueError) as exc:
        raise UsageError(f"{path}: not a {SCHEMA} file ({str(exc).splitlines()[0]})") from None
    for _, c in candidates(payload):  # older files spell a placement policy the old way ("nodes")
        c["fold"] = OLD_FOLD_WORDS.get(c["fold"], c["fold"])
        c["placement"] = canonical_placement(c["placement"])
    return payload


def candidates(payload: dict):
    """Every (site entry, candidate entry) pair, in order."""
    for site in payload["sites"]:
        for c in site["candidates"]:
            yield site, c
