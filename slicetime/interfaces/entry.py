"""The console entry point (``slicetime`` on the command line, ``python -m slicetime``).

It loads the command line (click and slicetime's own modules: a few hundredths of a
second) under a guard: a Ctrl-C in that time ends with the line every command gives a
Ctrl-C before its first stage (:data:`STARTING`, which ``commands.shared.starting``
says too), exit 130, not a traceback. This module imports nothing but the standard
library, so the guard stands before anything else loads.
"""

from __future__ import annotations

import sys

#: what a Ctrl-C before a command's first stage left: the one wording
STARTING = "before anything was done; nothing written"
#: the exit status of an interrupted command (128 + SIGINT, common practice (no source))
EXIT_INTERRUPTED = 130


def main() -> None:
    try:
        from slicetime.interfaces.cli import main as run_command_line
    except KeyboardInterrupt:
        sys.stderr.write(f"slicetime: interrupted {STARTING}\n")
        raise SystemExit(EXIT_INTERRUPTED) from None
    run_command_line()


__all__ = ["EXIT_INTERRUPTED", "STARTING", "main"]
