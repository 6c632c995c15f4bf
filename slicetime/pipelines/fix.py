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

``apply_plan`` writes each changed file atomically (temporary file, fsync,
rename) with the original's key order, indentation and final newline, after
copying it to a backup folder and recording a journal; it refuses a file that
is a symbolic link (annexed content: unlock it, or ``replace_links``),
read-only, or changed since the plan was made. ``undo`` restores every byte
from a journal.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import difflib
import hashlib
import json
import os
import shutil
from collections import defaultdict
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from slicetime import __version__
from slicetime.model import Finding, RunRecord
from slicetime.pipelines.audit import AuditResult, audit_paths
from slicetime.pipelines.executor import Executor
from slicetime.policy.checks import select_protocol
from slicetime.policy.loading import root_policies
from slicetime.policy.model import Policy
from slicetime.readers.dataset import find_root
from slicetime.readers.entities import parse_name, sidecar_path
from slicetime.readers.source import SourceOptions
from slicetime.readers.volumes import file_sha256
from slicetime.rules import RULES
from slicetime.rules.dataset import PROTOCOL_ENTITIES
from slicetime.rules.repairs import FIXABLE, Repair, plan_consensus, plan_run

JOURNAL_NAME = "journal.json"
PLAN_FORMAT = "slicetime-fix-plan"
JOURNAL_FORMAT = "slicetime-fix-journal"


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
        before = self.before.splitlines(keepends=True) if self.before is not None else []
        after = self.after.splitlines(keepends=True)
        lines = difflib.unified_diff(
            before, after,
            fromfile=f"a/{self.file}" if self.before is not None else "/dev/null",
            tofile=f"b/{self.file}",
        )
        return "".join(line if line.endswith("\n") else line + "\n" for line in lines)

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
        "evidence": dict(repair.evidence),
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


