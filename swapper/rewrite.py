"""Apply a swap plan to a copy of a model.

Transformation: for every swapped site, the site's nodes are replaced by
``y = a·g(b·x + c) + d`` where ``g`` is the registry emitter of the target and
each of a, b, c, d is placed as the plan says: folded into the producer of
``x`` (its output channels scaled/shifted), folded into the linear layers that
read ``y`` (their input-channel weights scaled, ``W·d`` added to their bias),
moved inside ``g`` (a > 0, homogeneous g), or emitted as per-channel Mul/Add
nodes. Parameters equal to their neutral value add nothing. The output tensor
name of every site is kept, so consumers and graph outputs are untouched. The
input model is never mutated, and folded weights always get a new initializer
(the model's own initializers may be shared by other nodes).
"""
from __future__ import annotations

import logging
from dataclasses import dataclass, field

import numpy as np
import onnx
from onnx import helper, numpy_helper

from . import functions
from .emit import Emitter
from .errors import BadModelError, UsageError
from .fold import (ConsumerFold, ProducerFold, consumer_folds, input_offset, input_scale, producer_fold,
                   scale_shift_output)
from .graph import GraphIndex, attr
from .plan import NEUTRAL, PARAMS, Plan, SiteSwap
from .sites import Site

logger = logging.getLogger(__name__)

PLAN_KEY = "swapper.plan"
PLACEMENTS = ("producer", "consumers", "inner", "nodes", "held", "approx")


@dataclass
class SiteRecord:
    site_id: str
    source: str
    target: str
    placement: dict
    folded_into: list[str]  # names of the nodes whose weights or bias changed
    nodes_added: int  # nodes inserted for this site (surrogate plus parameter Mul/Add)
    notes: list[str] = field(default_factory=list)


@dataclass
class RewriteResult:
    model: onnx.ModelProto
    nodes_before: int
    nodes_after: int
    records: list[SiteRecord]


# ------------------------------------------------------------- weight copies
class _Weights:
    """Folded copies of weight tensors, in float64 until written out.

    Each (node, input) that gets folded is rewired once to a fresh tensor that
    only it reads; later folds into the same input update that copy, so two
    sites folding into one layer compose.
    """

    def __init__(self, index: GraphIndex, taken: set[str]):
        self.index = index
        self.taken = taken
        self.values: dict[str, np.ndarray] = {}
        self.dtypes: dict[str, np.dtype] = {}

    def read(self, node: onnx.NodeProto, slot: int) -> np.ndarray | None:
        name = node.input[slot] if slot < len(node.input) else ""
        if not name:
            return None
        if name in self.values:
            return self.values[name].copy()
        value = self.index.const(name)
        return None if value is None else value.astype(np.float64)

    def dtype(self, node: onnx.NodeProto, slot: int) -> np.dtype:
        """dtype of the tensor in ``slot``; a missing bias takes the weight's (slot 1) dtype."""
        name = node.input[slot] if slot < len(node.input) else ""
        if name in self.dtypes:
            return self.dtypes[name]
        value = self.index.const(name) if name else None
        if value is None:
            return self.dtype(node, 1) if slot != 1 else np.dtype(np.float32)
        return value.dtype

    def write(self, node: onnx.NodeProto, slot: int, value: np.ndarray, prefix: str) -> None:
        name = node.input[slot] if slot < len(node.input) else ""
        if name in self.values:
            self.values[name] = np.asarray(value, dtype=np.float64)
            return
        dtype = self.dtype(node, slot)
        base = f"{prefix}/{node.name}/in{slot}"
        new, k = base, 0
        while new in self.taken:
            k += 1
            new = f"{base}_{k}"
        self.taken.add(new)
        while len(node.input) <= slot:
            node.input.append("")
        node.input[slot] = new
        self.values[new] = np.asarray(value, dtype=np.float64)
        self.dtypes[new] = np.dtype(dtype)

    def tensors(self) -> list[onnx.TensorProto]:
        return [numpy_helper.from_array(self.values[n].astype(self.dtypes[n]), n) for n in sorted(self.values)]


def _neutral(p: str, v: np.ndarray) -> bool:
    return bool(np.all(v == NEUTRAL[p]))


def _bias_of(node: onnx.NodeProto, add: onnx.NodeProto | None) -> tuple[onnx.NodeProto, int]:
    """(node, input slot) holding the bias: the layer's input 2, or the constant operand of its Add."""
    if add is None:
        return node, 2
    return add, 1 if add.input[0] == node.output[0] else 0


