"""Progress bars for passes over data: rows per second, parts (files) done, time left."""

from __future__ import annotations

import sys
from types import TracebackType
from typing import Any

from rich.console import Console
from rich.progress import (
    BarColumn,
    Progress,
    TaskID,
    TextColumn,
    TimeElapsedColumn,
    TimeRemainingColumn,
)

__all__ = ["PassProgress", "wants_progress"]


def wants_progress(progress: bool | None) -> bool:
    """Whether to draw bars: as asked, or by default only when stderr is a terminal."""
    if progress is None:
        return sys.stderr.isatty()
    if not isinstance(progress, bool):
        raise TypeError(f"progress must be True, False or None, got {progress!r}")
    return progress


class PassProgress:
    """One bar per pass over a source; a no-op when progress is off.

    Use as a context manager; call :meth:`start` at each pass, :meth:`rows` after each batch
    and :meth:`part_done` after each file.
    """

    def __init__(self, enabled: bool, total_rows: int | None, n_parts: int) -> None:
        self.total_rows = total_rows
        self.n_parts = n_parts
        self._task: TaskID | None = None
        self._parts = 0
        self._progress: Progress | None = None
        if enabled:
            self._progress = Progress(
                TextColumn("[bold]{task.description}"),
                BarColumn(),
                TextColumn("{task.completed:,.0f} rows"),
                TextColumn("{task.fields[speed]}"),
                TextColumn("files {task.fields[parts]}"),
                TimeElapsedColumn(),
                TimeRemainingColumn(),
                console=Console(stderr=True),
                transient=False,
                redirect_stdout=False,
                redirect_stderr=False,
            )

    def __enter__(self) -> PassProgress:
        if self._progress is not None:
            self._progress.start()
        return self

    def __exit__(
        self,
        kind: type[BaseException] | None,
        value: BaseException | None,
        trace: TracebackType | None,
    ) -> None:
        if self._progress is not None:
            self._progress.stop()

    def start(self, description: str) -> None:
        """Begin a new pass."""
        self._parts = 0
        if self._progress is None:
            return
        if self._task is not None:
            self._progress.update(self._task, visible=True)
        self._task = self._progress.add_task(
            description, total=self.total_rows, speed="", parts=f"0/{self.n_parts}"
        )

    def rows(self, n: int) -> None:
        """Count ``n`` more rows of the current pass."""
        if self._progress is None or self._task is None:
            return
        task = self._progress.tasks[-1]
        speed = task.speed
        fields: dict[str, Any] = {"speed": f"{speed:,.0f} rows/s" if speed else ""}
        self._progress.update(self._task, advance=n, **fields)

    def part_done(self) -> None:
        """Count one more file (part) done."""
        self._parts += 1
        if self._progress is not None and self._task is not None:
            self._progress.update(self._task, parts=f"{self._parts}/{self.n_parts}")

    def note(self, message: str) -> None:
        """Print a line above the bars (or nothing when they are off)."""
        if self._progress is not None:
            self._progress.console.print(message)
