"""Checks one target profile file against the ``swapper.target/1`` schema.

Transformation: a path -> the parsed, checked JSON object (plain dicts and
lists, exactly as written), or a :class:`BadTargetError` whose one-line message
names the file, the key path (``ops.Sigmoid.support``, ``fusions[2].ops[0]``)
and the cause. The format is documented field by field in
:mod:`swapper.targets.profile`; this module only enforces it.
"""
from __future__ import annotations

import json
import logging
import math
import re
import stat
from pathlib import Path

from swapper.errors import SwapperError

logger = logging.getLogger(__name__)

SCHEMA = "swapper.target/1"
MAX_BYTES = 1 << 20  # a profile is a short hand-written file; anything larger is a mistake
SUPPORT_WORDS = ("native", "lookup_table", "none")
PRECISIONS = ("float32", "int8")
COSTS_FROM = ("measured", "declared")
RUNTIMES = ("onnxruntime",)
# onnxruntime.GraphOptimizationLevel members ORT_DISABLE_ALL, ORT_ENABLE_BASIC, ..._EXTENDED, ..._ALL
OPT_LEVELS = ("disable_all", "basic", "extended", "all")
QUANT_FORMATS = ("QDQ",)
INT8_TYPES = ("uint8", "int8")
ANYWHERE = "*"  # a fusion's "after": the runtime rewrites the pattern wherever it appears
# ONNX op_type spelling: an identifier (ONNX IR spec: names are C90 identifiers)
OP_NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_]*\Z")
PROFILE_NAME = re.compile(r"[a-z0-9][a-z0-9._-]{0,63}\Z")
MAX_COST = 1e6
MAX_OPSET = 1000
MAX_PATTERN = 8
MAX_TEXT = 2000

TOP_REQUIRED = ("schema", "name", "description", "precision", "opset", "costs_from", "ops", "sources")
TOP_OPTIONAL = ("measurement", "default", "fusions", "notes")
ENTRY_KEYS = ("support", "cost", "source", "note", "from_memory")
FUSION_KEYS = ("after", "ops", "cost", "source", "note", "from_memory")
SOURCE_KEYS = ("title", "url", "supports", "note")
MEASUREMENT_KEYS = ("runtime", "provider", "graph_optimization_level", "threads", "quantization")
QUANT_KEYS = ("format", "activations", "weights", "per_channel")


class BadTargetError(SwapperError):
    """A target profile file is missing, unreadable, malformed or breaks the schema (exit code 2)."""


class _Object(dict):
    """A JSON object that remembers keys the file wrote more than once (json keeps only the last)."""

    duplicates: tuple[str, ...] = ()


def _object_pairs(pairs: list[tuple[str, object]]) -> _Object:
    obj = _Object(pairs)
    seen: set[str] = set()
    obj.duplicates = tuple(k for k, _ in pairs if k in seen or seen.add(k))
    return obj


def _type_name(value: object) -> str:
    return {dict: "object", _Object: "object", list: "array", str: "string", bool: "boolean",
            int: "integer", float: "number", type(None): "null"}.get(type(value), type(value).__name__)


