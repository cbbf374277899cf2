"""Where each surrogate parameter lives, decided once per site, before calibration.

Transformation: a site swapped for ``y = a·g(b·x + c) + d`` gets a placement
``{param: where}`` (:func:`decide_placement`, from the layers
:mod:`swapper.plan.fold_targets` finds and the fold policy):

- ``"producer"``          (b, c) folded into the layer that produces x;
- ``"consumers"``         (a, d) folded into the linear layers that read y;
- ``"consumers-via-max"`` (a) as "consumers", but a max pool (or max reduction) is on
                          the way: max(a·y) = a·max(y) only for a > 0;
- ``"in-surrogate"``      (a) moved inside g: a·g(z) = g(a·z) for a > 0 and positively homogeneous g;
- ``"nodes"``             an explicit per-channel Mul/Add node (always exact);
- ``"fixed"``             kept at its neutral value (1 for a, b; 0 for c, d); the fitter may not move it;
- ``"approx"``            (d) pushed into a zero-padded Conv's bias (inexact at the borders);
- ``"through-add"``       (b, c) x is a residual Add's output: c into the bias of the
                          Add's exclusive linear producer of one operand, b into every
                          operand (producers' rows and biases; an upstream swapped site's
                          pre-activation, its other readers reading through 1/b);
                          (d) y also feeds residual Adds: d into the linear readers' biases
                          and, through each Add, into its other operand's exclusive linear
                          producer or the layers reading its output. The rules and their
                          maths are in :mod:`swapper.plan.add_folds`.

Plans written before these words (``"held"``, ``"inner"``, ``"consumers+"``) read
through :func:`canonical_placement`. :data:`LEGEND` is the one-line explanation
of each word that tables print beneath them.

The placement is the whole record: nothing later moves a parameter. What
the values of a must satisfy for it to stay exact is read from the
placement alone (:func:`a_rule`), never from the current values, so the
fitter keeps to it and the rewriter only checks it:

- a > 0 ("positive") for "in-surrogate" and for "consumers-via-max";
- a ≠ 0 ("nonzero") for "consumers" while d is a node: the consumers scale
  their input by a, so the d node before them must add d/a. Two rules would
  make that exact for any values: keep a away from 0 in the fit, or emit a
  as a node too. The first is taken: it adds no node under any policy (the
  second would add a Mul to every such site under ``--fold exact+nodes``; under
  the default ``--fold exact`` d is never a node, as it is "fixed" where it
  cannot fold, so neither rule ever applies there). The fit loses nothing
  that matters: it clamps |a| to 1e-6 of the channel's natural slope scale
  only where the best a is closer to 0 than that (:mod:`swapper.fit.channel`),
  and float32 rounding of (g + d/a)·a is that of a·g + d.

b > 0 ("positive", :func:`b_rule`) for "through-add": the scale may pass
through an upstream site's activation (g(b·z) = b·g(z) holds for b > 0
only); it is asked in every case so that it reads from the placement alone.

Values that break the rule (a hand-edited plan) are refused with a
one-line :class:`~swapper.errors.UsageError` (:func:`check_placement`).
"""
from __future__ import annotations

import logging

import numpy as np

from swapper.core.graph import GraphIndex
from swapper.errors import UsageError
from swapper.functions.params import NEUTRAL, PARAMS
from swapper.functions.registry import Function
from swapper.options import fold_word
from swapper.plan.add_folds import (
    THROUGH_ADD,
    Upstream,
    add_input,
    add_readers,
    residual_operands,
    residual_readers,
)
from swapper.plan.fold_targets import consumer_folds, producer_fold
from swapper.scan.sites import Site

logger = logging.getLogger(__name__)

PLACEMENTS = ("producer", "consumers", "consumers-via-max", "in-surrogate", "nodes", "fixed", "approx", THROUGH_ADD)
# the parameters each placement can hold (every one for the others)
ONLY_FOR = {"consumers-via-max": "a", "in-surrogate": "a", "approx": "d", THROUGH_ADD: "bcd", "producer": "bc",
            "consumers": "ad"}
IN_CONSUMERS = ("consumers", "consumers-via-max")  # a folded into the consumers' weights
# placements that rewrite layers
FOLDING = ("producer", "consumers", "consumers-via-max", "approx", "in-surrogate", THROUGH_ADD)
PRE_SCALED = ("producer", "nodes", THROUGH_ADD)  # where b may live for a to move inside g
OLD_WORDS = {"held": "fixed", "inner": "in-surrogate", "consumers+": "consumers-via-max"}  # older plans' words
# What each word means, for a reader of a table of placements (the terminal's swap table, report.html).
LEGEND = {
    "producer": "folded into the layer that computes the site's input",
    "consumers": "folded into the layers that read the site's output",
    "consumers-via-max": "folded into those layers through a max pool; exact only for a > 0, so a is kept > 0",
    "in-surrogate": "moved inside the surrogate: a·g(z) = g(a·z) for a > 0 (ReLU family)",
    "nodes": "a per-channel Mul or Add node added to the graph",
    "fixed": "kept at 1 (a, b) or 0 (c, d) and not fitted: it has nowhere exact to go",
    "approx": "pushed into a zero-padded Conv's bias: inexact at the image borders",
    THROUGH_ADD: "folded through a residual Add into the layers on its other side (b kept > 0)",
}


