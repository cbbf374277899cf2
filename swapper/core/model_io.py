"""Load, validate and save ONNX models safely.

``load_model`` turns every way a model file can be broken into a one-line
:class:`BadModelError` naming the file: not a regular file, too big, not a
protobuf, unsupported opset, external data that is not a plain file inside the
model's folder, tensors whose bytes do not match their dims, checker and
shape-inference failures. ``save_model`` refuses a model that holds non-finite
weights, fails ``onnx.checker`` or does not load in onnxruntime, refuses to
overwrite any input it is given, and writes atomically (temporary file in the
target folder, then rename).
"""
from __future__ import annotations

import hashlib
import logging
import os
import tempfile
from dataclasses import dataclass, field
from pathlib import Path

import onnx
from google.protobuf.message import DecodeError, EncodeError

from swapper.core.files import (  # noqa: F401  (check_output_path, atomic_write_bytes: used from here too)
    Inputs,
    atomic_write_bytes,
    check_output_path,
    clashing_input,
    open_regular,
    os_reason,
    path_problem,
)
from swapper.core.graph import DEFAULT_DOMAINS, subgraphs
from swapper.core.tensor_check import check_tensor_sizes, nonfinite_tensor, undecodable_text
from swapper.errors import BadModelError, BadOutputError, first_line

logger = logging.getLogger(__name__)

# The default-domain opsets we read and write. 11 is the oldest opset that
# current exporters still emit; the top is the newest our onnx package knows
# and onnxruntime 1.18+ runs (checked against onnxruntime's operator docs).
MIN_OPSET = 11
MAX_OPSET = 22
# protobuf cannot serialise a single message above 2 GiB; bigger models keep
# their weights as external data and are checked by path.
PROTOBUF_LIMIT = 2**31 - 1
# A declared dimension above this is damage, not a model: onnx's shape inference allocates by declared
# shapes and dies of std::bad_alloc on one of 2**40 (found by the fuzzer). 2**31 - 1 is the largest
# dimension onnxruntime's 32-bit index paths take (common practice, no source).
MAX_DECLARED_DIM = 2**31 - 1


@dataclass
class LoadedModel:
    """A validated model with shapes inferred, plus where it came from."""

    model: onnx.ModelProto
    path: Path
    opset: int
    file_bytes: int  # the .onnx file plus any external data files
    external_files: list[Path] = field(default_factory=list)  # the external data files the model reads

    def files(self) -> list[tuple[str, Path]]:
        """(role, path) of every file this model was read from: the .onnx file and its external data."""
        return [("the input model", self.path)] + [("the input model's external data", f)
                                                    for f in self.external_files]


def default_opset(model: onnx.ModelProto) -> int | None:
    """The version of the default-domain (ai.onnx) opset the model imports, None if it imports none."""
    for entry in model.opset_import:
        if entry.domain in DEFAULT_DOMAINS:
            return entry.version
    return None


def _external_file(location: str, base: Path, path: Path) -> Path:
    """The file an external-data ``location`` names, once it is a plain regular file inside ``base``."""
    shown = repr(location[:60] + ("..." if len(location) > 60 else ""))
    problem = "\0" in location and "holds a NUL byte" or path_problem(base / location)
    if problem:
        raise BadModelError(f"external data location {shown}: {problem.replace('the path ', '')} (refused)", path)
    parts = Path(location).parts
    if os.path.isabs(location) or ".." in parts or not parts:
        raise BadModelError(f"external data location {shown} points outside the model's folder (absolute "
                            "paths and '..' are refused)", path)
    try:
        target = (base / location).resolve(strict=True)
    except FileNotFoundError:
        raise BadModelError(f"external data file {shown} is missing", path) from None
    except (OSError, ValueError, RuntimeError) as exc:
        raise BadModelError(f"external data location {shown}: {os_reason(exc)} (refused)", path) from None
    if not target.is_relative_to(base):
        raise BadModelError(f"external data location {shown} points outside the model's folder "
                            "(through a symbolic link; refused)", path)
    try:
        with open_regular(target, BadModelError, what="external data file"):
            pass  # a FIFO or device is refused here, without blocking
    except BadModelError as exc:
        raise BadModelError(f"external data location {shown}: {exc}", path) from None
    return target


