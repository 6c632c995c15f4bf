"""A journaled transaction on files inside dataset folders: lock, checks, backups,
apply all or nothing, roll back, undo.

It knows files, folders and SHA-256 hashes only; what the new contents are and why
is the caller's business (:mod:`slicetime.pipelines.fix` plans sidecar repairs).

:func:`apply_changes` writes a list of planned files all or nothing under a lock
of every dataset root: every file is checked first (links — annexed content:
unlock it, or ``replace_links`` —, read-only, changed since the plan, outside its
dataset) and one refusal writes nothing; then each original is copied to the
backup folder, the journal (before and after SHA-256 of every file) is written
once, and the files are replaced atomically; when a write fails, the files already
written are put back. :func:`undo` checks the whole journal (against its shipped
schema, ``fix-journal.schema.json``, then every path and backup hash) before it
restores any byte.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import fcntl
import json
import os
import re
import secrets
import signal
import socket
import stat
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path

from slicetime import __version__
from slicetime.pipelines.journal import (
    JOURNAL_FORMAT,
    JOURNAL_NAME,
    JOURNAL_SCHEMA,
    LOCK_NAME,
    JournalEntry,
    PlannedWrite,
    TransactionError,
    backup_bytes,
    confinement_problem,
    current_sha,
    entry_state,
    read_document,
    read_journal,
    root_identity,
    sha256_of,
)
from slicetime.pipelines.signals import signals_noted, test_point
from slicetime.readers.atomic import (
    WriteRefused,
    check_write_target,
    temp_parts,
    temp_path,
    write_atomic,
)

# --------------------------------------------------------------------------- locking

def _lock_one(root: Path) -> tuple[Path, int, str]:
    """Hold ``root/.slicetime-fix.lock`` (flock); the kernel frees it if the process dies.
    Returns the file, its descriptor and what the file said before (a holder killed
    while applying left its journal's path there: see :func:`recover`)."""
    path = root / LOCK_NAME
    for _ in range(5):
        try:
            fd = os.open(path, os.O_RDWR | os.O_CREAT | getattr(os, "O_NOFOLLOW", 0), 0o644)
        except OSError as exc:
            raise TransactionError(
                f"{root}: cannot create the lock file {LOCK_NAME} "
                f"({exc.strerror or exc}); slicetime writes a dataset only while "
                "it holds that lock") from None
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            try:
                holder = os.pread(fd, 200, 0).decode("utf-8", "replace").strip()
            except OSError:
                holder = ""
            os.close(fd)
            raise TransactionError(
                f"{root}: another slicetime fix is writing this dataset now "
                f"({holder.splitlines()[0] if holder else 'process unknown'}); wait until "
                "it ends, then make a new plan") from None
        try:  # the previous holder may have removed the file between our open and flock
            same = os.fstat(fd).st_ino == os.lstat(path).st_ino
        except FileNotFoundError:
            same = False
        if same:
            try:
                previous = os.pread(fd, 8192, 0).decode("utf-8", "replace")
            except OSError:
                previous = ""
            _note(fd, None)
            return path, fd, previous
        os.close(fd)
    raise TransactionError(f"{root}: cannot take the lock {LOCK_NAME}: it keeps being replaced")


def _note(fd: int, journal: Path | None) -> None:
    """Say in the lock file who holds it and, while files are being written, which
    journal can put them back (the next fix or undo reads it after a kill -9)."""
    note = f"pid {os.getpid()} on {socket.gethostname()}\n"
    if journal is not None:
        note += f"journal: {journal}\n"
    os.ftruncate(fd, 0)
    os.pwrite(fd, note.encode("utf-8", "surrogateescape"), 0)
    with contextlib.suppress(OSError):
        os.fsync(fd)


@dataclass
class Locks:
    """The fix locks held on some dataset roots."""

    held: list[tuple[Path, int]] = field(default_factory=list)
    #: per root: the journal an earlier holder was applying when it died (None: none)
    interrupted: dict[str, Path] = field(default_factory=dict)

    def note_journal(self, journal: Path | None) -> None:
        for _path, fd in self.held:
            _note(fd, journal)


def _journal_named(note: str) -> Path | None:
    for line in note.splitlines():
        if line.startswith("journal: "):
            return Path(os.fsencode(line[len("journal: "):]).decode("utf-8", "surrogateescape"))
    return None


@contextlib.contextmanager
def dataset_lock(roots: Sequence[str]) -> Iterator[Locks]:
    """Hold the fix lock of every root (sorted, all or none) while writing; the lock
    files are removed when the block ends."""
    locks = Locks()
    try:
        for root in sorted(set(roots)):
            path, fd, previous = _lock_one(Path(root))
            locks.held.append((path, fd))
            journal = _journal_named(previous)
            if journal is not None:
                locks.interrupted[root] = journal
        yield locks
    finally:
        for path, fd in reversed(locks.held):
            with contextlib.suppress(OSError):
                os.unlink(path)
            os.close(fd)


def recover(roots: Sequence[str]) -> list[str]:
    """Finish what an ``--apply`` killed on these dataset roots left (kill -9, a power
    cut): the files it had written are put back from its backups, its temporary files
    and its lock file removed, its journal marked "rolled back". Returns one line per
    journal recovered (none: nothing was left). A root whose lock another running fix
    holds is left to it."""
    lines: list[str] = []
    for root in sorted(set(roots)):
        if not os.path.lexists(Path(root) / LOCK_NAME):
            continue
        try:
            with dataset_lock([root]) as locks:
                journal = locks.interrupted.get(root)
                if journal is not None:
                    lines.append(_finish_rollback(journal))
        except TransactionError:
            continue  # another fix holds it: that one is running, not killed
    return lines


def _finish_rollback(journal_path: Path) -> str:
    """Roll back the files an interrupted apply wrote (its journal says "prepared");
    a journal that says "applied" was complete: only its temporary files go."""
    try:
        journal = read_journal(journal_path)
    except TransactionError as exc:
        return (f"an earlier fix --apply was interrupted, but its journal cannot be used "
                f"({exc}); check the files it names by hand")
    _remove_temps(journal.entries, journal.token)
    if journal.status != "prepared":
        return f"an earlier fix --apply ended without removing its lock (journal {journal_path})"
    put_back, stuck = _put_back(journal.entries, journal.path.parent, journal.token)
    if stuck:
        return (f"an earlier fix --apply was interrupted: {len(put_back)} of its files were "
                f"put back, not {', '.join(stuck[:3])}: run slicetime fix --undo {journal_path}")
    with contextlib.suppress(OSError):
        _write_journal(journal.path, journal.roots, journal.token or "", journal.entries,
                       "rolled back", journal.root_ids)
    return (f"an earlier fix --apply was interrupted; the {len(put_back)} files it had written "
            f"were put back (journal {journal_path})")


def _put_back(entries: Sequence[JournalEntry], backup: Path,
              token: str | None) -> tuple[list[str], list[str]]:
    """Restore, newest first, every entry whose file holds its bytes after the fix;
    (put back, could not be put back)."""
    put_back: list[str] = []
    stuck: list[str] = []
    for n, entry in reversed(list(enumerate(entries))):
        if entry_state(entry) != "after":
            continue
        try:
            _restore(entry, backup, _temp_tag(token or secrets.token_hex(8), n))
        except (OSError, TransactionError):
            stuck.append(entry.file)
            continue
        put_back.append(entry.file)
    return put_back, stuck


# --------------------------------------------------------------------------- applying


class Interrupted(TransactionError):
    """A signal (Ctrl-C, SIGTERM) stopped an apply; the files written were put back.
    ``exit_code``: 128 + the signal's number, as a shell reports it."""

    def __init__(self, message: str, signum: int) -> None:
        super().__init__(message)
        self.exit_code = 128 + signum


@dataclass
class ApplyResult:
    journal: Path | None
    written: list[str] = field(default_factory=list)
    refused: list[str] = field(default_factory=list)  # one line per refused file
    #: what an earlier, interrupted apply left and this one put right first
    recovered: list[str] = field(default_factory=list)
    #: a SIGINT or SIGTERM came after the last file was written (the apply is whole)
    late_signal: bool = False


def default_backup_dir(roots: Sequence[str]) -> Path:
    """``<dataset>-slicetime-backups/<UTC time to the second>`` beside the (first)
    dataset root; a second apply within the same second gets ``-1``, ``-2``... (made
    unique where the folder is created, by ``mkdir`` refusing an existing one)."""
    root = Path(roots[0]) if roots else Path.cwd()
    stamp = dt.datetime.now(dt.timezone.utc).strftime("%Y%m%dT%H%M%SZ")
    return root.parent / f"{root.name}-slicetime-backups" / stamp


def _read_only(st: os.stat_result) -> bool:
    """No write bit at all: the owner meant the file to stay as it is (root could still
    write it, so the bits are read, not ``access(2)``)."""
    return not st.st_mode & (stat.S_IWUSR | stat.S_IWGRP | stat.S_IWOTH)


def _refusal(change: PlannedWrite, replace_links: bool, expected_sha: str | None,
             rewrite_read_only: bool = False) -> str | None:
    path = change.path
    problem = confinement_problem(change.root, change.file)
    if problem is not None:
        return f"{change.file}: {problem}"
    if path.is_symlink():
        if not replace_links:
            target = os.readlink(path)
            kind = ("an annexed file" if "annex/objects" in target.replace("\\", "/")
                    else "a symbolic link")
            return (f"{change.file}: is {kind} (-> {target}); slicetime never writes through "
                    "links: unlock it with your annex tool (its unlock command), or pass "
                    "--replace-links to replace the link with a regular file")
    elif path.exists():
        if not path.is_file():
            return f"{change.file}: is not a regular file"
        if _read_only(path.stat()) and not rewrite_read_only:
            return (f"{change.file}: is read-only; make it writable (chmod u+w), or pass "
                    "--rewrite-read-only to rewrite it and keep it read-only")
        if not _read_only(path.stat()) and not os.access(path, os.W_OK):
            return f"{change.file}: is read-only for this user; make it writable (chmod u+w)"
    if not path.parent.is_dir():
        return f"{change.file}: its folder does not exist"
    if not os.access(path.parent, os.W_OK):
        return f"{change.file}: its folder is not writable"
    try:
        current = current_sha(path)
    except OSError as exc:
        return f"{change.file}: cannot be read ({exc.strerror or exc})"
    if current != expected_sha:
        return (f"{change.file}: changed since the plan was made (or created); make a new "
                "plan and review it")
    return None


def preflight(changes: Sequence[PlannedWrite], replace_links: bool = False,
              rewrite_read_only: bool = False) -> list[str]:
    """Every file :func:`apply_changes` would refuse, one line each (none: it can write
    all)."""
    out = []
    for change in changes:
        reason = _refusal(change, replace_links, change.sha256_before, rewrite_read_only)
        if reason is not None:
            out.append(reason)
    return out


def _prepare_backup_dir(backup_dir: Path | None, roots: Sequence[str]) -> Path:
    if backup_dir is not None:
        backup = Path(os.path.abspath(backup_dir))
        _clear_rolled_back(backup)
        if (backup / JOURNAL_NAME).exists() or (backup / JOURNAL_NAME).is_symlink():
            raise TransactionError(
                f"{backup}: already holds the journal of an earlier --apply; give "
                "a new or empty --backup-dir (the earlier journal is needed to "
                "undo that fix)")
    else:
        backup = default_backup_dir(roots)
    try:
        check_write_target(backup, roots, (), what="the backup folder", folder=True)
    except WriteRefused as exc:
        raise TransactionError(str(exc)) from None
    base = backup
    for n in range(1, 1000):
        try:
            backup.mkdir(parents=True, exist_ok=backup_dir is not None)
            return backup
        except FileExistsError:
            backup = base.with_name(f"{base.name}-{n}")
    raise TransactionError(f"{base}: cannot make a new backup folder there")


def _clear_rolled_back(backup: Path) -> None:
    """A backup folder whose journal says "rolled back" (an apply that failed, say on a
    full disk, and put every file back) records nothing that happened: its journal
    and backups are removed, so the same --backup-dir can be used again."""
    journal = backup / JOURNAL_NAME
    try:
        content = read_document(journal, JOURNAL_SCHEMA, "journal", "it is kept")
    except TransactionError:
        return
    if content.get("status") != "rolled back":
        return
    files = backup / "files"
    if files.is_dir() and not files.is_symlink():
        import shutil

        shutil.rmtree(files, ignore_errors=True)
    with contextlib.suppress(OSError):
        journal.unlink()


def apply_changes(
    changes: Sequence[PlannedWrite], *, backup_dir: Path | None = None,
    replace_links: bool = False, rewrite_read_only: bool = False,
) -> ApplyResult:
    """Write the planned changes, all or none, after backing every file up.

    Under the lock of every dataset root: an earlier apply that was killed is rolled
    back first (:func:`recover`); every file is checked (links, read-only, changed
    since the plan, out of its dataset) and one refusal writes nothing. Then each
    original is copied to the backup folder (its owner and mode kept), the journal
    (before and after SHA-256 of every file) is written and named in the lock files,
    and the files are replaced atomically, each keeping its owner and mode. When a
    write fails, or a SIGINT or SIGTERM arrives, the files already written are put
    back (:class:`Interrupted` for a signal).
    """
    if not changes:
        return ApplyResult(None)
    roots = list(dict.fromkeys(c.root for c in changes))
    # a signal is noted for the whole apply, lock release included: before the first
    # write it stops the apply with nothing written; after the last one the apply is
    # done and the caller is told (``late_signal``), never a bare "interrupted"
    with signals_noted() as late:
        with dataset_lock(roots) as locks:
            recovered = [_finish_rollback(j)
                         for j in dict.fromkeys(locks.interrupted.values())]
            refused = preflight(changes, replace_links, rewrite_read_only)
            if late:
                raise Interrupted(f"interrupted ({signal.Signals(late[0]).name}) before "
                                  "anything was written; nothing is changed", late[0])
            if refused:
                return ApplyResult(None, refused=refused, recovered=recovered)
            backup = _prepare_backup_dir(backup_dir, roots)
            result = _apply_checked(changes, roots, backup, locks)
            result.recovered = recovered
            test_point("fix:release")
        result.late_signal = result.late_signal or bool(late)
    return result


def _fsync_folder(folder: Path) -> None:
    with contextlib.suppress(OSError):
        fd = os.open(folder, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)


def _backup_name(roots: Sequence[str], root: str) -> str:
    name = re.sub(r"[^A-Za-z0-9._-]", "_", Path(root).name) or "root"
    return f"{roots.index(root) + 1}-{name}"


def _save_backup(saved: Path, data: bytes, like: os.stat_result) -> None:
    """The original's bytes at ``saved``, no more readable than the original: made
    readable by this user only, then given the original's owner and permission bits."""
    saved.parent.mkdir(parents=True, exist_ok=True)
    fd = os.open(saved, os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_CLOEXEC", 0),
                 0o600)
    with os.fdopen(fd, "wb") as fh:
        fh.write(data)
        fh.flush()
        os.fsync(fh.fileno())
        with contextlib.suppress(PermissionError):
            os.fchown(fh.fileno(), like.st_uid, like.st_gid)
        os.fchmod(fh.fileno(), stat.S_IMODE(like.st_mode) & 0o777)


def _apply_checked(changes: Sequence[PlannedWrite], roots: list[str],
                   backup: Path, locks: Locks) -> ApplyResult:
    journal_path = backup / JOURNAL_NAME
    token = secrets.token_hex(8)
    ids = [root_identity(r) for r in roots]
    entries: list[JournalEntry] = []
    # a signal is noted, so that the apply stops between two files and puts back what
    # it wrote; one after the last file lets the journal be finished ("applied")
    with signals_noted() as signals:
        for change in changes:
            path = change.path
            entry = JournalEntry(change.root, change.file, "created", None,
                                 sha256_of(change.after.encode("utf-8")))
            if path.is_symlink():
                entry.action, entry.link_target = "replaced-link", os.readlink(path)
                entry.sha256_before = change.sha256_before
            elif path.exists():
                st = path.stat()
                data = path.read_bytes()
                if sha256_of(data) != change.sha256_before:
                    raise TransactionError(
                        f"{change.file}: changed while the backups were being made; "
                        "nothing was written, make a new plan")
                rel = f"files/{_backup_name(roots, change.root)}/{change.file}"
                _save_backup(backup / rel, data, st)
                entry.action, entry.backup = "modified", rel
                entry.sha256_before = change.sha256_before
                entry.mode = stat.S_IMODE(st.st_mode)
                entry.uid, entry.gid = st.st_uid, st.st_gid
            entries.append(entry)
            if signals:
                raise Interrupted(
                    f"interrupted ({signal.Signals(signals[0]).name}) while the backups were "
                    f"made; nothing was written (backups in {backup})", signals[0])
        _write_journal(journal_path, roots, token, entries, "prepared", ids)
        _fsync_folder(backup)
        locks.note_journal(journal_path)
        result = ApplyResult(journal_path)
        done: list[JournalEntry] = []
        for n, (change, entry) in enumerate(zip(changes, entries, strict=True)):
            try:
                _atomic_write(change.path, change.after.encode("utf-8"), entry.like(),
                              _temp_tag(token, n))
            except OSError as exc:
                _roll_back(exc, change.file, done, backup, token, roots, journal_path, ids)
            done.append(entry)
            result.written.append(change.file)
            if signals and len(done) < len(entries):
                _roll_back(signals[0], change.file, done, backup, token, roots, journal_path,
                           ids)
        test_point("fix:written")
        for folder in {e.path.parent for e in entries}:
            _fsync_folder(folder)
        _write_journal(journal_path, roots, token, entries, "applied", ids)
        locks.note_journal(None)
    result.late_signal = bool(signals)  # after the last file: the apply is whole
    return result


def _roll_back(cause: OSError | int, file: str, done: list[JournalEntry], backup: Path,
               token: str, roots: list[str], journal_path: Path,
               ids: Sequence[str | None]) -> None:
    """Put back the files written so far (``cause``: the error writing ``file``, or the
    signal that arrived after it) and raise."""
    put_back, stuck = _put_back(done, backup, token)
    if isinstance(cause, int):
        what = f"interrupted ({signal.Signals(cause).name}) after {len(done)} files"
    else:
        what = f"cannot write {file} ({cause.strerror or cause})"
    if stuck:
        raise TransactionError(
            f"{what}; {len(put_back)} of the {len(done)} files written before it were put "
            f"back, not {', '.join(stuck[:3])}: run slicetime fix --undo {journal_path}")
    with contextlib.suppress(OSError):
        _write_journal(journal_path, roots, token, done, "rolled back", ids)
    message = (f"{what}; nothing is changed: the {len(put_back)} files written were put back "
               f"from the backups (journal {journal_path})")
    if isinstance(cause, int):
        raise Interrupted(message, cause)
    raise TransactionError(message)


def _temp_tag(token: str, n: int) -> str:
    """The tag of the n-th entry's temporary file (:func:`readers.atomic.temp_path`), so
    that a later run finds what an interrupted apply or undo left."""
    return f"{token}-{n}"


def _write_journal(path: Path, roots: Sequence[str], token: str,
                   entries: Sequence[JournalEntry], status: str,
                   ids: Sequence[str | None] | None = None) -> None:
    content = {
        "format": JOURNAL_FORMAT,
        "tool": {"name": "slicetime", "version": __version__},
        "status": status,
        "roots": list(roots),
        "root_ids": list(ids) if ids is not None else [None] * len(roots),
        "temp_token": token,
        "entries": [e.to_json() for e in entries],
    }
    _atomic_write(path, (json.dumps(content, indent=1) + "\n").encode("utf-8"), None)


def _atomic_write(path: Path, data: bytes, like: os.stat_result | None,
                  tag: str | None = None) -> None:
    """Write ``data`` to ``path`` by rename, with the owner and mode of ``like``; a link
    at ``path`` is replaced, never followed. ``tag`` names the temporary file
    (:func:`readers.atomic.temp_path`), so an interrupted apply or undo is found."""
    write_atomic(path, data, temp=temp_path(path, tag), like=like)


# --------------------------------------------------------------------------- undo


@dataclass
class UndoResult:
    restored: list[str] = field(default_factory=list)
    already: list[str] = field(default_factory=list)  # at their bytes before the fix
    never_written: list[str] = field(default_factory=list)  # the apply stopped before them
    refused: list[str] = field(default_factory=list)  # "file: why", each not restored
    failure: str | None = None  # the undo stopped here; ``restored`` says what was done
    recovered: list[str] = field(default_factory=list)  # other interrupted applies put right
    #: a SIGINT or SIGTERM stopped the undo between two files (its number); ``restored``
    #: says what was done, ``left`` how many files it did not reach
    signal: int | None = None
    left: int = 0
    late_signal: bool = False  # one came after the last file: the undo is whole


def _restore(entry: JournalEntry, backup: Path, tag: str, data: bytes | None = None) -> None:
    """Put ``entry``'s file back as it was before the fix; ``data``: its backup's bytes,
    already read and checked (:func:`backup_bytes`), else read here."""
    path = entry.path
    if entry.action == "created":
        path.unlink()
    elif entry.action == "replaced-link":
        assert entry.link_target is not None
        tmp = temp_path(path, tag)
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        os.symlink(entry.link_target, tmp)
        os.replace(tmp, path)
    else:
        _atomic_write(path, backup_bytes(entry, backup) if data is None else data,
                      entry.like(), tag)


def _remove_temps(entries: Sequence[JournalEntry], token: str | None) -> None:
    """Remove what an interrupted apply or undo may have left: its own temporary files
    only (tagged ``<token>-<n>`` for the n-th entry, by whichever process)."""
    if token is None:
        return
    tags = {_temp_tag(token, n) for n in range(len(entries))}
    for folder in {entry.path.parent for entry in entries}:
        try:
            names = os.listdir(folder)
        except OSError:
            continue
        for name in names:
            parts = temp_parts(name)
            if parts is not None and parts[1] in tags:
                with contextlib.suppress(OSError):
                    os.unlink(folder / name)


def undo(journal_path: Path, at: Path | None = None) -> UndoResult:
    """Restore every file a journal records, newest first, byte for byte, with its
    owner and mode.

    ``at``: where the dataset is now, when it was moved or copied (checked by its
    identity, not its path). The journal is checked first (its schema; every entry
    inside its dataset and the backup folder); an entry that is not, or whose backup
    does not match its recorded SHA-256, is refused with its reason and the others
    are restored. Files already at their bytes from before the fix are reported, not
    written; files changed since the fix are refused and left alone. An apply that
    was killed on these datasets is rolled back first.
    """
    journal = read_journal(Path(os.path.abspath(journal_path)), at)
    backup = journal.path.parent
    result = UndoResult(refused=list(journal.refused))
    # a signal is noted and obeyed between two files (each is restored whole): the
    # result says what was restored; the same undo run again does the rest
    with signals_noted() as signals, dataset_lock(journal.roots) as locks:
        for other in dict.fromkeys(locks.interrupted.values()):
            if os.path.abspath(other) != str(journal.path):
                result.recovered.append(_finish_rollback(other))
        # each backup is read and checked once; its bytes are what is restored
        usable: list[tuple[int, JournalEntry, bytes | None]] = []
        for n, entry in enumerate(journal.entries):
            data = None
            if entry.action == "modified":
                try:
                    data = backup_bytes(entry, backup)
                except TransactionError as exc:
                    result.refused.append(f"{entry.file}: not restored: {exc}")
                    continue
            usable.append((n, entry, data))
        todo: list[tuple[int, JournalEntry, bytes | None]] = []
        for n, entry, data in usable:
            state = entry_state(entry)
            if state == "after":
                todo.append((n, entry, data))
            elif state == "before":
                (result.never_written if journal.status == "prepared"
                 else result.already).append(entry.file)
            else:
                result.refused.append(f"{entry.file}: changed since the fix; not restored")
        for n, entry, data in reversed(todo):
            if signals:
                result.signal, result.left = signals[0], len(todo) - len(result.restored)
                break
            try:
                _restore(entry, backup, _temp_tag(journal.token or secrets.token_hex(8), n),
                         data)
            except (OSError, TransactionError) as exc:
                why = exc.strerror if isinstance(exc, OSError) and exc.strerror else str(exc)
                left = len(todo) - len(result.restored)
                result.failure = (f"{entry.file}: cannot be restored ({why}); the undo stopped: "
                                  f"{len(result.restored)} files restored (listed above), "
                                  f"{left} not restored yet; fix the cause and run the undo "
                                  "again")
                break
            result.restored.append(entry.file)
            test_point("undo:file")  # tests: Ctrl-C after each file restored
        _remove_temps(journal.entries, journal.token)
        if result.failure is None and result.signal is None and not result.refused \
                and not journal.moved:
            with contextlib.suppress(OSError):
                _write_journal(journal.path, journal.roots, journal.token or "",
                               journal.entries, "undone", journal.root_ids)
        result.late_signal = bool(signals) and result.signal is None
    return result
