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
import hashlib
import json
import os
import re
import secrets
import socket
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path, PurePosixPath
from typing import Any, Protocol

from slicetime import __version__
from slicetime.readers.atomic import write_atomic
from slicetime.readers.shipped_schemas import document_problem, load_schema
from slicetime.readers.volumes import file_sha256

JOURNAL_NAME = "journal.json"
#: the shipped schema of the journal (``slicetime/data/fix-journal.schema.json``)
JOURNAL_SCHEMA = "fix-journal"
JOURNAL_FORMAT = "slicetime-fix-journal"
LOCK_NAME = ".slicetime-fix.lock"


class TransactionError(Exception):
    """A problem with what the user asked for (a bad plan, journal or backup folder, a
    dataset another process is writing): one line, exit 2."""


class PlannedWrite(Protocol):
    """One file to create or replace: ``file`` relative to the dataset ``root`` (forward
    slashes), its new text, and the SHA-256 of its bytes when planned (None: no file)."""

    root: str
    file: str
    after: str
    sha256_before: str | None

    @property
    def path(self) -> Path: ...


def sha256_of(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def current_sha(path: Path) -> str | None:
    """The SHA-256 of the file at ``path`` now; None when there is none."""
    try:
        return file_sha256(path)
    except FileNotFoundError:
        return None


# --------------------------------------------------------------------------- reading back


def read_document(path: Path, schema: str, what: str, refused: str) -> dict[str, Any]:
    """A JSON file this transaction's caller wrote (a plan, a journal), validated by its
    shipped ``schema``; ``what`` names it in messages, ``refused`` says what a refusal
    means ("nothing was restored")."""
    try:
        with open(path, "rb") as fh:
            raw = fh.read(1 << 30)
        content = json.loads(raw.decode("utf-8"))
    except (OSError, ValueError) as exc:
        why = exc.strerror if isinstance(exc, OSError) and exc.strerror else str(exc)
        raise TransactionError(f"{path}: cannot read the {what} ({why})") from None
    marker = load_schema(schema)["properties"]["format"]["const"]
    if not isinstance(content, dict) or content.get("format") != marker:
        raise TransactionError(f"{path}: not a slicetime fix {what} (format {marker!r} expected)")
    problem = document_problem(schema, content)
    if problem is not None:
        raise TransactionError(f"{path}: the {what} is damaged ({problem}); the whole {what} is "
                               f"refused, {refused}")
    return content


# --------------------------------------------------------------------------- confinement


def is_dataset_root(root: Path) -> bool:
    """An absolute folder that holds ``dataset_description.json`` or ``sub-*`` folders."""
    try:
        if not root.is_absolute() or not root.is_dir():
            return False
        if (root / "dataset_description.json").is_file():
            return True
        with os.scandir(root) as entries:
            return any(e.name.startswith("sub-") and e.is_dir() for e in entries)
    except (OSError, ValueError):
        return False


def inside(path: str, folder: str) -> bool:
    """``path`` is ``folder`` or lies under it (both as given: resolve links first)."""
    return path == folder or path.startswith(folder.rstrip(os.sep) + os.sep)


def confinement_problem(root: str, file: object) -> str | None:
    """Why ``file`` is not a sidecar inside the dataset ``root`` (None when it is).

    A plan or journal names files relative to a dataset root; slicetime only
    ever writes sidecars (``.json``, not hidden) whose folder, links resolved,
    is inside the root.
    """
    if not isinstance(file, str) or not file:
        return "no file name"
    pure = PurePosixPath(file)
    if pure.is_absolute() or "\\" in file or ".." in pure.parts or "\x00" in file:
        return f"the file {file!r} is not a plain path inside its dataset"
    if any(part.startswith(".") for part in pure.parts) or not pure.name.endswith(".json"):
        return f"the file {file!r} is not a sidecar (slicetime writes only .json sidecars)"
    real_root = os.path.realpath(root)
    real_folder = os.path.realpath(os.path.join(root, *pure.parts[:-1]))
    if not inside(real_folder, real_root):
        return f"the folder of {file!r} leads out of the dataset through a link"
    return None


def check_root(root: object, where: Path, what: str) -> str:
    """``root`` as a plan or journal names it, when it is a dataset root (else refused)."""
    if not isinstance(root, str) or not is_dataset_root(Path(root)):
        raise TransactionError(
            f"{where}: the {what} names {root!r} as a dataset root, but it is not "
            "one (an absolute folder with dataset_description.json or sub-* "
            f"folders); the whole {what} is refused, nothing was "
            f"{'restored' if what == 'journal' else 'written'}")
    return root


# --------------------------------------------------------------------------- locking

def _lock_one(root: Path) -> tuple[Path, int]:
    """Hold ``root/.slicetime-fix.lock`` (flock); the kernel frees it if the process dies."""
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
                f"({holder or 'process unknown'}); wait until it ends, then make "
                "a new plan") from None
        try:  # the previous holder may have removed the file between our open and flock
            same = os.fstat(fd).st_ino == os.lstat(path).st_ino
        except FileNotFoundError:
            same = False
        if same:
            note = f"pid {os.getpid()} on {socket.gethostname()}\n".encode()
            os.ftruncate(fd, 0)
            os.pwrite(fd, note, 0)
            return path, fd
        os.close(fd)
    raise TransactionError(f"{root}: cannot take the lock {LOCK_NAME}: it keeps being replaced")