def _check_external_paths(model: onnx.ModelProto, path: Path) -> tuple[list[Path], int]:
    """Refuse external-data locations that are not plain files inside the model's folder.

    Returns the files and their total size. Offsets and lengths must lie inside the file.
    """
    try:
        base = path.parent.resolve(strict=True)
    except (OSError, RuntimeError) as exc:
        raise BadModelError(f"cannot resolve the model's folder: {os_reason(exc)}", path) from None
    files: dict[str, Path] = {}
    for tensor in _external_tensors(model):
        entries = {e.key: e.value for e in tensor.external_data}
        location = entries.get("location", "")
        if location not in files:
            files[location] = _external_file(location, base, path)
        size = files[location].stat().st_size
        try:
            offset, length = int(entries.get("offset", 0)), int(entries.get("length", size))
        except ValueError:
            raise BadModelError(f"tensor {tensor.name!r}: external data offset/length are not integers", path) \
                from None
        if offset < 0 or length < 0 or offset + length > size:
            raise BadModelError(f"tensor {tensor.name!r}: external data bytes {offset}..{offset + length} lie "
                                f"outside {location!r} ({size} bytes)", path)
    unique = sorted(set(files.values()))
    return unique, sum(f.stat().st_size for f in unique)


def _external_tensors(model: onnx.ModelProto) -> list[onnx.TensorProto]:
    return [t for t in onnx.external_data_helper._get_all_tensors(model)
            if t.data_location == onnx.TensorProto.EXTERNAL]


def name_unnamed_nodes(model: onnx.ModelProto) -> None:
    """Give every node a name unique in its graph (bodies included) so sites can refer to nodes by name."""
    for graph in (model.graph, *subgraphs(model.graph)):
        _name_graph_nodes(graph)


def _name_graph_nodes(graph: onnx.GraphProto) -> None:
    # Unique per graph: each body is indexed on its own (sites.find_sites), and
    # unnamed nodes get "<OpType>_<position>".
    seen: set[str] = set()
    for i, node in enumerate(graph.node):
        if not node.name or node.name in seen:
            base = node.name or f"{node.op_type}_{i}"
            name, k = base, 0
            while name in seen:
                k += 1
                name = f"{base}_{k}"
            node.name = name
        seen.add(node.name)


def load_model(path: str | Path) -> LoadedModel:
    """Read, check and shape-infer a model. Raises BadModelError with a one-line cause."""
    path = Path(path)
    data = _read(path)
    model = _parse(data, path)
    opset = _supported_opset(model, path)
    external_files, external_bytes = _check_external_paths(model, path)
    check_tensor_sizes(model, path)  # in-place tensors; external ones once their bytes are known
    _check_declared_dims(model, path)
    is_large = len(data) + external_bytes > PROTOBUF_LIMIT
    try:
        model = _checked_and_inferred(model, data, path, has_external=bool(external_files), is_large=is_large)
    except onnx.checker.ValidationError as exc:
        raise BadModelError(f"invalid graph: {first_line(exc)}", path) from None
    except onnx.shape_inference.InferenceError as exc:
        raise BadModelError(f"shape inference failed: {first_line(exc)}", path) from None
    except (OSError, ValueError, RuntimeError) as exc:  # onnx's C++ side raises RuntimeError for odd graphs
        raise BadModelError(f"cannot load: {first_line(exc)}", path) from None
    except MemoryError:  # the C++ side's std::bad_alloc
        raise BadModelError("shape inference ran out of memory (declared shapes too large?)", path) from None
    name_unnamed_nodes(model)
    logger.debug("loaded %s: opset %d, %d nodes", path, opset, len(model.graph.node))
    return LoadedModel(model=model, path=path, opset=opset, file_bytes=len(data) + external_bytes,
                       external_files=external_files)


