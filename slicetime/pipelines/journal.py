"""The fix journal and the checks shared by applying and undoing: its constants,
the journal entry, reading a shipped-schema document back, confining paths to a
dataset root, and reading and validating a journal before any byte is restored.

:mod:`slicetime.pipelines.transaction` applies, rolls back and undoes with these.
"""

from __future__ import annotations

import hashlib
import json
import os
import stat
from dataclasses import dataclass, field
from pathlib import Path, PurePosixPath
from typing import Any, Protocol

from slicetime.readers.atomic import (
    within,
)
from slicetime.readers.errors import ReadError, link_leaving, open_regular, read_bounded
from slicetime.readers.shipped_schemas import document_problem, load_schema
from slicetime.readers.volumes import file_sha256

JOURNAL_NAME = "journal.json"
#: the shipped schema of the journal (``slicetime/data/fix-journal.schema.json``)
JOURNAL_SCHEMA = "fix-journal"
JOURNAL_FORMAT = "slicetime-fix-journal"
LOCK_NAME = ".slicetime-fix.lock"
#: the largest plan or journal read back (a plan holds every new file's text)
MAX_DOCUMENT_BYTES = 1 << 30


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
        fh, st = open_regular(path, str(path), what=what)  # a FIFO or a device: refused
        with fh:
            raw = read_bounded(fh, st.st_size, MAX_DOCUMENT_BYTES)
        if len(raw) > MAX_DOCUMENT_BYTES:
            raise ValueError(f"larger than {MAX_DOCUMENT_BYTES} bytes")
        content = json.loads(raw.decode("utf-8"))
    except ReadError as exc:
        why = exc.message.removeprefix(f"{path}: ")
        raise TransactionError(f"{path}: cannot read the {what} ({why})") from None
    except (OSError, ValueError, RecursionError) as exc:
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


