"""Which surrogate, in which emission form, each site gets on a target, and why a site is kept.

Transformation: a site, the graph and a target profile -> :class:`SiteOptions`:
the site's original chain of ops priced on the target (its own fusions
included, e.g. x·Sigmoid(x) -> QuickGelu on ort-cpu) and every candidate
surrogate × emission form (:mod:`swapper.functions.forms`) with its placement,
its priced chain, the opset it needs and, when it cannot be used here, why.
:func:`choose` turns the options into a :class:`Choice`.

The rules (``profile`` given):

- *eligible*: a form is usable when the model's opset has its ops, every
  parameter its re-parametrisation moves has a placement other than "fixed"
  (:mod:`swapper.plan.placement`), and the target supports every op of its
  chain (``profile.allows``); a surrogate is eligible when one form is usable;
- *form*: the usable form with the lowest ``profile.cost_of`` after the site's
  producer (costs within 2% are ties: the form listed first wins);
- *never slower*: a surrogate pays when its chosen form costs less than the
  site's original chain, or when the target cannot run the original at all;
- *order*: the registry default if it pays, else the cheapest alternative
  that pays (:data:`swapper.functions.registry.ALTERNATIVES`, ties within 2%
  to the earlier entry), else the site is kept with a one-line reason;
- *forced* (``--to`` or a per-site choice): the cheapest usable form of that
  surrogate, pays or not; UsageError naming the op or the opset when none is usable.

Without a profile the registry default is taken in the form the registry's
emitter writes at the model's opset (the behaviour before targets existed).

A chain is what runs between the producer and the next layer: a MatMul's bias
Add first (the runtime fuses MatMul+Add into a Gemm), then the parameter nodes
the placement adds (b, c before the form; a, d after), then the form's ops.
"""
from __future__ import annotations

import logging
from collections import Counter
from dataclasses import dataclass

from swapper import functions
from swapper.core.graph import GraphIndex, is_op
from swapper.errors import UsageError
from swapper.functions.forms import Form, default_form, forms_of
from swapper.plan.layers import float_const
from swapper.plan.placement import decide_placement
from swapper.scan.sites import Site
from swapper.targets.profile import TargetProfile

logger = logging.getLogger(__name__)

# How people write the decomposed forms the scanner finds (its Site.form names).
SHOWN = {"silu/mul-sigmoid": "x·Sigmoid(x)", "swish/mul-sigmoid-scaled": "x·Sigmoid(βx)",
         "gelu/erf": "erf-GELU", "gelu_tanh/tanh-cubic": "tanh-GELU", "mish/softplus-tanh": "x·Tanh(Softplus(x))",
         "mish/exp-log-tanh": "x·Tanh(Log(1+Exp(x)))", "hard_swish/mul-hardsigmoid": "x·HardSigmoid(x)"}
EPS = 1e-9  # costs are sums of a few file numbers; closer than this is a tie, and a tie does not pay
# When ranking forms or alternatives, costs within 2% of the cheapest count as equal and the earlier entry
# wins (the registry's own form, the preferred surrogate): a measured prior moves by more than that from
# run to run (common practice, no source).
TIE = 0.02


def _cheapest(items: list, cost) -> object:
    """The first of ``items`` whose cost is within TIE of the lowest (None costs count as 0)."""
    costs = [0.0 if cost(i) is None else cost(i) for i in items]
    lowest = min(costs)
    return next(i for i, c in zip(items, costs) if c <= lowest * (1.0 + TIE) + EPS)


@dataclass(frozen=True)
class Chain:
    """The ops between a site's producer and the next layer, priced on a target."""

    after: str | None  # the producer's op type as the target's fusions name it (None: a graph input)
    ops: tuple[str, ...]  # execution order
    linear: bool  # each op reads only the previous one (see TargetProfile.cost_of)
    cost: float | None  # None: the target cannot run one of the ops (or no target)
    shown: str = ""  # how people write it
    fused: str = ""  # the fusion that prices it, when one covers more than one op or sits on the producer


@dataclass
class FormOption:
    """One surrogate in one form at one site: what it costs and whether it can be used."""

    surrogate: str
    form: Form
    placement: dict[str, str]
    notes: list[str]
    ops: tuple[str, ...]  # the whole priced chain (bias Add, parameter nodes, form ops)
    cost: float | None
    blocked: str | None  # why it cannot be used at any opset here (placement, unsupported op); None if it can

    def usable(self, opset: int) -> bool:
        return self.blocked is None and opset >= self.form.min_opset

    def why_not(self, opset: int) -> str:
        if self.blocked is not None:
            return self.blocked
        if opset < self.form.min_opset:
            return f"form {self.form.name} needs opset {self.form.min_opset} (the model is opset {opset})"
        return ""


