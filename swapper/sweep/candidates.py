"""Which sites a sweep tries, and every candidate at each: surrogate × form × placement × consumer refit.

Transformation: (model, its sites, a target profile, the choice settings) ->
one :class:`SiteCandidates` per eligible site, listing its
:class:`CandidateSpec` s and the surrogates that cannot be used there (why).

- *eligible site*: one the plan would swap with no target (registry defaults:
  supported, costly, hidden (not gates or outputs) unless gates / outputs are asked for, narrowed
  by ``site_ids`` / ``only``), or one the plan for the target swaps (a site
  whose ops the target cannot run). Sites inside If/Loop/Scan bodies are
  left out: the shared recording is made on the main graph, where their
  tensors do not exist (``--plan all`` swaps them).
- *surrogates*: the function's candidates (registry default, then its
  alternatives, :func:`swapper.functions.candidates`), or the ones named; each
  in its cheapest usable form on the target (:meth:`SiteOptions.best`), per
  placement: ``exact`` (parameters folded into neighbours, no node added;
  one that cannot fold is fixed at its neutral value) and ``exact+nodes``
  (those become per-channel Mul/Add nodes). A surrogate with no usable form is listed with
  the reason. ``paying_only`` keeps a surrogate only where the profile's
  prior says it is cheaper than the site's own ops.
- *same model*: where the ``exact`` placement fixes nothing, ``exact+nodes`` places
  every parameter the same way and writes the same graph: that candidate is
  not run again but points at the other (``same_as``).
- *refit*: each of those without and with the consumer refit.
"""
from __future__ import annotations

import logging
from dataclasses import asdict, dataclass, field

import onnx

from swapper import functions
from swapper.core.graph import GraphIndex
from swapper.plan.choose import site_options
from swapper.plan.plan import make_plan
from swapper.scan.sites import Site
from swapper.targets.profile import TargetProfile

logger = logging.getLogger(__name__)

PLACEMENTS = ("exact", "exact+nodes")


@dataclass(frozen=True)
class CandidateSpec:
    """One single-site swap to measure."""

    id: str  # "s3/relu:Relu/exact/refit": unique in a sweep
    site_id: str
    surrogate: str
    form: str
    fold: str  # the placement policy: "exact" (no node added) or "exact+nodes"
    refit: bool
    placement: tuple[tuple[str, str], ...]  # (param, where) as the plan would place it
    ops: tuple[str, ...]  # the priced chain after the producer
    prior_cost: float | None  # the profile's cost of that chain per element (None: no target / cannot run)
    same_as: str | None = None  # a candidate that writes the same model

    def choice(self) -> str:
        """The per-site choice string of ``make_plan(choices=...)``."""
        return f"{self.surrogate}:{self.form}@{self.fold}"

    def group(self) -> str:
        """Candidates that share one calibration (the refit variants of one swap)."""
        return f"{self.site_id}/{self.surrogate}:{self.form}/{self.fold}"


@dataclass
class SiteCandidates:
    site: Site
    original_ops: tuple[str, ...]
    original_cost: float | None  # per element on the target; None: the target cannot run it (or no target)
    original_shown: str
    candidates: list[CandidateSpec] = field(default_factory=list)
    unusable: list[dict] = field(default_factory=list)  # {"surrogate", "placement", "why"}

    def header(self) -> dict:
        s = self.site
        return {"site_id": s.id, "function": s.function, "role": s.role, "channels": s.channels,
                "original_ops": list(self.original_ops), "original_cost": self.original_cost,
                "original_shown": self.original_shown, "unusable": list(self.unusable)}


def spec_dict(spec: CandidateSpec) -> dict:
    d = asdict(spec)
    d["placement"], d["ops"] = dict(spec.placement), list(spec.ops)
    return d


def eligible_sites(model: onnx.ModelProto, sites: list[Site], profile: TargetProfile | None, *,
                   site_ids: list[str] | None = None, only: str | None = None, include_gates: bool = False,
                   include_outputs: bool = False) -> list[Site]:
    """The sites a sweep tries (module docstring), in graph order."""
    kw = {"site_ids": site_ids, "only": only, "include_gates": include_gates, "include_outputs": include_outputs}
    ids = {s.site_id for s in make_plan(model, sites, **kw).swaps}
    if profile is not None:
        ids |= {s.site_id for s in make_plan(model, sites, target=profile, **kw).swaps}
    return [s for s in sites if s.id in ids and not getattr(s, "body", ())]


def site_candidates(model: onnx.ModelProto, sites: list[Site], profile: TargetProfile | None, *,
                    surrogates: list[str] | None = None, refit: tuple[bool, ...] = (False, True),
                    placements: tuple[str, ...] = PLACEMENTS, paying_only: bool = False,
                    **eligibility) -> list[SiteCandidates]:
    """Every candidate at every eligible site (module docstring)."""
    index = GraphIndex.of(model)
    opset = index.opset
    out = []
    for site in eligible_sites(model, sites, profile, **eligibility):
        names = functions.candidates(site.function)
        if surrogates:
            names = [n for n in names if n in surrogates]
        entry = None
        for fold in placements:
            opts = site_options(index, site, profile, names, fold=fold, opset=opset)
            if entry is None:
                o = opts.original
                entry = SiteCandidates(site, o.ops, o.cost, o.shown)
            for name in names:
                best = opts.best(name, opset)
                if best is None:
                    why = "; ".join(dict.fromkeys(x.why_not(opset) for x in opts.options if x.surrogate == name))
                    entry.unusable.append({"surrogate": name, "placement": fold, "why": why or "no form"})
                    continue
                if paying_only and not opts.pays(best):
                    entry.unusable.append({"surrogate": name, "placement": fold,
                                           "why": f"not cheaper than {opts.original.shown} by the profile "
                                                  f"({best.cost} against {opts.original.cost})"})
                    continue
                placement = tuple(sorted(best.placement.items()))
                same = None
                if fold != placements[0]:  # the same placement as an earlier policy writes the same model
                    same = next((c for c in entry.candidates if c.surrogate == name and c.form == best.form.name
                                 and c.placement == placement), None)
                for r in refit:
                    twin = None if same is None else next(
                        (c.id for c in entry.candidates if c.group() == same.group() and c.refit == r), None)
                    cid = f"{site.id}/{name}:{best.form.name}/{fold}" + ("/refit" if r else "")
                    entry.candidates.append(CandidateSpec(cid, site.id, name, best.form.name, fold, r, placement,
                                                          tuple(best.ops), best.cost, twin))
        if entry is not None:
            out.append(entry)
    return out
