"""What each candidate saves on the target, and the Pareto front of saving against accuracy cost.

Transformation: the sweep's site entries with their candidates' timings (or
the profile's chain costs) -> each candidate's ``saving`` entry
(:mod:`swapper.sweep.schema`), and the ids of the candidates on the front.

- *measured target* (``costs_from: measured``): ``ms`` = the original's median
  minus the candidate's, timed together at the profile's settings, in the
  site's neighbourhood or the whole graph (:mod:`swapper.sweep.timing`);
  ``fraction`` = ``ms`` over the whole original's median. One site of a dozen
  saves little next to the timer's noise, so the value the search uses is
  *pooled*: candidates whose site has the same chain of ops and
  whose replacement has the same chain (same producer, same form, same
  parameter nodes) save in proportion to the site's element count, and the
  least-squares rate over all of them, ``Σ msᵢ·nᵢ / Σ nᵢ²``, times the site's
  elements is ``pooled_ms`` (= ``ms`` when the chain pair occurs once).
  Timings a refit reused from its sibling count once.
- *declared target*: ``units`` = (the site's chain cost − the candidate's) ×
  the site's elements per sample, in the profile's units (Relu = 1 per
  element); ``fraction`` = ``units`` over the swept sites' summed chain cost.
  A site whose own ops the target cannot run has no saving to weigh: every
  candidate there is ``required`` (the site must go, whatever it costs).
- *no target*: as declared, with the registry's relative costs
  (:mod:`swapper.functions.costs`).

``value`` is what the search maximises: ``pooled_ms`` on measured targets,
``units`` otherwise.
"""
from __future__ import annotations

import logging
from collections import defaultdict

from swapper import functions

logger = logging.getLogger(__name__)


def _ok(c: dict) -> bool:
    return c.get("status") == "ok"


def fill_savings(sites: list[dict], costs_from: str | None, original_ms: float | None = None) -> None:
    """Set ``saving`` on every candidate of ``sites`` (module docstring); ``costs_from`` None: no target;
    ``original_ms`` the whole original's median on a measured target (the fractions' denominator)."""
    if costs_from == "measured":
        _measured(sites, original_ms)
    else:
        _declared(sites, costs_from)


def _empty(how: str) -> dict:
    return {"ms": None, "fraction": None, "units": None, "pooled_ms": None, "pooled_over": 0, "value": None,
            "required": False, "how": how}


def _measured(sites: list[dict], original_ms: float | None) -> None:
    pools: dict[tuple, list[tuple[float, int]]] = defaultdict(list)
    for site in sites:
        n = site["elements"] or 0
        for c in site["candidates"]:
            c["saving"] = _empty("measured in context")
            t = c.get("timing") if _ok(c) else None
            if not t:
                continue
            o, k = t["original"]["median_ms"], t["candidate"]["median_ms"]
            c["saving"].update(ms=o - k, fraction=(o - k) / original_ms if original_ms else None)
            if not c.get("timing_reused") and n > 0:
                pools[(tuple(site["original_ops"]), tuple(c["ops"]))].append((o - k, n))
    for site in sites:
        n = site["elements"] or 0
        for c in site["candidates"]:
            s = c["saving"]
            pool = pools.get((tuple(site["original_ops"]), tuple(c["ops"])), [])
            if s["ms"] is None or not pool or n <= 0:
                s["value"] = s["ms"]
                continue
            rate = sum(ms * e for ms, e in pool) / sum(e * e for _, e in pool)
            s.update(pooled_ms=rate * n, pooled_over=len(pool), value=rate * n)
            if len(pool) > 1:
                s["how"] = f"measured in context, pooled over {len(pool)} timings of the same chains"


def _declared(sites: list[dict], costs_from: str | None) -> None:
    how = "declared by the profile" if costs_from is not None else "the registry's relative costs (no target)"
    total = 0.0
    for site in sites:
        own = site["original_cost"] if costs_from is not None else functions.get(site["function"]).cost
        site["_own"] = own
        if own is not None and site["elements"]:
            total += own * site["elements"]
    for site in sites:
        own, n = site.pop("_own"), site["elements"] or 0
        for c in site["candidates"]:
            c["saving"] = s = _empty(how)
            if not _ok(c):
                continue
            if own is None:
                s.update(required=True, how=f"{how}: the target cannot run the site's own ops")
                continue
            mine = c["prior_cost"] if costs_from is not None else functions.get(c["surrogate"]).cost
            if mine is None:
                continue
            units = (own - mine) * n
            s.update(units=units, value=units, fraction=units / total if total > 0 else None)


def pareto_front(points: list[tuple[str, float, float]]) -> list[str]:
    """Ids of the points (id, saving, cost) that no other point beats on both (more saving, less cost)."""
    front, best_cost = [], float("inf")
    for pid, saving, cost in sorted(points, key=lambda p: (-p[1], p[2], p[0])):
        if cost < best_cost:
            front.append(pid)
            best_cost = cost
    return front