def _read(path: Path) -> bytes:
    """The bytes of a regular file of at most 2 GiB (protobuf's limit for one .onnx file)."""
    with open_regular(path, BadModelError, what=".onnx file") as fh:
        size = os.fstat(fh.fileno()).st_size
        if size > PROTOBUF_LIMIT:
            raise BadModelError(f"file is {size} bytes, above protobuf's 2 GiB limit for one .onnx file "
                                "(large models keep their weights as external data)", path)
        try:
            data = fh.read(PROTOBUF_LIMIT + 1)
        except OSError as exc:
            raise BadModelError(f"cannot read: {os_reason(exc)}", path) from None
    if not data:
        raise BadModelError("file is empty", path)
    if len(data) > PROTOBUF_LIMIT:  # grew while being read
        raise BadModelError("file is above protobuf's 2 GiB limit for one .onnx file", path)
    return data


def _parse(data: bytes, path: Path) -> onnx.ModelProto:
    model = onnx.ModelProto()
    try:
        model.ParseFromString(data)
    except (DecodeError, RuntimeError, ValueError):
        raise BadModelError("not an ONNX model: the bytes do not parse as one (truncated or another format)", path) \
            from None
    if not model.HasField("graph") or len(model.graph.node) == 0 and len(model.graph.output) == 0:
        raise BadModelError("not an ONNX model (no graph inside)", path)
    damaged = undecodable_text(model)
    if damaged:
        raise BadModelError(f"text field {damaged} is not valid UTF-8 (a damaged file)", path)
    return model


def _supported_opset(model: onnx.ModelProto, path: Path) -> int:
    opset = default_opset(model)
    if opset is None:
        raise BadModelError("model imports no default-domain (ai.onnx) opset", path)
    if not MIN_OPSET <= opset <= MAX_OPSET:
        raise BadModelError(
            f"opset {opset} is outside the supported range {MIN_OPSET}..{MAX_OPSET}", path
        )
    return opset


def _check_declared_dims(model: onnx.ModelProto, path: Path) -> None:
    """Refuse a graph input, output or value_info (main graph) whose declared dimension is absurdly large."""
    g = model.graph
    for v in list(g.input) + list(g.output) + list(g.value_info):
        for dim in v.type.tensor_type.shape.dim:
            # negative values are how some exporters write "unknown" (-1); onnxruntime reads them so
            if dim.HasField("dim_value") and dim.dim_value > MAX_DECLARED_DIM:
                raise BadModelError(f"{v.name!r} declares a dimension of {dim.dim_value} "
                                    f"(at most {MAX_DECLARED_DIM})", path)


def _checked_and_inferred(model: onnx.ModelProto, data: bytes, path: Path, *, has_external: bool,
                          is_large: bool) -> onnx.ModelProto:
    """Structure check, then one strict shape inference (it also checks types), on bytes we already hold.

    Strict inference with type checks is what check_model(full_check=True) adds
    to the structure check, so running it once covers both.
    """
    if is_large:
        # Weights stay on disk. The structure check goes by path so external
        # files resolve against the model's folder; inference never reads
        # external tensors, so the in-memory .onnx bytes are all it needs.
        onnx.checker.check_model(str(path))
    else:
        if has_external:  # inference reads initializer values (e.g. Reshape shapes): bring them in
            onnx.load_external_data_for_model(model, str(path.parent))
            check_tensor_sizes(model, path)  # the external bytes are in place now
            data = model.SerializeToString()
        onnx.checker.check_model(data)
    return onnx.shape_inference.infer_shapes(data, check_type=True, strict_mode=True, data_prop=True)


def _serialise(model: onnx.ModelProto) -> bytes | None:
    """The model's bytes, or None when protobuf cannot serialise it (a message above 2 GiB)."""
    try:
        return model.SerializeToString(deterministic=True)
    except (EncodeError, ValueError):  # above 2 GiB: upb raises EncodeError, the C++ backend ValueError
        return None