@contextlib.contextmanager
def dataset_lock(roots: Sequence[str]) -> Iterator[None]:
    """Hold the fix lock of every root (sorted, all or none) while writing."""
    held: list[tuple[Path, int]] = []
    try:
        for root in sorted(set(roots)):
            held.append(_lock_one(Path(root)))
        yield
    finally:
        for path, fd in reversed(held):
            with contextlib.suppress(OSError):
                os.unlink(path)
            os.close(fd)


# --------------------------------------------------------------------------- applying


@dataclass
class ApplyResult:
    journal: Path | None
    written: list[str] = field(default_factory=list)
    refused: list[str] = field(default_factory=list)  # one line per refused file


@dataclass
class JournalEntry:
    """One file as the journal records it (paths checked when read back)."""

    root: str
    file: str
    action: str  # modified | created | replaced-link
    sha256_before: str | None
    sha256_after: str
    backup: str | None = None  # relative to the journal's folder
    mode: int | None = None
    link_target: str | None = None

    @property
    def path(self) -> Path:
        return Path(self.root) / self.file

    def to_json(self) -> dict[str, Any]:
        return {"root": self.root, "file": self.file, "action": self.action,
                "sha256_before": self.sha256_before, "sha256_after": self.sha256_after,
                "backup": self.backup, "mode": self.mode, "link_target": self.link_target}


def default_backup_dir(roots: Sequence[str]) -> Path:
    """``<dataset>-slicetime-backups/<UTC time>`` beside the (first) dataset root."""
    root = Path(roots[0]) if roots else Path.cwd()
    stamp = dt.datetime.now(dt.timezone.utc).strftime("%Y%m%dT%H%M%S%fZ")
    return root.parent / f"{root.name}-slicetime-backups" / stamp


def _refusal(change: PlannedWrite, replace_links: bool, expected_sha: str | None) -> str | None:
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
        if not os.access(path, os.W_OK):
            return f"{change.file}: is read-only; make it writable (chmod u+w) to fix it"
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


def preflight(changes: Sequence[PlannedWrite], replace_links: bool = False) -> list[str]:
    """Every file :func:`apply_changes` would refuse, one line each (none: it can write
    all)."""
    out = []
    for change in changes:
        reason = _refusal(change, replace_links, change.sha256_before)
        if reason is not None:
            out.append(reason)
    return out


