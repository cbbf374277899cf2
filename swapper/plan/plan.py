"""The swap plan: which sites get which surrogate, with which parameters.

A plan is plain data (JSON round-trips) so it can be written into the model's
metadata and the report, edited by hand, and re-applied.

Per swapped site, the surrogate computes, per channel c,

    y = a_c · g(b_c · x + c_c) + d_c

and ``placement`` says where each of a, b, c, d lives in the rewritten graph:

- ``"producer"``          folded into the Conv/Gemm/MatMul(+Add)/BatchNormalization that feeds x;
- ``"consumers"``         folded into the linear layers that read y, directly or behind
                          ops that commute with it (average pools, channel-keeping reshapes;
                          a also through a gate Mul, d only where no zero padding is averaged);
- ``"consumers-via-max"`` (a only) as "consumers", but a max pool is on the way: exact
                          only for a >= 0, so the fitter keeps a > 0;
- ``"in-surrogate"``      (a only) moved inside g, allowed when g is positively homogeneous and a > 0;
- ``"nodes"``             emitted as per-channel Mul/Add nodes (adds nodes, always exact);
- ``"fixed"``             kept at its neutral value (1 for a, b; 0 for c, d); the fitter may not move it;
- ``"approx"``            (d only) pushed into a zero-padded Conv's bias (no nodes, inexact at borders);
- ``"through-add"``       (b, c) carried through the residual Add that produces x into its
                          operands' layers (b > 0); (d) into y's linear readers and through the
                          residual Adds reading y (:mod:`swapper.plan.add_folds`).

Each swap names the function it replaces (``SiteSwap.function``) and the
surrogate written instead (``SiteSwap.surrogate``). Plans written before these
names (``source``/``target``, ``"held"``/``"inner"``/``"consumers+"``,
fold ``"nodes"``) are read with the new ones (:meth:`Plan.from_dict`).

The placement is decided once, in :mod:`swapper.plan.placement`, which also
says what it asks of the values of a (:func:`swapper.plan.placement.a_rule`);
calibration keeps to it and the rewriter carries it out unchanged, so the
plan written into the model and the report is what the graph holds.

With a target profile, :mod:`swapper.plan.choose` picks per site the
surrogate and its emission form (``SiteSwap.form``, one of
:mod:`swapper.functions.forms`; its costs on the target in ``SiteSwap.cost``)
or keeps the site (``Skipped.reason``); ``Plan.target``, ``Plan.opset``,
``Plan.conversion`` (an ``--opset`` conversion), ``Plan.remaining`` (sites
left with ops the target cannot run) and ``Plan.hints`` record the rest.
The fitted a, b, c, d stay in the surrogate's own parametrisation; the
rewriter applies the form's exact re-parametrisation when it writes the graph.
"""
from __future__ import annotations

import json
import logging
from dataclasses import asdict, dataclass, field

import numpy as np

from swapper.functions.params import NEUTRAL, PARAMS
from swapper.options import fold_word
from swapper.plan.placement import a_rule, b_rule, canonical_placement, check_placement

logger = logging.getLogger(__name__)


# Field names of plans written before the rename: what a site computes was its "source", the surrogate its "target".
_RENAMED = {"source": "function", "source_params": "function_params", "target": "surrogate",
            "target_params": "surrogate_params"}


