"""One exception per broken promise.

Every error a user can cause derives from :class:`SwapperError`. The CLI prints
its message on one line and exits with ``exit_code``; anything else is a bug: one
line and exit 4 (the traceback with ``--verbose``). The exit codes, defined here and nowhere else:

- 0: done, or the gate approved the candidate;
- 1: the gate rejected the candidate (:data:`EXIT_REJECTED`; nothing else exits 1);
- 2: bad input or usage (:class:`SwapperError` and most subclasses);
- 3: the validation data cannot judge this model (:class:`CannotJudge`): a figure the
  rule needs is missing (no labels for top-1, no float output to compare, ...);
- 4: an internal error (:data:`EXIT_INTERNAL`): an exception that is not a SwapperError, i.e. a
  bug in swapper or a library. The command line prints one line and a pointer to ``--verbose``,
  which shows the traceback; never 1, so a bug is never read as a rejection.
"""
from __future__ import annotations

from pathlib import Path


def first_line(exc: BaseException) -> str:
    """The first non-empty line of ``str(exc)`` (library errors can span pages), else the type name."""
    for line in str(exc).splitlines():
        if line.strip():
            return line.strip()
    return type(exc).__name__


EXIT_OK = 0
EXIT_REJECTED = 1
EXIT_BAD_INPUT = 2
EXIT_CANNOT_JUDGE = 3
EXIT_INTERNAL = 4


class SwapperError(Exception):
    """Base class: a user-facing failure with a one-line message."""

    exit_code = EXIT_BAD_INPUT
    label = "error"  # what the CLI prints before the message

    def __init__(self, message: str, path: str | Path | None = None):
        self.path = str(path) if path is not None else None
        text = f"{self.path}: {message}" if self.path else message
        super().__init__(" ".join(text.split()))  # always one line

    def naming(self, path: str | Path | None) -> "SwapperError":
        """This error, its message led by ``path`` when it names no file yet (the README promises the file)."""
        if self.path is None and path is not None:
            self.path = str(path)
            self.args = (" ".join(f"{self.path}: {self.args[0] if self.args else ''}".split()),)
        return self


class BadModelError(SwapperError):
    """The model file is missing, unreadable, corrupt, invalid or unsupported."""


class BadDataError(SwapperError):
    """A calibration or validation file is missing, malformed or does not fit the model."""


class BadOutputError(SwapperError):
    """An output path cannot be written (missing or read-only folder, or it is the input model)."""


class UsageError(SwapperError):
    """An option names something that does not exist (a function, a site id, ...)."""


class GateRejected(SwapperError):
    """The candidate failed the accuracy budget. Exit code 1, so CI can tell it from bad input."""

    exit_code = EXIT_REJECTED


class CannotJudge(SwapperError):
    """The validation data or the model's outputs give the gate nothing to decide on.

    Not a rejection (the candidate may be fine) and not malformed input: the message
    says which figure is missing and which option or array would supply it. Exit code 3.
    """

    exit_code = EXIT_CANNOT_JUDGE
    label = "cannot judge"
