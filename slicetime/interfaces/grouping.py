"""Findings told once: a finding that arises from one file that several runs share
(a top-level or folder-level sidecar they inherit) is the same finding on every
one of those runs. The audit keeps it per run (the JSON report's run objects,
for machines); the reports for people tell it once, with the runs it applies to
(:func:`group_findings`, used by the text, TSV, JUnit and HTML writers, and the
JSON report's ``shared_findings``).

Two findings are the same when they come from the same dataset root and agree
in code, severity, file, field, message, hint and evidence. Only findings about
a file that is neither the run's image nor the run's own sidecar can be shared;
a finding made by several runs' shared file but worded for each run (with a run's
own value in the message) stays with its run.

Counting (``Grouping.distinct``, ``Grouping.runs_affected``): a shared finding
counts once however many runs it applies to; each severity also says how many
runs carry at least one finding of it, so a summary can give both.

Pure over the report's run objects (no I/O of its own: the source reads its spool).
"""

from __future__ import annotations

import json
from collections import defaultdict
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, TypeVar

from slicetime.readers.entities import sidecar_path
from slicetime.words import count

if TYPE_CHECKING:
    from slicetime.interfaces.report_source import ReportSource
    from slicetime.pipelines.audit import AuditTotals

SEVERITIES = ("error", "warning", "note")
_RANK = {"error": 3, "warning": 2, "note": 1}
#: a text screen names at most this many runs of a shared finding (the JSON lists all)
LISTED_RUNS = 8

T = TypeVar("T")
Key = tuple[str, str, str, str, str | None, str, str | None, str]


def _evidence(f: dict[str, Any]) -> Any:
    return f.get("evidence")


def finding_key(root: str, run_path: str, f: dict[str, Any]) -> Key | None:
    """The key under which runs share ``f``, or None when it is about the run's own
    files (or about no file)."""
    file = f.get("file")
    if not file or file == run_path or file == sidecar_path(run_path):
        return None
    evidence = json.dumps(_evidence(f), sort_keys=True, ensure_ascii=False, default=str)
    return (root, f["code"], f["severity"], file, f.get("field"), f["message"], f.get("hint"),
            evidence)


@dataclass
class SharedFinding:
    """One finding from a shared file, told once, and the runs it applies to."""

    finding: dict[str, Any]  # the JSON finding object (as the first run has it)
    root: str
    runs: list[int] = field(default_factory=list)  # indices into ``totals.facts``
    paths: list[str] = field(default_factory=list)  # the runs' paths, in report order

    @property
    def severity(self) -> str:
        return str(self.finding["severity"])


@dataclass
class Grouping:
    """The shared findings of a report and what is left for each run."""

    shared: list[SharedFinding]
    #: run index -> positions (in its ``findings``) of the findings told as shared
    told_shared: dict[int, frozenset[int]]
    #: each finding counted once (shared findings once, run and dataset findings each)
    distinct: dict[str, int]
    #: runs with at least one finding of each severity
    runs_affected: dict[str, int]
    #: run index -> how many of its findings of each severity are told as shared
    shared_counts: dict[int, tuple[int, int, int]] = field(default_factory=dict)
    #: run group (``report_source.run_group``) -> its number of runs
    group_sizes: dict[tuple[str, ...], int] = field(default_factory=dict)

    def own(self, index: int, findings: Sequence[dict[str, Any]]) -> list[dict[str, Any]]:
        """The run's findings that are told with the run (not as shared)."""
        skip = self.told_shared.get(index)
        if not skip:
            return list(findings)
        return [f for i, f in enumerate(findings) if i not in skip]

    def own_counts(self, index: int, counts: tuple[int, int, int]) -> tuple[int, int, int]:
        shared = self.shared_counts.get(index)
        if shared is None:
            return counts
        return (counts[0] - shared[0], counts[1] - shared[1], counts[2] - shared[2])


