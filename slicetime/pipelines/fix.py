"""The repair pipeline: audit, plan sidecar changes and where each is written.

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

Each file's new text changes only the edited values
(:mod:`slicetime.pipelines.json_splice`). The ``--consolidate``/``--spread`` moves
are planned in :mod:`slicetime.pipelines.fix_layout`; applying a plan all or nothing
(lock, backups, journal, roll back) and undoing it is the generic transaction of
:mod:`slicetime.pipelines.transaction`. A saved plan read back is validated by its
shipped schema (``fix-plan.schema.json``).
"""

from __future__ import annotations

import difflib
import json
import math
import os
import re
from collections import defaultdict
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from slicetime import __version__
from slicetime.model import Finding, RunRecord
from slicetime.numbers import tidy_json
from slicetime.pipelines.audit import AuditResult, audit_paths, policy_problem
from slicetime.pipelines.executor import Executor
from slicetime.pipelines.fix_layout import REMOVE, check_fields, layout_moves, value_key
from slicetime.pipelines.journal import (
    TransactionError,
    check_root,
    confinement_problem,
    read_document,
    sha256_of,
)
from slicetime.pipelines.json_splice import DELETE, Layout, scan, splice
from slicetime.pipelines.transaction import (
    ApplyResult,
    Interrupted,
    UndoResult,
    apply_changes,
    recover,
    undo,
)
from slicetime.pipelines.transaction import preflight as preflight_changes
from slicetime.policy.checks import select_protocol
from slicetime.policy.loading import root_policies
from slicetime.policy.model import Policy
from slicetime.readers.atomic import write_atomic
from slicetime.readers.dataset import find_root
from slicetime.readers.entities import sidecar_path
from slicetime.readers.errors import ReadError, open_regular, read_bounded
from slicetime.readers.sidecar import MAX_SIDECAR_BYTES
from slicetime.readers.source import SourceOptions
from slicetime.rules.correction import DOUBTED_FIELDS, undecided_doubt, undecided_reason
from slicetime.rules.registry import RENAMED, known_codes
from slicetime.rules.repairs import FIXABLE, Repair, plan_consensus, plan_run, window_distrust

PLAN_FORMAT = "slicetime-fix-plan"
#: the shipped schema of a saved plan (``slicetime/data/fix-plan.schema.json``)
PLAN_SCHEMA = "fix-plan"


class FixError(TransactionError):
    """A problem with what the user asked for (a field to move that no run has, a bad
    plan file): exit 2. The transaction's own refusals are its parent class."""


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


@dataclass(frozen=True)
class Unplanned:
    """A finding the audit calls fixable that the plan does not repair, and why."""

    root: str
    run: str
    code: str
    reason: str

    def line(self) -> str:
        return f"{self.run}: {self.code} not planned: {self.reason}"


#: why a fixable finding is not planned, when nothing more precise is known
UNSETTLED = "the evidence does not settle the value (see slicetime show)"


@dataclass
class FixPlan:
    changes: list[FileChange] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)  # other remarks (layout, placement)
    audit: AuditResult | None = None
    repaired_runs: dict[str, set[str]] = field(default_factory=dict)  # root -> runs
    #: every fixable finding under the given paths that no change repairs (exit 1)
    unplanned: list[Unplanned] = field(default_factory=list)
    #: the runs (root, path) under the given paths: the audit also holds the rest of
    #: their datasets (for inherited files and dataset rules), which the plan leaves be
    given: frozenset[tuple[str, str]] | None = None

    def to_json(self) -> dict[str, Any]:
        return {
            "format": PLAN_FORMAT,
            "tool": {"name": "slicetime", "version": __version__},
            "changes": [c.to_json() for c in self.changes],
            "notes": [*(u.line() for u in self.unplanned), *self.notes],
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
        "evidence": tidy_json(dict(repair.evidence)),
    }


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