@dataclass
class SiteSwap:
    site_id: str
    function: str  # the costly function at the site (a registry name)
    function_params: dict
    surrogate: str  # the function written in its place
    surrogate_params: dict  # the surrogate's own fixed parameters (functions.surrogate_params)
    channel_axis: int | None
    channels: int  # 1 when the channel axis is unknown (one scalar set)
    a: np.ndarray
    b: np.ndarray
    c: np.ndarray
    d: np.ndarray
    placement: dict  # param -> one of swapper.plan.placement.PLACEMENTS
    notes: list[str] = field(default_factory=list)
    # the emission form (swapper.functions.forms); None: the one the registry's emitter writes at the model's opset
    form: str | None = None
    cost: dict | None = None  # on the plan's target: {"original": x, "candidate": y} (null: cannot run)

    def free(self) -> tuple[str, ...]:
        """The parameters a fitter may move."""
        return tuple(p for p in PARAMS if self.placement.get(p) != "fixed")

    def a_bounds(self) -> dict[str, bool]:
        """What the fitter must keep true of a, as its options ``positive_a`` and ``nonzero_a``.

        From the placement alone (:func:`swapper.plan.placement.a_rule`), never
        from the current values: a > 0 for "in-surrogate" and "consumers-via-max", a != 0 for
        "consumers" while d is a node.
        """
        rule = a_rule(self.placement)
        return {"positive_a": rule == "positive", "nonzero_a": rule == "nonzero"}

    def fit_bounds(self) -> dict[str, bool]:
        """Every option the fitter takes from the placement: :meth:`a_bounds` and ``positive_b``
        (b > 0 for "through-add", :func:`swapper.plan.placement.b_rule`)."""
        return {**self.a_bounds(), "positive_b": b_rule(self.placement) == "positive"}

    def check(self) -> dict[str, str]:
        """The placement with every parameter named; UsageError if the current values break it
        (:func:`swapper.plan.placement.check_placement`: e.g. a hand-edited a < 0 behind a max pool)."""
        from swapper import functions

        values = {p: np.asarray(getattr(self, p), dtype=np.float64).ravel() for p in PARAMS}
        return check_placement(self.site_id, self.placement, values, functions.get(self.surrogate))

    def bound_surrogate(self):
        """(g, dg) of the surrogate with its own parameters fixed."""
        from swapper import functions

        return functions.get(self.surrogate).bind(self.surrogate_params)

    def params(self) -> dict[str, np.ndarray]:
        return {p: getattr(self, p) for p in PARAMS}

    def set_params(self, **values: np.ndarray) -> None:
        for p, v in values.items():
            setattr(self, p, np.asarray(v, dtype=np.float64).reshape(self.channels))

    def to_dict(self) -> dict:
        d = asdict(self)
        for p in PARAMS:
            d[p] = [float(v) for v in np.asarray(getattr(self, p), dtype=np.float64).ravel()]
        return d

    @classmethod
    def from_dict(cls, d: dict) -> "SiteSwap":
        d = dict(d)
        for old, new in _RENAMED.items():  # plans written before the rename (model metadata, hand-edited files)
            if old in d and new not in d:
                d[new] = d.pop(old)
        d["placement"] = canonical_placement(d["placement"])
        for p in PARAMS:  # a summary (model metadata) carries no values: read them as neutral
            d[p] = np.asarray(d.get(p, [NEUTRAL[p]] * d["channels"]), dtype=np.float64)
        return cls(**d)


@dataclass
class Skipped:
    site_id: str
    function: str
    reason: str


@dataclass
class Plan:
    fold: str  # one of swapper.options.FOLD_POLICIES
    swaps: list[SiteSwap]
    skipped: list[Skipped] = field(default_factory=list)
    target: str | None = None  # the target profile planned for (None: no target, registry defaults)
    opset: int | None = None  # the default-domain opset planned at
    conversion: dict | None = None  # {"from", "to", "max_abs_diff", "samples"} when the opset was converted
    remaining: list[str] = field(default_factory=list)  # sites left with ops the target cannot run, and why
    hints: list[str] = field(default_factory=list)  # e.g. a faster form that needs a higher opset

    def by_site(self) -> dict[str, SiteSwap]:
        return {s.site_id: s for s in self.swaps}

    def to_dict(self) -> dict:
        return {
            "fold": self.fold,
            "swaps": [s.to_dict() for s in self.swaps],
            "skipped": [asdict(s) for s in self.skipped],
            "target": self.target,
            "opset": self.opset,
            "conversion": self.conversion,
            "remaining": list(self.remaining),
            "hints": list(self.hints),
        }

    def summary_json(self) -> str:
        """The plan without per-channel values (they are folded into the graph): small enough for model metadata."""
        d = self.to_dict()
        for s in d["swaps"]:
            for p in PARAMS:
                del s[p]
        return json.dumps(d, sort_keys=True, separators=(",", ":"))

    @classmethod
    def from_dict(cls, d: dict) -> "Plan":
        return cls(
            fold=fold_word(d["fold"]),
            swaps=[SiteSwap.from_dict(s) for s in d["swaps"]],
            skipped=[Skipped(**s) for s in d.get("skipped", [])],
            target=d.get("target"), opset=d.get("opset"), conversion=d.get("conversion"),
            remaining=list(d.get("remaining", [])), hints=list(d.get("hints", [])),
        )

    @classmethod
    def from_json(cls, text: str) -> "Plan":
        return cls.from_dict(json.loads(text))


_STARTS: dict[tuple, tuple[float, float, float, float]] = {}