def _apply_producer(w: _Weights, pf: ProducerFold, b: np.ndarray, c: np.ndarray, prefix: str) -> list[str]:
    """Fold b (scale) and c (shift) into the layer that produces x. Returns the touched node names."""
    node = pf.node
    bias_node, bias_slot = _bias_of(node, pf.add)
    bias = None if pf.kind == "matmul" else w.read(bias_node, bias_slot)
    new_w, new_bias = scale_shift_output(pf.kind, node, w.read(node, 1), bias, b, c)
    touched = []
    if not _neutral("b", b):
        w.write(node, 1, new_w, prefix)
        touched.append(node.name)
    if pf.kind != "matmul" and (not _neutral("c", c) or (bias is not None and not _neutral("b", b))):
        w.write(bias_node, bias_slot, new_bias, prefix)
        touched.append(bias_node.name)
    return touched


def _apply_consumer(w: _Weights, f: ConsumerFold, a: np.ndarray | None, d: np.ndarray | None, prefix: str) -> list[str]:
    """Fold y -> a·y + d into one linear consumer. d uses the weights before the a scaling."""
    node = f.node
    weight = w.read(node, 1)
    touched = []
    if d is not None:
        offset = input_offset(f.kind, node, weight, d)
        if f.kind == "gemm":  # C is scaled by beta inside Gemm
            offset = offset / float(attr(node, "beta", 1.0))
        bias_node, bias_slot = _bias_of(node, f.add)
        bias = w.read(bias_node, bias_slot)
        w.write(bias_node, bias_slot, (0.0 if bias is None else bias) + offset, prefix)
        touched.append(bias_node.name)
    if a is not None:
        w.write(node, 1, input_scale(f.kind, node, weight, a), prefix)
        touched.append(node.name)
    return touched


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
    shape = site.shape or index.shape(site.input) or index.shape(site.output)
    if shape is None:
        raise BadModelError(f"site {site.id}: rank of {site.input!r} is unknown; cannot place per-channel nodes")
    return (n,) + (1,) * (len(shape) - 1 - axis)


def _check_placement(site: Site, swap: SiteSwap, fn: functions.Function, vals: dict) -> dict[str, str]:
    place = {p: swap.placement.get(p, "held") for p in PARAMS}
    for p, where in place.items():
        if where not in PLACEMENTS or (where == "inner" and p != "a") or (where == "approx" and p != "d"):
            raise UsageError(f"site {site.id}: invalid placement {where!r} for {p}")
        if where == "held" and not _neutral(p, vals[p]):
            raise UsageError(f"site {site.id}: {p} is held but not neutral ({NEUTRAL[p]})")
    if place["a"] == "inner":
        if not fn.homogeneous:
            raise UsageError(f"site {site.id}: a is placed inside {fn.name}, which is not homogeneous")
        if np.any(vals["a"] <= 0):
            raise UsageError(f"site {site.id}: a is placed inside {fn.name} but is not > 0 everywhere")
        if place["b"] not in ("producer", "nodes"):
            raise UsageError(f"site {site.id}: a inside g needs b in the producer or as a node")
    if place["c"] == "producer" and place["b"] == "nodes":
        raise UsageError(f"site {site.id}: c in the producer with b as a node would shift before scaling")
    return place


