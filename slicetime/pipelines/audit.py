"""The audit pipeline: read every run, run every rule, collect the findings."""

from __future__ import annotations

import dataclasses
import functools
import os
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path

from slicetime.model import Finding, RunRecord, Severity
from slicetime.model_source import SourceEvidence
from slicetime.pipelines.errors import NoRunsError
from slicetime.pipelines.executor import Executor, Progress, map_chunks
from slicetime.policy.checks import (
    IgnoredFinding,
    apply_overrides_and_ignores,
    apply_policy,
    dataset_codes_judged,
)
from slicetime.policy.loading import root_policies
from slicetime.policy.model import Policy
from slicetime.readers.dataset import find_root, iter_runs
from slicetime.readers.errors import ReadError
from slicetime.readers.inheritance import SidecarIndex
from slicetime.readers.record import build_record, relative_display
from slicetime.readers.source import SourceIndex, SourceOptions, find_source
from slicetime.rules import RULES, check_dataset, check_run, fold_consequences


@dataclass
class RunResult:
    record: RunRecord
    findings: list[Finding]
    ignored: list[IgnoredFinding] = field(default_factory=list)


@dataclass
class AuditResult:
    roots: list[str]
    runs: list[RunResult] = field(default_factory=list)
    dataset_findings: list[Finding] = field(default_factory=list)
    ignored: list[IgnoredFinding] = field(default_factory=list)
    policies: dict[str, str] = field(default_factory=dict)  # root -> policy file used
    #: runs whose policy protocol states a value, so that value was judged by the policy
    #: and not by the majority of their task and acquisition (dataset/outlier-*)
    judged_by_policy: int = 0

    def ignored_count(self) -> int:
        return len(self.ignored) + sum(len(r.ignored) for r in self.runs)

    def counts(self) -> dict[str, int]:
        counts = {s.value: 0 for s in Severity}
        for finding in self.all_findings():
            counts[finding.severity.value] += 1
        return counts

    def all_findings(self) -> Iterable[Finding]:
        for run in self.runs:
            yield from run.findings
        yield from self.dataset_findings

    def exit_code(self, fail_on: str) -> int:
        """0 when nothing reaches ``fail_on`` (error|warning|never), else 1."""
        if fail_on == "never":
            return 0
        level = Severity.parse(fail_on).rank
        return 1 if any(f.severity.rank >= level for f in self.all_findings()) else 0


def audit_one(
    root: Path, path: Path, index: SidecarIndex | None = None, policy: Policy | None = None,
    *, verify: bool = False, source: SourceOptions | None = None,
    sources: SourceIndex | None = None,
) -> RunResult:
    """Audit one run (the unit of work for every executor). With ``verify`` the image
    data are read too and the run gets one ``verify/*`` finding (before the policy, so
    the policy can ignore or re-rate it)."""
    record = build_record(root, path, index)
    record = _with_source(record, root, source, sources)
    findings = check_run(record)
    if verify:
        from slicetime.pipelines.verify import verify_finding

        findings.append(verify_finding(record))
    if policy is None:
        return RunResult(record, fold_consequences(findings))
    outcome = apply_policy(policy, record, findings)
    return RunResult(record, fold_consequences(outcome.kept), list(outcome.ignored))


# ---- the source cross-check (sourcedata/ DICOM series): one place, see readers/source.py
def _with_source(record: RunRecord, root: Path, options: SourceOptions | None,
                 sources: SourceIndex | None) -> RunRecord:
    """The record with its source evidence (``record.source``) when the check applies."""
    options = options if options is not None else SourceOptions()
    if options.mode == "off":
        return record
    sources = sources if sources is not None else SourceIndex(root)
    if options.mode == "auto" and not options.mapping and not sources.has_sourcedata():
        return record
    try:
        evidence = find_source(record, sources, options)
    except Exception as exc:  # a series no reader anticipated: a finding, never a crash
        if os.environ.get("SLICETIME_DEBUG"):
            raise
        error = Finding("source/unreadable", Severity.WARNING, f"{record.path}: its source "
                        f"series could not be read ({type(exc).__name__}: {exc})", record.path)
        evidence = SourceEvidence("unreadable", "", error=error)
    return dataclasses.replace(record, source=evidence) if evidence is not None else record
# ---- end of the source cross-check


def audit_chunk(
    targets: Sequence[tuple[Path, Path]], policies: Mapping[Path, Policy | None] | None = None,
    verify: bool = False, source: SourceOptions | None = None,
) -> list[RunResult]:
    """Audit neighbouring runs with one sidecar cache per dataset root.

    A bug while auditing one run becomes a ``batch/internal-error`` finding for
    that run (set ``SLICETIME_DEBUG`` to get the traceback instead).
    """
    indexes: dict[Path, SidecarIndex] = {}
    source_indexes: dict[Path, SourceIndex] = {}
    results = []
    for root, path in targets:
        if root not in indexes:
            indexes[root] = SidecarIndex(root)
            source_indexes[root] = SourceIndex(root)
        index = indexes[root]
        try:
            results.append(audit_one(root, path, index, (policies or {}).get(root),
                                     verify=verify, source=source,
                                     sources=source_indexes[root]))
        except Exception as exc:
            if os.environ.get("SLICETIME_DEBUG"):
                raise
            results.append(
                failed_run(root, path, "batch/internal-error", f"{type(exc).__name__}: {exc}")
            )
    return results