def confinement_problem(root: str, file: object) -> str | None:
    """Why ``file`` is not a sidecar inside the dataset ``root`` (None when it is).

    A plan or journal names files relative to a dataset root; slicetime only
    ever writes sidecars (``.json``, not hidden) whose folder, links resolved,
    is inside the root, and never a file that is a link out of the dataset (not
    even with ``--replace-links``: what it points at is never read, so it cannot
    be backed up; :func:`slicetime.readers.errors.link_leaving` decides).
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
    if not within(real_folder, real_root):
        return f"the folder of {file!r} leads out of the dataset through a link"
    leaving = link_leaving(os.path.join(root, *pure.parts), root)
    if leaving is not None:
        return f"the file {file!r} is a link to {leaving}, outside the dataset"
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
    uid: int | None = None  # the file's owner and group before the fix
    gid: int | None = None

    @property
    def path(self) -> Path:
        return Path(self.root) / self.file

    def to_json(self) -> dict[str, Any]:
        return {"root": self.root, "file": self.file, "action": self.action,
                "sha256_before": self.sha256_before, "sha256_after": self.sha256_after,
                "backup": self.backup, "mode": self.mode, "link_target": self.link_target,
                "uid": self.uid, "gid": self.gid}

    def like(self) -> os.stat_result | None:
        """The owner and mode to give the file when it is written back (None: unknown)."""
        if self.mode is None:
            return None
        uid = self.uid if self.uid is not None else os.geteuid()
        gid = self.gid if self.gid is not None else os.getegid()
        return os.stat_result((stat.S_IFREG | self.mode, 0, 0, 1, uid, gid, 0, 0, 0, 0))


def root_identity(root: str | Path) -> str | None:
    """What says a folder is the dataset a journal was made for, wherever it now is
    (moved or copied): the SHA-256 of its ``dataset_description.json`` (None: it has
    none)."""
    try:
        return file_sha256(Path(root) / "dataset_description.json")
    except OSError:
        return None


@dataclass
class Journal:
    """A fix journal as read back: its status, roots, temp token and entries."""
    path: Path
    status: str
    roots: list[str]
    token: str | None
    entries: list[JournalEntry]
    root_ids: list[str | None] = field(default_factory=list)
    #: entries that cannot be restored, with the reason (the others still are)
    refused: list[str] = field(default_factory=list)
    moved: bool = False  # a root is read at another place than the journal records


def _place_roots(content: dict[str, Any], where: Path, at: Path | None) -> dict[str, str]:
    """Where each root the journal names is now: as recorded, or ``at`` (the dataset
    moved or copied), checked by its identity (:func:`root_identity`), not its path."""
    roots: list[str] = content["roots"]
    ids: list[str | None] = list(content.get("root_ids") or [])
    ids = (ids + [None] * len(roots))[: len(roots)]
    placed: dict[str, str] = {}
    if at is not None:
        new = os.path.abspath(at)
        if not is_dataset_root(Path(new)):
            raise TransactionError(f"{at}: not a dataset (no dataset_description.json or sub-* "
                                   "folders); nothing was restored")
        have = root_identity(new)
        matching = [r for r, i in zip(roots, ids, strict=True) if i is not None and i == have]
        if len(roots) == 1 and not matching and ids[0] is None:
            matching = roots  # a journal from before identities: its only root
        if len(matching) != 1:
            raise TransactionError(
                f"{at}: not the dataset this journal was made for (its "
                "dataset_description.json differs from the one recorded); nothing was restored")
        placed[matching[0]] = new
    for root, ident in zip(roots, ids, strict=True):
        if root in placed:
            continue
        if not is_dataset_root(Path(root)):
            gone = "is not there any more" if not os.path.lexists(root) else "is not a dataset"
            raise TransactionError(
                f"{where}: the journal's dataset {root} {gone}; if the dataset was moved or "
                f"copied, give its new place: slicetime fix --undo {where} NEW-PLACE; "
                "nothing was restored")
        if ident is not None and root_identity(root) != ident:
            raise TransactionError(
                f"{where}: {root} is no longer the dataset this journal was made for (its "
                "dataset_description.json changed); nothing was restored")
        placed[root] = root
    return placed


def read_journal(journal_path: Path, at: Path | None = None) -> Journal:
    """A journal valid against its shipped schema, its roots placed
    (:func:`_place_roots`), every entry then checked against the file system: an
    entry out of bounds is refused with its reason, the others are kept."""
    content = read_document(journal_path, JOURNAL_SCHEMA, "journal", "nothing was restored")
    placed = _place_roots(content, journal_path, at)
    real_backup = os.path.realpath(journal_path.parent)
    entries: list[JournalEntry] = []
    refused: list[str] = []
    seen: set[tuple[str, str]] = set()
    for n, raw in enumerate(content["entries"], 1):
        root, file, action = raw["root"], raw["file"], raw["action"]
        shown = file if isinstance(file, str) and file else f"entry {n}"

        def refuse(why: str, shown: str = shown, n: int = n) -> None:
            refused.append(f"{shown}: not restored: {why} (journal entry {n})")

        if root not in placed:
            refuse(f"its root {root!r} is not one of the journal's roots")
            continue
        root = placed[root]
        problem = confinement_problem(root, file)
        if problem is not None:
            refuse(problem)
            continue
        if (root, file) in seen:
            refuse("it is recorded twice")
            continue
        seen.add((root, file))
        before = raw["sha256_before"]
        if (action == "created") != (before is None):
            refuse(f"a {action} file with{'' if before is not None else 'out'} sha256_before")
            continue
        entry = JournalEntry(root, file, action, before, raw["sha256_after"])
        if action == "modified":
            backup, mode = raw.get("backup"), raw.get("mode")
            if not backup:
                refuse("its backup is not named")
                continue
            pure = PurePosixPath(backup)
            real = os.path.realpath(journal_path.parent / backup)
            if (pure.is_absolute() or ".." in pure.parts or not pure.parts
                    or pure.parts[0] != "files" or not within(real, real_backup)):
                refuse(f"its backup {backup!r} is outside the backup folder")
                continue
            owner = (mode, raw.get("uid"), raw.get("gid"))
            if not all(v is None or (type(v) is int and 0 <= v < 1 << 32) for v in owner):
                refuse("its mode, uid or gid is not a whole number")
                continue
            entry.backup, entry.mode = backup, mode
            entry.uid, entry.gid = owner[1], owner[2]
        if action == "replaced-link":
            target = raw.get("link_target")
            landing = (os.path.normpath(os.path.join(os.path.dirname(entry.path), target))
                       if target else "")
            if not target or os.path.isabs(target) or not within(landing,
                                                                  os.path.normpath(root)):
                refuse(f"the link it replaced pointed to {target!r}, out of the dataset; "
                       "slicetime does not make links that leave a dataset (make it by "
                       f"hand: ln -s {target} {file})")
                continue
            entry.link_target = target
        entries.append(entry)
    return Journal(journal_path, content["status"], list(placed.values()),
                    content.get("temp_token"), entries,
                    list(content.get("root_ids") or [None] * len(placed)), refused,
                    moved=any(k != v for k, v in placed.items()))


def backup_bytes(entry: JournalEntry, backup: Path) -> bytes:
    """The backup of ``entry``, checked against its recorded SHA-256
    (:class:`TransactionError` if not)."""
    assert entry.backup is not None
    path = backup / entry.backup
    shown = str(path)
    try:
        fh, st = open_regular(path, shown, what="backup")
        with fh:
            data = read_bounded(fh, st.st_size, MAX_DOCUMENT_BYTES)
    except ReadError:
        raise TransactionError(
            f"{path}: the backup of {entry.file} is missing (or not a regular "
            "file)") from None
    if os.path.islink(path) or sha256_of(data) != entry.sha256_before:
        raise TransactionError(
            f"{path}: the backup of {entry.file} does not match the SHA-256 the "
            "journal recorded before the fix")
    return data


def entry_state(entry: JournalEntry) -> str:
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
