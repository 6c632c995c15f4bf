"""Atomic file writes: the one way slicetime puts a whole file in place, the one
scheme of temporary names, the one test of "is this path inside that folder", and
the one decision of "may this path be written".

Every file the tool writes (repaired sidecars, backups and journals, corrected
runs' sidecars and provenance, reports) is written to a temporary file beside
its final name, flushed and fsynced, then renamed over the final name: a reader
never sees half a file, and a crash leaves either the old file or the new one
(plus, at worst, the temporary, whose name says which process wrote it, so that
a later run finds and removes it: :func:`temp_path`, :func:`stale_temporary`).
A symbolic link at the final name is replaced, never written through.

Before any of that, :func:`check_write_target` decides whether the path may be
written at all: never inside an input dataset (except a root's ``derivatives/``
folder, for the commands that write derivatives), never onto an input file, with
links resolved so that no link leads a write into the data.
"""

from __future__ import annotations

import contextlib
import os
import stat
from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import IO, Any

#: every temporary file slicetime makes is named ``.slicetime-<pid>-<tag>.tmp``
TEMP_PREFIX = ".slicetime-"
TEMP_SUFFIX = ".tmp"


# ---------------------------------------------------------------------------
# paths inside folders


def within(path: str | os.PathLike[str], folder: str | os.PathLike[str]) -> bool:
    """Whether ``path`` is ``folder`` or lies below it, compared component by component
    as given (pass real paths to compare real places; ``/data/ab`` is not inside
    ``/data/a``)."""
    p, f = os.fspath(path), os.fspath(folder)
    if p == f:
        return True
    bare = f.rstrip(os.sep)
    return p == bare or p.startswith(bare + os.sep)


def real_within(path: str | os.PathLike[str], folder: str | os.PathLike[str]) -> bool:
    """:func:`within` for the real places (links resolved) of both paths."""
    return within(os.path.realpath(path), os.path.realpath(folder))


def link_between(path: str | os.PathLike[str], base: str | os.PathLike[str]) -> Path | None:
    """The first symbolic link among ``path`` and the folders between it and ``base``
    (``base`` itself excluded; ``path`` given under ``base``), or None: a write or a
    removal at ``path`` that must stay inside ``base`` is refused when there is one."""
    here, stop = Path(path), Path(base)
    found: Path | None = None
    while here != stop and within(here, stop):
        if _is_link(here):
            found = here
        here = here.parent
    return found


def _is_link(path: Path) -> bool:
    """A symbolic link (a name the system refuses, e.g. too long, is none)."""
    try:
        return stat.S_ISLNK(os.lstat(path).st_mode)
    except OSError:
        return False


def make_folders(folder: str | os.PathLike[str], base: str | os.PathLike[str]) -> None:
    """Create ``folder`` (below ``base``, made when missing) and the folders between,
    never through a link: a link (or a file) on the way is refused with
    :class:`WriteRefused`, before anything is created beneath it."""
    target, stop = Path(folder), Path(base)
    os.makedirs(stop, exist_ok=True)
    chain: list[Path] = []
    here = target
    while here != stop and within(here, stop):
        chain.append(here)
        here = here.parent
    for step in reversed(chain):
        try:
            os.mkdir(step)
            continue
        except FileExistsError:
            pass
        st = os.lstat(step)
        if stat.S_ISLNK(st.st_mode):
            raise WriteRefused(f"{step} is a symbolic link; nothing is written through it")
        if not stat.S_ISDIR(st.st_mode):
            raise WriteRefused(f"{step} is not a folder; nothing is written there")


# ---------------------------------------------------------------------------
# temporary names


def temp_path(final: str | os.PathLike[str], tag: str | None = None) -> Path:
    """The temporary name beside ``final``: ``.slicetime-<pid>-<tag>.tmp`` (``tag``:
    random by default). It never contains ``final``'s name, so a long legal name
    cannot make its temporary too long, and its pid tells a later run whether the
    writer still runs (:func:`stale_temporary`)."""
    # random: what secrets.token_hex(6) gives, without the 7 ms of importing secrets
    tag = tag if tag is not None else os.urandom(6).hex()
    return Path(final).with_name(f"{TEMP_PREFIX}{os.getpid()}-{tag}{TEMP_SUFFIX}")


