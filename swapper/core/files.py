"""Opening inputs and writing outputs without losing anything.

Inputs: :func:`open_regular` opens a path only when it is a regular file
(FIFOs, devices and sockets are refused without blocking: the file is opened
non-blocking and checked with ``fstat`` before a byte is read). Outputs:
:func:`check_output_path` and :func:`check_report_dir` refuse, before any
work, a location that cannot be written or that is (or resolves to, through
symbolic links, hard links or ``..``) a file the run reads;
:func:`atomic_write_bytes` writes through a temporary file and a rename and
gives the file the permissions the umask gives any new file.

Every failure is one :class:`~swapper.errors.SwapperError` line naming the path.
"""
from __future__ import annotations

import logging
import os
import stat
import tempfile
import threading
from collections.abc import Iterable
from pathlib import Path

from swapper.errors import BadOutputError, SwapperError

logger = logging.getLogger(__name__)

# Linux limits (limits.h): a path of at most PATH_MAX bytes, each name at most NAME_MAX bytes.
PATH_MAX = 4096
NAME_MAX = 255
REPORT_FILES = ("report.json", "report.html")

_UMASK_LOCK = threading.Lock()


def path_problem(path: str | os.PathLike) -> str | None:
    """Why ``path`` cannot name a file on this system (NUL byte, too long), or None."""
    text = os.fsencode(path)
    if b"\0" in text:
        return "the path holds a NUL byte"
    if len(text) >= PATH_MAX:
        return f"the path is {len(text)} bytes long (the limit is {PATH_MAX - 1})"
    if any(len(part) > NAME_MAX for part in text.split(b"/")):
        return f"a name in the path is longer than {NAME_MAX} bytes"
    return None


def os_reason(exc: BaseException) -> str:
    """A short cause for an OSError/ValueError/RuntimeError raised while probing a path."""
    if isinstance(exc, OSError):
        return exc.strerror or str(exc)
    if isinstance(exc, RuntimeError):  # Path.resolve on a symlink loop (Python 3.11)
        return "symbolic link loop"
    return str(exc)


def open_regular(path: str | Path, error: type[SwapperError], *, what: str = "file"):
    """Open ``path`` for binary reading if it is a regular file (symbolic links followed).

    Raises ``error`` (one line naming the path) when it is missing, a folder, a
    FIFO, device or socket, or cannot be opened. The open is non-blocking, so a
    FIFO without a writer is refused instead of waiting.
    """
    problem = path_problem(path)
    if problem:
        raise error(problem, path)
    try:
        fd = os.open(path, os.O_RDONLY | os.O_NONBLOCK | getattr(os, "O_CLOEXEC", 0))
    except FileNotFoundError:
        raise error("no such file", path) from None
    except IsADirectoryError:
        raise error(f"is a directory, expected a {what}", path) from None
    except (OSError, ValueError) as exc:
        raise error(f"cannot read: {os_reason(exc)}", path) from None
    try:
        mode = os.fstat(fd).st_mode
        if stat.S_ISDIR(mode):
            raise error(f"is a directory, expected a {what}", path)
        if not stat.S_ISREG(mode):
            raise error("not a regular file (a FIFO, device or socket); refused", path)
        os.set_blocking(fd, True)
        return os.fdopen(fd, "rb")
    except BaseException:
        os.close(fd)
        raise


def file_identity(path: str | Path) -> tuple[int, int] | None:
    """(device, inode) of the file ``path`` names (links followed), None when it does not exist."""
    try:
        st = os.stat(path)
    except (OSError, ValueError):
        return None
    return st.st_dev, st.st_ino


def _resolved(path: str | Path) -> Path | None:
    try:
        return Path(path).resolve()
    except (OSError, ValueError, RuntimeError):
        return None


Inputs = Iterable["tuple[str, str | os.PathLike | None] | str | os.PathLike | None"]


def named_inputs(inputs: Inputs) -> list[tuple[str, Path]]:
    """``inputs`` as ``(role, path)`` pairs: a bare path is "an input file"; None entries are dropped."""
    pairs = []
    for item in inputs:
        role, given = item if isinstance(item, tuple) else ("an input file", item)
        if given is not None:
            pairs.append((role, Path(given)))
    return pairs


def clashing_input(out: str | Path, inputs: Inputs) -> tuple[str, Path] | None:
    """The first ``(role, path)`` of ``inputs`` that writing ``out`` would overwrite, else None.

    ``inputs`` are ``(role, path)`` pairs or bare paths (:func:`named_inputs`). An
    output clashes with an input file when both name the same file (same resolved
    path, or same device and inode: symbolic and hard links), and with an input
    folder when it lies inside it (a folder's files are all read).
    """
    out_real = _resolved(out)
    out_id = file_identity(out)
    for role, given in named_inputs(inputs):
        if given is None:
            continue
        given_real = _resolved(given)
        if given_real is None:
            continue
        if out_real is not None and (out_real == given_real or given_real in out_real.parents):
            return role, Path(given)
        if out_id is not None and out_id == file_identity(given):
            return role, Path(given)
    return None