class _Checker:
    """Walks the parsed file; every check raises at the first problem, naming its key path."""

    def __init__(self, path: Path):
        self.path = path

    def fail(self, where: str, cause: str) -> None:
        raise BadTargetError(f"{where or '(top level)'}: {cause}", self.path)

    def keys(self, value: object, where: str, required: tuple[str, ...], optional: tuple[str, ...] = ()) -> dict:
        if not isinstance(value, dict):
            self.fail(where, f"expected an object, got {_type_name(value)}")
        prefix = f"{where}." if where else ""
        for key in getattr(value, "duplicates", ()):
            self.fail(f"{prefix}{key}", "key written twice")
        for key in value:
            if key not in required and key not in optional:
                self.fail(f"{prefix}{key}", f"unknown key; expected one of {', '.join(required + optional)}")
        for key in required:
            if key not in value:
                self.fail(f"{prefix}{key}", "missing")
        return value

    def text(self, value: object, where: str, *, one_line: bool = True) -> str:
        if not isinstance(value, str):
            self.fail(where, f"expected a string, got {_type_name(value)}")
        if not value.strip():
            self.fail(where, "empty string")
        if one_line and ("\n" in value or "\r" in value):
            self.fail(where, "must be one line")
        if len(value) > MAX_TEXT:
            self.fail(where, f"longer than {MAX_TEXT} characters")
        return value

    def word(self, value: object, where: str, choices: tuple[str, ...], what: str = "value") -> str:
        if not isinstance(value, str):
            self.fail(where, f"expected a string, got {_type_name(value)}")
        if value not in choices:
            self.fail(where, f"unknown {what} {value!r}; expected one of {', '.join(choices)}")
        return value

    def integer(self, value: object, where: str, lo: int, hi: int) -> int:
        if isinstance(value, bool) or not isinstance(value, int):
            self.fail(where, f"expected an integer, got {_type_name(value)}")
        if not lo <= value <= hi:
            self.fail(where, f"value {value} out of range {lo}..{hi}")
        return value

    def number(self, value: object, where: str, *, allow_zero: bool) -> float:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            self.fail(where, f"expected a number, got {_type_name(value)}")
        if not math.isfinite(value):
            self.fail(where, "must be a finite number")
        if value < 0 or (value == 0 and not allow_zero):
            self.fail(where, f"cost {value} must be {'>= 0' if allow_zero else '> 0'}")
        if value > MAX_COST:
            self.fail(where, f"cost {value} out of range (at most {MAX_COST:g})")
        return float(value)

    def flag(self, value: object, where: str) -> bool:
        if not isinstance(value, bool):
            self.fail(where, f"expected true or false, got {_type_name(value)}")
        return value

    def op_name(self, value: object, where: str) -> str:
        if not isinstance(value, str):
            self.fail(where, f"expected an op name, got {_type_name(value)}")
        if not OP_NAME.match(value):
            self.fail(where, f"{value!r} is not an ONNX op identifier (letters, digits, '_'; not starting with a digit)")
        return value

    def array(self, value: object, where: str, *, nonempty: bool) -> list:
        if not isinstance(value, list):
            self.fail(where, f"expected an array, got {_type_name(value)}")
        if nonempty and not value:
            self.fail(where, "empty array")
        return value

    # ------------------------------------------------------------------ sections
    def entry(self, value: object, where: str) -> None:
        """One op's support entry (also the shape of ``default``)."""
        entry = self.keys(value, where, ("support", "source"), ("cost", "note", "from_memory"))
        support = self.word(entry["support"], f"{where}.support", SUPPORT_WORDS, "support word")
        if support == "none":
            if entry.get("cost") is not None:
                self.fail(f"{where}.cost", "given for an op with support none (it cannot run on this target)")
        elif "cost" not in entry:
            self.fail(f"{where}.cost", f"missing (required for support {support})")
        else:
            self.number(entry["cost"], f"{where}.cost", allow_zero=False)
        self.text(entry["source"], f"{where}.source")
        if "note" in entry:
            self.text(entry["note"], f"{where}.note")
        if "from_memory" in entry:
            self.flag(entry["from_memory"], f"{where}.from_memory")

    def measurement(self, value: object, precision: str) -> None:
        m = self.keys(value, "measurement", MEASUREMENT_KEYS[:4], MEASUREMENT_KEYS[4:])
        self.word(m["runtime"], "measurement.runtime", RUNTIMES, "runtime")
        provider = self.text(m["provider"], "measurement.provider")
        if not OP_NAME.match(provider):
            self.fail("measurement.provider", f"{provider!r} is not a provider name such as CPUExecutionProvider")
        self.word(m["graph_optimization_level"], "measurement.graph_optimization_level", OPT_LEVELS, "level")
        self.integer(m["threads"], "measurement.threads", 1, 1024)
        if "quantization" in m:
            if precision != "int8":
                self.fail("measurement.quantization", "only for precision int8")
            q = self.keys(m["quantization"], "measurement.quantization", QUANT_KEYS[:3], QUANT_KEYS[3:])
            self.word(q["format"], "measurement.quantization.format", QUANT_FORMATS, "format")
            self.word(q["activations"], "measurement.quantization.activations", INT8_TYPES, "type")
            self.word(q["weights"], "measurement.quantization.weights", INT8_TYPES, "type")
            if "per_channel" in q:
                self.flag(q["per_channel"], "measurement.quantization.per_channel")
        elif precision == "int8":
            self.fail("measurement.quantization", "missing (an int8 measured profile must say how models are quantized)")

    def fusions(self, value: object, ops: dict, default: dict | None) -> None:
        seen: dict[tuple[str, tuple[str, ...]], int] = {}
        for i, raw in enumerate(self.array(value, "fusions", nonempty=False)):
            where = f"fusions[{i}]"
            f = self.keys(raw, where, ("after", "ops", "cost", "source"), ("note", "from_memory"))
            after = f["after"]
            if after == ANYWHERE:
                producers = (ANYWHERE,)
            else:
                producers = tuple(self.op_name(p, f"{where}.after[{j}]")
                                  for j, p in enumerate(self.array(after, f"{where}.after", nonempty=True)))
            pattern = self.array(f["ops"], f"{where}.ops", nonempty=True)
            if len(pattern) > MAX_PATTERN:
                self.fail(f"{where}.ops", f"{len(pattern)} ops; a fusion pattern has at most {MAX_PATTERN}")
            for j, op in enumerate(pattern):
                self.op_name(op, f"{where}.ops[{j}]")
                entry = ops.get(op, default)
                if entry is None or entry["support"] == "none":
                    self.fail(f"{where}.ops[{j}]", f"{op!r} has support none in this profile; a fusion cannot use it")
            self.number(f["cost"], f"{where}.cost", allow_zero=True)
            self.text(f["source"], f"{where}.source")
            if "note" in f:
                self.text(f["note"], f"{where}.note")
            if "from_memory" in f:
                self.flag(f["from_memory"], f"{where}.from_memory")
            for producer in producers:
                key = (producer, tuple(pattern))
                if key in seen:
                    self.fail(where, f"same producer {producer!r} and ops as fusions[{seen[key]}]")
                seen[key] = i

    def sources(self, value: object) -> None:
        for i, raw in enumerate(self.array(value, "sources", nonempty=True)):
            where = f"sources[{i}]"
            s = self.keys(raw, where, SOURCE_KEYS[:3], SOURCE_KEYS[3:])
            self.text(s["title"], f"{where}.title")
            url = self.text(s["url"], f"{where}.url")
            if not url.startswith(("https://", "http://")) or " " in url:
                self.fail(f"{where}.url", f"{url!r} is not an http(s) URL")
            self.text(s["supports"], f"{where}.supports")
            if "note" in s:
                self.text(s["note"], f"{where}.note")

    def profile(self, value: object) -> dict:
        top = self.keys(value, "", TOP_REQUIRED, TOP_OPTIONAL)
        if top["schema"] != SCHEMA:
            self.fail("schema", f"expected {SCHEMA!r}, got {top['schema']!r}")
        name = self.text(top["name"], "name")
        if not PROFILE_NAME.match(name):
            self.fail("name", f"{name!r}: use lower-case letters, digits, '.', '_' or '-' (at most 64)")
        self.text(top["description"], "description")
        precision = self.word(top["precision"], "precision", PRECISIONS, "precision")
        opset = self.keys(top["opset"], "opset", ("min", "max"))
        lo = self.integer(opset["min"], "opset.min", 1, MAX_OPSET)
        hi = self.integer(opset["max"], "opset.max", 1, MAX_OPSET)
        if lo > hi:
            self.fail("opset", f"range reversed (min {lo} > max {hi})")
        costs_from = self.word(top["costs_from"], "costs_from", COSTS_FROM)
        if costs_from == "measured":
            if "measurement" not in top:
                self.fail("measurement", "missing (required when costs_from is measured)")
            self.measurement(top["measurement"], precision)
        elif "measurement" in top:
            self.fail("measurement", "given but costs_from is declared")
        ops = top["ops"]
        if not isinstance(ops, dict):
            self.fail("ops", f"expected an object, got {_type_name(ops)}")
        for op in getattr(ops, "duplicates", ()):
            self.fail(f"ops.{op}", "op listed twice")
        for op, entry in ops.items():
            self.op_name(op, f"ops.{op}")
            self.entry(entry, f"ops.{op}")
        relu = ops.get("Relu")
        if relu is None:
            self.fail("ops.Relu", "missing (costs are relative to Relu = 1.0)")
        if relu["support"] == "none" or relu.get("cost") != 1.0:
            self.fail("ops.Relu.cost", "must be 1.0 (costs are relative to Relu)")
        default = top.get("default")
        if default is not None:
            self.entry(default, "default")
        self.fusions(top.get("fusions", []), ops, default)
        self.sources(top["sources"])
        for i, note in enumerate(self.array(top.get("notes", []), "notes", nonempty=False)):
            self.text(note, f"notes[{i}]", one_line=False)
        return top


