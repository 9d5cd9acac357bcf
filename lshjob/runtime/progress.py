"""Progress display: rich bars on a terminal, silent under --quiet or when not a TTY."""

from __future__ import annotations

import sys
from collections.abc import Iterator
from contextlib import contextmanager

from rich.console import Console
from rich.progress import BarColumn, Progress, TextColumn, TimeElapsedColumn


class StageProgress:
    """One bar per stage. ``enabled=None`` shows bars only when stderr is a terminal."""

    def __init__(self, enabled: bool | None = None) -> None:
        self.enabled = sys.stderr.isatty() if enabled is None else enabled
        self._progress: Progress | None = None

    def __enter__(self) -> StageProgress:
        if self.enabled:
            self._progress = Progress(
                TextColumn("{task.description:<10}"),
                BarColumn(),
                TextColumn("{task.completed}/{task.total}"),
                TimeElapsedColumn(),
                console=Console(stderr=True),
                transient=False,
            )
            self._progress.start()
        return self

    def __exit__(self, *exc) -> None:
        if self._progress is not None:
            self._progress.stop()

    @contextmanager
    def stage(self, name: str, total: int = 1) -> Iterator[_Task]:
        task = _Task(self._progress, name, total)
        try:
            yield task
        finally:
            task.finish()


class _Task:
    def __init__(self, progress: Progress | None, name: str, total: int) -> None:
        self._progress = progress
        self._total = total
        self._id = progress.add_task(name, total=total) if progress is not None else None

    def advance(self, steps: int = 1) -> None:
        if self._progress is not None:
            self._progress.advance(self._id, steps)

    def finish(self) -> None:
        if self._progress is not None:
            self._progress.update(self._id, completed=self._total)


QUIET = StageProgress(enabled=False)
