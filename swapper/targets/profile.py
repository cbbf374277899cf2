"""Target profiles: what a deployment target runs, and what it costs there.

Transformation: a profile file (JSON, schema ``swapper.target/1``) or a
built-in profile name -> a frozen :class:`TargetProfile` that answers "may
these ops appear in a model for this target?" and "what does this chain of
nodes cost after a Conv here?".

The file format, field by field (every key below is checked; an unknown key,
a wrong type, a value out of range or a missing required key is an error that
names the file and the key path, e.g. ``ops.Sigmoid.support``)::

    {
      "schema": "swapper.target/1",          required, exactly this string
      "name": "mcu-int8",                     required; lower-case letters, digits, '.', '_', '-' (<= 64)
      "description": "one line",              required, one line of text
      "precision": "int8",                    required: "float32" | "int8" (the tensors the target computes on)
      "opset": {"min": 11, "max": 22},        required: accepted default-domain ONNX opsets, 1 <= min <= max
      "costs_from": "declared",               required: "declared" | "measured" (see below)
      "measurement": {...},                   required when measured, forbidden when declared
      "ops": {"Relu": {...}, ...},            required: per-op support and cost (below); must include Relu
      "default": {...},                       optional: the entry used for ops not listed in "ops";
                                              without it an unlisted op has support "none"
      "fusions": [{...}, ...],                optional: patterns folded into a producer (below)
      "sources": [{...}, ...],                required, non-empty: the documents the facts come from
      "notes": ["...", ...]                   optional free text (what was measured, caveats)
    }

``ops`` maps an ONNX op type, spelled as the ONNX default domain spells it
(``Relu``, ``Clip``, ``LeakyRelu``, ``HardSigmoid``, ``HardSwish``,
``Sigmoid``, ``Tanh``, ``Erf``, ``Exp``, ``Log``, ``Softplus``, ``Elu``,
``Mul``, ``Add``, ``Div``, ``Pow``, ``Max``, ``Min``, ``Gelu``, ``Mish``,
``Where``...), to an entry. Op names not in ONNX are allowed (custom targets)
but must be identifiers. Each entry:

    "support"      required: "native" (a kernel computes it in the target's precision) |
                   "lookup_table" (computed by indexing a table with the quantized input,
                   e.g. a 256-entry int8 table) | "none" (the op cannot appear in a model
                   for this target)
    "cost"         relative cost per output element, Relu = 1.0; a number > 0; required
                   unless support is "none", where it must be absent or null.
                   ops.Relu must exist with cost 1.0: it is the unit.
    "source"       required: where the fact comes from (a document in "sources", a measurement)
    "note"         optional one line of text
    "from_memory"  optional boolean: true when the fact was recalled rather than read in a
                   document or measured

``fusions`` lists short op patterns that the target folds into the layer that
produces their input, for free (cost 0) or at the stated cost::

    {"after": ["Conv", "Gemm"],     producer op types, or "*" = wherever the pattern appears
                                    (a rewrite the runtime does anywhere, e.g. x*Sigmoid(x) -> one op)
     "ops": ["Sigmoid", "Mul"],     1..8 op types in execution order, starting at the node that reads
                                    the producer's output: ["Sigmoid", "Mul"] is y = x*Sigmoid(x)
                                    (Sigmoid runs first, then Mul reads x and Sigmoid(x))
     "cost": 0.0,                   cost per element of the whole fused pattern, Relu units, >= 0
     "source": "...", "note": "...", "from_memory": false}

Every op of a pattern must itself be supported in ``ops`` (or by
``default``); the same (producer, ops) pair may not be listed twice. A
producer's fusion absorbs its pattern only when nothing else reads the
producer's output; :meth:`TargetProfile.cost_of` spells out how a chain is
matched (longest pattern first, as a runtime's matcher does, even when the
fused form is dearer).

``sources`` entries: ``{"title", "url" (http/https), "supports" (what this
document supports in the file), "note"?}``.

``costs_from``: a *declared* profile's costs are the numbers in the file
(written from documentation or experience; say which in ``source``). A
*measured* profile's real costs come from timing the candidate graph in
context on onnxruntime (another module does that); its ``ops`` costs are only
the prior used before measuring, and ``measurement`` states the settings::

    "measurement": {"runtime": "onnxruntime",
                    "provider": "CPUExecutionProvider",
                    "graph_optimization_level": "disable_all" | "basic" | "extended" | "all",
                    "threads": 1,                              intra-op threads, 1..1024
                    "quantization": {"format": "QDQ",          int8 profiles only, and required there
                                     "activations": "uint8" | "int8",
                                     "weights": "uint8" | "int8",
                                     "per_channel": true}}

File rules: UTF-8 JSON of at most 1 MiB, a regular file; a key written twice
in one object is an error (JSON parsers otherwise keep the last silently).
"""
from __future__ import annotations