def failed_run(root: Path, path: Path, code: str, why: str) -> RunResult:
    """The result for a run that could not be audited at all."""
    shown = relative_display(path, root)
    record = RunRecord(path=shown, abs_path=str(path), root=str(root))
    message = (
        f"{shown}: not audited, {why}"
        if code == "batch/worker-lost"
        else f"{shown}: the audit of this run failed ({why})"
    )
    return RunResult(record, [Finding(code, Severity.ERROR, message, shown)])


def _lost_target(target: tuple[Path, Path], why: str) -> RunResult:
    return failed_run(target[0], target[1], "batch/worker-lost", why)


def _not_processed(result: RunResult) -> bool:
    """A run that could not be processed (unreadable, not NIfTI, a lost worker, a bug):
    what progress counts as failed. Findings about a readable run are not failures."""
    return result.record.header is None


def _check_every_path_has_runs(
    paths: Sequence[Path], targets: Sequence[tuple[Path, Path]]
) -> None:
    """Raise :class:`NoRunsError` for the first given path that holds no run."""
    runs = [str(run) for _, run in targets]
    for given in paths:
        where = os.path.abspath(given)
        prefix = where.rstrip(os.sep) + os.sep
        if not any(run == where or run.startswith(prefix) for run in runs):
            raise NoRunsError(str(given), is_folder=os.path.isdir(given))


def _policies(
    roots: Iterable[Path], policy_file: Path | None, problems: list[Finding]
) -> dict[Path, Policy | None]:
    """The policy of each root: the one given (errors propagate: exit 2), else the
    root's own file (a broken one becomes a dataset finding and is not used)."""
    return root_policies(roots, policy_file, RULES, problems)


def check_paths_hold_runs(paths: Sequence[Path], **include: bool) -> None:
    """Walk ``paths`` (names only, no file is read) and raise :class:`NoRunsError` for
    the first that holds no run; for commands that find their runs another way."""
    _check_every_path_has_runs(paths, list(iter_runs(paths, **include)))


def audit_paths(
    paths: Sequence[Path],
    *,
    include_derivatives: bool = False,
    include_sourcedata: bool = False,
    include_hidden: bool = False,
    jobs: int = 1,
    progress: Progress | None = None,
    policy_file: Path | None = None,
    executor: Executor | None = None,
    verify: bool = False,
    source: SourceOptions | None = None,
    require_runs: bool = True,
) -> AuditResult:
    """Audit every run under ``paths``; raises ReadError only for a missing given path,
    and :class:`NoRunsError` when a given path holds no run (unless ``require_runs`` is
    false): nothing found is not success.

    ``verify`` also reads every run's image data in its worker and adds its
    ``verify/*`` finding (see :mod:`slicetime.pipelines.verify`). ``source`` says
    whether runs are checked against their DICOM series under ``sourcedata/``
    (default: when that folder exists; see :mod:`slicetime.readers.source`). Findings
    that follow from a root cause are folded into it
    (:func:`slicetime.rules.fold_consequences`)."""
    walk_problems: list[Finding] = []
    targets: list[tuple[Path, Path]] = list(
        iter_runs(
            paths,
            include_derivatives=include_derivatives,
            include_sourcedata=include_sourcedata,
            include_hidden=include_hidden,
            on_error=walk_problems.append,
        )
    )
    if require_runs:
        _check_every_path_has_runs(paths, targets)
    roots = sorted({str(root) for root, _ in targets}) or [str(find_root(p)) for p in paths]
    result = AuditResult(roots=roots)
    policies = _policies(sorted({root for root, _ in targets}), policy_file, walk_problems)
    result.policies = {str(r): p.file for r, p in policies.items() if p is not None}
    job = functools.partial(audit_chunk, policies=policies, verify=verify, source=source)
    result.runs = map_chunks(
        job,
        targets,
        lost=_lost_target,
        executor=executor,
        jobs=jobs,
        progress=progress,
        failed_of=_not_processed,
    )
    result.dataset_findings.extend(walk_problems)
    exempt: dict[str, set[str]] = {}
    for run in result.runs:
        policy = policies.get(Path(run.record.root))
        if policy is None:
            continue
        codes = dataset_codes_judged(policy, run.record)
        for code in codes:
            exempt.setdefault(code, set()).add(run.record.abs_path)
        result.judged_by_policy += bool(codes)
    per_run, overall = check_dataset([r.record for r in result.runs], exempt)
    for run in result.runs:
        extra = per_run.get(run.record.abs_path, [])
        policy = policies.get(Path(run.record.root))
        if policy is not None and extra:
            outcome = apply_overrides_and_ignores(policy, run.record.path, extra)
            run.findings.extend(outcome.kept)
            run.ignored.extend(outcome.ignored)
        else:
            run.findings.extend(extra)
        if extra:
            run.findings[:] = fold_consequences(run.findings)
    only = {p.file: p for p in policies.values() if p is not None}
    if len(only) == 1 and overall:
        outcome = apply_overrides_and_ignores(next(iter(only.values())), None, overall)
        result.dataset_findings.extend(outcome.kept)
        result.ignored.extend(outcome.ignored)
    else:
        result.dataset_findings.extend(overall)
    return result


__all__ = [
    "AuditResult",
    "NoRunsError",
    "ReadError",
    "RunResult",
    "audit_one",
    "audit_paths",
    "check_paths_hold_runs",
    "failed_run",
]
