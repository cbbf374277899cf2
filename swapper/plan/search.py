"""The per-site search under an accuracy allowance: what to swap where, and backing off until the plan passes.

Transformation, in two steps, with no model in sight (the numbers come from a
sweep, :mod:`swapper.sweep`):

1. :func:`select`: per site a list of :class:`Option` (one way of swapping
   that site, with the saving measured when it alone was swapped and the
   accuracy it cost then) and an allowance -> at most one option per site,
   the set with the largest total saving whose summed cost stays within the
   allowance. The sum of single-site costs is the first estimate of the
   combined cost (errors of separate sites add roughly, as independent noise
   powers do; interactions are what the verification below catches). A cost
   below zero (the site alone *gained* accuracy) counts as zero: a gain on a
   few hundred samples is mostly chance and is not spent elsewhere. Options
   that save nothing are never taken. This is the multiple-choice knapsack,
   solved exactly by dynamic programming over the cost axis cut into ``grid``
   steps of ``allowance / grid``, each cost rounded *up* to whole steps (so the
   true sum never exceeds the allowance); ties go to the lower cost, then to
   the earlier option.
2. :func:`search`: the selection is verified as a whole by the caller's
   ``verify`` (a full calibration, the full gate and the timing on the
   target); while it fails, one site is dropped and the rest verified again:
   on a failed gate the site with the worst accuracy cost per unit of saving,
   on a plan that is not faster than the original the site that saves least.
   A plan that is not faster is never returned; when every site has been
   dropped, or none saves anything, the result is empty and says why.
"""
from __future__ import annotations

import logging
import math
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

logger = logging.getLogger(__name__)

GRID = 1000  # cost steps per allowance: 0.1% of the allowance is lost at most to rounding per site
EPS = 1e-12


@dataclass(frozen=True)
class Option:
    """One way to swap one site: its id in the sweep, what it saves and what it costs in accuracy."""

    site_id: str
    key: str
    saving: float  # larger is better (ms, or the target's cost units)
    cost: float  # in the gate metric's cost units (e.g. top-1 points lost); < 0 is a measured gain

    @property
    def charged(self) -> float:
        """The cost counted against the allowance: gains count as zero."""
        return max(0.0, float(self.cost))


@dataclass
class Selection:
    """At most one option per site, with the sums the choice was made on."""

    chosen: dict[str, Option]  # site id -> option
    saving: float
    cost: float  # summed charged costs


def _steps(cost: float, unit: float) -> int | None:
    """Cost in whole grid steps, rounded up; None when it does not fit at all (zero allowance, positive cost)."""
    if cost <= 0.0:
        return 0
    if unit <= 0.0:
        return None
    return math.ceil(cost / unit - 1e-9)


def select(options: list[Option], allowance: float, *, grid: int = GRID) -> Selection:
    """The options (at most one per site) with the largest total saving within ``allowance`` (module docstring)."""
    if not math.isfinite(allowance) or allowance < 0:
        raise ValueError(f"allowance must be a finite number >= 0, got {allowance}")
    unit = allowance / grid if allowance > 0 else 0.0
    cap = grid if allowance > 0 else 0
    sites: dict[str, list[tuple[Option, int]]] = {}
    for o in options:
        steps = _steps(o.charged, unit)
        if o.saving > 0 and math.isfinite(o.saving) and steps is not None and steps <= cap:
            sites.setdefault(o.site_id, []).append((o, steps))
    best = np.zeros(cap + 1)  # best[w]: the largest saving with summed steps <= w
    picks: list[tuple[str, np.ndarray]] = []  # per site: the option index taken at each w (-1: none)
    for site_id, group in sites.items():
        new, pick = best.copy(), np.full(cap + 1, -1)
        for k, (o, steps) in enumerate(group):
            shifted = np.full(cap + 1, -np.inf)
            shifted[steps:] = best[: cap + 1 - steps] + o.saving
            better = shifted > new + EPS
            new[better], pick[better] = shifted[better], k
        best = new
        picks.append((site_id, pick))
    w = int(np.flatnonzero(best >= best[-1] - EPS)[0])  # the lowest summed cost with the largest saving
    chosen: dict[str, Option] = {}
    for site_id, pick in reversed(picks):
        k = int(pick[w])
        if k >= 0:
            o, steps = sites[site_id][k]
            chosen[site_id] = o
            w -= steps
    chosen = {s: chosen[s] for s in sites if s in chosen}  # site order of the input
    return Selection(chosen, float(sum(o.saving for o in chosen.values())),
                     float(sum(o.charged for o in chosen.values())))


@dataclass
class Verification:
    """What the caller's ``verify`` found for one combined plan."""

    passed: bool  # the full gate approved it
    faster: bool | None  # measured on the target: faster than the original (None: not measured)
    detail: str = ""  # one line: the gate's reason, the ratio
    figures: dict = field(default_factory=dict)  # anything worth keeping (metric, ratio)


@dataclass
class Attempt:
    """One verification of a combined plan, and the site dropped after it (if any)."""

    chosen: dict[str, str]  # site id -> option key
    verification: Verification
    dropped: str | None = None
    why_dropped: str = ""


@dataclass
class SearchResult:
    chosen: dict[str, Option]  # empty: nothing is swapped
    attempts: list[Attempt]
    reason: str  # one line: why this plan, or why nothing
    first: Selection | None = None  # what the single-site figures chose before any verification


def _worst_per_saving(chosen: dict[str, Option]) -> str:
    # cost per unit of saving; the small floor on cost makes zero-cost sites comparable (least saving goes first)
    return max(chosen, key=lambda s: ((chosen[s].charged + EPS) / chosen[s].saving, -chosen[s].saving))


def _least_saving(chosen: dict[str, Option]) -> str:
    return min(chosen, key=lambda s: (chosen[s].saving, -chosen[s].charged))


def search(options: list[Option], allowance: float, verify: Callable[[dict[str, Option]], Verification], *,
           grid: int = GRID) -> SearchResult:
    """Select (:func:`select`), then verify and back off until a plan passes and is faster (module docstring)."""
    first = select(options, allowance, grid=grid)
    chosen = dict(first.chosen)
    attempts: list[Attempt] = []
    if not chosen:
        return SearchResult({}, attempts, "no single-site swap saves anything here within the allowance", first)
    while chosen:
        check = verify(dict(chosen))
        attempt = Attempt({s: o.key for s, o in chosen.items()}, check)
        attempts.append(attempt)
        if check.passed and check.faster is not False:
            return SearchResult(chosen, attempts, f"{len(chosen)} site(s) pass together: {check.detail}", first)
        if not check.passed:
            drop = _worst_per_saving(chosen)
            attempt.why_dropped = (f"gate failed ({check.detail}); {drop} has the largest accuracy cost per "
                                   f"saving ({chosen[drop].charged:.3g} for {chosen[drop].saving:.3g})")
        else:
            drop = _least_saving(chosen)
            attempt.why_dropped = f"not faster than the original ({check.detail}); {drop} saves least"
        attempt.dropped = drop
        logger.info("search: dropping %s: %s", drop, attempt.why_dropped)
        del chosen[drop]
    last = attempts[-1].verification
    why = "no subset passed the gate" if not last.passed else "no subset was faster than the original"
    return SearchResult({}, attempts, f"{why} after dropping every site ({last.detail})", first)
