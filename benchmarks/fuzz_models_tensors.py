"""Structure-level model mutations on tensors and the graph's interface.

Initializers (raw_data length, dims, data_type, special values, sparse, duplicates), external data (odd
locations, symlinks, FIFOs, offsets), opset and IR versions, graph inputs/outputs and their types. Each is
``(model, rng, ctx) -> ModelProto | bytes`` and edits the given copy in place (see fuzz_models.py).
"""
from __future__ import annotations

import os

import numpy as np
import onnx
from fuzz_graph_tools import Ctx, edges, float_inits, set_attr
from onnx import TensorProto, helper, numpy_helper

# ---------------------------------------------------------------- initializers


def init_rawlen(m, rng, ctx):
    t = rng.choice(float_inits(m))
    raw = t.raw_data or numpy_helper.to_array(t).tobytes()
    t.ClearField("float_data")
    t.raw_data = rng.choice((raw[: len(raw) // 2], raw + raw, raw[:-1], b"", raw + b"\0" * 3))
    return m


def init_dims(m, rng, ctx):
    t = rng.choice(list(m.graph.initializer))
    new = rng.choice(([-1], [0], [2**31], [2**40, 2**40], [2**62], [-(2**62)], [1] * 40, list(t.dims)[::-1],
                      [3] + list(t.dims)))
    del t.dims[:]
    t.dims.extend(new)
    return m


def init_dtype(m, rng, ctx):
    t = rng.choice(list(m.graph.initializer))
    t.data_type = rng.choice((TensorProto.INT64, TensorProto.STRING, TensorProto.BFLOAT16, TensorProto.FLOAT16,
                              TensorProto.DOUBLE, TensorProto.UNDEFINED, TensorProto.BOOL, TensorProto.INT4,
                              TensorProto.FLOAT8E4M3FN, TensorProto.COMPLEX64, 999, -5, 2**30))
    return m


def _set_weights(m, rng, value_fn):
    for t in rng.sample(float_inits(m), k=rng.randint(1, len(float_inits(m)))):
        arr = numpy_helper.to_array(t).copy()
        value_fn(arr)
        t.CopyFrom(numpy_helper.from_array(arr.astype(np.float32), t.name))
    return m


def weights_special(m, rng, ctx):
    value = rng.choice((np.nan, np.inf, -np.inf, 3.2e38, -3.2e38, 1e-45, 0.0, 1e20))
    everywhere = rng.random() < 0.4

    def poison(arr):
        if everywhere:
            arr[...] = value
        else:
            arr.flat[rng.randrange(arr.size)] = value

    return _set_weights(m, rng, poison)


def constants_special(m, rng, ctx):
    """The constants inside decomposed activations (0.5, sqrt(2), 0.044715, 1) become NaN/Inf/0/huge."""
    consts = [n for n in m.graph.node if n.op_type == "Constant"]
    if not consts:
        return weights_special(m, rng, ctx)
    node = rng.choice(consts)
    value = rng.choice((np.nan, np.inf, 0.0, -1.0, 3.2e38, 1e-40))
    shape = rng.choice(((), (1,), (2,), (64,)))
    set_attr(node, "value", numpy_helper.from_array(np.full(shape, value, np.float32)))
    return m


def init_string_bytes(m, rng, ctx):
    """A STRING initializer with binary payloads, read by nothing (or renamed onto a used weight)."""
    t = helper.make_tensor("fuzz_strings", TensorProto.STRING, [2], [b"\xff\xfe\x00", b"[red]x[/]"])
    if rng.random() < 0.5 and float_inits(m):
        victim = rng.choice(float_inits(m))
        t.name = victim.name
        m.graph.initializer.remove(victim)
    m.graph.initializer.append(t)
    return m


def init_remove(m, rng, ctx):
    t = rng.choice(list(m.graph.initializer))
    m.graph.initializer.remove(t)
    if rng.random() < 0.5:  # the weight becomes an input the caller must feed
        m.graph.input.append(helper.make_tensor_value_info(t.name, t.data_type, list(t.dims)))
    return m


def init_as_input(m, rng, ctx):
    """Old-IR style: initializers also listed as graph inputs (overridable)."""
    for t in m.graph.initializer:
        m.graph.input.append(helper.make_tensor_value_info(t.name, t.data_type, list(t.dims)))
    if rng.random() < 0.5:
        m.ir_version = 3
    return m


def init_duplicate(m, rng, ctx):
    t = rng.choice(list(m.graph.initializer))
    dup = m.graph.initializer.add()
    dup.CopyFrom(t)
    if rng.random() < 0.5 and len(t.dims):
        dup.CopyFrom(numpy_helper.from_array(np.zeros([d + 1 for d in t.dims], np.float32), t.name))
    return m


def init_sparse(m, rng, ctx):
    t = rng.choice(float_inits(m))
    dense = numpy_helper.to_array(t)
    values = numpy_helper.from_array(dense.ravel()[:4].copy(), t.name)
    indices = numpy_helper.from_array(np.array(rng.choice(([0, 1, 2, 3], [0, 0, 0, 0], [-1, 2**40, 3, 1])),
                                               np.int64), t.name + "_idx")
    m.graph.sparse_initializer.append(helper.make_sparse_tensor(values, indices, list(dense.shape)))
    m.graph.initializer.remove(t)
    return m


# ---------------------------------------------------------------- external data


def _externalise(m: onnx.ModelProto, ctx: Ctx, location: str = "weights.bin") -> list[onnx.TensorProto]:
    blob = bytearray()
    moved = []
    for t in m.graph.initializer:
        if not t.raw_data:
            continue
        offset = len(blob)
        blob += t.raw_data
        t.ClearField("raw_data")
        t.data_location = TensorProto.EXTERNAL
        for k, v in (("location", location), ("offset", str(offset)), ("length", str(len(t.raw_data) or
                                                                                        len(blob) - offset))):
            t.external_data.add(key=k, value=v)
        moved.append(t)
    (ctx.work / "weights.bin").write_bytes(bytes(blob))
    ctx.side_files.append("weights.bin")
    return moved


def _set_entry(t, key, value):
    for e in t.external_data:
        if e.key == key:
            e.value = value
            return
    t.external_data.add(key=key, value=value)


def external_data(m, rng, ctx):
    moved = _externalise(m, ctx)
    victims = moved if rng.random() < 0.3 else [rng.choice(moved)]
    kind = rng.choice(("ok", "nul", "long", "very_long", "absolute", "dotdot", "loop", "link_out", "link_abs",
                       "dir", "fifo", "devzero", "offset_past", "length_past", "negative", "not_number",
                       "missing", "empty", "dot", "newline", "markup", "unknown_key", "checksum"))
    work = ctx.work
    if kind == "loop":
        os.symlink("loop_b.bin", work / "loop_a.bin")
        os.symlink("loop_a.bin", work / "loop_b.bin")
    elif kind == "link_out":
        (work.parent / f"{work.name}_outside.bin").write_bytes(rng.randbytes(1 << 16))
        os.symlink(f"../{work.name}_outside.bin", work / "link.bin")
    elif kind == "link_abs":
        os.symlink("/etc/hostname", work / "link.bin")
    elif kind == "dir":
        (work / "adir.bin").mkdir()
    elif kind == "fifo":
        os.mkfifo(work / "pipe.bin")
    elif kind == "devzero":
        os.symlink("/dev/zero", work / "zero.bin")
    location = {"nul": "weights\0.bin", "long": "w" * 300 + ".bin", "very_long": "w/" * 3000 + "w.bin",
                "absolute": "/etc/hostname", "dotdot": "../weights.bin", "loop": "loop_a.bin",
                "link_out": "link.bin", "link_abs": "link.bin", "dir": "adir.bin", "fifo": "pipe.bin",
                "devzero": "zero.bin", "missing": "nothere.bin", "empty": "", "dot": ".",
                "newline": "weights\n.bin", "markup": "[red]w[/].bin"}.get(kind)
    for t in victims:
        if location is not None:
            _set_entry(t, "location", location)
        if kind == "offset_past":
            _set_entry(t, "offset", str(rng.choice((10**6, 2**40, 2**63 - 1))))
        elif kind == "length_past":
            _set_entry(t, "length", str(rng.choice((10**7, 2**40, 2**64))))
        elif kind == "negative":
            _set_entry(t, rng.choice(("offset", "length")), "-16")
        elif kind == "not_number":
            _set_entry(t, rng.choice(("offset", "length")), rng.choice(("abc", "1e3", "", " 4")))
        elif kind == "unknown_key":
            t.external_data.add(key="fuzz", value="[/b]")
        elif kind == "checksum":
            _set_entry(t, "checksum", "not-a-sha1")
        elif kind == "devzero":
            _set_entry(t, "length", str(2**33))
    if kind == "nul":  # protobuf strings may carry NUL; keep it in the bytes
        return m.SerializeToString()
    return m


# ---------------------------------------------------------------- opsets, versions


def opset_range(m, rng, ctx):
    entry = next(e for e in m.opset_import if e.domain in ("", "ai.onnx"))
    choice = rng.random()
    if choice < 0.6:
        entry.version = rng.choice((0, 1, 7, 10, 11, 21, 22, 23, 24, 25, 100, -1, 2**40))
    elif choice < 0.75:
        m.opset_import.remove(entry)
    elif choice < 0.9:
        m.opset_import.add(domain=rng.choice(("", "ai.onnx")), version=rng.choice((9, 11, 13, 30)))
    else:
        entry.domain = "ai.onnx"
    return m


def ir_version(m, rng, ctx):
    m.ir_version = rng.choice((0, 1, 2, 3, 4, 10, 11, 12, 13, 100, -1, 2**40))
    return m


# ---------------------------------------------------------------- graph inputs and outputs


def io_missing(m, rng, ctx):
    target = rng.choice((m.graph.input, m.graph.output))
    del target[:]
    return m


def io_type(m, rng, ctx):
    vi = rng.choice((m.graph.input[0], m.graph.output[0]))
    tt = vi.type.tensor_type
    tt.elem_type = rng.choice((TensorProto.INT32, TensorProto.INT64, TensorProto.DOUBLE, TensorProto.FLOAT16,
                               TensorProto.BFLOAT16, TensorProto.STRING, TensorProto.BOOL, TensorProto.UINT8,
                               TensorProto.UNDEFINED, 999))
    return m


def io_shape(m, rng, ctx):
    vi = rng.choice((m.graph.input[0], m.graph.output[0]))
    shape = vi.type.tensor_type.shape
    choice = rng.random()
    if choice < 0.2:
        vi.type.tensor_type.ClearField("shape")
    elif choice < 0.4:
        del shape.dim[:]
    else:
        dim = rng.choice(list(shape.dim))
        value = rng.choice((0, 1, 7, -1, -5, 2**40, "N", "", "[red]", "batch"))
        if isinstance(value, int):
            dim.dim_value = value
        else:
            dim.dim_param = value
        if rng.random() < 0.3:
            shape.dim.add().dim_value = 1
    return m


def io_nontensor(m, rng, ctx):
    vi = rng.choice((m.graph.input[0], m.graph.output[0]))
    elem = helper.make_tensor_type_proto(TensorProto.FLOAT, None)
    kind = rng.choice(("sequence", "optional", "map", "sparse"))
    if kind == "sequence":
        vi.type.CopyFrom(helper.make_sequence_type_proto(elem))
    elif kind == "optional":
        vi.type.CopyFrom(helper.make_optional_type_proto(elem))
    elif kind == "map":
        vi.type.CopyFrom(helper.make_map_type_proto(TensorProto.INT64, elem))
    else:
        vi.type.CopyFrom(helper.make_sparse_tensor_type_proto(TensorProto.FLOAT, [None, 64]))
    return m


def io_extra(m, rng, ctx):
    choice = rng.random()
    if choice < 0.35:  # an internal tensor (often an activation site) becomes a graph output
        m.graph.output.append(helper.make_tensor_value_info(rng.choice(edges(m)), TensorProto.FLOAT, None))
    elif choice < 0.55:  # the input is also an output
        m.graph.output.append(m.graph.input[0])
    elif choice < 0.75:  # a second input, unused or with the same name
        vi = m.graph.input.add()
        vi.CopyFrom(m.graph.input[0])
        vi.name = rng.choice(("pixels", "extra", "labels", "targets", "[/b]"))
    else:  # an output listed twice
        m.graph.output.append(m.graph.output[0])
    return m


def value_info_bad(m, rng, ctx):
    name = rng.choice(edges(m) + ["nowhere"])
    shape = rng.choice(([1], [None, 3, 3], [2**40], [0], None))
    m.graph.value_info.append(helper.make_tensor_value_info(name, rng.choice((TensorProto.FLOAT, TensorProto.INT64,
                                                                              TensorProto.DOUBLE)), shape))
    return m


def dtype_convert(m, rng, ctx):
    """A whole model in double or float16 (valid ONNX, unusual for the rewriter)."""
    target = rng.choice((TensorProto.DOUBLE, TensorProto.FLOAT16))
    np_type = helper.tensor_dtype_to_np_dtype(target)
    for t in m.graph.initializer:
        if t.data_type == TensorProto.FLOAT:
            t.CopyFrom(numpy_helper.from_array(numpy_helper.to_array(t).astype(np_type), t.name))
    for n in m.graph.node:
        for a in n.attribute:
            if a.type == onnx.AttributeProto.TENSOR and a.t.data_type == TensorProto.FLOAT:
                a.t.CopyFrom(numpy_helper.from_array(numpy_helper.to_array(a.t).astype(np_type)))
    for vi in list(m.graph.input) + list(m.graph.output) + list(m.graph.value_info):
        if vi.type.tensor_type.elem_type == TensorProto.FLOAT:
            vi.type.tensor_type.elem_type = target
    return m


def batch_static(m, rng, ctx):
    dim = m.graph.input[0].type.tensor_type.shape.dim[0]
    dim.dim_value = rng.choice((1, 2, 3, 7, 64, 256))
    if rng.random() < 0.5:
        m.graph.output[0].type.tensor_type.shape.dim[0].dim_value = dim.dim_value
    return m
