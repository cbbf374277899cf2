"""Progress reporting for long work, decoupled from the terminal.

Library code calls ``progress.task(description, total)`` and advances the
returned counter; the CLI passes a rich-backed reporter, the Python API a
silent one by default.
"""
from __future__ import annotations

from contextlib import contextmanager
from typing import Callable, Iterator

Advance = Callable[[int], None]


class Silent:
    """Reports nothing (the default for API calls and tests)."""

    @contextmanager
    def task(self, description: str, total: int | None) -> Iterator[Advance]:
        yield lambda n=1: None


class RichBars:
    """Progress bars on stderr via rich (shipped with typer)."""

    def __init__(self) -> None:
        from rich.console import Console
        from rich.progress import (
            BarColumn,
            MofNCompleteColumn,
            Progress,
            TextColumn,
            TimeElapsedColumn,
        )

        self._progress = Progress(
            TextColumn("{task.description}"),
            BarColumn(),
            MofNCompleteColumn(),
            TimeElapsedColumn(),
            console=Console(stderr=True),
            transient=True,
        )

    @contextmanager
    def task(self, description: str, total: int | None) -> Iterator[Advance]:
        with self._progress:
            task_id = self._progress.add_task(description, total=total)
            yield lambda n=1: self._progress.advance(task_id, n)
            self._progress.remove_task(task_id)