def temp_parts(name: str) -> tuple[int, str] | None:
    """``(pid, tag)`` of a temporary name of :func:`temp_path`; None for any other name."""
    if not (name.startswith(TEMP_PREFIX) and name.endswith(TEMP_SUFFIX)):
        return None
    pid_text, dash, tag = name[len(TEMP_PREFIX) : -len(TEMP_SUFFIX)].partition("-")
    if not dash or not pid_text.isdigit() or not tag:
        return None
    return int(pid_text), tag


def process_alive(pid: int) -> bool:
    """Whether process ``pid`` exists (this process counts as not alive: its own
    temporaries of an earlier, finished step are stale to it)."""
    if pid <= 0 or pid == os.getpid():
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def stale_temporary(name: str) -> bool:
    """A temporary name (:func:`temp_path`) whose writing process no longer runs."""
    parts = temp_parts(name)
    return parts is not None and not process_alive(parts[0])


# ---------------------------------------------------------------------------
# may this path be written


class WriteRefused(ValueError):
    """A path the tool must not write (a usage error: exit 2); the message is one line
    naming the path."""


def _land(path: Path) -> str:
    """Where a write at ``path`` lands: the real folder plus the name (an atomic write
    replaces a link at the name, but every link above it is followed)."""
    parent = os.path.realpath(path.parent if str(path.parent) else ".")
    return os.path.join(parent, path.name)


def check_write_target(
    path: str | os.PathLike[str],
    roots: Sequence[str | os.PathLike[str]],
    inputs: Sequence[str | os.PathLike[str]] = (),
    *,
    what: str,
    folder: bool = False,
    derivatives: bool = False,
) -> None:
    """Refuse (:class:`WriteRefused`) a write at ``path`` that could touch the inputs.

    ``roots``: the input dataset roots (given or found, also those without runs);
    ``inputs``: the paths the user gave (folders or files). ``what`` names the
    option or file in the message (``--html``, ``the journal``). A path is refused
    when, links resolved, it is a root or lies inside one (with ``derivatives``, a
    folder under a root's ``derivatives/`` is allowed), is or lies inside a given
    path, or (a link at the name) points at an input. A ``folder`` (an output
    folder) is also refused when it contains a root or a given path.
    """
    target = Path(path)
    shown = os.fspath(path)
    places = [_land(target)]
    if target.is_symlink():
        places.append(os.path.realpath(target))
    for root in roots:
        root_real = os.path.realpath(root)
        for place in places:
            if place == root_real:
                raise WriteRefused(f"{what} {shown} is the input dataset {os.fspath(root)}; "
                                   "choose a path outside it")
            if within(place, root_real):
                rel = Path(os.path.relpath(place, root_real)).parts
                if derivatives and len(rel) >= 2 and rel[0] == "derivatives":
                    continue
                where = (f"outside it or under {Path(root) / 'derivatives'}" if derivatives
                         else "outside it")
                raise WriteRefused(f"{what} {shown} is inside the input dataset "
                                   f"{os.fspath(root)}; choose a path {where}")
            if folder and within(root_real, place):
                raise WriteRefused(f"{what} {shown} contains the input dataset "
                                   f"{os.fspath(root)}; choose another folder")
    for given in inputs:
        given_real = os.path.realpath(given)
        for place in places:
            if within(place, given_real):
                raise WriteRefused(f"{what} {shown} is or lies inside the input "
                                   f"{os.fspath(given)}; choose a path outside it")
            if folder and within(given_real, place):
                raise WriteRefused(f"{what} {shown} contains the input {os.fspath(given)}; "
                                   "choose another folder")


# ---------------------------------------------------------------------------
# one writer at a time


class FolderBusy(RuntimeError):
    """Another process holds the folder's lock (:func:`folder_lock`)."""