def canonical_placement(placement: dict) -> dict:
    """``placement`` with the words of older plans replaced by today's (``"held"`` -> ``"fixed"``...)."""
    return {p: OLD_WORDS.get(w, w) for p, w in placement.items()}
A_RULES = {"positive": "a > 0", "nonzero": "a != 0"}  # what a placement can ask of the values of a


def a_rule(placement: dict) -> str | None:
    """What every value of a must satisfy under ``placement``: "positive", "nonzero" or None (anything).

    From the placement alone (module docstring): the fitter keeps to it and the rewriter checks it.
    """
    where = placement.get("a")
    if where in ("in-surrogate", "consumers-via-max"):
        return "positive"
    if where in IN_CONSUMERS and placement.get("d") == "nodes":
        return "nonzero"
    return None


def b_rule(placement: dict) -> str | None:
    """What every value of b must satisfy under ``placement``: "positive" or None (module docstring)."""
    return "positive" if placement.get("b") == THROUGH_ADD else None


def check_placement(site_id: str, placement: dict, values: dict[str, np.ndarray],
                    surrogate: Function) -> dict[str, str]:
    """``placement`` with every parameter named (a missing one is "fixed"); UsageError if it or the values break it.

    ``values`` maps "a".."d" to the parameter vectors. Checked: each placement
    is known and allowed for its parameter, fixed parameters are neutral, a
    inside g needs a homogeneous g and b in the producer or a node, c in the
    producer cannot follow b as a node, and a keeps to :func:`a_rule`.
    """
    placement = canonical_placement(placement)
    place = {p: placement.get(p, "fixed") for p in PARAMS}
    for p, where in place.items():
        if where not in PLACEMENTS or p not in ONLY_FOR.get(where, p):
            raise UsageError(f"site {site_id}: invalid placement {where!r} for {p}")
        if where == "fixed" and not np.all(values[p] == NEUTRAL[p]):
            raise UsageError(f"site {site_id}: {p} is fixed but not neutral ({NEUTRAL[p]})")
    if place["a"] == "in-surrogate":
        if not surrogate.homogeneous:
            raise UsageError(f"site {site_id}: a is placed inside {surrogate.name}, which is not homogeneous")
        if place["b"] not in PRE_SCALED:
            raise UsageError(f"site {site_id}: a inside g needs b in the producer, through an add or as a node")
    if place["c"] in ("producer", THROUGH_ADD) and place["b"] == "nodes":
        raise UsageError(f"site {site_id}: c {place['c']} with b as a node would shift before scaling")
    if "producer" in (place["b"], place["c"]) and THROUGH_ADD in (place["b"], place["c"]):
        raise UsageError(f"site {site_id}: b and c cannot fold into a producer and through an add at once")
    if b_rule(place) == "positive" and np.any(values["b"] <= 0):
        bad = np.flatnonzero(values["b"] <= 0)
        channels = ", ".join(str(i) for i in bad[:5]) + (" ..." if len(bad) > 5 else "")
        raise UsageError(f"site {site_id}: b through an add needs b > 0; channel {channels} breaks it "
                         f"(placement {THROUGH_ADD!r}); re-plan instead of editing the values")
    rule, a = a_rule(place), values["a"]
    bad = np.flatnonzero(a <= 0) if rule == "positive" else np.flatnonzero(a == 0) if rule == "nonzero" else []
    if len(bad):
        what = {"in-surrogate": f"a inside {surrogate.name}", "consumers-via-max": "a folded through a max pool",
                "consumers": "a in the consumers with d as a node (d/a)"}[place["a"]]
        channels = ", ".join(str(i) for i in bad[:5]) + (" ..." if len(bad) > 5 else "")
        raise UsageError(f"site {site_id}: {what} needs {A_RULES[rule]}; channel {channels} breaks it "
                         f"(placement {place['a']!r}); re-plan instead of editing the values")
    return place


