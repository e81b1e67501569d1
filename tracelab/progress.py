"""Progress bars for long work (ingest, simulate, batch); silent with --quiet or off a TTY."""

from __future__ import annotations

import sys
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Protocol


class Advance(Protocol):
    def __call__(self, amount: float = 1) -> None: ...


def progress_enabled(quiet: bool) -> bool:
    return not quiet and sys.stderr.isatty()


@contextmanager
def progress(description: str, total: float | None, quiet: bool = False) -> Iterator[Advance]:
    """Yield ``advance(amount)``; draws a bar on stderr only when it is a TTY and not quiet."""
    if not progress_enabled(quiet):
        yield lambda amount=1: None
        return
    from rich.progress import (
        BarColumn,
        MofNCompleteColumn,
        Progress,
        TextColumn,
        TimeElapsedColumn,
        TimeRemainingColumn,
    )

    columns = (TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(),
               TimeElapsedColumn(), TimeRemainingColumn())
    with Progress(*columns, transient=True) as bar:
        task = bar.add_task(description, total=total)
        yield lambda amount=1: bar.advance(task, amount)
