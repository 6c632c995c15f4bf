"""The readers' error type and the file checks every reader shares.

A reader never lets a bare ``OSError``, ``ValueError`` or ``struct.error``
escape for a bad file. A problem that makes the file unusable is raised as a
:class:`ReadError` (always severity ``error``); callers that process batches
turn it into a :class:`~slicetime.model.Finding` with :meth:`ReadError.to_finding`
and go on with the next file.

File-level codes (our own):

``file/missing``
    the path does not exist, or is a symlink whose target does not exist;
``file/no-content``
    a symlink into an annex-style object store (its target path contains
    ``annex/objects``) whose content is not present locally;
``file/link-loop``
    symlinks that point at each other in a loop;
``file/unreadable``
    a permission or other OS error, a directory or anything that is not a
    regular file (FIFOs, sockets and devices are refused so that reading never blocks);
``file/link-leaves-dataset``
    a symbolic link that leads out of the dataset (a warning): a reader given the
    dataset root (``root=``) does not read what it points at (:func:`link_leaving`,
    the one decision, which the walk makes for folder links too).

Every reader opens its input through :func:`open_regular`: the path is checked
with ``stat`` (a special file is refused before it is opened, so opening has no
side effect), then opened without blocking (``O_NONBLOCK``: a FIFO swapped in
between the two calls cannot block the open) and checked again with ``fstat``
on the open descriptor (a swap between the two is refused too). Content is
read with :func:`read_bounded`, which never reads more than a caller's limit
even from a file that keeps growing.
"""

from __future__ import annotations

import errno
import io
import os
import stat
from collections.abc import Callable, Mapping
from pathlib import Path
from typing import Any, BinaryIO

from slicetime.codes import make_finding
from slicetime.model import Finding
from slicetime.words import with_article

from .atomic import within

__all__ = [
    "ReadError",
    "check_regular_file",
    "display_name",
    "file_kind",
    "is_regular_file",
    "link_leaves_error",
    "link_leaving",
    "open_regular",
    "os_error",
    "read_bounded",
    "read_up_to",
]

_MAX_LINK_HOPS = 40


class ReadError(Exception):
    """A fatal problem with one input file.

    ``code`` is a stable finding code such as ``file/truncated``; ``file`` is
    the display path given by the caller; ``field`` names the header field or
    sidecar key at fault (or ``None``); ``message`` is one line and already
    names the file and the field.
    """

    def __init__(
        self,
        code: str,
        file: str | None,
        field: str | None,
        message: str,
        *,
        evidence: Mapping[str, Any] | None = None,
        hint: str | None = None,
    ) -> None:
        super().__init__(message)
        self.code = code
        self.file = file
        self.field = field
        self.message = message
        self.evidence: dict[str, Any] = dict(evidence or {})
        self.hint = hint

    def __str__(self) -> str:
        return f"{self.code}: {self.message}"

    def __repr__(self) -> str:
        return f"ReadError({self.code!r}, {self.file!r}, {self.field!r}, {self.message!r})"

    def to_finding(self) -> Finding:
        """This error as a finding of its code's registered severity (an error for every
        code a reader raises; ``source/unreadable`` is a warning, reported again by its
        rule)."""
        return make_finding(self.code, self.message, file=self.file, field=self.field,
                            evidence=self.evidence, hint=self.hint)


def display_name(path: Path | str, display: str | None) -> str:
    """The name to use for ``path`` in messages: ``display`` when given."""
    return display if display is not None else str(path)


def _annex_target(path: str | os.PathLike[str]) -> str | None:
    """The first link target on the way from ``path`` that points into an annex store."""
    current = os.fspath(path)
    for _ in range(_MAX_LINK_HOPS):
        try:
            target = os.readlink(current)
        except OSError:
            return None
        if "annex/objects" in target.replace("\\", "/"):
            return target
        current = os.path.join(os.path.dirname(current), target)
    return None


annex_target = _annex_target  # public: the run reader asks whether content is absent


def os_error(exc: OSError, shown: str, *, what: str = "file") -> ReadError:
    """Translate an ``OSError`` raised while opening or reading ``shown`` into a ReadError."""
    if exc.errno == errno.ELOOP:
        return ReadError(
            "file/link-loop",
            shown,
            None,
            f"{shown}: symbolic links form a loop",
            hint="point the link at a real file",
        )
    if isinstance(exc, FileNotFoundError):
        return ReadError("file/missing", shown, None, f"{shown}: {what} does not exist")
    if isinstance(exc, IsADirectoryError):
        return ReadError(
            "file/unreadable", shown, None,
            f"{shown}: is a directory, not {with_article(what)}"
        )
    if isinstance(exc, PermissionError):
        return ReadError(
            "file/unreadable",
            shown,
            None,
            f"{shown}: permission denied while reading the {what}",
            hint="check the file's permissions",
        )
    reason = exc.strerror or exc.__class__.__name__
    return ReadError("file/unreadable", shown, None, f"{shown}: cannot read the {what}: {reason}")


