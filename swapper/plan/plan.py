"""The swap plan: which sites get which surrogate, with which parameters.

A plan is plain data (JSON round-trips) so it can be written into the model's
metadata and the report, edited by hand, and re-applied.

Per swapped site, the surrogate computes, per channel c,

    y = a_c · g(b_c · x + c_c) + d_c

and ``placement`` says where each of a, b, c, d lives in the rewritten graph:

- ``"producer"``  folded into the Conv/Gemm/MatMul(+Add)/BatchNormalization that feeds x;
- ``"consumers"`` folded into the linear layers that read y, directly or behind
                  ops that commute with it (average pools, channel-keeping reshapes;
                  a also through a gate Mul, d only where no zero padding is averaged);
- ``"consumers+"`` (a only) as "consumers", but a max pool is on the way: exact
                  only for a >= 0, so the fitter keeps a > 0;
- ``"inner"``     (a only) moved inside g, allowed when g is positively homogeneous and a > 0;
- ``"nodes"``     emitted as per-channel Mul/Add nodes (adds nodes, always exact);
- ``"held"``      kept at its neutral value (1 for a, b; 0 for c, d); the fitter may not move it;
- ``"approx"``    (d only) pushed into a zero-padded Conv's bias (no nodes, inexact at borders);
- ``"through add"`` (b, c) carried through the residual Add that produces x into its
                  operands' layers (b > 0); (d) into y's linear readers and through the
                  residual Adds reading y (:mod:`swapper.plan.add_folds`).

The placement is decided once, in :mod:`swapper.plan.placement`, which also
says what it asks of the values of a (:func:`swapper.plan.placement.a_rule`);
calibration keeps to it and the rewriter carries it out unchanged, so the
plan written into the model and the report is what the graph holds.
"""
from __future__ import annotations

import json
import logging
from dataclasses import asdict, dataclass, field

import numpy as np

from swapper.functions.params import NEUTRAL, PARAMS
from swapper.options import check_fold
from swapper.plan.placement import a_rule, b_rule, check_placement

logger = logging.getLogger(__name__)


@dataclass
class SiteSwap:
    site_id: str
    source: str
    source_params: dict
    target: str
    target_params: dict
    channel_axis: int | None
    channels: int  # 1 when the channel axis is unknown (one scalar set)
    a: np.ndarray
    b: np.ndarray
    c: np.ndarray
    d: np.ndarray
    placement: dict  # param -> one of swapper.plan.placement.PLACEMENTS
    notes: list[str] = field(default_factory=list)

    def free(self) -> tuple[str, ...]:
        """The parameters a fitter may move."""
        return tuple(p for p in PARAMS if self.placement.get(p) != "held")

    def a_bounds(self) -> dict[str, bool]:
        """What the fitter must keep true of a, as its options ``positive_a`` and ``nonzero_a``.

        From the placement alone (:func:`swapper.plan.placement.a_rule`), never
        from the current values: a > 0 for "inner" and "consumers+", a != 0 for
        "consumers" while d is a node.
        """
        rule = a_rule(self.placement)
        return {"positive_a": rule == "positive", "nonzero_a": rule == "nonzero"}

    def fit_bounds(self) -> dict[str, bool]:
        """Every option the fitter takes from the placement: :meth:`a_bounds` and ``positive_b``
        (b > 0 for "through add", :func:`swapper.plan.placement.b_rule`)."""
        return {**self.a_bounds(), "positive_b": b_rule(self.placement) == "positive"}

    def check(self) -> dict[str, str]:
        """The placement with every parameter named; UsageError if the current values break it
        (:func:`swapper.plan.placement.check_placement`: e.g. a hand-edited a < 0 behind a max pool)."""
        from swapper import functions

        values = {p: np.asarray(getattr(self, p), dtype=np.float64).ravel() for p in PARAMS}
        return check_placement(self.site_id, self.placement, values, functions.get(self.target))

    def surrogate(self):
        """(g, dg) of the surrogate with its own parameters fixed."""
        from swapper import functions

        return functions.get(self.target).bind(self.target_params)

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

    def by_site(self) -> dict[str, SiteSwap]:
        return {s.site_id: s for s in self.swaps}

    def to_dict(self) -> dict:
        return {
            "fold": self.fold,
            "swaps": [s.to_dict() for s in self.swaps],
            "skipped": [asdict(s) for s in self.skipped],
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
            fold=d["fold"],
            swaps=[SiteSwap.from_dict(s) for s in d["swaps"]],
            skipped=[Skipped(**s) for s in d.get("skipped", [])],
        )

    @classmethod
    def from_json(cls, text: str) -> "Plan":
        return cls.from_dict(json.loads(text))