def read_profile(path: str | Path) -> dict:
    """The checked JSON object of the profile at ``path``; BadTargetError (one line) on any problem."""
    path = Path(path)
    try:
        info = path.stat()
    except FileNotFoundError:
        raise BadTargetError("cannot read: file not found", path) from None
    except OSError as exc:
        raise BadTargetError(f"cannot read: {exc.strerror or exc}", path) from None
    if not stat.S_ISREG(info.st_mode):
        raise BadTargetError("cannot read: not a regular file", path)
    if info.st_size > MAX_BYTES:
        raise BadTargetError(f"cannot read: {info.st_size} bytes, over the 1 MiB limit for a profile", path)
    try:
        with open(path, "rb") as fh:
            data = fh.read(MAX_BYTES + 1)  # the file may have grown since stat
    except OSError as exc:
        raise BadTargetError(f"cannot read: {exc.strerror or exc}", path) from None
    if len(data) > MAX_BYTES:
        raise BadTargetError("cannot read: over the 1 MiB limit for a profile", path)
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise BadTargetError(f"cannot read: not UTF-8 text (byte {exc.start})", path) from None
    try:
        raw = json.loads(text, object_pairs_hook=_object_pairs)
    except json.JSONDecodeError as exc:
        raise BadTargetError(f"line {exc.lineno} column {exc.colno}: malformed JSON: {exc.msg}", path) from None
    except RecursionError:
        raise BadTargetError("malformed JSON: nested too deeply", path) from None
    checked = _Checker(path).profile(raw)
    logger.debug("target profile %s checked (%d ops)", path, len(checked["ops"]))
    return checked
