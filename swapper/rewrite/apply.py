"""Apply a swap plan to a copy of a model.

Transformation: for every swapped site, the site's nodes are replaced by
``y = a·g(b·x + c) + d`` written in the plan's emission form (``SiteSwap.form``,
:mod:`swapper.functions.forms`: the form's exact re-parametrisation of a, b, c, d
is applied first) and each of a, b, c, d is placed exactly as the plan says: folded into the producer
of ``x`` (its output channels scaled/shifted), folded into the linear layers
that read ``y``, directly or behind pools/reshapes/gates (their input-channel
weights scaled, ``W·d`` added to their bias; "consumers-via-max" = behind a max pool),
moved inside ``g`` (homogeneous g), carried through residual Adds into the
layers around them ("through-add", :mod:`swapper.rewrite.transport`; sites are
carried out in graph order so those folds compose), or emitted as per-channel
Mul/Add nodes. An "approx" d reports the border error of each zero-padded Conv
it enters (:func:`swapper.rewrite.folding.border_note`).
The rewriter never moves a parameter: a plan whose values break what its
placement asks (:func:`swapper.plan.placement.check_placement`, e.g. a < 0
behind a max pool), or whose folds the graph does not allow, is refused with
a UsageError, so the plan stored in the model is what the graph holds.
Parameters equal to their neutral value add nothing. The output tensor name of every site is kept,
so consumers and graph outputs are untouched. The input model is never
mutated, and folded weights always get a new initializer (the model's own
initializers may be shared by other nodes). The graph surgery itself (placing
nodes, dropping what died) is :mod:`swapper.core.surgery`.
"""
from __future__ import annotations

import logging
from dataclasses import dataclass, field

import numpy as np
import onnx
from onnx import helper

from swapper import functions
from swapper.core.emit import Emitter
from swapper.core.graph import GraphIndex
from swapper.core.surgery import (
    all_names,
    copy_model,
    site_positions,
    splice,
    used_names,
)
from swapper.errors import BadModelError, UsageError
from swapper.functions.forms import Form, default_form, get_form
from swapper.functions.params import PARAMS
from swapper.plan.add_folds import THROUGH_ADD, residual_readers
from swapper.plan.fold_targets import (
    consumer_folds,
    producer_fold,
    site_rank,
)
from swapper.plan.placement import FOLDING, IN_CONSUMERS, canonical_placement, check_placement
from swapper.plan.plan import Plan, SiteSwap
from swapper.rewrite.bodies import floor_with_bodies, has_body_swaps, node_count, rewrite_bodies
from swapper.rewrite.folding import border_note
from swapper.rewrite.transport import Transport
from swapper.rewrite.weights import Weights, apply_consumer, apply_producer, is_neutral
from swapper.scan.sites import Site

logger = logging.getLogger(__name__)

PLAN_KEY = "swapper.plan"


@dataclass
class SiteRecord:
    site_id: str
    function: str
    surrogate: str
    placement: dict  # the plan's placement, as carried out (every parameter named)
    folded_into: list[str]  # names of the nodes whose weights or bias changed
    nodes_added: int  # nodes written for this site (surrogate plus parameter Mul/Add), not a net change
    notes: list[str] = field(default_factory=list)
    form: str = ""  # the emission form written (swapper.functions.forms)
    nodes_replaced: int = 0  # the original's nodes at the site, which the written ones replace


@dataclass
class RewriteResult:
    model: onnx.ModelProto
    nodes_before: int
    nodes_after: int
    records: list[SiteRecord]


# ----------------------------------------------------------- one site swap
def _vectors(swap: SiteSwap) -> dict[str, np.ndarray]:
    vals = {p: np.asarray(getattr(swap, p), dtype=np.float64).ravel() for p in PARAMS}
    sizes = {v.size for v in vals.values()} - {1}
    if len(sizes) > 1 or any(v.size == 0 for v in vals.values()):
        raise UsageError(f"site {swap.site_id}: parameters a, b, c, d have inconsistent lengths")
    if not all(np.all(np.isfinite(v)) for v in vals.values()):
        raise UsageError(f"site {swap.site_id}: parameters are not all finite")
    return vals


