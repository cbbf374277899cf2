"""Model mutants for benchmarks/fuzz.py: broken copies of the demo models.

Transformation: (demo model, seeded rng) -> a hostile .onnx file (plus any side files) in a case folder.
Byte-level mutants damage the serialised protobuf; structure-level mutants edit the ModelProto with the
onnx API (nodes, ops, attributes, initializers, external data, opsets, inputs/outputs, subgraphs, names,
metadata; see fuzz_models_graph.py and fuzz_models_tensors.py). Every mutation is a small function
``(model, rng, ctx) -> ModelProto | bytes`` registered in BYTE_LEVEL / STRUCTURAL; the fuzzer applies one to
three of them per mutant.
"""
from __future__ import annotations

import random
from pathlib import Path

import fuzz_models_graph as graph
import fuzz_models_tensors as tensors
import onnx
from fuzz_graph_tools import Ctx

__all__ = ["BYTE_LEVEL", "STRUCTURAL", "Ctx", "make_model_mutant"]

# ---------------------------------------------------------------- byte level


def bytes_bitflip(m, rng, ctx):
    data = bytearray(m.SerializeToString())
    for _ in range(rng.choice((1, 2, 4, 16, 64))):
        i = rng.randrange(len(data))
        data[i] ^= 1 << rng.randrange(8)
    return bytes(data)


def bytes_truncate(m, rng, ctx):
    data = m.SerializeToString()
    return data[: rng.choice((1, 2, 8, 64, rng.randrange(1, len(data)), len(data) - 1))]


def bytes_splice(m, rng, ctx):
    a, b = m.SerializeToString(), rng.choice(ctx.others)
    return a[: rng.randrange(len(a))] + b[rng.randrange(len(b)):]


def bytes_insert(m, rng, ctx):
    data = m.SerializeToString()
    i = rng.randrange(len(data))
    junk = b"\xff" * rng.randint(1, 12) if rng.random() < 0.3 else rng.randbytes(rng.randint(1, 64))
    return data[:i] + junk + data[i:]


def bytes_delete(m, rng, ctx):
    data = m.SerializeToString()
    i = rng.randrange(len(data))
    return data[:i] + data[i + rng.randint(1, 256):]


def bytes_zero(m, rng, ctx):
    data = bytearray(m.SerializeToString())
    i = rng.randrange(len(data))
    n = rng.choice((1, 4, 64, 1024))
    data[i : i + n] = bytes(len(data[i : i + n]))
    return bytes(data)


def bytes_duplicate(m, rng, ctx):
    data = m.SerializeToString()
    i = rng.randrange(len(data))
    j = min(len(data), i + rng.randint(1, 512))
    return data[:j] + data[i:j] + data[j:]


BYTE_LEVEL = {f.__name__: f for f in (bytes_bitflip, bytes_truncate, bytes_splice, bytes_insert, bytes_delete,
                                      bytes_zero, bytes_duplicate)}


# the order is part of a case's seed: append new mutations at the end
STRUCTURAL_NAMES = (
    "node_drop", "node_duplicate", "node_rename_edge", "node_reverse_order", "node_cycle", "op_wrong", "op_unknown",
    "op_domain", "op_costly_variant", "attr_bad", "attr_wrong_type", "init_rawlen", "init_dims", "init_dtype",
    "weights_special", "constants_special", "init_string_bytes", "init_remove", "init_as_input", "init_duplicate",
    "init_sparse", "external_data", "opset_range", "ir_version", "io_missing", "io_type", "io_shape", "io_nontensor",
    "io_extra", "value_info_bad", "dtype_convert", "batch_static", "subgraph_if", "subgraph_loop", "local_function",
    "names_duplicate", "names_empty", "names_weird", "metadata", "layer_params", "site_rewire")
STRUCTURAL = {name: getattr(graph, name, None) or getattr(tensors, name) for name in STRUCTURAL_NAMES}
# mutations that must come last (they return bytes, or write side files once)
FINAL_ONLY = {"external_data", "metadata", "init_string_bytes"}


def make_model_mutant(base: onnx.ModelProto, rng: random.Random, ctx: Ctx) -> tuple[str, Path]:
    """Apply one to three mutations to a copy of ``base``; write it into ctx.work; return (name, path)."""
    m = onnx.ModelProto()
    m.CopyFrom(base)
    if rng.random() < 0.3:
        names = [rng.choice(list(BYTE_LEVEL))]
    else:
        k = rng.choices((1, 2, 3), weights=(70, 20, 10))[0]
        pool = [n for n in STRUCTURAL if n not in FINAL_ONLY]
        names = [rng.choice(pool) for _ in range(k - 1)] + [rng.choice(list(STRUCTURAL))]
        if rng.random() < 0.1:
            names.append(rng.choice(list(BYTE_LEVEL)))
    result = m
    for name in names:
        fn = BYTE_LEVEL.get(name) or STRUCTURAL[name]
        if isinstance(result, bytes):  # byte mutants stack on bytes: re-parse is not possible, so mutate bytes
            result = fn(_BytesModel(result), rng, ctx) if name in BYTE_LEVEL else result
            continue
        result = fn(result, rng, ctx)
    data = result if isinstance(result, bytes) else result.SerializeToString()
    path = ctx.work / ctx.model_name
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(data)
    return "+".join(names), path


class _BytesModel:
    """Lets a byte-level mutation act on bytes that are already mutated."""

    def __init__(self, data: bytes):
        self._data = data

    def SerializeToString(self) -> bytes:  # noqa: N802 - the protobuf spelling
        return self._data
