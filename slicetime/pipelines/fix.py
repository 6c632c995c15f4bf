"""The repair pipeline: audit, plan sidecar changes, apply them safely, undo them.

``plan_fix`` audits the datasets that hold the given paths (the whole dataset,
so that a shared top-level sidecar is only changed when every run it serves
needs the same change), turns the fixable findings of the runs under the given
paths into :class:`~slicetime.rules.repairs.Repair` values, and decides where
each is written:

* where the current value is resolved (an inherited top-level file is changed
  once, for all its runs) when every run that inherits the field from it gets
  the same new value; otherwise, or with ``per_run``, in each run's own
  sidecar (created when missing), which overrides the inherited value;
* a field that is absent goes into the run's own sidecar.

``apply_plan`` applies a plan all or nothing under a per-dataset lock: every
file is checked first (links — annexed content: unlock it, or
``replace_links`` —, read-only, changed since the plan, outside its dataset),
then backed up, the journal written once, and each file replaced atomically
with only the edited value's text changed (:mod:`slicetime.pipelines.json_splice`).
``undo`` checks the whole journal and every backup's hash before it restores
any byte.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import difflib
import fcntl
import hashlib
import json
import math
import os
import re
import secrets
import socket
from collections import defaultdict
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path, PurePosixPath
from typing import Any

from slicetime import __version__
from slicetime.model import Finding, RunRecord
from slicetime.numbers import tidy_json
from slicetime.pipelines.audit import AuditResult, audit_paths
from slicetime.pipelines.executor import Executor
from slicetime.pipelines.json_splice import DELETE, Layout, scan, splice
from slicetime.policy.checks import select_protocol
from slicetime.policy.loading import root_policies
from slicetime.policy.model import Policy
from slicetime.readers.atomic import write_atomic
from slicetime.readers.dataset import find_root
from slicetime.readers.entities import parse_name, sidecar_path
from slicetime.readers.sidecar import MAX_SIDECAR_BYTES, TIMING_FIELDS
from slicetime.readers.source import SourceOptions
from slicetime.readers.volumes import file_sha256
from slicetime.rules.dataset import PROTOCOL_ENTITIES
from slicetime.rules.registry import RENAMED, known_codes
from slicetime.rules.repairs import FIXABLE, Repair, plan_consensus, plan_run

JOURNAL_NAME = "journal.json"
PLAN_FORMAT = "slicetime-fix-plan"
JOURNAL_FORMAT = "slicetime-fix-journal"
#: journal entry keys written by earlier releases, read as the keys they became
_JOURNAL_FORMER_KEYS = {"before_sha256": "sha256_before", "after_sha256": "sha256_after"}


class FixError(Exception):
    """A problem with what the user asked for (bad plan or journal file): exit 2."""


@dataclass
class FileChange:
    """One sidecar to create or rewrite."""

    root: str
    file: str  # relative to root, forward slashes
    before: str | None  # current text; None when the file does not exist (or unknown)
    after: str
    sha256_before: str | None  # of the bytes on disk when planned; None: no file then
    repairs: list[Repair] = field(default_factory=list)

    @property
    def path(self) -> Path:
        return Path(self.root) / self.file

    @property
    def runs(self) -> list[str]:
        return sorted({r.run for r in self.repairs})

    def diff(self) -> str:
        """A unified diff, one output line per line of the file.

        Characters that would break a line on screen (in the file name, or raw
        U+2028 in a JSON string) are written as escapes, so a renderer that
        splits on line breaks and escapes the rest sees the true lines.
        """
        before = _diff_lines(self.before) if self.before is not None else []
        after = _diff_lines(self.after)
        name = _one_line(self.file)
        lines = difflib.unified_diff(
            before, after,
            fromfile=f"a/{name}" if self.before is not None else "/dev/null",
            tofile=f"b/{name}", lineterm="",
        )
        return "".join(line + "\n" for line in lines)

    def to_json(self) -> dict[str, Any]:
        return {
            "root": self.root,
            "file": self.file,
            "sha256_before": self.sha256_before,
            "content_after": self.after,
            "runs": self.runs,
            "repairs": [_repair_json(r) for r in self.repairs],
        }


@dataclass
class FixPlan:
    changes: list[FileChange] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)  # repairs not planned, and why
    audit: AuditResult | None = None
    repaired_runs: dict[str, set[str]] = field(default_factory=dict)  # root -> runs

    def to_json(self) -> dict[str, Any]:
        return {
            "format": PLAN_FORMAT,
            "tool": {"name": "slicetime", "version": __version__},
            "changes": [c.to_json() for c in self.changes],
            "notes": self.notes,
        }


#: what str.splitlines breaks on, besides the newline itself
_BREAKS = re.compile("[\r\x0b\x0c\x1c-\x1e\x85\u2028\u2029\n]")


def _one_line(text: str) -> str:
    def escape(match: re.Match[str]) -> str:
        char = match.group(0)
        code = ord(char)
        named = {"\n": "\\n", "\r": "\\r"}
        return named.get(char) or (f"\\u{code:04x}" if code > 0xFF else f"\\x{code:02x}")

    return _BREAKS.sub(escape, text)


def _diff_lines(text: str) -> list[str]:
    lines = text.split("\n")
    if lines and lines[-1] == "":
        lines.pop()  # the final newline ends the last line; it is not a line of its own
    return [_one_line(line) for line in lines]


def _repair_json(repair: Repair) -> dict[str, Any]:
    return {
        "run": repair.run,
        "code": repair.code,
        "field": repair.field,
        "value": None if repair.value is REMOVE else repair.value,
        "remove": repair.value is REMOVE,
        "current": repair.current,
        "resolved_from": repair.resolved_from,
        "source": repair.source,
        "grounds": tidy_json(dict(repair.evidence)),
    }


def _sha(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


# --------------------------------------------------------------------------- JSON style


@dataclass(frozen=True)
class JsonStyle:
    """How a sidecar was written, so a rewrite looks like its neighbours."""

    indent: int | str | None = 2
    separators: tuple[str, str] = (",", ": ")
    ensure_ascii: bool = False
    final_newline: bool = True

    @classmethod
    def of(cls, text: str) -> JsonStyle:
        lines = text.splitlines()
        indent: int | str | None = None
        for line in lines[1:]:
            stripped = line.lstrip(" \t")
            if stripped and len(stripped) < len(line):
                lead = line[: len(line) - len(stripped)]
                indent = "\t" if lead.startswith("\t") else len(lead)
                break
        compact = '":' in text and '": ' not in text
        item = "," if indent is not None else ", "
        separators = (",", ":") if compact else (item, ": ")
        escaped = "\\u" in text and all(ord(c) < 128 for c in text)
        return cls(indent, separators, escaped, text.endswith("\n"))

    def dumps(self, data: Any) -> str:
        text = json.dumps(data, indent=self.indent, separators=self.separators,
                          ensure_ascii=self.ensure_ascii, allow_nan=False)
        return text + ("\n" if self.final_newline else "")


def _load_for_edit(path: Path) -> tuple[str, Layout]:
    """The exact text of a sidecar about to be edited, and where its members sit."""
    if path.is_symlink() and not path.is_file():
        raise ValueError("it is a link to something that is not a regular file")
    if path.exists() and not path.is_file():
        raise ValueError("it is not a regular file")
    with open(path, "rb") as fh:
        data = fh.read(MAX_SIDECAR_BYTES + 1)
    if len(data) > MAX_SIDECAR_BYTES:
        raise ValueError(f"it is larger than {MAX_SIDECAR_BYTES} bytes")
    text = data.decode("utf-8")  # no newline translation: every byte is kept
    return text, scan(text)


# --------------------------------------------------------------------------- planning


def _policies(roots: Sequence[Path], policy_file: Path | None) -> dict[str, Policy | None]:
    # a broken policy is reported by the audit itself
    return {str(r): p for r, p in root_policies(roots, policy_file, known_codes(),
                                                renamed=RENAMED).items()}


def _under(run: RunRecord, wanted: Sequence[Path]) -> bool:
    real = Path(os.path.realpath(run.abs_path))
    for target in wanted:
        if real == target or target in real.parents:
            return True
    return False


def plan_fix(
    paths: Sequence[Path],
    *,
    per_run: bool = False,
    policy_file: Path | None = None,
    executor: Executor | None = None,
    consolidate: Sequence[str] = (),
    spread: Sequence[str] = (),
    source: SourceOptions | None = None,
) -> FixPlan:
    """Audit the datasets holding ``paths`` and plan the repairs of the runs under them.

    ``consolidate`` fields identical in the own sidecars of every run of a task and
    acquisition move into one top-level sidecar; ``spread`` fields move from the
    shared sidecars that supply them into each run's own sidecar.
    """
    roots = sorted({find_root(Path(p)) for p in paths}, key=str)
    targets = [Path(os.path.realpath(p)) for p in paths]
    audit = audit_paths(list(roots), policy_file=policy_file, executor=executor, source=source)
    policies = _policies(roots, policy_file)
    plan = FixPlan(audit=audit)
    runs: list[tuple[RunRecord, list[Finding]]] = [(r.record, r.findings) for r in audit.runs]
    _check_fields(runs, consolidate, spread)
    # the runs under the given paths, resolved once (realpath per run is file-system work)
    wanted = {(r.root, r.path) for r, _ in runs if _under(r, targets)}
    repairs: list[Repair] = []
    for record, findings in runs:
        if (record.root, record.path) not in wanted or not {f.code for f in findings} & FIXABLE:
            continue
        policy = policies.get(record.root)
        protocol = select_protocol(policy, record).protocol if policy is not None else None
        repairs += plan_run(record, findings, protocol)
    consensus = plan_consensus(runs, repairs)
    repairs += [r for r in consensus if (r.root, r.run) in wanted]
    _explain_unrepaired(runs, wanted, repairs, plan)
    moves = _layout_moves(runs, wanted, consolidate, spread, plan)
    _place(repairs, runs, per_run, plan, moves)
    for repair in repairs:
        plan.repaired_runs.setdefault(repair.root, set()).add(repair.run)
    return plan


def _check_fields(
    runs: Sequence[tuple[RunRecord, list[Finding]]],
    consolidate: Sequence[str],
    spread: Sequence[str],
) -> None:
    """``FixError`` for a --consolidate/--spread field that no run has and BIDS timing lacks."""
    asked = [("--consolidate", k) for k in consolidate] + [("--spread", k) for k in spread]
    if not asked:
        return
    known = set(TIMING_FIELDS)
    for record, _ in runs:
        known.update(record.metadata)
    for option, key in asked:
        if key not in known:
            close = difflib.get_close_matches(key, sorted(known), n=1, cutoff=0.6)
            guess = f"; did you mean {close[0]!r}?" if close else ""
            raise FixError(f"{option} {key!r}: no run in the dataset has this field and it is "
                           f"not a known timing field{guess}")


def _explain_unrepaired(
    runs: Sequence[tuple[RunRecord, list[Finding]]],
    wanted: set[tuple[str, str]],
    repairs: Sequence[Repair],
    plan: FixPlan,
) -> None:
    done = {(r.root, r.run, r.code) for r in repairs}
    from slicetime.rules.repairs import SOURCE_TIMING_CODES  # source: see rules/repairs.py

    # SliceTiming rebuilt from the source series settles the run's other timing findings
    sourced = {(r.root, r.run) for r in repairs if r.code in SOURCE_TIMING_CODES}
    for record, findings in runs:
        if (record.root, record.path) not in wanted:
            continue
        for finding in findings:
            if finding.code in FIXABLE and (record.root, record.path, finding.code) not in done \
                    and (record.root, record.path) not in sourced:
                plan.notes.append(
                    f"{record.path}: {finding.code} not repaired: the evidence does not settle "
                    "the value (see slicetime show)"
                )


def _place(
    repairs: Sequence[Repair],
    runs: Sequence[tuple[RunRecord, list[Finding]]],
    per_run: bool,
    plan: FixPlan,
    moves: Sequence[tuple[str, Repair]] = (),
) -> None:
    """Decide the file of every repair, then build the new content of every file."""
    users: dict[tuple[str, str, str], set[str]] = defaultdict(set)
    for record, _ in runs:
        for key, source in record.metadata_sources.items():
            users[(record.root, source, key)].add(record.path)
    by_shared: dict[tuple[str, str, str], list[Repair]] = defaultdict(list)
    for repair in repairs:
        if repair.resolved_from is not None:
            by_shared[(repair.root, repair.resolved_from, repair.field)].append(repair)
    targets: dict[tuple[str, str], dict[str, list[Repair]]] = defaultdict(lambda: defaultdict(list))
    for repair in repairs:
        target = sidecar_path(repair.run)
        shared = repair.resolved_from
        if shared is not None and shared != target and not per_run:
            group = by_shared[(repair.root, shared, repair.field)]
            values = {json.dumps(r.value) for r in group}
            served = users[(repair.root, shared, repair.anchor_field)]
            if len(values) == 1 and served <= {r.run for r in group}:
                target = shared
            else:
                note = (f"{shared} also gives {repair.field} to runs that need another value "
                        "(or none): writing per-run overrides")
                if note not in plan.notes:
                    plan.notes.append(note)
        targets[(repair.root, target)][repair.field].append(repair)
    for file, move in moves:
        targets[(move.root, file)][move.field].append(move)
    for (root, file), fields in sorted(targets.items()):
        change = _build_change(root, file, fields, plan)
        if change is not None:
            plan.changes.append(change)


def _build_change(
    root: str, file: str, fields: dict[str, list[Repair]], plan: FixPlan
) -> FileChange | None:
    path = Path(root) / file
    try:
        if path.exists() or path.is_symlink():
            before: str | None
            before, _ = _load_for_edit(path)
        else:
            before = None
    except (OSError, UnicodeDecodeError, ValueError) as exc:
        plan.notes.append(f"{file}: not changed: {_reason(exc)}")
        return None
    chosen: list[Repair] = []
    edits: list[tuple[str, Any]] = []
    for key, group in fields.items():
        values = {_value_key(r.value) for r in group}
        if len(values) != 1:
            plan.notes.append(f"{file}: {key} not changed: the repairs disagree on its value")
            continue
        if group[0].value is not REMOVE and not _finite(group[0].value):
            plan.notes.append(f"{file}: {key} not changed: the new value is not a finite number")
            continue
        edits.append((key, DELETE if group[0].value is REMOVE else group[0].value))
        chosen.extend(group)
    if not chosen:
        return None
    if before is None:
        after = JsonStyle().dumps({k: v for k, v in edits if v is not DELETE})
    else:
        try:
            after = splice(before, edits)
        except ValueError as exc:
            plan.notes.append(f"{file}: not changed: {_reason(exc)}")
            return None
    if after == before:
        return None
    return FileChange(root, file, before, after, _current_sha(path), chosen)


def _reason(exc: BaseException) -> str:
    if isinstance(exc, OSError):
        return exc.strerror or str(exc)
    if isinstance(exc, UnicodeDecodeError):
        return "it is not UTF-8 text"
    return str(exc)


def _finite(value: Any) -> bool:
    if isinstance(value, float):
        return math.isfinite(value)
    if isinstance(value, list | tuple):
        return all(_finite(v) for v in value)
    if isinstance(value, dict):
        return all(_finite(v) for v in value.values())
    return True


# --------------------------------------------------------------------------- layout


class _Remove:
    """The value of a repair that deletes its field."""

    def __repr__(self) -> str:
        return "REMOVE"


REMOVE: Any = _Remove()


def _value_key(value: Any) -> str:
    return "<remove>" if value is REMOVE else json.dumps(value, sort_keys=True)


def _top_name(record: RunRecord) -> str:
    """The root-level sidecar for the run's task and acquisition: ``task-x[_acq-y]_bold.json``."""
    parts = [f"{e}-{record.entities[e]}" for e in PROTOCOL_ENTITIES if e in record.entities]
    return "_".join([*parts, record.suffix]) + ".json"