def _param_shape(index: GraphIndex, site: Site, swap: SiteSwap, n: int) -> tuple[int, ...]:
    """Broadcastable shape of a per-channel constant: [C, 1, 1] for NCHW axis 1, [C] for the last axis."""
    if n == 1:
        return ()
    axis = swap.channel_axis if swap.channel_axis is not None else site.channel_axis
    if axis is None:
        raise UsageError(f"site {site.id}: {n} parameters per set but no channel axis")
    if axis < 0:
        return (n,) + (1,) * (-axis - 1)
    rank = site_rank(index, site)
    if rank is None:
        raise BadModelError(f"site {site.id}: rank of {site.input!r} is unknown; cannot place per-channel nodes")
    return (n,) + (1,) * (rank - 1 - axis)


def _swap_site(index: GraphIndex, weights: Weights, site: Site, swap: SiteSwap, em: Emitter,
               analysis: tuple | None, transport: Transport) -> SiteRecord:
    """Emit one site's surrogate into ``em`` and fold its parameters as the plan places them; ``analysis`` is
    ``(producer_fold(...), consumer_folds(...), residual Adds reading y)`` taken before any weight was
    rewired (None when the plan folds nothing of this site); ``transport`` carries "through-add" folds.
    Raises UsageError where the plan cannot be carried out as it stands."""
    fn = functions.get(swap.surrogate)
    form = _form(swap, index.opset)
    vals = _vectors(swap)
    place = check_placement(site.id, swap.placement, vals, fn)  # also what the values of a must satisfy
    vals = form.emitted_values(vals, swap.surrogate_params)  # the values the form's own E(z) needs
    moved = [p for p in PARAMS if place[p] == "fixed" and not is_neutral(p, vals[p])]
    if moved:
        raise UsageError(f"site {site.id}: form {form.name} of {fn.name} moves {', '.join(moved)}, which the "
                         "plan holds; re-plan for this form")
    if place["a"] == "in-surrogate":  # a·g(z) = g(a·z) for a > 0
        vals["b"], vals["c"], vals["a"] = vals["b"] * vals["a"], vals["c"] * vals["a"], np.ones(1)
    need = {p: not is_neutral(p, vals[p]) for p in PARAMS}
    n = max(v.size for v in vals.values())
    np_dtype = helper.tensor_dtype_to_np_dtype(index.dtypes.get(site.input, onnx.TensorProto.FLOAT))

    def const(p: str, v: np.ndarray) -> str:
        """A per-channel constant shaped to broadcast along the channel axis (asked for only when emitted)."""
        if v.size == 1:
            return em.const(v.reshape(()), p, np_dtype)
        return em.const(np.broadcast_to(v, (n,)).reshape(_param_shape(index, site, swap, n)), p, np_dtype)

    folded: list[str] = []
    notes = list(swap.notes)
    in_b, in_c = place["b"] == "producer" and need["b"], place["c"] == "producer" and need["c"]
    if in_b or in_c:
        pf, why = analysis[0]
        if pf is None or (in_c and not pf.can_shift):
            raise UsageError(f"site {site.id}: plan folds b/c into the producer but {why or pf.reason}")
        folded += apply_producer(weights, pf, vals["b"] if in_b else np.ones(1),
                                  vals["c"] if in_c else np.zeros(1), em)
    thru_b, thru_c = place["b"] == THROUGH_ADD and need["b"], place["c"] == THROUGH_ADD and need["c"]
    if thru_b or thru_c:
        folded += transport.fold_input(site.id, vals["b"] if thru_b else None, vals["c"] if thru_c else None, em)
    x = site.input
    if place["b"] == "nodes" and need["b"]:
        x = em.node("Mul", [x, const("b", vals["b"])])
    if place["c"] == "nodes" and need["c"]:
        x = em.node("Add", [x, const("c", vals["c"])])

    a_cons = place["a"] in IN_CONSUMERS and need["a"]
    d_cons = place["d"] in ("consumers", "approx", THROUGH_ADD) and need["d"]
    a_node, d_node = place["a"] == "nodes" and need["a"], place["d"] == "nodes" and need["d"]
    # The consumers will scale the Add's output by a: emit d/a so they see a·g + d (a != 0 is checked above).
    d_emit = np.divide(vals["d"], vals["a"], out=np.zeros(n)) if a_cons and d_node else vals["d"]
    if a_cons or d_cons:
        folds, why = analysis[1]
        if folds is None:
            raise UsageError(f"site {site.id}: plan folds a/d into the consumers but {why}")
        if a_cons and analysis[2]:
            raise UsageError(f"site {site.id}: a cannot fold into the consumers: the residual Add "
                             f"{', '.join(sorted(analysis[2]))} reads the output too")
        ok = (lambda f: f.d_exact) if place["d"] != "approx" else (lambda f: f.d_exact or f.d_approx)
        if d_cons and not all(ok(f) and not f.reach.d_block for f in folds + transport.onward(site.id)):
            raise UsageError(f"site {site.id}: d cannot fold into every consumer's bias")
        if a_cons and place["a"] == "consumers" and any(f.reach.a_positive for f in folds):
            raise UsageError(f"site {site.id}: a reaches its consumers through a max pool; place it as consumers-via-max")
        for f in folds:
            folded += apply_consumer(weights, f, vals["a"] if a_cons else None,
                                      vals["d"] if d_cons else None, em)
        if d_cons and place["d"] != "consumers":
            folded += transport.fold_offset(site.id, vals["d"], em)
        if d_cons and place["d"] == "approx":
            notes += [border_note(index, f, vals["d"]) for f in folds + transport.onward(site.id) if not f.d_exact]

    g_out = em.fresh("g") if (a_node or d_node) else site.output
    form.emit(em, x, g_out, dict(swap.surrogate_params))
    if a_node:
        em.node("Mul", [g_out, const("a", vals["a"])], None if d_node else site.output)
    if d_node:
        em.node("Add", [em.nodes[-1].output[0], const("d", d_emit)], site.output)
    if not em.nodes or em.nodes[-1].output[0] != site.output:
        raise BadModelError(f"site {site.id}: emitter for {fn.name} did not write {site.output!r}")
    return SiteRecord(site.id, site.function, swap.surrogate, place, sorted(set(folded)), len(em.nodes),
                      notes, form.name, nodes_replaced=len(site.nodes))


