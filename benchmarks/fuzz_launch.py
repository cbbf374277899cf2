"""Run one CLI invocation for benchmarks/fuzz.py, with a timeout and an address-space limit.

Two launchers, same contract ``run(argv, cwd, env, timeout) -> {rc, timed_out, seconds, stdout, stderr}``:

- ``exec``: a fresh interpreter per run, ``python -c "from swapper.cli import app; app()" ARGS`` (what a user
  runs; 1.5-2 s of imports each).
- ``fork``: one server per worker imports ``from swapper.cli import app`` once, then forks a child per run
  that sets its own session, limits, folder, environment, stdio and argv, calls ``app()`` and exits the way
  the interpreter would (SystemExit code, traceback + 1 for an uncaught exception, atexit handlers run).
  Each run is still its own process; only the import cost is shared. Findings are confirmed with ``exec``.

rc follows subprocess: negative = killed by that signal. A run still going at ``timeout`` has its process
group killed (only the group this run started).
"""
from __future__ import annotations

import json
import os
import resource
import select
import signal
import subprocess
import sys
import time
from pathlib import Path

CLI = [sys.executable, "-c", "from swapper.cli import app; app()"]

SERVER = r'''
import atexit, json, os, resource, sys, tempfile, traceback
from swapper.cli import app
channel = os.fdopen(os.dup(1), "w", buffering=1)
null = os.open(os.devnull, os.O_RDONLY)
for line in sys.stdin:
    req = json.loads(line)
    sys.stdout.flush(); sys.stderr.flush()
    pid = os.fork()
    if pid == 0:
        code = 70
        try:
            os.setsid()
            os.close(channel.fileno())
            resource.setrlimit(resource.RLIMIT_AS, (req["mem"], req["mem"]))
            resource.setrlimit(resource.RLIMIT_CORE, (0, 0))
            os.chdir(req["cwd"])
            os.environ.update(req["env"])
            tempfile.tempdir = None
            flags = os.O_WRONLY | os.O_CREAT | os.O_TRUNC
            os.dup2(null, 0)
            os.dup2(os.open(req["stdout"], flags, 0o644), 1)
            os.dup2(os.open(req["stderr"], flags, 0o644), 2)
            sys.argv = ["-c"] + req["argv"]
            try:
                app()
                code = 0
            except SystemExit as exc:
                if exc.code is None or isinstance(exc.code, int):
                    code = exc.code or 0
                else:
                    print(exc.code, file=sys.stderr)
                    code = 1
            except BaseException:
                traceback.print_exc()
                code = 1
            atexit._run_exitfuncs()
            sys.stdout.flush(); sys.stderr.flush()
        finally:
            os._exit(code)
    channel.write(json.dumps({"pid": pid}) + "\n")
    _, status = os.waitpid(pid, 0)
    channel.write(json.dumps({"rc": os.waitstatus_to_exitcode(status)}) + "\n")
'''


def _limits(mem_bytes: int):
    def apply() -> None:
        resource.setrlimit(resource.RLIMIT_AS, (mem_bytes, mem_bytes))
        resource.setrlimit(resource.RLIMIT_CORE, (0, 0))
    return apply


def _kill_group(pid: int) -> None:
    try:
        os.killpg(pid, signal.SIGKILL)
    except ProcessLookupError:
        pass


def _read(path: Path) -> str:
    text = path.read_bytes()[: 1 << 20].decode("utf-8", "replace")
    path.unlink()
    return text


class ExecLauncher:
    def __init__(self, env: dict, mem_bytes: int):
        self.env, self.mem_bytes = env, mem_bytes

    def run(self, argv: list[str], cwd: Path, env: dict, timeout: float, out: Path, err: Path) -> dict:
        t0 = time.monotonic()
        with open(out, "wb") as fo, open(err, "wb") as fe:
            proc = subprocess.Popen(CLI + argv, cwd=cwd, stdin=subprocess.DEVNULL, stdout=fo, stderr=fe,
                                    env={**self.env, **env}, start_new_session=True,
                                    preexec_fn=_limits(self.mem_bytes))
            try:
                rc, timed_out = proc.wait(timeout=timeout), False
            except subprocess.TimeoutExpired:
                _kill_group(proc.pid)  # the session this run started
                rc, timed_out = proc.wait(), True
        return {"rc": rc, "timed_out": timed_out, "seconds": round(time.monotonic() - t0, 2),
                "stdout": _read(out), "stderr": _read(err)}


class ForkLauncher:
    def __init__(self, env: dict, mem_bytes: int):
        self.env, self.mem_bytes = env, mem_bytes
        self.server: subprocess.Popen | None = None
        self._buf = b""

    def _start(self) -> None:
        self.server = subprocess.Popen([sys.executable, "-c", SERVER], stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                                       env=self.env, bufsize=0)
        self._buf = b""

    def _reply(self, timeout: float | None) -> dict | None:
        """The server's next JSON line, or None at the timeout (unbuffered, so select sees every byte)."""
        deadline = None if timeout is None else time.monotonic() + timeout
        fd = self.server.stdout.fileno()
        while b"\n" not in self._buf:
            left = None if deadline is None else max(0.0, deadline - time.monotonic())
            ready, _, _ = select.select([fd], [], [], left)
            if not ready:
                return None
            chunk = os.read(fd, 4096)
            if not chunk:
                raise EOFError("fork server stopped")
            self._buf += chunk
        line, self._buf = self._buf.split(b"\n", 1)
        return json.loads(line)

    def run(self, argv: list[str], cwd: Path, env: dict, timeout: float, out: Path, err: Path) -> dict:
        if self.server is None or self.server.poll() is not None:
            self._start()
        request = {"argv": argv, "cwd": str(cwd), "env": env, "mem": self.mem_bytes, "stdout": str(out),
                   "stderr": str(err)}
        t0 = time.monotonic()
        self.server.stdin.write((json.dumps(request) + "\n").encode())
        pid = self._reply(60)["pid"]
        reply = self._reply(max(0.0, timeout - (time.monotonic() - t0)))
        timed_out = reply is None
        if timed_out:
            _kill_group(pid)  # the child made its own session; kill only that group
            reply = self._reply(None)
        return {"rc": reply["rc"], "timed_out": timed_out, "seconds": round(time.monotonic() - t0, 2),
                "stdout": _read(out), "stderr": _read(err)}

    def close(self) -> None:
        if self.server is not None:
            self.server.stdin.close()
            self.server.wait(timeout=30)
