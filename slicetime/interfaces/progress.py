"""Progress on stderr for long batches (rich is imported only for a terminal)."""

from __future__ import annotations

import sys
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager


@contextmanager
def progress_reporter(
    what: str, *, every: float = 10.0
) -> Iterator[Callable[[int, int, int], None] | None]:
    """Progress on stderr: a bar (runs done, failures, time left) on a terminal; on
    anything else (CI logs, batch jobs) one line every ``every`` seconds."""
    if not sys.stderr.isatty():
        yield periodic_lines(what, every)
        return
    from rich.console import Console
    from rich.progress import (
        BarColumn,
        MofNCompleteColumn,
        Progress,
        TextColumn,
        TimeRemainingColumn,
    )

    bar = Progress(f"[dim]{what}[/dim]", BarColumn(), MofNCompleteColumn(),
                   TextColumn("{task.fields[failed]}"), TimeRemainingColumn(),
                   console=Console(stderr=True), transient=True)
    task = bar.add_task(what, total=None, failed="")
    with bar:
        def update(done: int, total: int, failed: int) -> None:
            bar.update(task, completed=done, total=total,
                       failed=f"[bold red3]{failed} failed" if failed else "")

        yield update


def periodic_lines(what: str, every: float) -> Callable[[int, int, int], None]:
    """A progress callback that prints one plain line every ``every`` seconds (none
    for the last run)."""
    started = time.monotonic()
    last = [started]

    def update(done: int, total: int, failed: int) -> None:
        now = time.monotonic()
        if now - last[0] < every or done >= total:
            return
        last[0] = now
        elapsed = now - started
        left = elapsed / done * (total - done) if done else float("nan")
        eta = f", about {left:.0f} s left" if done else ""
        print(f"slicetime: {what}: {done}/{total} runs, {failed} failed{eta}",
              file=sys.stderr, flush=True)

    return update




__all__ = ["progress_reporter"]