def _applies(top: str, record: RunRecord) -> bool:
    parsed = parse_name(top)
    return parsed is not None and parsed.suffix == record.suffix and all(
        record.entities.get(k) == v for k, v in parsed.entities.items()
    )


def _move(record: RunRecord, key: str, value: Any, code: str, source: str) -> Repair:
    return Repair(run=record.path, root=record.root, code=code, field=key, value=value,
                  current=record.metadata.get(key),
                  resolved_from=record.metadata_sources.get(key), source=source)


def _layout_moves(
    runs: Sequence[tuple[RunRecord, list[Finding]]],
    wanted: set[tuple[str, str]],
    consolidate: Sequence[str],
    spread: Sequence[str],
    plan: FixPlan,
) -> list[tuple[str, Repair]]:
    """(file, repair) pairs that move fields between run and top-level sidecars."""
    records = [r for r, _ in runs if r.header is not None]
    users: dict[tuple[str, str, str], list[RunRecord]] = defaultdict(list)
    for record in records:
        for name, source in record.metadata_sources.items():
            users[(record.root, source, name)].append(record)
    moves: list[tuple[str, Repair]] = []
    for key in consolidate:
        groups: dict[tuple[str, str], list[RunRecord]] = defaultdict(list)
        for record in records:
            if (record.root, record.path) in wanted and record.suffix:
                groups[(record.root, _top_name(record))].append(record)
        for (root, top), members in sorted(groups.items()):
            affected = [r for r in records if r.root == root and _applies(top, r)]
            values = {_value_key(r.metadata.get(key)) for r in affected}
            if len(affected) < 2 or len(values) != 1 or key not in affected[0].metadata:
                plan.notes.append(f"{top}: {key} not consolidated: the {len(affected)} runs "
                                  "it would serve do not all have one value")
                continue
            if all(r.metadata_sources.get(key) == top for r in affected):
                continue  # already written once
            sources = {r.metadata_sources[key] for r in affected} - {top}
            outside = [s for s in sorted(sources)
                       if not {u.path for u in users[(root, s, key)]} <= {a.path for a in affected}]
            if outside:
                plan.notes.append(f"{top}: {key} not consolidated: {outside[0]} also gives it "
                                  "to runs of other tasks or acquisitions")
                continue
            value = affected[0].metadata[key]
            why = f"one value shared by the {len(affected)} runs {top} serves"
            moves.append((top, _move(members[0], key, value, "layout/consolidate", why)))
            for record in affected:
                origin = record.metadata_sources.get(key)
                if origin is not None and origin != top:
                    moves.append((origin, _move(record, key, REMOVE, "layout/consolidate",
                                                f"now inherited from {top}")))
    for key in spread:
        for record in records:
            origin = record.metadata_sources.get(key)
            own = sidecar_path(record.path)
            if (record.root, record.path) not in wanted or origin is None or origin == own:
                continue
            if not all((u.root, u.path) in wanted for u in users[(record.root, origin, key)]):
                note = (f"{origin}: {key} not spread: it also serves runs outside the paths "
                        "given (give the whole dataset)")
                if note not in plan.notes:
                    plan.notes.append(note)
                continue
            value = record.metadata[key]
            moves.append((own, _move(record, key, value, "layout/spread",
                                     f"copied from {origin} into the run's own sidecar")))
            moves.append((origin, _move(record, key, REMOVE, "layout/spread",
                                        "now written in each run's own sidecar")))
    return moves