def _load_for_edit(path: Path, root: str) -> tuple[str, Layout]:
    """The exact text of a sidecar about to be edited, and where its members sit (read
    as the audit reads it: a regular file only, never through a link out of the
    dataset ``root``)."""
    if path.is_symlink() and not path.is_file():
        raise ValueError("it is a link to something that is not a regular file")
    if path.exists() and not path.is_file():
        raise ValueError("it is not a regular file")
    try:
        fh, st = open_regular(path, str(path), what="sidecar", root=root)
    except ReadError as exc:
        raise ValueError(exc.message.removeprefix(f"{path}: ")) from None
    with fh:
        data = read_bounded(fh, st.st_size, MAX_SIDECAR_BYTES)
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
    """Whether the run lies under a given path: where its file really is, or where the
    walk found it (a subject folder that is a link is walked as part of its dataset)."""
    real = Path(os.path.realpath(run.abs_path))
    walked = Path(os.path.realpath(run.root)) / run.path
    for target in wanted:
        for place in (real, walked):
            if place == target or target in place.parents:
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
    # the given paths too: one behind a link out of its dataset is walked only when given
    audit = audit_paths([*roots, *(Path(p) for p in paths)], policy_file=policy_file,
                        executor=executor, source=source)
    _refuse_broken_policy(audit.policy_problem())
    policies = _policies(roots, policy_file)
    plan = FixPlan(audit=audit)
    runs: list[tuple[RunRecord, list[Finding]]] = [(r.record, r.findings) for r in audit.runs]
    problem = check_fields(runs, consolidate, spread)
    if problem is not None:
        raise FixError(problem)
    # the runs under the given paths, resolved once (realpath per run is file-system work)
    wanted = {(r.root, r.path) for r, _ in runs if _under(r, targets)}
    plan.given = frozenset(wanted)
    repairs: list[Repair] = []
    for record, findings in runs:
        if (record.root, record.path) not in wanted or not {f.code for f in findings} & FIXABLE:
            continue
        policy = policies.get(record.root)
        protocol = select_protocol(policy, record).protocol if policy is not None else None
        repairs += plan_run(record, findings, protocol)
    consensus = plan_consensus(runs, repairs)
    repairs += [r for r in consensus if (r.root, r.run) in wanted]
    repairs, doubted = _undecided(runs, repairs)
    moves = layout_moves(runs, wanted, consolidate, spread, plan.notes)
    _place(repairs, runs, per_run, plan, moves)
    reasons = {**doubted, **_confine(plan)}
    _unplanned(runs, wanted, plan, reasons)
    for repair in repairs:
        if (repair.root, repair.run, repair.code) not in reasons:
            plan.repaired_runs.setdefault(repair.root, set()).add(repair.run)
    return plan


def _refuse_broken_policy(problem: str | None) -> None:
    """Stop (exit 2) on a dataset whose own lab policy is broken, as ``correct`` does:
    its protocols, severities and accepted doubts decide what may be repaired."""
    if problem is not None:
        raise FixError(f"{problem} (fix does not run without the dataset's lab policy); "
                       "nothing was planned or written")


def check_policies(plan: FixPlan, policy_file: Path | None = None) -> None:
    """:func:`_refuse_broken_policy` for the roots of a saved plan about to be applied."""
    roots = sorted({Path(c.root) for c in plan.changes}, key=str)
    _refuse_broken_policy(policy_problem(roots, policy_file))


def _undecided(
    runs: Sequence[tuple[RunRecord, list[Finding]]], repairs: Sequence[Repair]
) -> tuple[list[Repair], dict[tuple[str, str, str], str]]:
    """Drop every repair that would change a doubted timing field of a run whose timing
    stands in a doubt only a person can settle (``rules.correction.undecided_doubt``):
    fix never takes one side of such a doubt (a repair from the source series, the
    scanner's own record, settles it). Returns the repairs kept and why the
    others are not planned, per (root, run, code), for every fixable finding of such runs."""
    codes: dict[tuple[str, str], set[str]] = defaultdict(set)
    for repair in repairs:
        codes[(repair.root, repair.run)].add(repair.code)
    reasons: dict[tuple[str, str, str], str] = {}
    for record, findings in runs:
        key = (record.root, record.path)
        doubt = undecided_doubt(findings, codes.get(key, ()))
        if doubt is not None:
            for finding in findings:
                reasons[(record.root, record.path, finding.code)] = undecided_reason(doubt)
    kept = [r for r in repairs
            if not ((r.root, r.run, r.code) in reasons and r.field in DOUBTED_FIELDS)]
    return kept, reasons