@dataclass
class SiteOptions:
    """Every candidate of one site, in candidate order (surrogates, then their forms in list order)."""

    site: Site
    original: Chain
    options: list[FormOption]
    target: str | None  # the profile's name

    def best(self, surrogate: str, opset: int, form: str | None = None) -> FormOption | None:
        """The cheapest usable form of ``surrogate`` at ``opset`` (only ``form`` when named), None if none."""
        usable = [o for o in self.options if o.surrogate == surrogate and o.usable(opset)
                  and (form is None or o.form.name == form)]
        return _cheapest(usable, lambda o: o.cost) if usable else None

    def pays(self, option: FormOption) -> bool:
        """True when ``option`` is cheaper than the original on the target (or the original cannot run)."""
        if self.target is None:
            return True
        return self.original.cost is None or (option.cost is not None and option.cost < self.original.cost - EPS)


@dataclass
class Choice:
    """What :func:`choose` decided for one site: an option, or None and the reason it is kept."""

    option: FormOption | None
    reason: str


# ------------------------------------------------------------------ chains
def _producer(index: GraphIndex, site: Site) -> tuple[str | None, tuple[str, ...]]:
    """(producer op type as fusions name it, ops of the chain before the site): a MatMul's bias Add comes first."""
    node = index.producer.get(site.input)
    if node is None:
        return None, ()
    if is_op(node, "Add"):
        for slot in (0, 1):
            if is_op(index.producer.get(node.input[slot]), "MatMul") and \
                    float_const(index, node.input[1 - slot]) is not None:
                return "MatMul", ("Add",)
    return node.op_type, ()


def _fused_words(profile: TargetProfile, ops: tuple[str, ...], after: str | None, linear: bool) -> str:
    """How the target fuses the chain, in words ("fuses to QuickGelu", "fuses into the Conv"), or ""."""
    for part in profile.cost_parts(ops, after, linear=linear) or []:
        f = part.fusion
        if f is None:
            continue
        if not f.anywhere:
            return f"fuses into the {after}"
        if len(part.ops) > 1:  # the runtime's own name for the fused op, when the profile's note records it
            name = f.note.split("graph:", 1)[1].split("@")[0].strip() if "graph:" in f.note else ""
            return f"fuses to {name}" if name else "fuses to one op"
    return ""


def original_chain(index: GraphIndex, site: Site, profile: TargetProfile | None) -> Chain:
    """The site's own ops (graph order) after its producer, priced on ``profile``.

    A runtime matches a pattern by its structure, not by the order the nodes
    are stored in: when a fusion of the profile holds the same ops in another
    order, its order is taken.
    """
    after, prefix = _producer(index, site)
    own = tuple(index.nodes_by_name[n].op_type for n in site.nodes if n in index.nodes_by_name)
    if profile is not None:
        for f in profile.fusions:
            if len(f.ops) == len(own) and Counter(f.ops) == Counter(own) and (f.anywhere or after in f.after):
                own = f.ops
                break
    ops, linear = prefix + own, len(own) == 1
    shown = SHOWN.get(site.form, own[0] if len(own) == 1 else site.form)
    if profile is None:
        return Chain(after, ops, linear, None, shown)
    return Chain(after, ops, linear, profile.cost_of(ops, after, linear=linear), shown,
                 _fused_words(profile, ops, after, linear))


def _param_nodes(placement: dict[str, str], before: bool) -> tuple[str, ...]:
    """The Mul/Add nodes the placement emits before (b, c) or after (a, d) the form."""
    mul, add = ("b", "c") if before else ("a", "d")
    return tuple(op for p, op in ((mul, "Mul"), (add, "Add")) if placement.get(p) == "nodes")


