"""The command line's outer layer: every way a command ends becomes one exit code and at most one line.

Transformation: a command's outcome -> (exit code, stderr). The commands map
user errors (SwapperError) to their codes themselves; this layer takes what is
left. Usage errors found while parsing options (missing option, bad value,
unknown option) print one line ``error: <message>`` and exit 2, without click's
boxed usage panel. Any other exception is a bug: one line naming the exception
and pointing at ``--verbose`` (which prints the traceback first), exit 4
(swapper/errors.py). Logging goes to stderr: swapper's own warnings, plus, with
``--verbose``, every library's records and Python warnings; without it, library
log lines (onnxruntime's quantizer logs through the root logger) and numpy's
RuntimeWarnings stay out of the one-line promise.
"""
from __future__ import annotations

import logging
import signal
import sys
import threading
import traceback

from rich.console import Console
from rich.text import Text
from typer.core import TyperGroup

from swapper.errors import EXIT_BAD_INPUT, EXIT_INTERNAL, first_line

logger = logging.getLogger(__name__)

EXIT_INTERRUPTED = 130  # 128 + SIGINT, the shell's convention
EXIT_TERMINATED = 143  # 128 + SIGTERM


class _State:
    verbose = False


class _Stderr(logging.Handler):
    """Writes records to whatever ``sys.stderr`` is now (test runners swap it per invocation)."""

    def emit(self, record: logging.LogRecord) -> None:
        try:
            sys.stderr.write(self.format(record) + "\n")
        except Exception:  # noqa: BLE001 - logging must never end a command
            self.handleError(record)


class _OwnRecords(logging.Filter):
    """Without --verbose: only swapper's own records (warnings and above) reach the terminal."""

    def filter(self, record: logging.LogRecord) -> bool:
        return _State.verbose or record.name == "swapper" or record.name.startswith("swapper.")


_HANDLER = _Stderr()
_HANDLER.setFormatter(logging.Formatter("%(name)s: %(message)s"))
_HANDLER.addFilter(_OwnRecords())


def configure_logging(verbose: bool) -> None:
    """Route logging (and Python warnings) to stderr for one command; ``verbose`` shows everything at DEBUG."""
    _State.verbose = verbose
    root = logging.getLogger()
    if _HANDLER not in root.handlers:
        root.addHandler(_HANDLER)
    root.setLevel(logging.DEBUG if verbose else logging.WARNING)
    _HANDLER.setLevel(logging.DEBUG if verbose else logging.WARNING)
    logging.captureWarnings(True)  # warnings become "py.warnings" records: shown with --verbose only


def _print(line: Text | str) -> None:
    Console(stderr=True, soft_wrap=True, markup=False, highlight=False).print(line)


def _usage_line(exc: Exception) -> str:
    message = exc.format_message() if hasattr(exc, "format_message") else str(exc)
    return " ".join(message.split()) or type(exc).__name__


def _is_click_error(exc: BaseException) -> bool:
    """A usage error raised by the option parser (click's ClickException family, bundled with typer)."""
    return hasattr(exc, "exit_code") and hasattr(exc, "format_message") and hasattr(exc, "show")


def run_guarded(command) -> int:
    """Run ``command()`` (the parser and the command) and return its exit code; print at most one line."""
    _State.verbose = False
    try:
        code = command()
    except KeyboardInterrupt:
        _print(Text.assemble(("interrupted", "bold red")))
        return EXIT_INTERRUPTED
    except Exception as exc:  # noqa: BLE001 - this is the guard
        if type(exc).__name__ == "NoArgsIsHelpError":  # the help text was printed when it was raised
            return EXIT_BAD_INPUT
        if type(exc).__name__ == "Abort":
            _print(Text.assemble(("interrupted", "bold red")))
            return EXIT_INTERRUPTED
        if _is_click_error(exc):
            _print(Text.assemble(("error:", "bold red"), " ", _usage_line(exc)))
            return EXIT_BAD_INPUT
        if _State.verbose:
            traceback.print_exc(file=sys.stderr)
        _print(Text.assemble(("internal error:", "bold red"), " ",
                             f"{type(exc).__name__}: {first_line(exc)} (a bug in swapper; "
                             + ("the traceback is above)" if _State.verbose else "run again with --verbose for the "
                                "traceback)")))
        return EXIT_INTERNAL
    if code is None:
        return 0
    return code if isinstance(code, int) else EXIT_INTERNAL


def _terminate(signum, frame) -> None:
    # SystemExit unwinds the stack, so `with` blocks and finalizers remove the spill folders and temporary
    # files a killed run would otherwise leave in TMPDIR
    raise SystemExit(EXIT_TERMINATED)


class OneLineGroup(TyperGroup):
    """The typer group of ``swapper``: runs every invocation (also CliRunner's) through :func:`run_guarded`."""

    def main(self, args=None, prog_name=None, complete_var=None, standalone_mode=True, **extra):
        def command():
            return super(OneLineGroup, self).main(args=args, prog_name=prog_name, complete_var=complete_var,
                                                  standalone_mode=False, **extra)

        previous = None
        if threading.current_thread() is threading.main_thread():
            previous = signal.signal(signal.SIGTERM, _terminate)
        try:
            code = run_guarded(command)
        finally:
            if previous is not None:
                signal.signal(signal.SIGTERM, previous)
        if standalone_mode:
            sys.exit(code)
        return code