def _confine(plan: FixPlan) -> dict[tuple[str, str, str], str]:
    """Drop the changes whose sidecar is not inside its dataset (a folder that is a link
    leading out of the root): slicetime never writes there, so they are not planned.
    Returns why, per (root, run, code) of the repairs dropped."""
    reasons: dict[tuple[str, str, str], str] = {}
    kept: list[FileChange] = []
    for change in plan.changes:
        problem = confinement_problem(change.root, change.file)
        if problem is None:
            kept.append(change)
            continue
        for repair in change.repairs:
            reasons[(repair.root, repair.run, repair.code)] = (
                f"{problem} (slicetime writes only inside the dataset root)")
    plan.changes[:] = kept
    return reasons


def _unplanned(
    runs: Sequence[tuple[RunRecord, list[Finding]]],
    wanted: set[tuple[str, str]],
    plan: FixPlan,
    reasons: Mapping[tuple[str, str, str], str],
) -> None:
    """Every finding the audit calls fixable, under the given paths, that no planned
    change repairs goes under ``plan.unplanned`` with the reason (``reasons``, else
    :data:`UNSETTLED`): whatever the audit calls fixable, fix plans it or says why not."""
    from slicetime.rules.repairs import SOURCE_TIMING_CODES  # source: see rules/repairs.py

    planned = {(r.root, r.run, r.code) for c in plan.changes for r in c.repairs}
    # SliceTiming rebuilt from the source series settles the run's other timing findings
    sourced = {(r.root, r.run) for c in plan.changes for r in c.repairs
               if r.code in SOURCE_TIMING_CODES}
    for record, findings in runs:
        key = (record.root, record.path)
        if key not in wanted or key in sourced:
            continue
        for finding in findings:
            if finding.code in FIXABLE and (*key, finding.code) not in planned:
                why = reasons.get((*key, finding.code))
                if why is None and finding.code == "timing/units-ms":
                    why = window_distrust(record)
                plan.unplanned.append(Unplanned(
                    record.root, record.path, finding.code, why or UNSETTLED))


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
    texts = _Texts()  # each file to edit read once, for the moves' check and the edit
    for file, move in _movable(moves, plan, texts):
        targets[(move.root, file)][move.field].append(move)
    for (root, file), fields in sorted(targets.items()):
        change = _build_change(root, file, fields, plan, texts)
        if change is not None:
            plan.changes.append(change)


class _Texts:
    """The text of each sidecar a plan edits (:func:`_load_for_edit`), read once per
    plan; a file that cannot be read raises its reason each time it is asked for.
    None: no file there (it is created)."""

    def __init__(self) -> None:
        self._read: dict[tuple[str, str], str | BaseException | None] = {}

    def get(self, root: str, file: str) -> str | None:
        key = (root, file)
        if key not in self._read:
            path = Path(root) / file
            try:
                self._read[key] = (_load_for_edit(path, root)[0]
                                   if path.exists() or path.is_symlink() else None)
            except (OSError, UnicodeDecodeError, ValueError) as exc:
                self._read[key] = exc
        found = self._read[key]
        if isinstance(found, BaseException):
            raise found
        return found