def _prepare_backup_dir(backup_dir: Path | None, roots: Sequence[str]) -> Path:
    if backup_dir is not None:
        backup = Path(os.path.abspath(backup_dir))
        if (backup / JOURNAL_NAME).exists() or (backup / JOURNAL_NAME).is_symlink():
            raise TransactionError(
                f"{backup}: already holds the journal of an earlier --apply; give "
                "a new or empty --backup-dir (the earlier journal is needed to "
                "undo that fix)")
    else:
        backup = default_backup_dir(roots)
    real = os.path.realpath(backup)
    for root in roots:
        if inside(real, os.path.realpath(root)):
            raise TransactionError(
                f"{backup}: the backups would be inside the dataset {root}; "
                "choose a --backup-dir outside it")
    base = backup
    for n in range(1, 1000):
        try:
            backup.mkdir(parents=True, exist_ok=backup_dir is not None)
            return backup
        except FileExistsError:
            backup = base.with_name(f"{base.name}-{n}")
    raise TransactionError(f"{base}: cannot make a new backup folder there")


def apply_changes(
    changes: Sequence[PlannedWrite], *, backup_dir: Path | None = None,
    replace_links: bool = False,
) -> ApplyResult:
    """Write the planned changes, all or none, after backing every file up.

    Under the lock of every dataset root: every file is checked first (links,
    read-only, changed since the plan, out of its dataset) and one refusal
    writes nothing. Then each original is copied to the backup folder, the
    journal (before and after SHA-256 of every file) is written once, and the
    files are replaced atomically. When a write fails, the files already written
    are put back from the backups.
    """
    if not changes:
        return ApplyResult(None)
    roots = list(dict.fromkeys(c.root for c in changes))
    with dataset_lock(roots):
        refused = preflight(changes, replace_links)
        if refused:
            return ApplyResult(None, refused=refused)
        backup = _prepare_backup_dir(backup_dir, roots)
        return _apply_checked(changes, roots, backup)


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


def _apply_checked(changes: Sequence[PlannedWrite], roots: list[str],
                   backup: Path) -> ApplyResult:
    journal_path = backup / JOURNAL_NAME
    token = secrets.token_hex(8)
    entries: list[JournalEntry] = []
    for change in changes:
        path = change.path
        entry = JournalEntry(change.root, change.file, "created", None,
                             sha256_of(change.after.encode("utf-8")))
        if path.is_symlink():
            entry.action, entry.link_target = "replaced-link", os.readlink(path)
            entry.sha256_before = change.sha256_before
        elif path.exists():
            data = path.read_bytes()
            if sha256_of(data) != change.sha256_before:
                raise TransactionError(
                    f"{change.file}: changed while the backups were being made; "
                    "nothing was written, make a new plan")
            rel = f"files/{_backup_name(roots, change.root)}/{change.file}"
            saved = backup / rel
            saved.parent.mkdir(parents=True, exist_ok=True)
            with open(saved, "xb") as fh:
                fh.write(data)
                fh.flush()
                os.fsync(fh.fileno())
            entry.action, entry.backup = "modified", rel
            entry.sha256_before = change.sha256_before
            entry.mode = path.stat().st_mode & 0o7777
        entries.append(entry)
    _write_journal(journal_path, roots, token, entries, "prepared")
    _fsync_folder(backup)
    result = ApplyResult(journal_path)
    done: list[JournalEntry] = []
    for n, (change, entry) in enumerate(zip(changes, entries, strict=True)):
        try:
            _atomic_write(change.path, change.after.encode("utf-8"), entry.mode,
                          _temp_name(token, n))
        except OSError as exc:
            _roll_back(exc, change.file, done, backup, token, roots, journal_path)
        done.append(entry)
        result.written.append(change.file)
    for folder in {e.path.parent for e in entries}:
        _fsync_folder(folder)
    _write_journal(journal_path, roots, token, entries, "applied")
    return result


def _roll_back(exc: OSError, file: str, done: list[JournalEntry], backup: Path, token: str,
               roots: list[str], journal_path: Path) -> None:
    stuck: list[str] = []
    for n, entry in reversed(list(enumerate(done))):
        try:
            _restore(entry, backup, _temp_name(token, n))
        except (OSError, TransactionError):
            stuck.append(entry.file)
    why = exc.strerror or str(exc)
    if stuck:
        raise TransactionError(
            f"cannot write {file} ({why}); {len(done) - len(stuck)} of the "
            f"{len(done)} files written before it were put back, not "
            f"{', '.join(stuck[:3])}: run slicetime fix --undo {journal_path}")
    with contextlib.suppress(OSError):
        _write_journal(journal_path, roots, token, done, "rolled back")
    raise TransactionError(
        f"cannot write {file} ({why}); nothing is changed: the {len(done)} files "
        "written before it were put back from the backups")


