"""One exception per broken promise.

Every error a user can cause derives from :class:`SwapperError`. The CLI prints
its message on one line and exits with ``exit_code`` (2 = bad input or usage);
anything else is a bug and keeps its traceback.
"""
from __future__ import annotations

from pathlib import Path


def first_line(exc: BaseException) -> str:
    """The first non-empty line of ``str(exc)`` (library errors can span pages), else the type name."""
    for line in str(exc).splitlines():
        if line.strip():
            return line.strip()
    return type(exc).__name__


class SwapperError(Exception):
    """Base class: a user-facing failure with a one-line message."""

    exit_code = 2

    def __init__(self, message: str, path: str | Path | None = None):
        self.path = str(path) if path is not None else None
        text = f"{self.path}: {message}" if self.path else message
        super().__init__(" ".join(text.split()))  # always one line


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

    exit_code = 1