def _starting_params(function: str, function_params: dict, surrogate: str, surrogate_params: dict,
                     free: str, positive_a: bool, nonzero_a: bool) -> tuple[float, float, float, float]:
    """Least-squares best a, b, c, d of the surrogate to the function over a standard input range (memoised)."""
    from swapper import functions
    from swapper.fit.channel import starting_params

    key = (function, json.dumps(function_params, sort_keys=True), surrogate,
           json.dumps(surrogate_params, sort_keys=True), free, positive_a, nonzero_a)
    if key not in _STARTS:
        f, _ = functions.get(function).bind(function_params)
        g, dg = functions.get(surrogate).bind(surrogate_params)
        _STARTS[key] = starting_params(f, g, free=free, positive_a=positive_a, dg=dg, nonzero_a=nonzero_a)
    return _STARTS[key]


def _parse_choices(choices: dict[str, str] | None, known: set[str]) -> dict[str, tuple[str, str | None, str | None]]:
    """{site id: (surrogate, form or None, fold policy or None)} from {site id: "surrogate[:form][@fold]"}."""
    from swapper import functions
    from swapper.errors import UsageError

    out = {}
    for site_id, text in (choices or {}).items():
        if site_id not in known:
            raise UsageError(f"no site with id {site_id}; valid ids: {', '.join(sorted(known)) or 'none'}")
        text, _, site_fold = str(text).partition("@")
        name, _, form = text.partition(":")
        functions.get(name)
        out[site_id] = (name, form or None, fold_word(site_fold) if site_fold else None)
    return out


def make_plan(
    model,
    sites: list,
    *,
    to: str | None = None,
    site_ids: list[str] | None = None,
    only: str | None = None,
    include_gates: bool = False,
    include_outputs: bool = False,
    fold: str = "exact",
    target=None,
    choices: dict[str, str] | None = None,
) -> Plan:
    """Choose sites, surrogates and emission forms; set each swap's starting parameters and placement.

    Default: every supported *hidden* site whose function is costly; gates only
    with ``include_gates``; graph outputs only with ``include_outputs``.
    ``site_ids`` and ``only`` (a source function name) narrow the choice.
    ``target`` (a :class:`~swapper.targets.profile.TargetProfile`) decides per
    site which surrogate and form pay on it, and keeps sites where none does
    (:mod:`swapper.plan.choose`); a site whose ops the target cannot run is
    swapped even when it is a gate, an output or already cheap, and named in
    ``Plan.remaining`` when it must stay. ``to`` forces one surrogate for every
    chosen site, ``choices`` one per site id ("relu" or "hard_swish:Mul-Clip"; "relu@nodes" also sets
    that site's fold policy, "relu:Relu@exact" both).
    """
    from swapper import functions
    from swapper.core.graph import GraphIndex
    from swapper.core.model_io import MAX_OPSET
    from swapper.errors import UsageError
    from swapper.plan.add_folds import Upstream
    from swapper.plan.bodies import SiteGraphs
    from swapper.plan.choose import choose, chosen_line, opset_hints, site_options

    fold = fold_word(fold)
    if to is not None:
        functions.get(to)  # raises with the valid names
    if only is not None:
        functions.get(only)
    known = {s.id for s in sites}
    if site_ids:
        unknown = [i for i in site_ids if i not in known]
        if unknown:
            raise UsageError(
                f"no site with id {', '.join(unknown)}; valid ids: {', '.join(s.id for s in sites) or 'none'}"
            )
    pinned = _parse_choices(choices, known)
    index = GraphIndex.of(model)
    graphs = SiteGraphs(model, index)  # a site inside an If/Loop/Scan body is placed within its body
    opset = index.opset
    name = None if target is None else target.name
    swaps, skipped, remaining, hints = [], [], [], {}
    # swapped sites decided so far, by graph (main graph or one body) and output: b may pass into them
    upstreams: dict[tuple, dict[str, Upstream]] = {}
    for site in sites:
        explicit = bool(site_ids) or site.id in pinned
        lacking = [] if target is None else _lacking(graphs.index_for(site), site, target)

        def skip(reason: str, site=site, lacking=lacking) -> None:
            skipped.append(Skipped(site.id, site.function, reason))
            if lacking:
                remaining.append(f"{site.id} ({site.function}): {', '.join(lacking)} cannot run on {name}; {reason}")

        if (site_ids and site.id not in site_ids) or (only and site.function != only):
            if lacking:
                remaining.append(f"{site.id} ({site.function}): {', '.join(lacking)} cannot run on {name}; "
                                 "not selected (--sites / --only)")
            continue
        if not site.supported:
            skip(site.reason or "not supported")
            continue
        fn = functions.REGISTRY.get(site.function)
        if fn is None:
            skip(f"no registry entry for {site.function}")
            continue
        forced, form, site_fold = pinned.get(site.id, (to, None, None))
        # a cheap function with alternatives (hard-swish: four ops where Relu fuses into the Conv) is priced on
        # a target like any other; without a target, or without alternatives, it stays
        priced = target is not None and bool(functions.ALTERNATIVES.get(site.function))
        if fn.is_cheap and not (explicit or lacking or priced):
            skip(f"{site.function} is already cheap")
            continue
        notes = [f"swapped although a {site.role}: {', '.join(lacking)} cannot run on {name}"] \
            if lacking and site.role != "hidden" else []
        if site.role == "gate" and not (include_gates or explicit or lacking):
            skip("gate (its output multiplies another tensor); use --include-gates")
            continue
        if site.role == "output" and not (include_outputs or explicit or lacking):
            skip("graph output; use --include-outputs")
            continue
        order = [forced] if forced else functions.candidates(site.function)
        if not order or (fn.is_cheap and forced is None and not (lacking or priced)):
            skip(f"no default surrogate for {site.function}; name one with --to")
            continue
        upstream = upstreams.setdefault(site.body, {})
        opts = site_options(graphs.index_for(site), site, target, order, fold=site_fold or fold, opset=opset,
                            upstream=upstream)
        choice = choose(opts, order, opset, forced=forced, form=form)
        if target is not None and forced is None:
            for k, op in opset_hints(opts, order, opset, min(target.opset_max, MAX_OPSET), choice):
                hints.setdefault((k, op), []).append(site.id)
        if choice.option is None:
            skip(choice.reason)
            continue
        option = choice.option
        if target is not None:
            notes.append(chosen_line(opts, option))
        swaps.append(_site_swap(site, option, notes, None if target is None else
                                {"original": opts.original.cost, "candidate": option.cost}))
        upstream[site.output] = Upstream(site, dict(option.placement), functions.get(option.surrogate).homogeneous)
    plan = Plan(fold=fold, swaps=swaps, skipped=skipped, target=name, opset=opset, remaining=remaining,
                hints=[f"{op} needs opset {k}; this model is opset {opset}; rerun with --opset {k} "
                       f"(sites {', '.join(ids)})" for (k, op), ids in sorted(hints.items())])
    if target is not None and not target.accepts_opset(opset):
        plan.hints.append(f"{name} accepts opsets {target.opset_min}..{target.opset_max}; this model is "
                          f"opset {opset}")
    return plan