import logging
import os
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from importlib import resources
from pathlib import Path
from types import MappingProxyType

from swapper.targets.schema import ANYWHERE, BadTargetError, read_profile

logger = logging.getLogger(__name__)

BUILTIN_PACKAGE = "swapper.targets"
BUILTIN_DIR = "builtin"


@dataclass(frozen=True)
class OpSupport:
    """How the target runs one op type."""

    support: str  # "native" | "lookup_table" | "none"
    cost: float | None  # per element, Relu = 1.0; None when support is "none"
    source: str
    note: str = ""
    from_memory: bool = False


@dataclass(frozen=True)
class Fusion:
    """A pattern the target folds into the producer of its input (or rewrites anywhere, after == ("*",))."""

    after: tuple[str, ...]
    ops: tuple[str, ...]
    cost: float
    source: str
    note: str = ""
    from_memory: bool = False

    @property
    def anywhere(self) -> bool:
        return self.after == (ANYWHERE,)


@dataclass(frozen=True)
class ChainPart:
    """One step of a priced chain: a lone op at its own cost, or a fused pattern at the fusion's cost."""

    ops: tuple[str, ...]
    cost: float
    fusion: Fusion | None = None


@dataclass(frozen=True)
class Quantization:
    """How a measured int8 profile quantizes a model before timing it."""

    format: str
    activations: str
    weights: str
    per_channel: bool | None = None


@dataclass(frozen=True)
class Measurement:
    """onnxruntime settings under which a measured profile's costs are timed."""

    runtime: str
    provider: str
    graph_optimization_level: str
    threads: int
    quantization: Quantization | None = None


@dataclass(frozen=True)
class Source:
    """A document the profile's facts come from."""

    title: str
    url: str
    supports: str
    note: str = ""


@dataclass(frozen=True)
class TargetProfile:
    """One deployment target as its profile file describes it (read-only; ``ops`` is a read-only mapping)."""

    name: str
    description: str
    precision: str
    opset_min: int
    opset_max: int
    costs_from: str
    ops: Mapping[str, OpSupport]
    fusions: tuple[Fusion, ...] = ()
    sources: tuple[Source, ...] = ()
    notes: tuple[str, ...] = ()
    measurement: Measurement | None = None
    default: OpSupport | None = None
    path: str | None = None

    def entry(self, op: str) -> OpSupport | None:
        """The entry for ``op``: its own, else ``default``, else None (unsupported)."""
        return self.ops.get(op, self.default)

    def support(self, op: str) -> str:
        """The support word of ``op``: native, lookup_table or none (none also for an unlisted op without default)."""
        entry = self.entry(op)
        return entry.support if entry is not None else "none"

    def cost(self, op: str) -> float | None:
        """Relative cost per element of ``op`` alone (Relu = 1.0); None when the target cannot run it."""
        entry = self.entry(op)
        return None if entry is None or entry.support == "none" else entry.cost

    def allows(self, ops: Sequence[str]) -> tuple[bool, list[str]]:
        """(True, []) when every op may appear in a model for this target, else (False, offending ops in order)."""
        bad: list[str] = []
        for op in _op_list(ops):
            if self.support(op) == "none" and op not in bad:
                bad.append(op)
        return not bad, bad

    def cost_of(self, ops: Sequence[str], after: str | None = None, *, linear: bool = False) -> float | None:
        """Cost per element of the chain ``ops`` (execution order) placed right after a node of type ``after``.

        ``ops`` are the nodes between the producer and the next layer, in
        execution order. Fusions are applied the way a runtime's pattern
        matcher does, whether or not the fused form is cheaper: walking the
        chain from its head, the longest fusion pattern that matches at the
        current position covers those ops at the fusion's cost, and an op no
        fusion covers costs its own ``cost``. A fusion with after "*" may match
        anywhere. A fusion listing ``after`` among its producers may match only
        at the head and, by default, only when it covers the whole chain: a
        producer can absorb its activation only if nothing else reads the
        producer's output, and in x*HardSigmoid(x) the Mul reads it again.
        Pass ``linear=True`` when each op reads only the previous op's output
        (and constants), e.g. Relu then a per-channel Mul; then a producer
        fusion may cover a head prefix. On equal length the producer's own
        fusion wins, then the earlier entry. None when any op is unsupported;
        0.0 for an empty chain.
        """
        parts = self.cost_parts(ops, after, linear=linear)
        return None if parts is None else sum(p.cost for p in parts)

    def cost_parts(self, ops: Sequence[str], after: str | None = None, *,
                   linear: bool = False) -> list["ChainPart"] | None:
        """How :meth:`cost_of` prices the chain: one :class:`ChainPart` per fused pattern or lone op, in order.

        None when any op is unsupported; [] for an empty chain. The costs sum to ``cost_of``.
        """
        chain = _op_list(ops)
        if any(self.cost(op) is None for op in chain):
            return None
        parts, i = [], 0
        while i < len(chain):
            producer = after if i == 0 else None
            fusion = self._longest_fusion(chain, i, producer, whole=not linear)
            if fusion is None:
                parts.append(ChainPart((chain[i],), self.cost(chain[i])))
                i += 1
            else:
                parts.append(ChainPart(fusion.ops, fusion.cost, fusion))
                i += len(fusion.ops)
        return parts

    def _longest_fusion(self, chain: list[str], i: int, producer: str | None, whole: bool) -> Fusion | None:
        best: Fusion | None = None
        for fusion in self.fusions:
            at_producer = producer is not None and producer in fusion.after
            if not (fusion.anywhere or at_producer):
                continue
            if tuple(chain[i:i + len(fusion.ops)]) != fusion.ops:
                continue
            if not fusion.anywhere and whole and len(fusion.ops) != len(chain):
                continue
            if best is None or len(fusion.ops) > len(best.ops) or (
                    len(fusion.ops) == len(best.ops) and best.anywhere and not fusion.anywhere):
                best = fusion
        return best

    def accepts_opset(self, opset: int) -> bool:
        """Whether a model of default-domain ``opset`` is accepted by this target."""
        return self.opset_min <= int(opset) <= self.opset_max


