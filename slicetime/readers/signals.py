"""Ctrl-C and SIGTERM held back for a block: :func:`signals_noted` (the caller reads
what arrived and decides) and :func:`signals_held` (what arrived is delivered after
the block). The readers' writer uses them around its helper threads; the pipelines
use them through :mod:`slicetime.pipelines.signals`, which adds the tests' hook.

Why a block hands work to helper threads under :func:`signals_held`: a
``KeyboardInterrupt`` raised in the main thread inside the standard library's thread
pool (a future's or a queue's condition entered from Python code) can leave that
condition's lock held; a helper thread then waits on it for ever, and shutting the
pool down waits on the helper: ``correct`` hung after a Ctrl-C while it wrote.
"""

from __future__ import annotations

import contextlib
import signal
import threading
from collections.abc import Iterator
from typing import Any


@contextlib.contextmanager
def signals_noted() -> Iterator[list[int]]:
    """While the block runs, SIGINT and SIGTERM are noted in the list it yields instead
    of stopping the process at once (a signal can arrive only in the main thread;
    elsewhere nothing changes). The former handlers are back after the block."""
    got: list[int] = []
    if threading.current_thread() is not threading.main_thread():
        yield got
        return

    def note(signum: int, frame: Any) -> None:
        got.append(signum)

    previous = {sig: signal.signal(sig, note) for sig in (signal.SIGINT, signal.SIGTERM)}
    try:
        yield got
    finally:
        for sig, handler in previous.items():
            signal.signal(sig, handler)


@contextlib.contextmanager
def signals_held() -> Iterator[None]:
    """SIGINT and SIGTERM that arrive while the block runs are delivered as it ends
    (normally or not), each once, to the handlers in place before it: a Ctrl-C is a
    ``KeyboardInterrupt`` raised after the block, never inside it."""
    got: list[int] = []
    try:
        with signals_noted() as got:
            yield
    finally:
        for signum in dict.fromkeys(got):
            signal.raise_signal(signum)


__all__ = ["signals_held", "signals_noted"]