# --------------------------------------------------------------------------- confinement

_SHA = re.compile(r"[0-9a-f]{64}\Z")
_TOKEN = re.compile(r"[0-9a-f]{8,32}\Z")


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


def _inside(path: str, folder: str) -> bool:
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
    if not _inside(real_folder, real_root):
        return f"the folder of {file!r} leads out of the dataset through a link"
    return None


def _check_root(root: object, where: Path, what: str) -> str:
    if not isinstance(root, str) or not is_dataset_root(Path(root)):
        raise FixError(f"{where}: the {what} names {root!r} as a dataset root, but it is not "
                       "one (an absolute folder with dataset_description.json or sub-* "
                       f"folders); the whole {what} is refused, nothing was "
                       f"{'restored' if what == 'journal' else 'written'}")
    return root


# --------------------------------------------------------------------------- plan files


def write_plan(plan: FixPlan, path: Path) -> None:
    _atomic_write(path, (json.dumps(plan.to_json(), indent=2) + "\n").encode("utf-8"), None)


def _load_marked(path: Path, marker: str, what: str) -> dict[str, Any]:
    """A JSON file slicetime wrote (a plan or a journal), checked by its format marker."""
    try:
        with open(path, "rb") as fh:
            raw = fh.read(1 << 30)
        content = json.loads(raw.decode("utf-8"))
    except (OSError, ValueError) as exc:
        why = exc.strerror if isinstance(exc, OSError) and exc.strerror else str(exc)
        raise FixError(f"{path}: cannot read the {what} ({why})") from None
    if not isinstance(content, dict) or content.get("format") != marker:
        raise FixError(f"{path}: not a slicetime fix {what} (format {marker!r} expected)")
    return content