class Grouper:
    """Collects the grouping run by run (``add``), so a writer that streams the runs
    (the JSON report) can group in the same pass; ``finish`` gives the :class:`Grouping`."""

    def __init__(self, totals: AuditTotals) -> None:
        self.totals = totals
        self._first: dict[Key, tuple[int, str, dict[str, Any], int]] = {}
        self._groups: dict[Key, SharedFinding] = {}
        self._positions: dict[Key, list[tuple[int, int]]] = defaultdict(list)

    def add(self, index: int, obj: dict[str, Any]) -> None:
        facts = self.totals.facts[index]
        path = obj["path"]
        for position, f in enumerate(obj["findings"]):
            key = finding_key(facts.root, path, f)
            if key is None:
                continue
            group = self._groups.get(key)
            if group is None:
                first = self._first.get(key)
                if first is None:  # seen once so far: remember it, cheaply
                    self._first[key] = (index, path, f, position)
                    continue
                del self._first[key]
                group = self._groups[key] = SharedFinding(first[2], facts.root,
                                                          [first[0]], [first[1]])
                self._positions[key].append((first[0], first[3]))
            if group.runs[-1] != index:
                group.runs.append(index)
                group.paths.append(path)
            self._positions[key].append((index, position))

    def finish(self) -> Grouping:
        from collections import Counter

        from slicetime.interfaces.report_source import run_group

        totals = self.totals
        self._groups = {k: g for k, g in self._groups.items() if len(g.runs) > 1}
        told: dict[int, set[int]] = defaultdict(set)
        shared_counts: dict[int, list[int]] = {}
        for key, group in self._groups.items():
            rank = SEVERITIES.index(group.severity)
            for index, position in self._positions[key]:
                told[index].add(position)
                counts = shared_counts.setdefault(index, [0, 0, 0])
                counts[rank] += 1
        distinct = dict(totals.counts)
        for key, group in self._groups.items():
            # every run counted it; a shared finding counts once
            distinct[group.severity] -= len(self._positions[key]) - 1
        runs_affected = {s: sum(1 for f in totals.facts if f.counts[i])
                         for i, s in enumerate(SEVERITIES)}
        shared = sorted(self._groups.values(), key=lambda g: (
            -_RANK[g.severity], g.root, g.finding.get("file") or "", g.finding["code"],
            g.finding["message"]))
        sizes = Counter(run_group(f) for f in totals.facts
                        ) if shared else Counter()
        return Grouping(shared, {i: frozenset(p) for i, p in told.items()}, distinct,
                        runs_affected, {i: (c[0], c[1], c[2]) for i, c in shared_counts.items()},
                        dict(sizes))


def group_findings(source: ReportSource) -> Grouping:
    """The grouping of a report's findings (one pass over the runs that have findings)."""
    grouper = Grouper(source.totals)
    facts = source.totals.facts
    for index, obj in source.objects(lambda i: any(facts[i].counts)):
        grouper.add(index, obj)
    return grouper.finish()


def runs_phrase(group: SharedFinding, grouping: Grouping, totals: AuditTotals) -> str:
    """``all 6 runs of task-chirp_bold`` when the runs are exactly one protocol
    group's, ``all 21 runs`` when they are every run audited, else ``2 runs``."""
    from slicetime.interfaces.report_source import NOT_BIDS, group_label, run_group

    n = len(group.runs)
    if n == len(totals.facts):
        return f"all {n} runs"
    keys = {run_group(totals.facts[i]) for i in group.runs}
    if len(keys) == 1:
        (key,) = keys
        if grouping.group_sizes.get(key) == n:
            if key[2] == NOT_BIDS:
                return f"all {n} runs whose file names are not valid BIDS names"
            label = group_label(key)
            return f"all {n} runs of {label.partition(': ')[2] or label}"
    return count(n, "run")


def listed_paths(paths: Sequence[T], limit: int | None = LISTED_RUNS) -> tuple[list[T], int]:
    """The paths (or entries) a screen names and how many more there are."""
    if limit is None or len(paths) <= limit:
        return list(paths), 0
    return list(paths[:limit]), len(paths) - limit


def counts_phrase(distinct: dict[str, int], runs_affected: dict[str, int],
                  severities: Iterable[str] = SEVERITIES) -> list[str]:
    """``3 errors on 3 runs`` per severity (``0 warnings`` when there are none)."""
    parts = []
    for s in severities:
        n = distinct.get(s, 0)
        text = count(n, s)
        if n and runs_affected.get(s, 0):
            text += f" on {count(runs_affected[s], 'run')}"
        parts.append(text)
    return parts


__all__ = ["LISTED_RUNS", "Grouper", "Grouping", "SharedFinding", "counts_phrase",
           "finding_key", "group_findings", "listed_paths", "runs_phrase"]
