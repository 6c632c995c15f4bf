"""The audit pipeline: read every run, run every rule, collect the findings."""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path

from slicetime.model import Finding, RunRecord, Severity
from slicetime.pipelines.executor import Progress, map_chunks
from slicetime.readers.dataset import find_root, iter_runs
from slicetime.readers.errors import ReadError
from slicetime.readers.inheritance import SidecarIndex
from slicetime.readers.record import build_record
from slicetime.rules import check_dataset, check_run


@dataclass
class RunResult:
    record: RunRecord
    findings: list[Finding]


@dataclass
class AuditResult:
    roots: list[str]
    runs: list[RunResult] = field(default_factory=list)
    dataset_findings: list[Finding] = field(default_factory=list)

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


def audit_one(root: Path, path: Path, index: SidecarIndex | None = None) -> RunResult:
    """Audit one run (the unit of work for every executor)."""
    record = build_record(root, path, index)
    return RunResult(record, check_run(record))


def audit_chunk(targets: Sequence[tuple[Path, Path]]) -> list[RunResult]:
    """Audit neighbouring runs with one sidecar cache per dataset root."""
    indexes: dict[Path, SidecarIndex] = {}
    results = []
    for root, path in targets:
        index = indexes.setdefault(root, SidecarIndex(root))
        results.append(audit_one(root, path, index))
    return results


def audit_paths(
    paths: Sequence[Path],
    *,
    include_derivatives: bool = False,
    include_sourcedata: bool = False,
    include_hidden: bool = False,
    jobs: int = 1,
    progress: Progress | None = None,
) -> AuditResult:
    """Audit every run under ``paths``; raises ReadError only for a missing given path."""
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
    result.runs = map_chunks(audit_chunk, targets, jobs=jobs, progress=progress)
    result.dataset_findings.extend(walk_problems)
    per_run, overall = check_dataset([r.record for r in result.runs])
    for run in result.runs:
        run.findings.extend(per_run.get(run.record.path, []))
    result.dataset_findings.extend(overall)
    return result


__all__ = ["AuditResult", "ReadError", "RunResult", "audit_one", "audit_paths"]