def read_plan(path: Path) -> FixPlan:
    """A saved plan, every change confined to a dataset root re-checked now."""
    content = _load_marked(path, PLAN_FORMAT, "plan")
    notes = content.get("notes", [])
    plan = FixPlan(notes=[str(n) for n in notes] if isinstance(notes, list) else [])
    changes = content.get("changes", [])
    if not isinstance(changes, list):
        raise FixError(f"{path}: the plan is damaged (changes is not a list)")
    for n, item in enumerate(changes, 1):
        if not isinstance(item, dict) or not all(
            k in item for k in ("root", "file", "sha256_before", "content_after")
        ):
            raise FixError(f"{path}: the plan is damaged (change {n} lacks root, file, "
                           "sha256_before or content_after)")
        root = _check_root(item["root"], path, "plan")
        file, sha, after = item["file"], item["sha256_before"], item["content_after"]
        problem = confinement_problem(root, file)
        if problem is not None:
            raise FixError(f"{path}: change {n}: {problem}; the whole plan is refused")
        if sha is not None and not (isinstance(sha, str) and _SHA.match(sha)):
            raise FixError(f"{path}: change {n}: sha256_before is not a SHA-256")
        try:
            parsed = json.loads(after) if isinstance(after, str) else None
        except ValueError:
            parsed = None
        if not isinstance(parsed, dict):
            raise FixError(f"{path}: change {n}: content_after is not a JSON object")
        plan.changes.append(FileChange(root, str(file), None, after, sha))
        repairs = item.get("repairs", [])
        runs = {str(r.get("run")) for r in repairs if isinstance(r, dict)} if isinstance(
            repairs, list) else set()
        plan.repaired_runs.setdefault(root, set()).update(runs)
    return plan


