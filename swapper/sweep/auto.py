"""From a sweep to the automatic plan: the search's options, the sites that must go, and why each site ended as it did.

Transformation: a ``swapper.sweep/1`` payload -> search options
(:class:`swapper.plan.search.Option`, one per ok candidate: its saving
``value`` and metric ``cost``) and the *required* sites (a declared target
cannot run the site's own ops: the site is swapped whatever it costs, with its
least costly candidate); then, after :func:`swapper.plan.search.search` and
the caller's verification, per site the candidate chosen and the reason, or
why the site was kept (:func:`site_outcomes`).

The plan a choice becomes: per site ``surrogate:form@fold`` (``make_plan``
choices) and one consumer refit for the whole plan when any chosen candidate
asked for it (``refit_consumers`` refits the consumers of every swapped site,
keeping a layer's refit only when it lowers the held-out error).
"""
from __future__ import annotations

import logging

from swapper.errors import UsageError
from swapper.plan.search import Option, SearchResult
from swapper.sweep.schema import candidates

logger = logging.getLogger(__name__)


def _rank(c: dict) -> tuple[float, float]:
    prior = c["prior_cost"]
    return float(c["metric"]["cost"]), float("inf") if prior is None else float(prior)


def search_options(payload: dict) -> tuple[list[Option], dict[str, dict], dict[str, dict]]:
    """(options for the search, candidate entries by id, required site id -> its chosen candidate)."""
    options, by_id, required = [], {}, {}
    for site, c in candidates(payload):
        by_id[c["id"]] = c
        if c["status"] != "ok" or c.get("nonfinite"):
            continue
        cost = (c["metric"] or {}).get("cost")
        if cost is None:
            continue
        if c["saving"]["required"]:  # least accuracy cost; among equals, the cheapest on the target
            best = required.get(site["site_id"])
            if best is None or _rank(c) < _rank(best):
                required[site["site_id"]] = c
            continue
        value = c["saving"]["value"]
        if value is not None:
            options.append(Option(site["site_id"], c["id"], float(value), float(cost)))
    return options, by_id, required


def plan_choices(chosen: dict[str, dict]) -> tuple[dict[str, str], bool]:
    """({site id: "surrogate:form@fold"}, refit) for candidate entries chosen per site."""
    return ({sid: f"{c['surrogate']}:{c['form']}@{c['fold']}" for sid, c in chosen.items()},
            any(c["refit"] for c in chosen.values()))


def check_matches(payload: dict, *, sha256: str | None, target: str | None, metric: str, where: str) -> None:
    """UsageError (one line naming the file) when a sweep given with --sweep was made for something else."""
    theirs = payload["model"]["sha256"]
    if sha256 and theirs and theirs != sha256:
        raise UsageError(f"{where}: this sweep was made on another model (sha256 {theirs[:12]}…)")
    if payload["target"]["name"] != target:
        raise UsageError(f"{where}: this sweep was made for target {payload['target']['name']}, not {target}")
    if payload["metric"]["name"] != metric:
        raise UsageError(f"{where}: this sweep measured {payload['metric']['name']}, the gate here decides by "
                         f"{metric}")


def _fmt(x) -> str:
    """Three significant digits; -0.0 (a zero cost written as a negated zero) shows as 0."""
    return "n/a" if x is None else f"{x + 0.0:.3g}"


def site_outcomes(payload: dict, result: SearchResult, required: dict[str, dict]) -> list[dict]:
    """Per swept site: the candidates tried, the one chosen (or null) and why, in words."""
    dropped = {a.dropped: (i + 1, a.why_dropped) for i, a in enumerate(result.attempts) if a.dropped}
    first = result.first.chosen if result.first is not None else {}
    front = set(payload["pareto"])
    unit = payload["metric"]["unit"]
    saving_unit = "ms" if payload["target"]["costs_from"] == "measured" else "cost units"
    out = []
    for site in payload["sites"]:
        sid = site["site_id"]
        tried = [{"id": c["id"], "surrogate": c["surrogate"], "form": c["form"], "fold": c["fold"],
                  "refit": c["refit"], "status": c["status"], "reason": c["reason"],
                  "cost": (c["metric"] or {}).get("cost"), "saving": c["saving"]["value"],
                  "saving_ms": c["saving"]["ms"], "on_front": c["id"] in front} for c in site["candidates"]]
        chosen = None
        if sid in result.chosen:
            chosen = result.chosen[sid].key
            o = result.chosen[sid]
            why = (f"chosen: saves {_fmt(o.saving)} ({saving_unit}) at a cost of {_fmt(o.cost)} ({unit}) "
                   "when swapped alone")
        elif sid in required:
            chosen = required[sid]["id"]
            why = "required: the target cannot run the site's own ops; its least costly candidate"
        elif sid in dropped:
            k, text = dropped[sid]
            why = f"kept: dropped after verification {k}: {text}"
        elif not any(t["status"] == "ok" for t in tried):
            why = "kept: every candidate failed (see their reasons)"
        elif not any(t["status"] == "ok" and (t["saving"] or 0) > 0 for t in tried):
            why = "kept: no candidate saves anything on the target"
        elif sid not in first:
            why = "kept: its candidates cost more accuracy per saving than the allowance leaves"
        else:
            why = "kept"
        out.append({"site_id": sid, "function": site["function"], "chosen": chosen, "why": why,
                    "candidates": tried})
    return out