def site_options(index: GraphIndex, site: Site, profile: TargetProfile | None, surrogates: list[str], *,
                 fold: str, opset: int, upstream: dict | None = None) -> SiteOptions:
    """Every form of every surrogate in ``surrogates`` at ``site``, priced on ``profile`` (module docstring).

    ``opset`` only names the opset the forms are read at (pwl's op list); whether
    a form's opset is available is asked later (:meth:`FormOption.usable`).
    ``upstream``: the swapped sites decided before in the site's graph
    (:func:`swapper.plan.placement.decide_placement`).
    """
    after, prefix = _producer(index, site)
    options = []
    for name in surrogates:
        fn = functions.get(name)
        placement, notes = decide_placement(index, site, fn, fold, upstream)
        params = functions.surrogate_params(site.function, site.params, name)
        for form in forms_of(name):
            held = [p for p in "abcd" if p in form.moves and placement.get(p) == "fixed"]
            ops = prefix + _param_nodes(placement, True) + form.op_types(params, max(opset, form.min_opset)) \
                + _param_nodes(placement, False)
            blocked = None
            if held:
                blocked = (f"form {form.name} moves {', '.join(held)}, which this site keeps fixed "
                           f"({'; '.join(n for n in notes if any(n.startswith(p) for p in held)) or 'no fold'})")
            cost = None
            if profile is not None:
                ok, missing = profile.allows(ops)
                if not ok:
                    blocked = blocked or (f"form {form.name} needs {', '.join(missing)}, which {profile.name} "
                                          "does not run")
                cost = profile.cost_of(ops, after, linear=form.linear)
            options.append(FormOption(name, form, placement, list(notes), ops, cost, blocked))
    return SiteOptions(site, original_chain(index, site, profile), options,
                       None if profile is None else profile.name)


# ------------------------------------------------------------------ choice
def _cost(x: float | None) -> str:
    return "unsupported" if x is None else f"{x:.3g}"


def _kept(opts: SiteOptions, tried: list[FormOption]) -> str:
    o = opts.original
    how = f"{o.fused} on {opts.target} ({_cost(o.cost)})" if o.fused else f"costs {_cost(o.cost)} on {opts.target}"
    line = f"kept: {o.shown} {how} and no allowed surrogate is cheaper here"
    if tried:
        best = min(tried, key=lambda t: t.cost if t.cost is not None else float("inf"))
        line += f" (best: {best.surrogate} as {best.form.name}, {_cost(best.cost)})"
    return line


def chosen_line(opts: SiteOptions, option: FormOption) -> str:
    """One line saying why ``option`` was taken at the site (for the plan's notes)."""
    o = opts.original
    return (f"{opts.target}: {option.surrogate} as {option.form.name} [{' '.join(option.ops)}] costs "
            f"{_cost(option.cost)} against {_cost(o.cost)} for {o.shown}" + (f" ({o.fused})" if o.fused else ""))


def choose(opts: SiteOptions, order: list[str], opset: int, *, forced: str | None = None,
           form: str | None = None) -> Choice:
    """The surrogate and form for one site (module docstring), or None with the reason it is kept.

    ``order``: the candidate surrogates, registry default first. ``forced``:
    a surrogate the user named (``form`` optionally pins its form); raises
    UsageError when no form of it can be used here, naming the op or opset.
    """
    if forced is not None:
        if opts.target is None and form is None:  # no target: the form the registry's emitter writes
            form = default_form(forced, opset).name
        best = opts.best(forced, opset, form)
        if best is None:
            tried = [o for o in opts.options if o.surrogate == forced and (form is None or o.form.name == form)]
            why = "; ".join(o.why_not(opset) for o in tried) or f"{forced} has no form {form!r}"
            where = f" on {opts.target}" if opts.target else ""
            raise UsageError(f"site {opts.site.id}: {forced} cannot be used{where}: {why}")
        return Choice(best, "forced")
    if opts.target is None:
        default = order[0]
        pinned = default_form(default, opset)
        return Choice(opts.best(default, opset, pinned.name), "registry default")
    tried = [b for b in (opts.best(s, opset) for s in order) if b is not None]
    paying = [b for b in tried if opts.pays(b)]
    if paying and paying[0].surrogate == order[0]:
        return Choice(paying[0], "registry default pays")
    if paying:
        return Choice(_cheapest(paying, lambda b: b.cost), "cheapest alternative that pays")
    return Choice(None, _kept(opts, tried))


def opset_hints(opts: SiteOptions, order: list[str], opset: int, highest: int,
                current: Choice) -> list[tuple[int, str]]:
    """(opset, op) pairs where a higher opset (up to ``highest``) would change this site's choice for the better.

    Better: cheaper on the target, or the registry default where an alternative
    (or nothing) had to be taken.
    """
    hints = []
    for higher in sorted({o.form.min_opset for o in opts.options if opset < o.form.min_opset <= highest}):
        new = choose(opts, order, higher)
        if new.option is None or new.option.form.min_opset <= opset:
            continue
        old = current.option
        cheaper = old is None or (new.option.cost is not None and old.cost is not None
                                  and new.option.cost < old.cost - EPS)
        preferred = new.option.surrogate == order[0] and (old is None or old.surrogate != order[0])
        if cheaper or preferred:
            hints.append((higher, new.option.form.ops[0] if new.option.form.ops else new.option.form.name))
    return hints