def _temp_name(token: str, n: int) -> str:
    return f".slicetime-{token}-{n}.tmp"


def _write_journal(path: Path, roots: Sequence[str], token: str,
                   entries: Sequence[JournalEntry], status: str) -> None:
    content = {
        "format": JOURNAL_FORMAT,
        "tool": {"name": "slicetime", "version": __version__},
        "status": status,
        "roots": list(roots),
        "temp_token": token,
        "entries": [e.to_json() for e in entries],
    }
    _atomic_write(path, (json.dumps(content, indent=1) + "\n").encode("utf-8"), None)


def _atomic_write(path: Path, data: bytes, mode: int | None, temp: str | None = None) -> None:
    """Write ``data`` to ``path`` by rename; a link at ``path`` is replaced, never followed.
    ``temp`` names the temporary file (so an interrupted apply or undo finds it)."""
    write_atomic(path, data, temp=path.with_name(temp or f".slicetime-{secrets.token_hex(8)}.tmp"),
                 mode=mode)


# --------------------------------------------------------------------------- undo


@dataclass
class UndoResult:
    restored: list[str] = field(default_factory=list)
    already: list[str] = field(default_factory=list)  # at their bytes before the fix
    never_written: list[str] = field(default_factory=list)  # the apply stopped before them
    refused: list[str] = field(default_factory=list)
    failure: str | None = None  # the undo stopped here; ``restored`` says what was done


@dataclass
class _Journal:
    path: Path
    status: str
    roots: list[str]
    token: str | None
    entries: list[JournalEntry]


def _read_journal(journal_path: Path) -> _Journal:
    """A journal valid against its shipped schema, every entry then checked against the
    file system; one entry out of bounds refuses it all."""
    content = read_document(journal_path, JOURNAL_SCHEMA, "journal", "nothing was restored")
    where = journal_path

    def damaged(why: str) -> TransactionError:
        return TransactionError(f"{where}: {why}; the journal is refused, nothing was restored")

    roots = [check_root(r, where, "journal") for r in content["roots"]]
    real_backup = os.path.realpath(journal_path.parent)
    entries: list[JournalEntry] = []
    seen: set[tuple[str, str]] = set()
    for n, raw in enumerate(content["entries"], 1):
        root, file, action = raw["root"], raw["file"], raw["action"]
        if root not in roots:
            raise damaged(f"entry {n}: its root {root!r} is not one of the journal's roots")
        problem = confinement_problem(root, file)
        if problem is not None:
            raise damaged(f"entry {n}: {problem}")
        if (root, file) in seen:
            raise damaged(f"entry {n}: {file!r} is recorded twice")
        seen.add((root, file))
        before = raw["sha256_before"]
        if (action == "created") != (before is None):
            raise damaged(f"entry {n}: a {action} file has "
                          f"{'a' if before is not None else 'no'} sha256_before")
        entry = JournalEntry(root, file, action, before, raw["sha256_after"])
        if action == "modified":
            backup, mode = raw.get("backup"), raw.get("mode")
            if not backup:
                raise damaged(f"entry {n}: the backup of {file!r} is not named")
            pure = PurePosixPath(backup)
            real = os.path.realpath(journal_path.parent / backup)
            if (pure.is_absolute() or ".." in pure.parts or not pure.parts
                    or pure.parts[0] != "files" or not inside(real, real_backup)):
                raise damaged(f"entry {n}: the backup {backup!r} is outside the backup folder")
            entry.backup, entry.mode = backup, mode
        if action == "replaced-link":
            target = raw.get("link_target")
            if not target or os.path.isabs(target):
                raise damaged(f"entry {n}: link_target is missing or absolute")
            landing = os.path.normpath(os.path.join(os.path.dirname(entry.path), target))
            if not inside(landing, os.path.normpath(root)):
                raise damaged(f"entry {n}: the link target {target!r} points out of the dataset")
            entry.link_target = target
        entries.append(entry)
    return _Journal(journal_path, content["status"], roots, content.get("temp_token"), entries)


