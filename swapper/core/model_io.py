"""Load, validate and save ONNX models safely.

``load_model`` turns every way a model file can be broken into a one-line
:class:`BadModelError` naming the file; ``save_model`` writes atomically
(temporary file in the target folder, then rename) and refuses to overwrite
the model it was given.
"""
from __future__ import annotations

import hashlib
import logging
import os
import tempfile
from dataclasses import dataclass
from pathlib import Path

import onnx
from google.protobuf.message import DecodeError, EncodeError

from swapper.core.graph import DEFAULT_DOMAINS, subgraphs
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


@dataclass
class LoadedModel:
    """A validated model with shapes inferred, plus where it came from."""

    model: onnx.ModelProto
    path: Path
    opset: int
    file_bytes: int  # the .onnx file plus any external data files


def default_opset(model: onnx.ModelProto) -> int | None:
    """The version of the default-domain (ai.onnx) opset the model imports, None if it imports none."""
    for entry in model.opset_import:
        if entry.domain in DEFAULT_DOMAINS:
            return entry.version
    return None


def _external_locations(model: onnx.ModelProto) -> list[str]:
    locations = []
    for tensor in onnx.external_data_helper._get_all_tensors(model):
        if tensor.data_location == onnx.TensorProto.EXTERNAL:
            for entry in tensor.external_data:
                if entry.key == "location":
                    locations.append(entry.value)
    return locations


def _check_external_paths(model: onnx.ModelProto, path: Path) -> int:
    """Refuse external-data locations outside the model's folder; return their total size."""
    base = path.parent.resolve()
    total = 0
    for location in sorted(set(_external_locations(model))):
        target = (base / location).resolve()
        if os.path.isabs(location) or not target.is_relative_to(base):
            raise BadModelError(
                f"external data location {location!r} points outside the model's folder (refused)", path
            )
        if not target.is_file():
            raise BadModelError(f"external data file {location!r} is missing", path)
        total += target.stat().st_size
    return total


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
    external_bytes = _check_external_paths(model, path)
    is_large = len(data) + external_bytes > PROTOBUF_LIMIT
    try:
        model = _checked_and_inferred(model, data, path, has_external=external_bytes > 0, is_large=is_large)
    except onnx.checker.ValidationError as exc:
        raise BadModelError(f"invalid graph: {first_line(exc)}", path) from None
    except onnx.shape_inference.InferenceError as exc:
        raise BadModelError(f"shape inference failed: {first_line(exc)}", path) from None
    except (OSError, ValueError) as exc:
        raise BadModelError(f"cannot load: {first_line(exc)}", path) from None
    name_unnamed_nodes(model)
    logger.debug("loaded %s: opset %d, %d nodes", path, opset, len(model.graph.node))
    return LoadedModel(model=model, path=path, opset=opset, file_bytes=len(data) + external_bytes)


def _read(path: Path) -> bytes:
    if not path.exists():
        raise BadModelError("no such file", path)
    if path.is_dir():
        raise BadModelError("is a directory, expected an .onnx file", path)
    try:
        with open(path, "rb") as fh:
            data = fh.read()
    except OSError as exc:
        raise BadModelError(f"cannot read: {exc.strerror or exc}", path) from None
    if not data:
        raise BadModelError("file is empty", path)
    return data


def _parse(data: bytes, path: Path) -> onnx.ModelProto:
    model = onnx.ModelProto()
    try:
        model.ParseFromString(data)
    except (DecodeError, RuntimeError, ValueError) as exc:
        raise BadModelError(f"not an ONNX protobuf or truncated ({type(exc).__name__})", path) from None
    if not model.HasField("graph") or len(model.graph.node) == 0 and len(model.graph.output) == 0:
        raise BadModelError("not an ONNX model (no graph inside)", path)
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
            data = model.SerializeToString()
        onnx.checker.check_model(data)
    return onnx.shape_inference.infer_shapes(data, check_type=True, strict_mode=True, data_prop=True)


def check_output_path(out: str | Path, *, inputs: tuple[str | Path, ...] = ()) -> Path:
    """Fail early (one line) if ``out`` cannot be written or would overwrite an input."""
    out = Path(out)
    for given in inputs:
        if given is not None and Path(given).exists() and out.resolve() == Path(given).resolve():
            raise BadOutputError("refusing to overwrite the input model; choose another output path", out)
    parent = out.resolve().parent
    if not parent.is_dir():
        raise BadOutputError(f"folder {str(parent)!r} does not exist", out)
    if out.is_dir():
        raise BadOutputError("is a directory, expected a file path", out)
    if not os.access(parent, os.W_OK):
        raise BadOutputError(f"folder {str(parent)!r} is not writable", out)
    return out


def atomic_write_bytes(data: bytes, out: str | Path) -> Path:
    """Write ``data`` to ``out`` via a temporary file in the same folder and a rename."""
    out = Path(out)
    fd, tmp = tempfile.mkstemp(prefix=f".{out.name}.", suffix=".tmp", dir=out.resolve().parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, out)
    except OSError as exc:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise BadOutputError(f"cannot write: {exc.strerror or exc}", out) from None
    return out


def _serialise(model: onnx.ModelProto) -> bytes | None:
    """The model's bytes, or None when protobuf cannot serialise it (a message above 2 GiB)."""
    try:
        return model.SerializeToString(deterministic=True)
    except (EncodeError, ValueError):  # above 2 GiB: upb raises EncodeError, the C++ backend ValueError
        return None


def save_model(model: onnx.ModelProto, out: str | Path, *, inputs: tuple[str | Path, ...] = (),
               external_above: int = PROTOBUF_LIMIT) -> Path:
    """Serialise ``model`` to ``out`` atomically; never overwrite any path in ``inputs``.

    Models larger than ``external_above`` bytes (default: the 2 GiB protobuf
    limit) keep their weights in ``<out>.data`` beside the model.
    """
    out = check_output_path(out, inputs=inputs)
    data = _serialise(model)
    if data is not None and len(data) <= external_above:
        return atomic_write_bytes(data, out)
    del data  # the external-data path writes its own bytes; do not hold two copies
    data_name = out.name + ".data"
    for given in inputs:
        if given is not None and (out.resolve().parent / data_name) == Path(given).resolve():
            raise BadOutputError(f"refusing to overwrite the input file {data_name}", out)
    # saving with external data rewrites the tensors it is given: work on a copy
    copy = onnx.ModelProto()
    copy.CopyFrom(model)
    with tempfile.TemporaryDirectory(prefix=f".{out.name}.", dir=out.resolve().parent) as tmp:
        staged = Path(tmp) / out.name
        try:
            onnx.save_model(copy, str(staged), save_as_external_data=True, all_tensors_to_one_file=True,
                            location=data_name, size_threshold=0)
            # weights first, then the model that points at them: a reader never sees a model without its data
            if (Path(tmp) / data_name).exists():  # absent when every tensor is below the threshold
                os.replace(Path(tmp) / data_name, out.resolve().parent / data_name)
            os.replace(staged, out)
        except OSError as exc:
            raise BadOutputError(f"cannot write: {exc.strerror or exc}", out) from None
    return out


def sha256_file(path: str | Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            digest.update(chunk)
    return digest.hexdigest()