def decide_placement(index: GraphIndex, site: Site, surrogate: Function, policy: str,
                     upstream: dict[str, Upstream] | None = None) -> tuple[dict[str, str], list[str]]:
    """Where a, b, c, d of ``site`` live under fold ``policy``, and why (human-readable notes).

    ``upstream``: the swapped sites decided before, by output tensor (:class:`~swapper.plan.add_folds.Upstream`);
    b may pass through a residual Add into one of them.
    """
    policy = fold_word(policy)
    if policy == "off":
        return {p: "nodes" for p in PARAMS}, ["fold off: every parameter is an explicit Mul/Add node"]
    rest = "nodes" if policy == "exact+nodes" else "fixed"
    placement: dict[str, str] = {}
    notes: list[str] = []

    prod, why = producer_fold(index, site)
    if prod is not None:
        placement["b"] = "producer"
        placement["c"] = "producer" if prod.can_shift else rest
        if not prod.can_shift:
            notes.append(f"c {rest}: {prod.reason}")
    else:
        placement["b"], placement["c"] = _through_add_input(index, site, upstream or {}, rest, why, notes)

    adds = residual_readers(index, site)
    cons, cons_why = consumer_folds(index, site, skip=adds)
    if surrogate.homogeneous and placement["b"] in PRE_SCALED:
        placement["a"] = "in-surrogate"
        notes.append(f"a moved inside {surrogate.name} (needs a > 0)")
    elif cons is not None and adds:
        placement["a"] = rest
        notes.append(f"a {rest}: {site.output!r} also feeds the residual Add {', '.join(sorted(adds))}")
    elif cons is not None and any(f.reach.a_positive for f in cons):
        placement["a"] = "consumers-via-max"
        pools = sorted({p for f in cons if f.reach.a_positive for p in f.path})
        notes.append(f"a folded through a max pool on the way to its consumers (needs a >= 0; via {', '.join(pools)})")
    elif cons is not None:
        placement["a"] = "consumers"
    else:
        placement["a"] = rest
        notes.append(f"a {rest}: {cons_why}")

    placement["d"] = _offset(index, site, cons, cons_why, adds, policy, rest, notes)
    if a_rule(placement) == "nonzero":
        notes.append("a kept away from 0: d is a node before the consumers that scale by a, so it adds d/a")
    logger.debug("site %s placement %s", site.id, placement)
    return {p: placement[p] for p in PARAMS}, notes


def _through_add_input(index: GraphIndex, site: Site, upstream: dict[str, Upstream], rest: str, why: str,
                       notes: list[str]) -> tuple[str, str]:
    """(b, c) placements when x has no foldable producer: through a residual Add, or ``rest``."""
    route, add_why = add_input(index, site, upstream)
    if route is None:
        residual = residual_operands(index, index.producer.get(site.input))[0] is not None
        notes.append(f"b, c {rest}: {add_why if residual else why}")
        return rest, rest
    b = THROUGH_ADD if not route.scale_why else rest
    c = THROUGH_ADD if route.shift is not None else rest
    if b != THROUGH_ADD:
        notes.append(f"b {rest}: {route.scale_why}")
    if b == "nodes" and c == THROUGH_ADD:
        c = "nodes"  # a shift through the add would come before the b node's scaling
        notes.append("c nodes: b is a node, and c must be added after it")
    elif c != THROUGH_ADD:
        notes.append(f"c {rest}: no operand of Add {route.add.name!r} is an exclusive linear layer with a bias")
    if THROUGH_ADD in (b, c):
        into = route.layers() if b == THROUGH_ADD else [route.layers()[route.shift]]
        which = "b, c" if b == c else ("b" if b == THROUGH_ADD else "c")
        notes.append(f"{which} through add {route.add.name!r} into {', '.join(into)}"
                     + (" (needs b > 0)" if b == THROUGH_ADD else ""))
    return b, c


def _offset(index: GraphIndex, site: Site, cons, cons_why: str, adds: frozenset, policy: str, rest: str,
            notes: list[str]) -> str:
    """Where d lives: the linear readers of y and, through residual Adds, the layers beside or behind them."""
    routes, add_why = add_readers(index, site) if adds else ([], "")
    reaches = cons is not None and not any(f.reach.d_block for f in cons) and not add_why
    folds = list(cons or []) + [f for r in routes for f in r.onward or []]
    through = f" and through add into {', '.join(n for r in routes for n in r.layers())}" if routes else ""
    if reaches and all(f.d_exact for f in folds):
        if routes:
            notes.append(f"d into its linear readers{through}")
        return THROUGH_ADD if routes else "consumers"
    if policy == "approximate" and reaches and all(f.d_exact or f.d_approx for f in folds):
        padded = ", ".join(f.layer.node.name for f in folds if not f.d_exact)
        notes.append(f"d approx: folded into zero-padded Conv bias ({padded}){through}; inexact at the borders")
        return "approx"
    if cons is None:
        notes.append(f"d {rest}: {cons_why}")
    elif add_why:
        notes.append(f"d {rest}: {add_why}")
    elif not reaches:
        notes.append(f"d {rest}: {next(f.reach.d_block for f in cons if f.reach.d_block)}")
    else:
        blocked = ", ".join(f"{f.layer.node.op_type} {f.layer.node.name!r}" for f in folds if not f.d_exact)
        notes.append(f"d {rest}: no exact bias fold into {blocked}")
    return rest