def save_model(model: onnx.ModelProto, out: str | Path, *, inputs: Inputs = (),
               external_above: int = PROTOBUF_LIMIT) -> Path:
    """Serialise ``model`` to ``out`` atomically; never overwrite any path in ``inputs``.

    ``inputs`` are the files and folders the run read, as paths or ``(role, path)``
    pairs. The model is refused (BadModelError, nothing written) when an
    initializer holds NaN/Inf, when it fails ``onnx.checker`` (full check) or when
    onnxruntime cannot load it. Models larger than ``external_above`` bytes
    (default: the 2 GiB protobuf limit) keep their weights in ``<out>.data``
    beside the model.
    """
    inputs = list(inputs)
    out = check_output_path(out, inputs=inputs)
    bad = nonfinite_tensor(model)
    if bad is not None:
        raise BadModelError(f"initializer {bad!r} holds NaN or infinite values (e.g. a weight that overflows "
                            "its type when a parameter is folded into it); model not written", out)
    data = _serialise(model)
    if data is not None and len(data) <= external_above:
        _verify(data, out)
        return atomic_write_bytes(data, out)
    del data  # the external-data path writes its own bytes; do not hold two copies
    data_name = out.name + ".data"
    clash = clashing_input(out.resolve().parent / data_name, inputs)
    if clash:
        raise BadOutputError(f"refusing to overwrite {clash[0]} ({clash[1]}) with the weights file {data_name}",
                             out)
    # saving with external data rewrites the tensors it is given: work on a copy
    copy = onnx.ModelProto()
    copy.CopyFrom(model)
    try:
        staging = tempfile.TemporaryDirectory(prefix=f".{out.name}.", dir=out.resolve().parent)
    except OSError as exc:
        raise BadOutputError(f"cannot write: {os_reason(exc)}", out) from None
    with staging as tmp:
        staged = Path(tmp) / out.name
        try:
            onnx.save_model(copy, str(staged), save_as_external_data=True, all_tensors_to_one_file=True,
                            location=data_name, size_threshold=0)
            _verify(staged, out)
            # weights first, then the model that points at them: a reader never sees a model without its data
            if (Path(tmp) / data_name).exists():  # absent when every tensor is below the threshold
                os.replace(Path(tmp) / data_name, out.resolve().parent / data_name)
            os.replace(staged, out)
        except OSError as exc:
            raise BadOutputError(f"cannot write: {os_reason(exc)}", out) from None
    return out


def _verify(model: bytes | Path, out: Path) -> None:
    """Refuse (BadModelError naming ``out``) a model that fails onnx.checker or does not load in onnxruntime.

    ``model`` is the serialised model, or a staged file whose external data lies beside it.
    """
    from swapper.core.session import ORT_ERRORS, open_session

    try:
        onnx.checker.check_model(model if isinstance(model, bytes) else str(model), full_check=True)
    except (onnx.checker.ValidationError, onnx.shape_inference.InferenceError, ValueError, RuntimeError) as exc:
        raise BadModelError(f"the model to write fails onnx.checker ({first_line(exc)}); not written", out) \
            from None
    try:
        open_session(model, graph_optimization="disabled", what="the model to write")
    except BadModelError as exc:
        raise BadModelError(f"{exc}; not written", out) from None
    except ORT_ERRORS as exc:  # pragma: no cover - open_session maps these
        raise BadModelError(f"onnxruntime cannot load the model to write ({first_line(exc)}); not written", out) \
            from None


def saved_size(path: str | Path) -> int:
    """Bytes of a written model: the .onnx file plus the external data files it names (each counted once)."""
    path = Path(path)
    model = onnx.load(str(path), load_external_data=False)
    files = {path.parent / e.value for t in _external_tensors(model) for e in t.external_data if e.key == "location"}
    return path.stat().st_size + sum(f.stat().st_size for f in files if f.is_file())


def sha256_file(path: str | Path) -> str:
    digest = hashlib.sha256()
    with open_regular(path, BadOutputError) as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            digest.update(chunk)
    return digest.hexdigest()
