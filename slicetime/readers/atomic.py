"""Atomic file writes: the one way slicetime puts a whole file in place.

Every file the tool writes (repaired sidecars, backups and journals, corrected
runs' sidecars and provenance, reports) is written to a temporary file beside
its final name, flushed and fsynced, then renamed over the final name: a reader
never sees half a file, and a crash leaves either the old file or the new one
(plus, at worst, the temporary, which the callers that can be interrupted name
so that they find and remove it later). A symbolic link at the final name is
replaced, never written through.
"""

from __future__ import annotations

import contextlib
import os
import secrets
from collections.abc import Iterator
from pathlib import Path
from typing import IO, Any


def default_temp(path: Path) -> Path:
    """A temporary name beside ``path``: hidden, unique to this process and call."""
    return path.with_name(f".{path.name}.tmp-{os.getpid()}-{secrets.token_hex(4)}")


@contextlib.contextmanager
def atomic_file(
    path: str | os.PathLike[str],
    *,
    binary: bool = False,
    temp: str | os.PathLike[str] | None = None,
    mode: int | None = None,
) -> Iterator[IO[Any]]:
    """A file object whose content replaces ``path`` when the block ends cleanly.

    The content goes to ``temp`` (default: :func:`default_temp`), created
    exclusively; on a clean exit it is flushed, fsynced, given ``mode`` (when
    set) and renamed over ``path``. On any exception the temporary file is
    removed and ``path`` is untouched. Text is UTF-8 with ``\\n`` line ends.
    """
    target = Path(path)
    tmp = Path(temp) if temp is not None else default_temp(target)
    # created exclusively: an existing file at the temporary name is never touched
    if binary:
        fh: IO[Any] = open(tmp, "xb")
    else:
        fh = open(tmp, "x", encoding="utf-8", newline="\n")
    try:
        with fh:
            yield fh
            fh.flush()
            os.fsync(fh.fileno())
        if mode is not None:
            os.chmod(tmp, mode)
        os.replace(tmp, target)
    finally:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)


def write_atomic(
    path: str | os.PathLike[str],
    data: str | bytes,
    *,
    temp: str | os.PathLike[str] | None = None,
    mode: int | None = None,
) -> None:
    """Put ``data`` (text as UTF-8, or bytes) at ``path`` with :func:`atomic_file`."""
    with atomic_file(path, binary=isinstance(data, bytes), temp=temp, mode=mode) as fh:
        fh.write(data)


__all__ = ["atomic_file", "default_temp", "write_atomic"]