def _load_for_edit(path: Path) -> tuple[str, dict[str, Any]]:
    """The text and the ordered content of a sidecar about to be edited."""
    text = path.read_text(encoding="utf-8")
    pairs_seen: list[str] = []

    def no_duplicates(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
        keys = [k for k, _ in pairs]
        if len(keys) != len(set(keys)):
            pairs_seen.extend(k for k in keys if keys.count(k) > 1)
        return dict(pairs)

    data = json.loads(text, object_pairs_hook=no_duplicates)
    if pairs_seen:
        raise ValueError(f"it repeats the key {sorted(set(pairs_seen))[0]!r}; a rewrite would "
                         "drop one of the values, so fix that by hand first")
    if not isinstance(data, dict):
        raise ValueError("its top level is not a JSON object")
    return text, data


# --------------------------------------------------------------------------- planning


def _policies(roots: Sequence[Path], policy_file: Path | None) -> dict[str, Policy | None]:
    # a broken policy is reported by the audit itself
    return {str(r): p for r, p in root_policies(roots, policy_file, RULES).items()}


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
            before, data = _load_for_edit(path)
            style = JsonStyle.of(before)
        else:
            before, data, style = None, {}, JsonStyle()
    except (OSError, UnicodeDecodeError, ValueError) as exc:
        plan.notes.append(f"{file}: not changed: {exc}")
        return None
    chosen: list[Repair] = []
    for key, group in fields.items():
        values = {_value_key(r.value) for r in group}
        if len(values) != 1:
            plan.notes.append(f"{file}: {key} not changed: the repairs disagree on its value")
            continue
        if group[0].value is REMOVE:
            data.pop(key, None)
        else:
            data[key] = group[0].value
        chosen.extend(group)
    if not chosen:
        return None
    after = style.dumps(data)
    if after == before:
        return None
    return FileChange(root, file, before, after, _current_sha(path), chosen)


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
                source = record.metadata_sources.get(key)
                if source is not None and source != top:
                    moves.append((source, _move(record, key, REMOVE, "layout/consolidate",
                                                f"now inherited from {top}")))
    for key in spread:
        for record in records:
            source = record.metadata_sources.get(key)
            own = sidecar_path(record.path)
            if (record.root, record.path) not in wanted or source is None or source == own:
                continue
            if not all((u.root, u.path) in wanted for u in users[(record.root, source, key)]):
                note = (f"{source}: {key} not spread: it also serves runs outside the paths "
                        "given (give the whole dataset)")
                if note not in plan.notes:
                    plan.notes.append(note)
                continue
            value = record.metadata[key]
            moves.append((own, _move(record, key, value, "layout/spread",
                                     f"copied from {source} into the run's own sidecar")))
            moves.append((source, _move(record, key, REMOVE, "layout/spread",
                                        "now written in each run's own sidecar")))
    return moves


# --------------------------------------------------------------------------- plan files


def write_plan(plan: FixPlan, path: Path) -> None:
    _atomic_write(path, (json.dumps(plan.to_json(), indent=2) + "\n").encode("utf-8"), None)


def _load_marked(path: Path, marker: str, what: str) -> dict[str, Any]:
    """A JSON file slicetime wrote (a plan or a journal), checked by its format marker."""
    try:
        content = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise FixError(f"{path}: cannot read the {what} ({exc})") from None
    if not isinstance(content, dict) or content.get("format") != marker:
        raise FixError(f"{path}: not a slicetime fix {what} (format {marker!r} expected)")
    return content


def read_plan(path: Path) -> FixPlan:
    content = _load_marked(path, PLAN_FORMAT, "plan")
    plan = FixPlan(notes=list(content.get("notes", [])))
    for item in content.get("changes", []):
        try:
            root, file = str(item["root"]), str(item["file"])
            sha = item["sha256_before"]
            change = FileChange(root, file, None, str(item["content_after"]),
                                str(sha) if sha is not None else None)
        except (KeyError, TypeError):
            raise FixError(f"{path}: the plan is damaged (a change lacks root, file, "
                           "sha256_before or content_after)") from None
        if Path(file).is_absolute() or ".." in Path(file).parts:
            raise FixError(f"{path}: the plan names a file outside its dataset: {file}")
        plan.changes.append(change)
        runs = {str(r.get("run")) for r in item.get("repairs", []) if isinstance(r, dict)}
        plan.repaired_runs.setdefault(root, set()).update(runs)
    return plan


# --------------------------------------------------------------------------- applying


@dataclass
class ApplyResult:
    journal: Path | None
    written: list[str] = field(default_factory=list)
    refused: list[str] = field(default_factory=list)  # one line per refused file


def default_backup_dir(roots: Sequence[str]) -> Path:
    """``<dataset>-slicetime-backups/<UTC time>`` beside the (first) dataset root."""
    root = Path(roots[0]) if roots else Path.cwd()
    stamp = dt.datetime.now(dt.timezone.utc).strftime("%Y%m%dT%H%M%S%fZ")
    return root.parent / f"{root.name}-slicetime-backups" / stamp


def _refusal(change: FileChange, replace_links: bool, expected_sha: str | None) -> str | None:
    path = change.path
    if path.is_symlink():
        if not replace_links:
            target = os.readlink(path)
            kind = ("an annexed file" if "annex/objects" in target.replace("\\", "/")
                    else "a symbolic link")
            return (f"{change.file}: is {kind} (-> {target}); slicetime never writes through "
                    "links: unlock it with your annex tool (its unlock command), or pass "
                    "--replace-links to replace the link with a regular file")
    elif path.exists():
        if not os.access(path, os.W_OK):
            return f"{change.file}: is read-only; make it writable (chmod u+w) to fix it"
    if not os.access(path.parent if path.parent.exists() else Path(change.root), os.W_OK):
        return f"{change.file}: its folder is not writable"
    current = _current_sha(path)
    if current != expected_sha:
        return (f"{change.file}: changed since the plan was made (or created); make a new "
                "plan and review it")
    return None


def _current_sha(path: Path) -> str | None:
    try:
        return file_sha256(path)
    except FileNotFoundError:
        return None


def apply_plan(
    plan: FixPlan, *, backup_dir: Path | None = None, replace_links: bool = False
) -> ApplyResult:
    """Write the planned changes, each after a backup; return the journal's path."""
    if not plan.changes:
        return ApplyResult(None)
    backup = backup_dir or default_backup_dir([c.root for c in plan.changes])
    backup.mkdir(parents=True, exist_ok=True)
    journal_path = backup / JOURNAL_NAME
    entries: list[dict[str, Any]] = []
    result = ApplyResult(journal_path)
    for change in plan.changes:
        expected = change.sha256_before
        reason = _refusal(change, replace_links, expected)
        if reason is not None:
            result.refused.append(reason)
            continue
        path = change.path
        entry: dict[str, Any] = {"root": change.root, "file": change.file,
                                 "after_sha256": _sha(change.after.encode("utf-8"))}
        mode = None
        if path.is_symlink():
            entry.update(action="replaced-link", link_target=os.readlink(path),
                         before_sha256=expected, backup=None)
        elif path.exists():
            saved = backup / "files" / Path(change.root).name / change.file
            saved.parent.mkdir(parents=True, exist_ok=True)
            shutil.copy2(path, saved)
            mode = path.stat().st_mode & 0o7777
            entry.update(action="modified", before_sha256=expected,
                         backup=saved.relative_to(backup).as_posix(), mode=mode)
        else:
            entry.update(action="created", before_sha256=None, backup=None)
        entries.append(entry)
        _write_journal(journal_path, entries, "in progress")
        path.parent.mkdir(parents=True, exist_ok=True)
        _atomic_write(path, change.after.encode("utf-8"), mode)
        result.written.append(change.file)
    if entries:
        _write_journal(journal_path, entries, "applied")
    else:
        with contextlib.suppress(OSError):
            journal_path.unlink()
            backup.rmdir()
        result.journal = None
    return result


def _write_journal(path: Path, entries: list[dict[str, Any]], status: str) -> None:
    content = {
        "format": JOURNAL_FORMAT,
        "tool": {"name": "slicetime", "version": __version__},
        "status": status,
        "entries": entries,
    }
    _atomic_write(path, (json.dumps(content, indent=2) + "\n").encode("utf-8"), None)


def _atomic_write(path: Path, data: bytes, mode: int | None) -> None:
    """Write ``data`` to ``path`` by rename; a link at ``path`` is replaced, never followed."""
    tmp = path.with_name(f".{path.name}.slicetime-{os.getpid()}.tmp")
    try:
        with open(tmp, "xb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        if mode is not None:
            os.chmod(tmp, mode)
        os.replace(tmp, path)
    finally:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)


# --------------------------------------------------------------------------- undo


@dataclass
class UndoResult:
    restored: list[str] = field(default_factory=list)
    refused: list[str] = field(default_factory=list)


def undo(journal_path: Path) -> UndoResult:
    """Restore every file a journal records, newest first, byte for byte."""
    content = _load_marked(journal_path, JOURNAL_FORMAT, "journal")
    backup = journal_path.parent
    result = UndoResult()
    for entry in reversed(content.get("entries", [])):
        path = Path(entry["root"]) / entry["file"]
        if _current_sha(path) != entry["after_sha256"] and not (
            entry["action"] == "replaced-link" and path.is_symlink()
        ):
            result.refused.append(f"{entry['file']}: changed since the fix; not restored")
            continue
        action = entry["action"]
        if action == "created":
            path.unlink()
        elif action == "replaced-link":
            tmp = path.with_name(f".{path.name}.slicetime-{os.getpid()}.link")
            with contextlib.suppress(FileNotFoundError):
                os.unlink(tmp)
            os.symlink(entry["link_target"], tmp)
            os.replace(tmp, path)
        else:
            data = (backup / entry["backup"]).read_bytes()
            _atomic_write(path, data, entry.get("mode"))
        result.restored.append(entry["file"])
    return result


def reaudit(plan: FixPlan) -> list[Finding]:
    """Fixable findings left on the repaired runs after applying (should be none)."""
    left: list[Finding] = []
    for root, runs in plan.repaired_runs.items():
        result = audit_paths([Path(root)])
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