_STARTS: dict[tuple, tuple[float, float, float, float]] = {}


def _starting_params(source: str, source_params: dict, target: str, target_params: dict,
                     free: str, positive_a: bool, nonzero_a: bool) -> tuple[float, float, float, float]:
    """Least-squares best a, b, c, d of the surrogate to the source over a standard input range (memoised)."""
    from swapper import functions
    from swapper.fit.channel import starting_params

    key = (source, json.dumps(source_params, sort_keys=True), target, json.dumps(target_params, sort_keys=True),
           free, positive_a, nonzero_a)
    if key not in _STARTS:
        f, _ = functions.get(source).bind(source_params)
        g, dg = functions.get(target).bind(target_params)
        _STARTS[key] = starting_params(f, g, free=free, positive_a=positive_a, dg=dg, nonzero_a=nonzero_a)
    return _STARTS[key]


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
) -> Plan:
    """Choose sites and surrogates; set each swap's starting parameters and placement.

    Default: every supported *pointwise* site whose function is costly; gates only
    with ``include_gates``; graph outputs only with ``include_outputs``.
    ``site_ids`` and ``only`` (a source function name) narrow the choice.
    """
    from swapper import functions
    from swapper.core.graph import GraphIndex
    from swapper.errors import UsageError
    from swapper.plan.add_folds import Upstream
    from swapper.plan.placement import decide_placement

    check_fold(fold)
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
    index = GraphIndex.of(model)
    swaps, skipped = [], []
    upstream: dict[str, Upstream] = {}  # swapped sites decided so far, by output (b may pass into them)
    for site in sites:
        if site_ids and site.id not in site_ids:
            continue
        if only and site.function != only:
            continue
        explicit = bool(site_ids)

        def skip(reason: str) -> None:
            skipped.append(Skipped(site.id, site.function, reason))

        if not site.supported:
            skip(site.reason or "not supported")
            continue
        fn = functions.REGISTRY.get(site.function)
        if fn is None:
            skip(f"no registry entry for {site.function}")
            continue
        if fn.is_cheap and not explicit:
            skip(f"{site.function} is already cheap")
            continue
        if site.role == "gate" and not (include_gates or explicit):
            skip("gate (its output multiplies another tensor); use --include-gates")
            continue
        if site.role == "output" and not (include_outputs or explicit):
            skip("graph output; use --include-outputs")
            continue
        target = to or functions.DEFAULT_TARGET.get(site.function)
        if target is None:
            skip(f"no default surrogate for {site.function}; name one with --to")
            continue
        if target == site.function and to is None:
            skip("already its own surrogate")
            continue
        target_fn = functions.get(target)
        tparams = functions.target_params(site.function, site.params, target)
        placement, notes = decide_placement(index, site, target_fn, fold, upstream)
        upstream[site.output] = Upstream(site, placement, target_fn.homogeneous)
        channels = site.channels or 1
        swap = SiteSwap(
            site_id=site.id,
            source=site.function,
            source_params=dict(site.params),
            target=target,
            target_params=tparams,
            channel_axis=site.channel_axis if site.channels else None,
            channels=channels,
            **{p: np.full(channels, NEUTRAL[p]) for p in PARAMS},
            placement=placement,
            notes=list(notes),
        )
        # the start keeps to what the placement asks of a, as every later fit does
        start = _starting_params(site.function, site.params, target, tparams, "".join(swap.free()),
                                 **swap.a_bounds())
        if swap.fit_bounds()["positive_b"] and start[1] <= 0:  # and b > 0 where b passes through an add
            start = _starting_params(site.function, site.params, target, tparams,
                                     "".join(p for p in swap.free() if p != "b"), **swap.a_bounds())
        swap.set_params(**{p: np.full(channels, v) for p, v in zip(PARAMS, start)})
        swaps.append(swap)
    return Plan(fold=fold, swaps=swaps, skipped=skipped)