def _form(swap: SiteSwap, opset: int) -> Form:
    """The plan's form for ``swap`` (None: what the registry's emitter writes at ``opset``); UsageError if the
    model's opset does not have it."""
    form = get_form(swap.surrogate, swap.form) if swap.form else default_form(swap.surrogate, opset)
    if opset < form.min_opset:
        raise UsageError(f"site {swap.site_id}: form {form.name} of {swap.surrogate} needs opset {form.min_opset}; "
                         f"the model is opset {opset}")
    return form


def _site_dtype(index: GraphIndex, site: Site) -> np.dtype:
    """The float type the site computes in (float32 when unknown): its emitted constants take it."""
    elem = index.dtypes.get(site.input, onnx.TensorProto.FLOAT)
    dtype = np.dtype(helper.tensor_dtype_to_np_dtype(elem)) if elem else np.dtype(np.float32)
    return dtype if dtype.kind == "f" else np.dtype(np.float32)


# ------------------------------------------------------------------ public
def rewrite(model: onnx.ModelProto, sites: list[Site], plan: Plan) -> RewriteResult:
    """A copy of ``model`` with every site of ``plan`` replaced by its surrogate, parameters placed."""
    if has_body_swaps(sites, plan):  # sites inside If/Loop/Scan bodies: body by body (swapper.rewrite.bodies)
        out, records = rewrite_bodies(model, sites, plan, rewrite)
        _stamp_plan(out, plan)
        return RewriteResult(out, node_count(model), node_count(out), records)
    out = copy_model(model)
    index = GraphIndex.of(out)
    if index.opset <= 0:
        raise BadModelError("model imports no default-domain opset")
    by_id = {s.id: s for s in sites}
    missing = [s.site_id for s in plan.swaps if s.site_id not in by_id]
    if missing:
        raise UsageError(f"plan names unknown site {', '.join(missing)}; valid ids: {', '.join(sorted(by_id))}")
    chosen = [by_id[s.site_id] for s in plan.swaps]
    positions = site_positions(out, chosen)
    used_before = used_names(out)
    taken = all_names(out)
    weights = Weights(index, taken)
    # Analyse on the untouched copy (folds rewire weights to new tensors), and only the sites whose
    # plan folds something: an all-"nodes" plan (refit's) needs no analysis at all.
    analyses = {}
    for s in plan.swaps:
        if set(s.placement.values()) & set(FOLDING):
            site = by_id[s.site_id]
            adds = residual_readers(index, site)
            analyses[s.site_id] = (producer_fold(index, site), consumer_folds(index, site, skip=adds), adds)
    # graph order: a scale passed upstream through an add lands after that site's own folds
    ordered = sorted(plan.swaps, key=lambda s: min(positions.get(s.site_id) or [0]))
    transport = Transport(index, weights, [(by_id[s.site_id], canonical_placement(
                              {p: s.placement.get(p, "fixed") for p in PARAMS}),
                                            functions.get(s.surrogate).homogeneous) for s in ordered],
                          {sid: a[0] for sid, a in analyses.items()})
    inserts, emitted, records = {}, [], {}
    for swap in ordered:
        site = by_id[swap.site_id]
        if swap.function != site.function:
            raise UsageError(f"site {site.id}: plan says {swap.function}, model has {site.function}")
        em = Emitter(prefix=f"swapper/{site.id}", opset=index.opset, taken=taken, dtype=_site_dtype(index, site))
        records[site.id] = _swap_site(index, weights, site, swap, em, analyses.get(site.id), transport)
        inserts[site.id] = list(em.nodes)
        emitted.extend(em.initializers)
    records = [records[s.site_id] for s in plan.swaps]
    splice(out, chosen, positions, inserts, emitted + weights.tensors(), used_before)
    _stamp_plan(out, plan)
    logger.info("rewrote %d sites: %d -> %d nodes", len(records), len(model.graph.node), len(out.graph.node))
    return RewriteResult(out, len(model.graph.node), len(out.graph.node), records)


def _stamp_plan(out: onnx.ModelProto, plan: Plan) -> None:
    """Record ``plan`` (without per-channel values) in the model's metadata, replacing an earlier one."""
    kept = [p for p in out.metadata_props if p.key != PLAN_KEY]
    del out.metadata_props[:]
    out.metadata_props.extend(kept)
    out.metadata_props.add(key=PLAN_KEY, value=plan.summary_json())


def rewrite_identity_floor(model: onnx.ModelProto, sites: list[Site]) -> onnx.ModelProto:
    """A copy of ``model`` with each site replaced by Identity: the speed floor of any swap."""
    if any(s.body for s in sites):  # sites inside If/Loop/Scan bodies: body by body (swapper.rewrite.bodies)
        return floor_with_bodies(model, sites, rewrite_identity_floor)
    out = copy_model(model)
    positions = site_positions(out, sites)
    taken = all_names(out)
    inserts, opset = {}, GraphIndex.of(out).opset
    for site in sites:
        em = Emitter(prefix=f"swapper/{site.id}", opset=opset, taken=taken)
        em.identity(site.input, site.output)
        inserts[site.id] = em.nodes
    splice(out, sites, positions, inserts, [], used_names(out))
    return out