def _swap_site(index: GraphIndex, weights: _Weights, site: Site, swap: SiteSwap, em: Emitter,
               analysis: tuple) -> SiteRecord:
    """Emit one site's surrogate into ``em`` and fold its parameters; ``analysis`` is
    ``(producer_fold(...), consumer_folds(...))`` taken before any weight was rewired."""
    fn = functions.get(swap.target)
    vals = _vectors(swap)
    place = _check_placement(site, swap, fn, vals)
    notes = list(swap.notes)
    if place["a"] == "inner":  # a·g(z) = g(a·z) for a > 0
        vals["b"], vals["c"], vals["a"] = vals["b"] * vals["a"], vals["c"] * vals["a"], np.ones(1)
    need = {p: not _neutral(p, vals[p]) for p in PARAMS}
    n = max(v.size for v in vals.values())
    np_dtype = helper.tensor_dtype_to_np_dtype(index.dtypes.get(site.input, onnx.TensorProto.FLOAT))
    shape = _param_shape(index, site, swap, n) if any(
        place[p] == "nodes" and need[p] and vals[p].size > 1 for p in PARAMS) else ()

    def const(p: str, v: np.ndarray) -> str:
        return em.const(np.broadcast_to(v, (n,)).reshape(shape) if v.size > 1 else v.reshape(()), p, np_dtype)

    folded: list[str] = []
    in_b, in_c = place["b"] == "producer" and need["b"], place["c"] == "producer" and need["c"]
    if in_b or in_c:
        pf, why = analysis[0]
        if pf is None or (in_c and not pf.can_shift):
            raise UsageError(f"site {site.id}: plan folds b/c into the producer but {why or pf.reason}")
        folded += _apply_producer(weights, pf, vals["b"] if in_b else np.ones(1),
                                  vals["c"] if in_c else np.zeros(1), em.prefix)
    x = site.input
    if place["b"] == "nodes" and need["b"]:
        x = em.node("Mul", [x, const("b", vals["b"])])
    if place["c"] == "nodes" and need["c"]:
        x = em.node("Add", [x, const("c", vals["c"])])

    a_cons = place["a"] == "consumers" and need["a"]
    d_cons = place["d"] in ("consumers", "approx") and need["d"]
    a_node, d_node = place["a"] == "nodes" and need["a"], place["d"] == "nodes" and need["d"]
    d_emit = vals["d"]
    if a_cons and d_node:
        # The consumers will scale the Add's output by a: emit d/a so they see a·g + d.
        if np.any((vals["a"] == 0) & (vals["d"] != 0)):
            a_cons, a_node, place["a"] = False, True, "nodes"
            notes.append("a emitted as a node: a = 0 where d != 0 cannot stay in the consumers")
        else:
            d_emit = np.divide(vals["d"], vals["a"], out=np.zeros(n), where=vals["a"] != 0)
    if a_cons or d_cons:
        folds, why = analysis[1]
        if folds is None:
            raise UsageError(f"site {site.id}: plan folds a/d into the consumers but {why}")
        ok = (lambda f: f.d_exact) if place["d"] == "consumers" else (lambda f: f.d_exact or f.d_approx)
        if d_cons and not all(ok(f) for f in folds):
            raise UsageError(f"site {site.id}: d cannot fold into every consumer's bias")
        for f in folds:
            folded += _apply_consumer(weights, f, vals["a"] if a_cons else None,
                                      vals["d"] if d_cons else None, em.prefix)

    g_out = em.fresh("g") if (a_node or d_node) else site.output
    fn.emit(em, x, g_out, dict(swap.target_params))
    if a_node:
        em.node("Mul", [g_out, const("a", vals["a"])], None if d_node else site.output)
    if d_node:
        em.node("Add", [em.nodes[-1].output[0], const("d", d_emit)], site.output)
    if not em.nodes or em.nodes[-1].output[0] != site.output:
        raise BadModelError(f"site {site.id}: emitter for {fn.name} did not write {site.output!r}")
    return SiteRecord(site.id, site.function, swap.target, dict(place), sorted(set(folded)), len(em.nodes), notes)


# ------------------------------------------------------------ graph surgery
def _deep_inputs(nodes) -> set[str]:
    """Every tensor name read by ``nodes``, including from inside their subgraphs."""
    used: set[str] = set()
    for node in nodes:
        used.update(t for t in node.input if t)
        for a in node.attribute:
            graphs = [a.g] if a.type == onnx.AttributeProto.GRAPH else list(a.graphs)
            for g in graphs:
                used |= _deep_inputs(g.node)
                used.update(o.name for o in g.output)
    return used


def _site_positions(model: onnx.ModelProto, sites: list[Site]) -> dict[str, list[int]]:
    positions: dict[str, list[int]] = {}
    for i, node in enumerate(model.graph.node):
        positions.setdefault(node.name, []).append(i)
    out, owner = {}, {}
    for site in sites:
        pos = []
        for name in site.nodes:
            found = positions.get(name, [])
            if len(found) != 1:
                what = "not found" if not found else "not unique (load the model with swapper.model_io.load_model)"
                raise BadModelError(f"site {site.id}: node name {name!r} is {what}")
            if found[0] in owner:
                raise UsageError(f"sites {owner[found[0]]} and {site.id} share node {name!r}")
            owner[found[0]] = site.id
            pos.append(found[0])
        out[site.id] = sorted(pos)
    return out


def _splice(model: onnx.ModelProto, sites: list[Site], positions: dict[str, list[int]],
            inserts: dict[str, list[onnx.NodeProto]], initializers: list[onnx.TensorProto],
            used_before: set[str]) -> None:
    """Replace each site's nodes by its inserted nodes (at the first site node); drop what became unused.

    ``used_before``: the tensors the graph read before any edit (only those may be dropped).
    """
    g = model.graph
    removed = {p for s in sites for p in positions[s.id]}
    at = {positions[s.id][0]: inserts[s.id] for s in sites}
    kept = [n for i, n in enumerate(g.node) if i not in removed]
    new_nodes = [n for s in sites for n in inserts[s.id]]
    used = _deep_inputs(kept + new_nodes) | {o.name for o in g.output}
    outputs = {s.output for s in sites}
    for i in sorted(removed):
        node = g.node[i]
        dangling = [t for t in node.output if t and t in used and t not in outputs]
        if dangling and node.op_type == "Constant":
            removed.discard(i)  # a shared constant of the pattern: keep it for its other readers
        elif dangling:
            raise BadModelError(f"site tensor {dangling[0]!r} is also read outside the site")
    nodes = []
    for i, node in enumerate(g.node):
        nodes.extend(at.get(i, []))
        if i not in removed:
            nodes.append(node)
    del g.node[:]
    g.node.extend(nodes)
    g.initializer.extend(initializers)
    if model.ir_version < 4:  # old IR: every initializer must also be a graph input
        for t in initializers:
            g.input.append(helper.make_tensor_value_info(t.name, t.data_type, list(t.dims)))
    _drop_unused(model, used_before)