@contextlib.contextmanager
def folder_lock(folder: str | os.PathLike[str]) -> Iterator[None]:
    """Hold an exclusive lock on ``folder`` itself (``flock`` on the folder's own
    descriptor: no lock file is made, and the kernel frees the lock when the process
    dies, even by kill -9). Raises :class:`FolderBusy` at once when another process
    holds it. The folder must exist; one that is replaced while the lock is taken is
    locked again."""
    import fcntl

    path = os.fspath(folder)
    for _ in range(5):
        fd = os.open(path, os.O_RDONLY | getattr(os, "O_DIRECTORY", 0)
                     | getattr(os, "O_CLOEXEC", 0))
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            os.close(fd)
            raise FolderBusy(path) from None
        try:
            same = os.fstat(fd).st_ino == os.stat(path).st_ino
        except FileNotFoundError:
            same = False
        if not same:  # removed or replaced by its last holder meanwhile
            os.close(fd)
            continue
        try:
            yield
        finally:
            os.close(fd)  # closing the descriptor frees the lock
        return
    raise FolderBusy(path)


# ---------------------------------------------------------------------------
# writing


def keep_owner_and_mode(path: str | os.PathLike[str], like: os.stat_result) -> None:
    """Give ``path`` the owner, group and permission bits of ``like`` (a file it
    replaces or copies). The owner is changed only where this process may (as root,
    or to its own ids); a mode is never widened beyond ``like``'s."""
    with contextlib.suppress(PermissionError):
        if like.st_uid != os.geteuid() or like.st_gid != os.getegid():
            os.chown(path, like.st_uid, like.st_gid)
    os.chmod(path, stat.S_IMODE(like.st_mode))


@contextlib.contextmanager
def atomic_file(
    path: str | os.PathLike[str],
    *,
    binary: bool = False,
    temp: str | os.PathLike[str] | None = None,
    mode: int | None = None,
    like: os.stat_result | None = None,
) -> Iterator[IO[Any]]:
    """A file object whose content replaces ``path`` when the block ends cleanly.

    The content goes to ``temp`` (default: :func:`temp_path`), created exclusively
    and readable by this user only until it is complete; on a clean exit it is
    flushed, fsynced, given ``mode`` (when set) or the owner and mode of ``like``
    (the file it replaces), and renamed over ``path``. On any exception the
    temporary file is removed and ``path`` is untouched. Text is UTF-8 with ``\\n``
    line ends.
    """
    target = Path(path)
    tmp = Path(temp) if temp is not None else temp_path(target)
    # created exclusively: an existing file at the temporary name is never touched
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_CLOEXEC", 0),
                 0o600)
    try:
        if binary:
            fh: IO[Any] = os.fdopen(fd, "wb")
        else:
            fh = os.fdopen(fd, "w", encoding="utf-8", newline="\n")
    except BaseException:
        os.close(fd)
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        raise
    try:
        with fh:
            yield fh
            fh.flush()
            os.fsync(fh.fileno())
        if like is not None:
            keep_owner_and_mode(tmp, like)
        else:
            os.chmod(tmp, mode if mode is not None else _default_mode())
        os.replace(tmp, target)
    finally:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)


def _read_umask() -> int:
    """This process's umask, read once at import (setting it to read it back is not
    safe once threads run)."""
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


_UMASK = _read_umask()


def _default_mode() -> int:
    """The mode ``open()`` would give a new file: 0o666 less the umask."""
    return 0o666 & ~_UMASK


def write_atomic(
    path: str | os.PathLike[str],
    data: str | bytes,
    *,
    temp: str | os.PathLike[str] | None = None,
    mode: int | None = None,
    like: os.stat_result | None = None,
) -> None:
    """Put ``data`` (text as UTF-8, or bytes) at ``path`` with :func:`atomic_file`."""
    with atomic_file(path, binary=isinstance(data, bytes), temp=temp, mode=mode,
                     like=like) as fh:
        fh.write(data)


__all__ = [
    "TEMP_PREFIX",
    "TEMP_SUFFIX",
    "FolderBusy",
    "WriteRefused",
    "atomic_file",
    "check_write_target",
    "folder_lock",
    "keep_owner_and_mode",
    "link_between",
    "make_folders",
    "process_alive",
    "real_within",
    "stale_temporary",
    "temp_parts",
    "temp_path",
    "within",
    "write_atomic",
]
