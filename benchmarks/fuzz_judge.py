"""Judge one run of the swapper CLI against the README's promises.

Classes (one per run, the first that applies in PRECEDENCE):
  OK            exit 0/1/2 (3 with a gate), no traceback; exit 2/3 print one stderr line; exit 1 only for a
                gate rejection
  TRACEBACK     "Traceback" or an exception summary line in the output
  HANG          still running at the timeout (killed)
  CRASH         killed by a signal (segfault, abort, ...)
  WRONG_EXIT    exit code outside {0,1,2,3} (4 = internal error); exit 1 that is not a gate rejection; exit 3
                without a gate; exit 0/1 where the only safe answer is exit 2 (writing would destroy an input)
  MULTILINE     exit 2, 3 or 4 with more than one stderr line
  INPUT_CHANGED a file that existed before the run changed or vanished (sha256)
Softer promises (the one line names a file, no exception names in it, no temporary files left, a written
model passes onnx.checker) become notes. A failure's signature is command | class | exception: first line.
"""
from __future__ import annotations

import hashlib
import os
import re
import signal
import stat
from dataclasses import dataclass
from pathlib import Path

import onnx

CLASSES = ("OK", "TRACEBACK", "HANG", "CRASH", "WRONG_EXIT", "MULTILINE", "INPUT_CHANGED")
# precedence when a run breaks several promises: the class reported is the first that applies
PRECEDENCE = ("HANG", "CRASH", "INPUT_CHANGED", "TRACEBACK", "WRONG_EXIT", "MULTILINE")
EXC_SUMMARY = re.compile(r"^(?:[A-Za-z_]\w*\.)*([A-Z]\w*(?:Error|Exception))(?::\s|$)", re.M)
EXC_NAME = re.compile(r"\b[A-Z]\w*(?:Error|Exception)\b")
# written into TMPDIR by this machine's Python start-up (a session id), not by swapper
TMP_IGNORED = {".ses"}
FRAME = re.compile(r'File "([^"]+)", line (\d+), in (\S+)')


@dataclass
class Case:
    id: str
    kind: str  # model | data | option
    mutation: str
    command: str  # the label used in tables
    argv: list[str]
    timeout: float
    gate: bool = False  # exit 1 (gate rejection) is a correct answer
    data_loss: bool = False  # only exit 2 is correct
    output: str | None = None
    may_change: tuple[str, ...] = ()
    base: str = ""
    output_existed: bool = False  # set just before the run


def snapshot(work: Path) -> dict[str, str]:
    """sha256 of every regular file under ``work`` (symlinks recorded by target, special files by kind)."""
    found = {}
    for folder, dirs, files in os.walk(work):
        for name in dirs + files:
            path = Path(folder) / name
            rel = str(path.relative_to(work))
            if rel.split(os.sep)[0] == "tmp":
                continue
            st = os.lstat(path)
            if stat.S_ISLNK(st.st_mode):
                found[rel] = "link:" + os.readlink(path)
            elif stat.S_ISREG(st.st_mode):
                with open(path, "rb") as fh:
                    found[rel] = hashlib.sha256(fh.read()).hexdigest()
            elif not stat.S_ISDIR(st.st_mode):
                found[rel] = f"special:{stat.S_IFMT(st.st_mode)}"
    return found


def _exists(path: Path) -> bool:
    """Path.exists that answers False for names the system refuses (too long, NUL) instead of raising."""
    try:
        return path.exists()
    except (OSError, ValueError):
        return False


def _traceback_parts(text: str) -> tuple[str, str, str]:
    """(exception type, its first message line, innermost swapper frame) of the last traceback in ``text``."""
    start = text.rfind("Traceback (most recent call last)")
    tail = text[start:] if start >= 0 else text
    frames = FRAME.findall(tail)
    ours = [f for f in frames if "/swapper/" in f[0]]
    where = ""
    if ours:
        path, line, fn = ours[-1]
        where = f"{path[path.rfind('/swapper/') + 1:]}:{fn}:{line}"
    exc_type, message = "", ""
    for line in tail.splitlines():
        m = re.match(r"^((?:[A-Za-z_]\w*\.)*[A-Za-z_]\w*)(?::\s?(.*))?$", line)
        if m and not line.startswith((" ", "Traceback", "During handling")) and line.strip():
            exc_type, message = m.group(1).split(".")[-1], (m.group(2) or "").strip()
    return exc_type, message, where