def _drop_unused(model: onnx.ModelProto, used_before: set[str]) -> None:
    g = model.graph
    used = _used(model)
    gone = {t.name for t in g.initializer if t.name in used_before and t.name not in used}
    stale_consts = [n for n in g.node if n.op_type == "Constant" and n.output[0] in used_before
                    and n.output[0] not in used]
    if gone:
        keep = [t for t in g.initializer if t.name not in gone]
        del g.initializer[:]
        g.initializer.extend(keep)
        keep_in = [v for v in g.input if v.name not in gone]
        del g.input[:]
        g.input.extend(keep_in)
    if stale_consts:
        drop = {n.output[0] for n in stale_consts}
        keep_nodes = [n for n in g.node if not (n.op_type == "Constant" and n.output[0] in drop)]
        del g.node[:]
        g.node.extend(keep_nodes)
    produced = {t for n in g.node for t in n.output} | {v.name for v in g.input} | {t.name for t in g.initializer}
    keep_vi = [v for v in g.value_info if v.name in produced]
    del g.value_info[:]
    g.value_info.extend(keep_vi)
    logger.debug("dropped %d initializers, %d constants", len(gone), len(stale_consts))


def _used(model: onnx.ModelProto) -> set[str]:
    return _deep_inputs(model.graph.node) | {o.name for o in model.graph.output}


def _all_names(model: onnx.ModelProto) -> set[str]:
    g = model.graph
    names = {n.name for n in g.node} | {t for n in g.node for t in list(n.input) + list(n.output)}
    names |= {t.name for t in g.initializer} | {v.name for v in list(g.input) + list(g.output) + list(g.value_info)}
    return names


def _copy(model: onnx.ModelProto) -> onnx.ModelProto:
    out = onnx.ModelProto()
    out.CopyFrom(model)
    return out


# ------------------------------------------------------------------ public
def rewrite(model: onnx.ModelProto, sites: list[Site], plan: Plan) -> RewriteResult:
    """A copy of ``model`` with every site of ``plan`` replaced by its surrogate, parameters placed."""
    out = _copy(model)
    index = GraphIndex.of(out)
    if index.opset <= 0:
        raise BadModelError("model imports no default-domain opset")
    by_id = {s.id: s for s in sites}
    missing = [s.site_id for s in plan.swaps if s.site_id not in by_id]
    if missing:
        raise UsageError(f"plan names unknown site {', '.join(missing)}; valid ids: {', '.join(sorted(by_id))}")
    chosen = [by_id[s.site_id] for s in plan.swaps]
    positions = _site_positions(out, chosen)
    used_before = _used(out)
    taken = _all_names(out)
    weights = _Weights(index, taken)
    # Analyse every site on the untouched copy: folds rewire weights to new tensors.
    analyses = {s.id: (producer_fold(index, s), consumer_folds(index, s)) for s in chosen}
    inserts, emitted, records = {}, [], []
    for swap in plan.swaps:
        site = by_id[swap.site_id]
        if swap.source != site.function:
            raise UsageError(f"site {site.id}: plan says {swap.source}, model has {site.function}")
        em = Emitter(prefix=f"swapper/{site.id}", opset=index.opset, taken=taken)
        records.append(_swap_site(index, weights, site, swap, em, analyses[site.id]))
        inserts[site.id] = list(em.nodes)
        emitted.extend(em.initializers)
    _splice(out, chosen, positions, inserts, emitted + weights.tensors(), used_before)
    kept = [p for p in out.metadata_props if p.key != PLAN_KEY]
    del out.metadata_props[:]
    out.metadata_props.extend(kept)
    out.metadata_props.add(key=PLAN_KEY, value=plan.summary_json())
    logger.info("rewrote %d sites: %d -> %d nodes", len(records), len(model.graph.node), len(out.graph.node))
    return RewriteResult(out, len(model.graph.node), len(out.graph.node), records)


def rewrite_identity_floor(model: onnx.ModelProto, sites: list[Site]) -> onnx.ModelProto:
    """A copy of ``model`` with each site replaced by Identity: the speed floor of any swap."""
    out = _copy(model)
    positions = _site_positions(out, sites)
    taken = _all_names(out)
    inserts, opset = {}, GraphIndex.of(out).opset
    for site in sites:
        em = Emitter(prefix=f"swapper/{site.id}", opset=opset, taken=taken)
        em.identity(site.input, site.output)
        inserts[site.id] = em.nodes
    _splice(out, sites, positions, inserts, [], _used(out))
    return out
