"""The audit pipeline: read every run, run every rule, collect the findings."""

from __future__ import annotations

import functools
import os
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path

from slicetime.model import Finding, RunRecord, Severity
from slicetime.pipelines.executor import Executor, Progress, map_chunks
from slicetime.readers.dataset import find_root, iter_runs
from slicetime.readers.errors import ReadError
from slicetime.readers.inheritance import SidecarIndex, SidecarStore, ValueSharer
from slicetime.readers.policy import POLICY_FILENAME, Policy, find_policy, load_policy
from slicetime.readers.record import build_record, relative_display
from slicetime.rules import RULES, check_dataset, check_run
from slicetime.rules.policy import IgnoredFinding, apply_overrides_and_ignores, apply_policy


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
    *, verify: bool = False,
) -> RunResult:
    """Audit one run (the unit of work for every executor). With ``verify`` the image
    data are read too and the run gets one ``verify/*`` finding (before the policy, so
    the policy can ignore or re-rate it)."""
    record = build_record(root, path, index)
    findings = check_run(record)
    if verify:
        from slicetime.pipelines.verify import verify_finding

        findings.append(verify_finding(record))
    if policy is None:
        return RunResult(record, findings)
    outcome = apply_policy(policy, record, findings)
    return RunResult(record, list(outcome.kept), list(outcome.ignored))


def audit_chunk(
    targets: Sequence[tuple[Path, Path]], policies: Mapping[Path, Policy | None] | None = None,
    verify: bool = False, store: SidecarStore | None = None,
) -> list[RunResult]:
    """Audit neighbouring runs with one sidecar cache per dataset root.

    ``store`` holds the walk's parsed shared sidecars (one per walk and process, so
    every chunk shares them). A bug while auditing one run becomes a
    ``batch/internal-error`` finding for that run (set ``SLICETIME_DEBUG`` to get
    the traceback instead).
    """
    indexes: dict[Path, SidecarIndex] = {}
    store = store if store is not None else SidecarStore()
    results = []
    for root, path in targets:
        if root not in indexes:
            indexes[root] = SidecarIndex(root, store=store)
        index = indexes[root]
        try:
            results.append(audit_one(root, path, index, (policies or {}).get(root),
                                     verify=verify))
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


def _has_error(result: RunResult) -> bool:
    return any(f.severity is Severity.ERROR for f in result.findings)


def _policies(
    roots: Iterable[Path], policy_file: Path | None, problems: list[Finding]
) -> dict[Path, Policy | None]:
    """The policy of each root: the one given (errors propagate: exit 2), else the
    root's own file (a broken one becomes a dataset finding and is not used)."""
    if policy_file is not None:
        given = load_policy(policy_file, RULES)
        return {root: given for root in roots}
    found: dict[Path, Policy | None] = {}
    for root in roots:
        candidate = find_policy(root)
        if candidate is None:
            found[root] = None
            continue
        try:
            found[root] = load_policy(candidate, RULES, display=POLICY_FILENAME)
        except ReadError as exc:
            problems.append(exc.to_finding())
            found[root] = None
    return found


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
) -> AuditResult:
    """Audit every run under ``paths``; raises ReadError only for a missing given path.

    ``verify`` also reads every run's image data in its worker and adds its
    ``verify/*`` finding (see :mod:`slicetime.pipelines.verify`)."""
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
    roots = sorted({str(root) for root, _ in targets}) or [str(find_root(p)) for p in paths]
    result = AuditResult(roots=roots)
    policies = _policies(sorted({root for root, _ in targets}), policy_file, walk_problems)
    result.policies = {str(r): p.file for r, p in policies.items() if p is not None}
    job = functools.partial(audit_chunk, policies=policies, verify=verify, store=SidecarStore())
    sharer = ValueSharer()  # one copy of each inherited value, as chunks come back

    def arrived(run: RunResult) -> bool:
        sharer.add(run.record)
        return _has_error(run)

    result.runs = map_chunks(
        job,
        targets,
        lost=_lost_target,
        executor=executor,
        jobs=jobs,
        progress=progress,
        failed_of=arrived,
    )
    result.dataset_findings.extend(walk_problems)
    per_run, overall = check_dataset([r.record for r in result.runs])
    for run in result.runs:
        extra = per_run.get(run.record.abs_path, [])
        policy = policies.get(Path(run.record.root))
        if policy is not None and extra:
            outcome = apply_overrides_and_ignores(policy, run.record.path, extra)
            run.findings.extend(outcome.kept)
            run.ignored.extend(outcome.ignored)
        else:
            run.findings.extend(extra)
    only = {p.file: p for p in policies.values() if p is not None}
    if len(only) == 1 and overall:
        outcome = apply_overrides_and_ignores(next(iter(only.values())), None, overall)
        result.dataset_findings.extend(outcome.kept)
        result.ignored.extend(outcome.ignored)
    else:
        result.dataset_findings.extend(overall)
    return result


__all__ = ["AuditResult", "ReadError", "RunResult", "audit_one", "audit_paths", "failed_run"]