def _probe_writable(folder: Path, shown: str | Path) -> None:
    """Create and remove a temporary file in ``folder``: the only honest test (root ignores modes, /proc lies)."""
    try:
        fd, tmp = tempfile.mkstemp(prefix=".swapper-probe.", dir=folder)
    except (OSError, ValueError) as exc:
        raise BadOutputError(f"cannot write in folder {str(folder)!r}: {os_reason(exc)}", shown) from None
    os.close(fd)
    try:
        os.unlink(tmp)
    except OSError:
        logger.debug("could not remove the probe file %s", tmp)


def check_output_path(out: str | Path, *, inputs: Inputs = ()) -> Path:
    """Fail early (one line) if ``out`` cannot be written as a file or would overwrite an input.

    ``inputs`` are ``(role, path)`` pairs ("the input model", "the calibration set"...):
    files and folders the run reads.
    """
    out = Path(out)
    problem = path_problem(out)
    if problem:
        raise BadOutputError(problem, out)
    clash = clashing_input(out, inputs)
    if clash:
        role, given = clash
        where = "names that file" if _resolved(out) == _resolved(given) or file_identity(out) == file_identity(given) \
            else "lies inside that folder"
        raise BadOutputError(f"refusing to overwrite {role} ({given}): the output path {where}; "
                             "choose another output path", out)
    try:
        if out.is_dir():
            raise BadOutputError("is a folder, expected a file path", out)
        parent = out.resolve().parent
        if not parent.exists():
            raise BadOutputError(f"folder {str(parent)!r} does not exist", out)
        if not parent.is_dir():
            raise BadOutputError(f"{str(parent)!r} is not a folder", out)
    except (OSError, ValueError, RuntimeError) as exc:
        raise BadOutputError(f"cannot write here: {os_reason(exc)}", out) from None
    _probe_writable(parent, out)
    return out


def check_report_dir(folder: str | Path, *, inputs: Inputs = ()) -> Path:
    """Fail early (one line) if report files cannot be written into ``folder`` (created later if missing).

    The report files (report.json, report.html) must not be any of ``inputs``, nor lie inside an
    input folder.
    """
    folder = Path(folder)
    inputs = named_inputs(inputs)
    problem = path_problem(folder / REPORT_FILES[0])
    if problem:
        raise BadOutputError(problem, folder)
    for name in REPORT_FILES:
        clash = clashing_input(folder / name, inputs)
        if clash:
            raise BadOutputError(f"refusing to overwrite {clash[0]} ({clash[1]}) with {name}", folder)
    try:
        existing = folder
        while not existing.exists():
            if existing.is_symlink():
                raise BadOutputError("is a dangling symbolic link", existing)
            existing = existing.parent
        if not existing.is_dir():
            raise BadOutputError(f"cannot create the report folder: {str(existing)!r} is not a folder", folder)
    except (OSError, ValueError, RuntimeError) as exc:
        raise BadOutputError(f"cannot create the report folder: {os_reason(exc)}", folder) from None
    _probe_writable(existing, folder)
    return folder


def ensure_folder(folder: str | Path, what: str = "output folder") -> Path:
    """Create ``folder`` (and its parents) unless it exists; BadOutputError (one line) when it cannot be."""
    folder = Path(folder)
    problem = path_problem(folder)
    if problem:
        raise BadOutputError(problem, folder)
    try:
        if folder.exists() and not folder.is_dir():
            raise BadOutputError(f"is a file, expected a folder ({what})", folder)
        folder.mkdir(parents=True, exist_ok=True)
    except (OSError, ValueError, RuntimeError) as exc:
        raise BadOutputError(f"cannot create the {what}: {os_reason(exc)}", folder) from None
    return folder


def current_umask() -> int:
    """The process umask (read from /proc where possible; else set and restored under a lock)."""
    try:
        with open("/proc/self/status", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("Umask:"):
                    return int(line.split()[1], 8)
    except (OSError, ValueError):
        pass
    with _UMASK_LOCK:
        mask = os.umask(0o022)
        os.umask(mask)
    return mask


def atomic_write_bytes(data: bytes, out: str | Path) -> Path:
    """Write ``data`` to ``out`` via a temporary file in the same folder and a rename.

    The file gets the permissions an ordinary new file gets (0666 less the umask),
    not the 0600 of a temporary file. Raises BadOutputError (one line) on failure.
    """
    out = Path(out)
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{out.name}.", suffix=".tmp", dir=out.resolve().parent)
    except (OSError, ValueError, RuntimeError) as exc:
        raise BadOutputError(f"cannot write: {os_reason(exc)}", out) from None
    try:
        with os.fdopen(fd, "wb") as fh:
            os.fchmod(fh.fileno(), 0o666 & ~current_umask())
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, out)
    except OSError as exc:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise BadOutputError(f"cannot write: {os_reason(exc)}", out) from None
    return out