def _norm(text: str, work: Path) -> str:
    text = text.replace(str(work), "<case>").replace(str(work.parent), "<root>")
    text = re.sub(r"'[^']{40,}'", "'<long>'", text)
    text = re.sub(r"0x[0-9a-f]+", "<hex>", text)
    text = re.sub(r"\.[A-Za-z0-9_]{8}\.tmp", ".<random>.tmp", text)  # mkstemp names
    text = re.sub(r"\d+", "N", text)
    return text[:160]


def classify(case: Case, run: dict, before: dict, after: dict, work: Path) -> dict:
    """Apply the promises; return flags, the primary class, notes and a failure signature."""
    rc, stdout, stderr = run["rc"], run["stdout"], run["stderr"]
    both = stdout + "\n" + stderr
    err_lines = [line for line in stderr.splitlines() if line.strip()]
    flags, notes = set(), []
    if run["timed_out"]:
        flags.add("HANG")
    elif rc < 0:
        flags.add("CRASH")
    if "Traceback (most recent call last)" in both or EXC_SUMMARY.search(stderr):
        flags.add("TRACEBACK")
    if not run["timed_out"] and rc >= 0:
        if rc not in (0, 1, 2, 3):  # 4 is the internal-error code: a bug, never a right answer
            flags.add("WRONG_EXIT")
        if rc == 3 and not case.gate:  # "cannot judge" needs a gate to judge for
            flags.add("WRONG_EXIT")
        if rc == 1 and not (case.gate and "REJECTED" in stdout) and "TRACEBACK" not in flags:
            flags.add("WRONG_EXIT")
        if case.data_loss and rc in (0, 1):
            flags.add("WRONG_EXIT")
        if rc in (2, 3, 4) and len(err_lines) > 1 and "TRACEBACK" not in flags:
            flags.add("MULTILINE")
    changed = sorted(k for k, v in before.items() if k not in case.may_change and after.get(k) != v)
    if changed:
        flags.add("INPUT_CHANGED")
        notes.append("changed: " + ", ".join(changed[:5]))
    # softer promises, reported as notes
    if rc == 2 and len(err_lines) == 1 and "TRACEBACK" not in flags:
        line = err_lines[0]
        if EXC_NAME.search(line):
            notes.append("exception name in the one-line message")
        inputs = [a for a in case.argv[1:] if not a.startswith("-")]
        if inputs and not any(a and (a in line or Path(a).name in line) for a in inputs):
            notes.append("one-line message names no file")
    if case.output and "HANG" not in flags:
        out = work / case.output
        if rc == 2 and _exists(out) and not case.output_existed:
            notes.append("output written although exit 2")
        if rc == 0 and case.command.startswith("swap") and not case.data_loss and "nothing to swap" not in stdout:
            if not _exists(out):
                notes.append("exit 0 but no output written")
            elif out.is_file():
                try:
                    onnx.checker.check_model(onnx.load_model_from_string(out.read_bytes()), full_check=True)
                except Exception as exc:  # noqa: BLE001 - any failure is the finding
                    notes.append(f"written model fails onnx.checker: {type(exc).__name__}")
    leftovers = [k for k in after if k not in before and k.endswith(".tmp")]
    tmp = work / "tmp"
    tmp_left = [p.name for p in tmp.iterdir() if p.name not in TMP_IGNORED] if tmp.is_dir() else []
    if leftovers or tmp_left:
        notes.append("temporary files left: " + ", ".join((leftovers + tmp_left)[:3]))
    if any("Warning:" in line for line in err_lines):
        notes.append("warning on stderr")
    cls = next((c for c in PRECEDENCE if c in flags), "OK")
    exc_type, message, where = _traceback_parts(both) if "TRACEBACK" in flags else ("", "", "")
    if cls == "OK":
        signature = ""
    elif cls == "TRACEBACK":
        signature = f"{exc_type}: {_norm(message, work)}"
    elif cls == "HANG":
        signature = f"timeout {case.timeout:.0f}s ({case.mutation.split('+')[0]})"
    elif cls == "CRASH":
        signature = f"signal {signal.Signals(-rc).name}: {_norm(err_lines[-1] if err_lines else '', work)}"
    elif cls == "INPUT_CHANGED":
        signature = f"exit {rc}; {notes[0]}"
    elif cls == "WRONG_EXIT":
        signature = f"exit {rc}: {_norm(err_lines[0] if err_lines else stdout.strip()[-120:], work)}"
    else:
        signature = f"{len(err_lines)} lines: {_norm(err_lines[0], work)}"
    return {"class": cls, "flags": sorted(flags), "notes": notes, "exc_type": exc_type, "exc_line": message[:300],
            "where": where, "signature": f"{case.command} | {cls} | {signature}" if signature else ""}