# --------------------------------------------------------------------------- locking

LOCK_NAME = ".slicetime-fix.lock"


def _lock_one(root: Path) -> tuple[Path, int]:
    """Hold ``root/.slicetime-fix.lock`` (flock); the kernel frees it if the process dies."""
    path = root / LOCK_NAME
    for _ in range(5):
        try:
            fd = os.open(path, os.O_RDWR | os.O_CREAT | getattr(os, "O_NOFOLLOW", 0), 0o644)
        except OSError as exc:
            raise FixError(f"{root}: cannot create the lock file {LOCK_NAME} "
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
            raise FixError(f"{root}: another slicetime fix is writing this dataset now "
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
    raise FixError(f"{root}: cannot take the lock {LOCK_NAME}: it keeps being replaced")


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


def _refusal(change: FileChange, replace_links: bool, expected_sha: str | None) -> str | None:
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
        current = _current_sha(path)
    except OSError as exc:
        return f"{change.file}: cannot be read ({exc.strerror or exc})"
    if current != expected_sha:
        return (f"{change.file}: changed since the plan was made (or created); make a new "
                "plan and review it")
    return None


def preflight(plan: FixPlan, replace_links: bool = False) -> list[str]:
    """Every file ``apply_plan`` would refuse, one line each (none: it can write all)."""
    out = []
    for change in plan.changes:
        reason = _refusal(change, replace_links, change.sha256_before)
        if reason is not None:
            out.append(reason)
    return out


def _current_sha(path: Path) -> str | None:
    try:
        return file_sha256(path)
    except FileNotFoundError:
        return None


def _prepare_backup_dir(backup_dir: Path | None, roots: Sequence[str]) -> Path:
    if backup_dir is not None:
        backup = Path(os.path.abspath(backup_dir))
        if (backup / JOURNAL_NAME).exists() or (backup / JOURNAL_NAME).is_symlink():
            raise FixError(f"{backup}: already holds the journal of an earlier --apply; give "
                           "a new or empty --backup-dir (the earlier journal is needed to "
                           "undo that fix)")
    else:
        backup = default_backup_dir(roots)
    real = os.path.realpath(backup)
    for root in roots:
        if _inside(real, os.path.realpath(root)):
            raise FixError(f"{backup}: the backups would be inside the dataset {root}; "
                           "choose a --backup-dir outside it")
    base = backup
    for n in range(1, 1000):
        try:
            backup.mkdir(parents=True, exist_ok=backup_dir is not None)
            return backup
        except FileExistsError:
            backup = base.with_name(f"{base.name}-{n}")
    raise FixError(f"{base}: cannot make a new backup folder there")


def apply_plan(
    plan: FixPlan, *, backup_dir: Path | None = None, replace_links: bool = False
) -> ApplyResult:
    """Write the planned changes, all or none, after backing every file up.

    Under the lock of every dataset root: every file is checked first (links,
    read-only, changed since the plan, out of its dataset) and one refusal
    writes nothing. Then each original is copied to the backup folder, the
    journal (before and after SHA-256 of every file) is written once, and the
    files are replaced atomically. When a write fails, the files already written
    are put back from the backups.
    """
    if not plan.changes:
        return ApplyResult(None)
    roots = list(dict.fromkeys(c.root for c in plan.changes))
    with dataset_lock(roots):
        refused = preflight(plan, replace_links)
        if refused:
            return ApplyResult(None, refused=refused)
        backup = _prepare_backup_dir(backup_dir, roots)
        return _apply_checked(plan, roots, backup)


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


def _apply_checked(plan: FixPlan, roots: list[str], backup: Path) -> ApplyResult:
    journal_path = backup / JOURNAL_NAME
    token = secrets.token_hex(8)
    entries: list[JournalEntry] = []
    for change in plan.changes:
        path = change.path
        entry = JournalEntry(change.root, change.file, "created", None,
                             _sha(change.after.encode("utf-8")))
        if path.is_symlink():
            entry.action, entry.link_target = "replaced-link", os.readlink(path)
            entry.sha256_before = change.sha256_before
        elif path.exists():
            data = path.read_bytes()
            if _sha(data) != change.sha256_before:
                raise FixError(f"{change.file}: changed while the backups were being made; "
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
    for n, (change, entry) in enumerate(zip(plan.changes, entries, strict=True)):
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
        except (OSError, FixError):
            stuck.append(entry.file)
    why = exc.strerror or str(exc)
    if stuck:
        raise FixError(f"cannot write {file} ({why}); {len(done) - len(stuck)} of the "
                       f"{len(done)} files written before it were put back, not "
                       f"{', '.join(stuck[:3])}: run slicetime fix --undo {journal_path}")
    with contextlib.suppress(OSError):
        _write_journal(journal_path, roots, token, done, "rolled back")
    raise FixError(f"cannot write {file} ({why}); nothing is changed: the {len(done)} files "
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
    """A journal with every entry checked; one entry out of bounds refuses it all."""
    content = _load_marked(journal_path, JOURNAL_FORMAT, "journal")
    where = journal_path

    def damaged(why: str) -> FixError:
        return FixError(f"{where}: {why}; the journal is refused, nothing was restored")

    raw_entries = content.get("entries")
    if not isinstance(raw_entries, list):
        raise damaged("it has no list of entries")
    raw_roots = content.get("roots")
    if raw_roots is None:  # journals written before roots were recorded
        raw_roots = list(dict.fromkeys(e.get("root") for e in raw_entries if isinstance(e, dict)))
    if not isinstance(raw_roots, list):
        raise damaged("its roots are not a list")
    roots = [_check_root(r, where, "journal") for r in raw_roots]
    token = content.get("temp_token")
    if token is not None and not (isinstance(token, str) and _TOKEN.match(token)):
        raise damaged("its temp_token is malformed")
    status = content.get("status")
    real_backup = os.path.realpath(journal_path.parent)
    entries: list[JournalEntry] = []
    seen: set[tuple[str, str]] = set()
    for n, raw in enumerate(raw_entries, 1):
        if not isinstance(raw, dict):
            raise damaged(f"entry {n} is not an object")
        for former, key in _JOURNAL_FORMER_KEYS.items():  # journals before 0.2
            if former in raw and key not in raw:
                raw = {**raw, key: raw[former]}
        for key in ("root", "file", "action", "sha256_after"):
            if key not in raw:
                raise damaged(f"entry {n} lacks {key!r}")
        root, file, action = raw["root"], raw["file"], raw["action"]
        if root not in roots:
            raise damaged(f"entry {n}: its root {root!r} is not one of the journal's roots")
        problem = confinement_problem(root, file)
        if problem is not None:
            raise damaged(f"entry {n}: {problem}")
        if (root, file) in seen:
            raise damaged(f"entry {n}: {file!r} is recorded twice")
        seen.add((root, file))
        after, before = raw["sha256_after"], raw.get("sha256_before")
        if not (isinstance(after, str) and _SHA.match(after)):
            raise damaged(f"entry {n}: sha256_after is not a SHA-256")
        entry = JournalEntry(root, file, str(action), None, after)
        if action == "created":
            if before is not None:
                raise damaged(f"entry {n}: a created file has a sha256_before")
        elif action in ("modified", "replaced-link"):
            if not (isinstance(before, str) and _SHA.match(before)):
                raise damaged(f"entry {n}: sha256_before is missing or not a SHA-256")
            entry.sha256_before = before
        else:
            raise damaged(f"entry {n}: unknown action {action!r}")
        if action == "modified":
            backup, mode = raw.get("backup"), raw.get("mode")
            if not isinstance(backup, str) or not backup:
                raise damaged(f"entry {n}: the backup of {file!r} is not named")
            pure = PurePosixPath(backup)
            real = os.path.realpath(journal_path.parent / backup)
            if (pure.is_absolute() or ".." in pure.parts or not pure.parts
                    or pure.parts[0] != "files" or not _inside(real, real_backup)):
                raise damaged(f"entry {n}: the backup {backup!r} is outside the backup folder")
            if mode is not None and not (isinstance(mode, int) and 0 <= mode <= 0o7777):
                raise damaged(f"entry {n}: mode is not a file mode")
            entry.backup, entry.mode = backup, mode
        if action == "replaced-link":
            target = raw.get("link_target")
            if not isinstance(target, str) or not target or os.path.isabs(target):
                raise damaged(f"entry {n}: link_target is missing or absolute")
            landing = os.path.normpath(os.path.join(os.path.dirname(entry.path), target))
            if not _inside(landing, os.path.normpath(root)):
                raise damaged(f"entry {n}: the link target {target!r} points out of the dataset")
            entry.link_target = target
        entries.append(entry)
    return _Journal(journal_path, str(status), roots, token, entries)


def _backup_bytes(entry: JournalEntry, backup: Path) -> bytes:
    """The backup of ``entry``, checked against its recorded SHA-256 (``FixError`` if not)."""
    assert entry.backup is not None
    path = backup / entry.backup
    if path.is_symlink() or not path.is_file():
        raise FixError(f"{path}: the backup of {entry.file} is missing (or not a regular "
                       "file); nothing was restored")
    data = path.read_bytes()
    if _sha(data) != entry.sha256_before:
        raise FixError(f"{path}: the backup of {entry.file} does not match the SHA-256 the "
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
    sha = _current_sha(path)
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
            except (OSError, FixError) as exc:
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


def reaudit(plan: FixPlan, *, policy_file: Path | None = None,
            source: SourceOptions | None = None) -> list[Finding]:
    """Fixable findings left on the repaired runs after applying (should be none).
    ``policy_file`` and ``source``: as the plan was made with (a code the lab policy
    ignores, or a series only the source map names, must not come back here)."""
    left: list[Finding] = []
    for root, runs in plan.repaired_runs.items():
        result = audit_paths([Path(root)], policy_file=policy_file, source=source)
        for run in result.runs:
            if run.record.path in runs:
                left.extend(f for f in run.findings if f.code in FIXABLE)
    return left


__all__ = [
    "ApplyResult",
    "FileChange",
    "FixError",
    "FixPlan",
    "JsonStyle",
    "UndoResult",
    "apply_plan",
    "default_backup_dir",
    "plan_fix",
    "read_plan",
    "reaudit",
    "undo",
    "write_plan",
]