def _movable(moves: Sequence[tuple[str, Repair]], plan: FixPlan,
             texts: _Texts) -> list[tuple[str, Repair]]:
    """The layout moves whose every receiving file can be edited: a field removed from
    one file must arrive in the other, so a move whose receiving file cannot be read
    (not UTF-8, a link out of the dataset, ...) drops that field's moves in its
    dataset (said in the notes), never the removal alone."""
    blocked: set[tuple[str, str, str]] = set()
    for file, move in moves:
        group = (move.root, move.code, move.field)
        if move.value is REMOVE or group in blocked:
            continue
        try:
            texts.get(move.root, file)
        except (OSError, UnicodeDecodeError, ValueError) as exc:
            blocked.add(group)
            verb = "spread" if move.code == "layout/spread" else "consolidated"
            plan.notes.append(f"{move.field} not {verb}: {file} cannot be changed "
                              f"({_reason(exc)})")
    return [(f, m) for f, m in moves if (m.root, m.code, m.field) not in blocked]


def _build_change(
    root: str, file: str, fields: dict[str, list[Repair]], plan: FixPlan, texts: _Texts
) -> FileChange | None:
    try:
        before = texts.get(root, file)
    except (OSError, UnicodeDecodeError, ValueError) as exc:
        plan.notes.append(f"{file}: not changed: {_reason(exc)}")
        return None
    chosen: list[Repair] = []
    edits: list[tuple[str, Any]] = []
    for key, group in fields.items():
        values = {value_key(r.value) for r in group}
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
    # the hash of the bytes just read (their text decodes and encodes back byte for
    # byte), not of a second read: the plan's "before" and its hash are one state of the
    # file. The transaction hashes the file again just before it writes (preflight and
    # backup): that re-check is the safety, a file changed since the plan is refused
    sha = None if before is None else sha256_of(before.encode("utf-8"))
    return FileChange(root, file, before, after, sha, chosen)


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


# --------------------------------------------------------------------------- plan files


def write_plan(plan: FixPlan, path: Path) -> None:
    write_atomic(path, (json.dumps(plan.to_json(), indent=2) + "\n").encode("utf-8"))


def read_plan(path: Path) -> FixPlan:
    """A saved plan, valid against its shipped schema, every change confined to a dataset
    root re-checked now."""
    content = read_document(path, PLAN_SCHEMA, "plan", "nothing was written")
    plan = FixPlan(notes=list(content["notes"]))
    for n, item in enumerate(content["changes"], 1):
        root = check_root(item["root"], path, "plan")
        file, sha, after = item["file"], item["sha256_before"], item["content_after"]
        problem = confinement_problem(root, file)
        if problem is not None:
            raise FixError(f"{path}: change {n}: {problem}; the whole plan is refused")
        try:
            parsed = json.loads(after)
        except ValueError:
            parsed = None
        if not isinstance(parsed, dict):
            raise FixError(f"{path}: change {n}: content_after is not a JSON object")
        plan.changes.append(FileChange(root, file, None, after, sha))
        plan.repaired_runs.setdefault(root, set()).update(r["run"] for r in item["repairs"])
    return plan


# --------------------------------------------------------------------------- applying


def preflight(plan: FixPlan, replace_links: bool = False,
              rewrite_read_only: bool = False) -> list[str]:
    """Every file :func:`apply_plan` would refuse, one line each (none: it can write all)."""
    return preflight_changes(plan.changes, replace_links, rewrite_read_only)


def apply_plan(
    plan: FixPlan, *, backup_dir: Path | None = None, replace_links: bool = False,
    rewrite_read_only: bool = False,
) -> ApplyResult:
    """Write the planned changes, all or none, after backing every file up
    (:func:`slicetime.pipelines.transaction.apply_changes`)."""
    return apply_changes(plan.changes, backup_dir=backup_dir, replace_links=replace_links,
                         rewrite_read_only=rewrite_read_only)


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
    "Interrupted",
    "JsonStyle",
    "TransactionError",
    "UndoResult",
    "apply_plan",
    "plan_fix",
    "preflight",
    "read_plan",
    "reaudit",
    "recover",
    "undo",
    "write_plan",
]