def _backup_bytes(entry: JournalEntry, backup: Path) -> bytes:
    """The backup of ``entry``, checked against its recorded SHA-256
    (:class:`TransactionError` if not)."""
    assert entry.backup is not None
    path = backup / entry.backup
    if path.is_symlink() or not path.is_file():
        raise TransactionError(
            f"{path}: the backup of {entry.file} is missing (or not a regular "
            "file); nothing was restored")
    data = path.read_bytes()
    if sha256_of(data) != entry.sha256_before:
        raise TransactionError(
            f"{path}: the backup of {entry.file} does not match the SHA-256 the "
            "journal recorded before the fix; nothing was restored")
    return data


def _state(entry: JournalEntry) -> str:
    """``before``, ``after`` or ``other``: where the file stands against the journal."""
    path = entry.path
    if path.is_symlink():
        if entry.action == "replaced-link" and os.readlink(path) == entry.link_target:
            return "before"
        return "other"
    if path.exists() and not path.is_file():
        return "other"
    sha = current_sha(path)
    if sha == entry.sha256_after:
        return "after"
    if sha == entry.sha256_before and entry.action != "replaced-link":
        return "before"
    return "other"


def _restore(entry: JournalEntry, backup: Path, temp: str) -> None:
    path = entry.path
    if entry.action == "created":
        path.unlink()
    elif entry.action == "replaced-link":
        assert entry.link_target is not None
        tmp = path.with_name(temp)
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        os.symlink(entry.link_target, tmp)
        os.replace(tmp, path)
    else:
        _atomic_write(path, _backup_bytes(entry, backup), entry.mode, temp)


def _remove_temps(entries: Sequence[JournalEntry], token: str | None) -> None:
    """Remove what an interrupted apply may have left: its own temporary files only.

    The temporary file of the n-th entry is ``.slicetime-<token>-<n>.tmp`` beside it.
    """
    if token is None:
        return
    for n, entry in enumerate(entries):
        tmp = entry.path.with_name(_temp_name(token, n))
        with contextlib.suppress(OSError):
            if tmp.is_symlink() or tmp.is_file():
                tmp.unlink()


def undo(journal_path: Path) -> UndoResult:
    """Restore every file a journal records, newest first, byte for byte.

    The journal is checked whole before anything is written (every entry inside
    a dataset root and the backup folder, every backup matching its recorded
    SHA-256). Files already at their bytes from before the fix are reported, not
    written; files changed since the fix are refused and left alone.
    """
    journal = _read_journal(Path(os.path.abspath(journal_path)))
    backup = journal.path.parent
    result = UndoResult()
    with dataset_lock(journal.roots):
        for entry in journal.entries:
            if entry.action == "modified":
                _backup_bytes(entry, backup)
        todo: list[tuple[int, JournalEntry]] = []
        for n, entry in enumerate(journal.entries):
            state = _state(entry)
            if state == "after":
                todo.append((n, entry))
            elif state == "before":
                (result.never_written if journal.status == "prepared"
                 else result.already).append(entry.file)
            else:
                result.refused.append(f"{entry.file}: changed since the fix; not restored")
        for n, entry in reversed(todo):
            try:
                _restore(entry, backup, _temp_name(journal.token or secrets.token_hex(8), n))
            except (OSError, TransactionError) as exc:
                why = exc.strerror if isinstance(exc, OSError) and exc.strerror else str(exc)
                left = len(todo) - len(result.restored)
                result.failure = (f"{entry.file}: cannot be restored ({why}); the undo stopped: "
                                  f"{len(result.restored)} files restored (listed above), "
                                  f"{left} not restored yet; fix the cause and run the undo "
                                  "again")
                break
            result.restored.append(entry.file)
        if journal.token is not None:
            _remove_temps(journal.entries, journal.token)
        if result.failure is None and not result.refused:
            with contextlib.suppress(OSError):
                _write_journal(journal.path, journal.roots, journal.token or "",
                               journal.entries, "undone")
    return result

