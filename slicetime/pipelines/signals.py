"""Ctrl-C and SIGTERM once the work is done: the one owner of "note the signal, finish
what must be whole, then decide".

A signal that arrives while records are written (a journal, a batch's description
and provenance) or while a finished command prints its summary must not leave a
half-written record or a report that says "interrupted" about work that was done.
:func:`signals_noted` defers such signals for a block: the block runs to its end and
the caller reads what arrived and says honestly what happened (finished, or
interrupted before the steps that remained). It lives in
:mod:`slicetime.readers.signals` (below the pipelines: the writer's helper threads use
it too) and is imported here.

:func:`test_point` is the private hook the tests use to send SIGINT at a named point
(DEVELOPERS.md, "Interrupting at a chosen point"): when the environment variable
``SLICETIME_TEST_SIGINT_AT`` holds the point's name, the process sends itself SIGINT
there. Nothing else reads that variable.
"""

from __future__ import annotations

import os
import signal

from slicetime.readers.signals import signals_noted

#: the environment variable that names the point where :func:`test_point` signals
TEST_POINT_VARIABLE = "SLICETIME_TEST_SIGINT_AT"


def test_point(name: str) -> None:
    """Send this process SIGINT when ``SLICETIME_TEST_SIGINT_AT`` is ``name`` (tests
    only; see the module). Python runs the handler before the next statement."""
    if os.environ.get(TEST_POINT_VARIABLE) == name:
        os.kill(os.getpid(), signal.SIGINT)


__all__ = ["TEST_POINT_VARIABLE", "signals_noted", "test_point"]