def link_leaving(path: str | os.PathLike[str], confine: str | os.PathLike[str]) -> str | None:
    """The real place ``path`` leads to when it is a symbolic link out of the dataset
    whose root is ``confine``, else None: the one decision of "does this link leave the
    dataset" (the walk asks it of folder links, the readers of file links).

    A link stays when its target (links resolved) lies inside the real root, or inside
    the real folder the link itself sits in (a subject folder kept elsewhere and given
    as a path of its own keeps its own links). Only ``path`` itself is looked at (one
    ``lstat``; the folders above it are the walk's to judge)."""
    try:
        if not stat.S_ISLNK(os.lstat(path).st_mode):
            return None
    except (OSError, ValueError):
        return None  # the reader reports a path it cannot look at
    target = os.path.realpath(path)
    if within(target, os.path.realpath(confine)):
        return None
    if within(target, os.path.realpath(os.path.dirname(os.path.abspath(path)))):
        return None
    return target


def link_leaves_error(shown: str, target: str, consequence: str) -> ReadError:
    """``file/link-leaves-dataset`` for the link ``shown`` to ``target`` (see
    :func:`link_leaving`); ``consequence`` says what is therefore not done."""
    return ReadError(
        "file/link-leaves-dataset", shown, None,
        f"{shown}: a link to {target}, outside the dataset; {consequence}",
        evidence={"link_target": target},
    )


def check_regular_file(
    path: str | os.PathLike[str], shown: str, *, what: str = "file",
    root: str | os.PathLike[str] | None = None,
) -> os.stat_result:
    """Return the ``stat`` of ``path`` (following links) or raise the matching ReadError.

    Distinguishes a missing path, a broken symlink (``file/missing``), a symlink
    into an annex object store whose content is absent (``file/no-content``), a
    link loop (``file/link-loop``) and anything that is not a regular file
    (``file/unreadable``). With ``root`` (the file's dataset root), a link that
    leaves the dataset (:func:`link_leaving`) raises ``file/link-leaves-dataset``:
    what it points at is never opened.
    """
    try:
        lst = os.lstat(path)
    except FileNotFoundError:
        raise ReadError("file/missing", shown, None, f"{shown}: {what} does not exist") from None
    except OSError as exc:
        raise os_error(exc, shown, what=what) from None
    try:
        st = os.stat(path) if stat.S_ISLNK(lst.st_mode) else lst  # not a link: lstat is stat
    except FileNotFoundError:
        annex = _annex_target(path) if stat.S_ISLNK(lst.st_mode) else None
        if annex is not None:
            raise ReadError(
                "file/no-content",
                shown,
                None,
                f"{shown}: the content of this annexed {what} is not present locally",
                evidence={"link_target": annex},
                hint="fetch the file's content from the annex before reading it",
            ) from None
        if stat.S_ISLNK(lst.st_mode):
            try:
                target = os.readlink(path)
            except OSError:
                target = "?"
            raise ReadError(
                "file/missing",
                shown,
                None,
                f"{shown}: broken symbolic link (target {target} does not exist)",
                evidence={"link_target": target},
            ) from None
        raise ReadError("file/missing", shown, None, f"{shown}: {what} does not exist") from None
    except OSError as exc:
        raise os_error(exc, shown, what=what) from None
    if stat.S_ISDIR(st.st_mode):
        raise ReadError(
            "file/unreadable", shown, None,
            f"{shown}: is a directory, not {with_article(what)}"
        )
    if not stat.S_ISREG(st.st_mode):
        raise _not_regular(shown, st.st_mode, what)
    if root is not None and stat.S_ISLNK(lst.st_mode):
        leads_to = link_leaving(path, root)
        if leads_to is not None:
            raise link_leaves_error(shown, leads_to, f"the {what} is not read")
    return st


def is_regular_file(path: str | os.PathLike[str]) -> bool:
    """Whether ``path`` is a regular file (links followed); any error (a missing
    path, a name too long, a loop, no permission) is "no"."""
    try:
        return stat.S_ISREG(os.stat(path).st_mode)
    except (OSError, ValueError):
        return False


#: the kinds of file a ``st_mode`` can describe, in words, in the order they are tested
_FILE_KINDS: tuple[tuple[Callable[[int], bool], str], ...] = (
    (stat.S_ISREG, "a regular file"),
    (stat.S_ISDIR, "a directory"),
    (stat.S_ISFIFO, "a FIFO (named pipe)"),
    (stat.S_ISCHR, "a character device"),
    (stat.S_ISBLK, "a block device"),
    (stat.S_ISSOCK, "a socket"),
)


def file_kind(mode: int) -> str:
    """What kind of file a ``st_mode`` describes, in words (for messages)."""
    for test, words in _FILE_KINDS:
        if test(mode):
            return words
    return "not a regular file"


def _not_regular(shown: str, mode: int, what: str, *, swapped: bool = False) -> ReadError:
    kind = file_kind(mode)
    when = " (it was replaced while being opened)" if swapped else ""
    return ReadError(
        "file/unreadable",
        shown,
        None,
        f"{shown}: is {kind}, not a regular file{when}; a {what} is only read from a "
        "regular file, so that reading cannot block",
        evidence={"kind": kind},
        hint="point the path at a regular file",
    )