def _lacking(index, site, target) -> list[str]:
    """The site's own op types the target cannot run (support "none"), in graph order."""
    ops = [index.nodes_by_name[n].op_type for n in site.nodes if n in index.nodes_by_name]
    return target.allows(ops)[1]


def _site_swap(site, option, notes: list[str], cost: dict | None) -> SiteSwap:
    """The SiteSwap for ``option`` at ``site``, its starting a, b, c, d fitted within the placement."""
    from swapper import functions

    channels = site.channels or 1
    tparams = functions.surrogate_params(site.function, site.params, option.surrogate)
    swap = SiteSwap(
        site_id=site.id,
        function=site.function,
        function_params=dict(site.params),
        surrogate=option.surrogate,
        surrogate_params=tparams,
        channel_axis=site.channel_axis if site.channels else None,
        channels=channels,
        **{p: np.full(channels, NEUTRAL[p]) for p in PARAMS},
        placement=dict(option.placement),
        notes=list(option.notes) + list(notes),
        form=option.form.name,
        cost=cost,
    )
    # the start keeps to what the placement asks of a, as every later fit does
    start = _starting_params(site.function, site.params, option.surrogate, tparams, "".join(swap.free()),
                             **swap.a_bounds())
    if swap.fit_bounds()["positive_b"] and start[1] <= 0:  # and b > 0 where b passes through an add
        start = _starting_params(site.function, site.params, option.surrogate, tparams,
                                 "".join(p for p in swap.free() if p != "b"), **swap.a_bounds())
    swap.set_params(**{p: np.full(channels, v) for p, v in zip(PARAMS, start)})
    return swap
