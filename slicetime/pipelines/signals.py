"""Ctrl-C and SIGTERM once the work is done: the one owner of "note the signal, finish
what must be whole, then decide".

A signal that arrives while records are written (a journal, a batch's description
and provenance) or while a finished command prints its summary must not leave a
half-written record or a report that says "interrupted" about work that was done.
:func:`signals_noted` defers such signals for a block: the block runs to its end and
the caller reads what arrived and says honestly what happened (finished, or
interrupted before the steps that remained).

:func:`test_point` is the private hook the tests use to send SIGINT at a named point
(DEVELOPERS.md, "Interrupting at a chosen point"): when the environment variable
``SLICETIME_TEST_SIGINT_AT`` holds the point's name, the process sends itself SIGINT
there. Nothing else reads that variable.
"""

from __future__ import annotations

import contextlib
import os
import signal
import threading
from collections.abc import Iterator
from typing import Any

#: the environment variable that names the point where :func:`test_point` signals
TEST_POINT_VARIABLE = "SLICETIME_TEST_SIGINT_AT"


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


def test_point(name: str) -> None:
    """Send this process SIGINT when ``SLICETIME_TEST_SIGINT_AT`` is ``name`` (tests
    only; see the module). Python runs the handler before the next statement."""
    if os.environ.get(TEST_POINT_VARIABLE) == name:
        os.kill(os.getpid(), signal.SIGINT)


__all__ = ["TEST_POINT_VARIABLE", "signals_noted", "test_point"]