#: open flags: never wait for a writer (FIFO), never become a controlling terminal
_OPEN_FLAGS = (
    os.O_RDONLY
    | getattr(os, "O_NONBLOCK", 0)
    | getattr(os, "O_NOCTTY", 0)
    | getattr(os, "O_CLOEXEC", 0)
    | getattr(os, "O_BINARY", 0)
)


#: open flag that refuses a link as the last part of the path (0 where there is none)
_NOFOLLOW = getattr(os, "O_NOFOLLOW", 0)


def open_regular(
    path: str | os.PathLike[str], shown: str, *, what: str = "file",
    root: str | os.PathLike[str] | None = None, plain: bool = False,
) -> tuple[BinaryIO, os.stat_result]:
    """Open the regular file at ``path`` for unbuffered binary reading, or raise.

    Returns the open file and its ``fstat``. Raises :class:`ReadError` as
    :func:`check_regular_file` does (with ``root``, the file's dataset root: a link
    out of the dataset is not opened), and ``file/unreadable`` when the path turned
    into something else (a FIFO, a device) between the check and the open. The
    open never blocks: the flags include ``O_NONBLOCK``, which regular files ignore.

    ``plain``: the caller's folder listing (``os.DirEntry``, from the walk) said the
    path is a regular file and not a link, so the ``lstat`` before the open is left
    out: the open refuses a link (``O_NOFOLLOW``), a FIFO swapped in since does not
    block it (``O_NONBLOCK``), and whatever the open or the ``fstat`` after it finds
    that is not a regular file (a link, a FIFO, a folder, nothing) is checked and
    opened as without ``plain``, so the finding is the same. What this cannot refuse
    is a device node put in the file's place between the walk's listing and this
    open (making one needs the privilege to create devices). Ignored where
    ``O_NOFOLLOW`` does not exist.
    """
    if plain and _NOFOLLOW:
        opened = _open_plain(path)
        if opened is not None:
            return opened
    # before the open: a device (or a link out of the dataset) is never opened
    try:
        known = stat.S_ISREG(os.lstat(path).st_mode)  # a regular file, not a link: no more
    except (OSError, ValueError):                     # to ask (the common case, said once)
        known = False
    if not known:
        check_regular_file(path, shown, what=what, root=root)
    try:
        fd = os.open(path, _OPEN_FLAGS)
    except OSError as exc:
        raise os_error(exc, shown, what=what) from None
    try:
        st = os.fstat(fd)
        if not stat.S_ISREG(st.st_mode):
            raise _not_regular(shown, st.st_mode, what, swapped=True)
        return io.FileIO(fd, "rb"), st  # what os.fdopen(fd, "rb", buffering=0) gives
    except BaseException:
        os.close(fd)
        raise


def _open_plain(path: str | os.PathLike[str]) -> tuple[BinaryIO, os.stat_result] | None:
    """``path`` opened without following a link, when it is a regular file; None for
    anything else (a link, a FIFO, a folder, a missing file), which the caller then
    checks and opens as any other path, so that the finding is the one it gives."""
    try:
        fd = os.open(path, _OPEN_FLAGS | _NOFOLLOW)
    except (OSError, ValueError):
        return None
    try:
        st = os.fstat(fd)
        if stat.S_ISREG(st.st_mode):
            return io.FileIO(fd, "rb"), st
    except BaseException:
        os.close(fd)
        raise
    os.close(fd)
    return None


def read_bounded(fh: BinaryIO, expected: int, limit: int) -> bytes:
    """The content of ``fh`` from its position, reading at most ``limit + 1`` bytes.

    ``expected`` is the size on disk (from ``fstat``): that much (plus one byte,
    to notice growth) is asked for first, so a small file costs one read and a
    small allocation. A file that grew since is read on, but never beyond
    ``limit + 1`` bytes, so a caller sees ``len(result) > limit`` as "too large"
    whatever the file does while it is read.
    """
    first = min(max(expected, 0), limit) + 1
    data = read_up_to(fh, first, expected)
    if len(data) == first and first <= limit:
        data += read_up_to(fh, limit + 1 - first)
    return data


def read_up_to(fh: BinaryIO, size: int, whole: int | None = None) -> bytes:
    """Up to ``size`` bytes; fewer only at the end of the file. ``whole``: the size
    ``fstat`` gave; a first read that returns exactly that much is taken as the whole
    file (no second read to see the end: one system call less per small file)."""
    data = fh.read(size)
    if data is None:  # a non-blocking read with nothing to give (not a regular file)
        return b""
    if len(data) >= size or (whole is not None and 0 < whole == len(data)):
        return data
    parts = [data]
    got = len(data)
    while got < size:
        more = fh.read(min(size - got, 1 << 20))
        if not more:
            break
        parts.append(more)
        got += len(more)
    return b"".join(parts)