def _op_list(ops: Sequence[str]) -> list[str]:
    if isinstance(ops, str):  # a bare string would iterate by character
        raise TypeError("ops must be a sequence of op type names, not a string")
    return list(ops)


def _entry(raw: dict) -> OpSupport:
    cost = raw.get("cost")
    return OpSupport(support=raw["support"], cost=None if cost is None else float(cost), source=raw["source"],
                     note=raw.get("note", ""), from_memory=raw.get("from_memory", False))


def _measurement(raw: dict | None) -> Measurement | None:
    if raw is None:
        return None
    q = raw.get("quantization")
    quant = None if q is None else Quantization(q["format"], q["activations"], q["weights"], q.get("per_channel"))
    return Measurement(raw["runtime"], raw["provider"], raw["graph_optimization_level"], raw["threads"], quant)


def profile_from_dict(raw: dict, path: str | None = None) -> TargetProfile:
    """A TargetProfile from an already checked JSON object (see :func:`swapper.targets.schema.read_profile`)."""
    fusions = tuple(
        Fusion(after=(ANYWHERE,) if f["after"] == ANYWHERE else tuple(f["after"]), ops=tuple(f["ops"]),
               cost=float(f["cost"]), source=f["source"], note=f.get("note", ""),
               from_memory=f.get("from_memory", False))
        for f in raw.get("fusions", []))
    sources = tuple(Source(s["title"], s["url"], s["supports"], s.get("note", "")) for s in raw["sources"])
    default = raw.get("default")
    return TargetProfile(
        name=raw["name"], description=raw["description"], precision=raw["precision"],
        opset_min=raw["opset"]["min"], opset_max=raw["opset"]["max"], costs_from=raw["costs_from"],
        ops=MappingProxyType({op: _entry(e) for op, e in raw["ops"].items()}), fusions=fusions,
        sources=sources, notes=tuple(raw.get("notes", [])), measurement=_measurement(raw.get("measurement")),
        default=None if default is None else _entry(default), path=path)


def builtin_targets() -> list[str]:
    """Names of the profiles shipped with swapper, sorted."""
    folder = resources.files(BUILTIN_PACKAGE) / BUILTIN_DIR
    return sorted(p.name[: -len(".json")] for p in folder.iterdir() if p.name.endswith(".json"))


def _looks_like_path(text: str) -> bool:
    return text.endswith(".json") or os.sep in text or (os.altsep is not None and os.altsep in text)


def load_target(name_or_path: str | os.PathLike) -> TargetProfile:
    """The profile named ``name_or_path`` (a built-in name) or stored at that path.

    A string that is not a built-in name is read as a path when it ends in
    .json, contains a path separator or names an existing file. Raises
    BadTargetError (exit code 2) with a one-line message otherwise, or when
    the file breaks the schema.
    """
    text = os.fspath(name_or_path)
    if not isinstance(name_or_path, os.PathLike) and text in builtin_targets():
        ref = resources.files(BUILTIN_PACKAGE) / BUILTIN_DIR / f"{text}.json"
        with resources.as_file(ref) as path:
            raw = read_profile(path)
            return profile_from_dict(raw, str(path))
    if isinstance(name_or_path, os.PathLike) or _looks_like_path(text) or Path(text).exists():
        raw = read_profile(text)
        return profile_from_dict(raw, text)
    raise BadTargetError(f"unknown target {text!r}: not a built-in profile ({', '.join(builtin_targets())}) "
                         "and not a path to a .json profile")
