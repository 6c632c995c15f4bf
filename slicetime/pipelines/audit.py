"""The audit pipeline: read every run, run every rule, collect the findings."""

from __future__ import annotations

import dataclasses
import functools
import gc
import os
from collections import Counter
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from slicetime.codes import make_finding
from slicetime.model import (
    Counts,
    FailOn,
    Finding,
    RunRecord,
    RunView,
    Severity,
)
from slicetime.model_source import SourceEvidence
from slicetime.pipelines.audit_facts import Interner, RunFacts
from slicetime.pipelines.audit_memo import Content, memo_for
from slicetime.pipelines.errors import NoRunsError
from slicetime.pipelines.executor import (
    Executor,
    Interrupted,
    ProcessExecutor,
    Progress,
    map_chunks,
)
from slicetime.policy.checks import (
    IgnoredFinding,
    apply_overrides_and_ignores,
    apply_policy,
    dataset_codes_judged,
)
from slicetime.policy.loading import root_policies
from slicetime.policy.model import AcceptEntry, Policy
from slicetime.readers.atomic import within
from slicetime.readers.dataset import find_root, given_run, iter_runs, not_a_run
from slicetime.readers.errors import ReadError
from slicetime.readers.inheritance import SidecarIndex, SidecarStore, ValueSharer
from slicetime.readers.record import build_record, relative_display
from slicetime.readers.source import SourceIndex, SourceOptions, find_source
from slicetime.rules import check_dataset, check_run, fold_consequences
from slicetime.rules.registry import RENAMED, attach_folded, fold, known_codes


@dataclass
class RunResult:
    record: RunRecord
    findings: list[Finding]
    ignored: list[IgnoredFinding] = field(default_factory=list)
    #: the content memo's judged content of the run (``audit_memo.Content``), when its
    #: content findings came from the memo: runs with the same one differ only in their
    #: names (what their report lines and facts may reuse); None otherwise
    content: Content | None = field(default=None, compare=False, repr=False)


@dataclass
class AuditResult:
    roots: list[str]
    runs: list[RunResult] = field(default_factory=list)
    dataset_findings: list[Finding] = field(default_factory=list)
    ignored: list[IgnoredFinding] = field(default_factory=list)
    policies: dict[str, str] = field(default_factory=dict)  # root -> policy file used
    #: root -> the policy's [[accept]] entries (the doubts correct may go ahead despite)
    accepts: dict[str, tuple[AcceptEntry, ...]] = field(default_factory=dict)
    #: runs whose policy protocol states a value, so that value was judged by the policy
    #: and not by the majority of their task and acquisition (dataset/outlier-*)
    judged_by_policy: int = 0
    #: root -> the problem of its own lab policy file, which was not used
    #: (``policy/invalid``; also among ``dataset_findings``)
    broken_policies: dict[str, Finding] = field(default_factory=dict)

    def policy_problem(self) -> str | None:
        """One line naming the first dataset whose own lab policy is broken, or None:
        what a command that must not go on without the lab's policy stops with
        (``correct``, ``fix``)."""
        return _first_broken(self.broken_policies)

    def ignored_count(self) -> int:
        return len(self.ignored) + sum(len(r.ignored) for r in self.runs)

    def counts(self) -> dict[str, int]:
        return Counts.of(self.all_findings()).as_dict()

    def all_findings(self) -> Iterable[Finding]:
        for run in self.runs:
            yield from run.findings
        yield from self.dataset_findings

    def exit_code(self, fail_on: str | FailOn) -> int:
        """0 when nothing reaches ``fail_on`` (error|warning|never), else 1."""
        return FailOn.parse(fail_on).exit_code(Counts.of(self.all_findings()))


def audit_one(
    root: Path, path: Path, index: SidecarIndex | None = None, policy: Policy | None = None,
    *, verify: bool = False, source: SourceOptions | None = None,
    sources: SourceIndex | None = None,
) -> RunResult:
    """Audit one run (the unit of work for every executor). With ``verify`` the image
    data are read too and the run gets one ``verify/*`` finding (before the policy, so
    the policy can ignore or re-rate it)."""
    memo = memo_for(index.store) if index is not None else None
    record = build_record(root, path, index, memo.timing_of if memo is not None else None)
    record = _with_source(record, root, source, sources)
    findings = memo.findings(record) if memo is not None else check_run(record)
    content = memo.content if memo is not None else None
    if verify:
        from slicetime.pipelines.verify import verify_finding

        findings.append(verify_finding(record))
    if policy is None:
        return RunResult(record, fold_consequences(findings), content=content)
    outcome = apply_policy(policy, record, findings)
    return RunResult(record, fold_consequences(outcome.kept), list(outcome.ignored),
                     content=content)


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
        error = make_finding("source/unreadable", f"{record.path}: its source series could "
                             f"not be read ({type(exc).__name__}: {exc})", file=record.path)
        evidence = SourceEvidence("unreadable", "", error=error)
    return dataclasses.replace(record, source=evidence) if evidence is not None else record
# ---- end of the source cross-check


def audit_chunk(
    targets: Sequence[tuple[Path, Path]], policies: Mapping[Path, Policy | None] | None = None,
    verify: bool = False, source: SourceOptions | None = None,
    store: SidecarStore | None = None,
) -> list[RunResult]:
    """Audit neighbouring runs with one sidecar cache per dataset root.

    ``store`` holds the walk's parsed shared sidecars (one per walk and process, so
    every chunk shares them). A bug while auditing one run becomes a
    ``batch/internal-error`` finding for that run (set ``SLICETIME_DEBUG`` to get
    the traceback instead).
    """
    indexes: dict[Path, SidecarIndex] = {}
    store = store if store is not None else SidecarStore()
    source_indexes: dict[Path, SourceIndex] = {}
    results = []
    for root, path in targets:
        if root not in indexes:
            indexes[root] = SidecarIndex(root, store=store)
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
    return RunResult(record, [make_finding(code, message, file=shown)])


def _lost_target(target: tuple[Path, Path], why: str) -> RunResult:
    return failed_run(target[0], target[1], "batch/worker-lost", why)


def _not_processed(result: RunResult) -> bool:
    """A run that could not be processed (unreadable, not NIfTI, a lost worker, a bug):
    what progress counts as failed. Findings about a readable run are not failures."""
    return result.record.header is None


def _check_every_path_has_runs(
    paths: Sequence[Path], targets: Sequence[tuple[Path, Path]]
) -> None:
    """Raise :class:`NoRunsError` for the first given path that holds no run. A path
    that is another given path under another name (a link to a dataset given beside
    the dataset) holds that path's runs: the walk met them once, under the first name."""
    runs = [str(run) for _, run in targets]

    def holds(where: str) -> bool:
        return any(within(run, where) for run in runs)

    # a run's own sidecar stands for its image (given_run, asked once per path)
    meant = [given_run(given) for given in paths]
    wheres = [os.path.abspath(run) for run in meant]
    holding = [where for where in wheres if holds(where)]
    for given, run, where in zip(paths, meant, wheres, strict=True):
        if where in holding:
            continue
        real = os.path.realpath(run)
        # the same folder under the name another given path gave it: its runs, met once
        aliases = [os.path.join(other, os.path.relpath(real, os.path.realpath(other)))
                   for other in holding if within(real, os.path.realpath(other))]
        if not any(holds(os.path.normpath(alias)) for alias in aliases):
            folder = os.path.isdir(given)
            raise NoRunsError(str(given), is_folder=folder,
                              why=None if folder else not_a_run(os.path.basename(given)))


def _first_broken(broken: Mapping[str, Finding]) -> str | None:
    for root, finding in sorted(broken.items()):
        name = finding.file or ""
        message = finding.message.removeprefix(f"{name}: ")  # named once, in full
        return f"{Path(root) / name}: {message}"
    return None


def policy_problem(roots: Iterable[Path], policy_file: Path | None = None) -> str | None:
    """:meth:`AuditResult.policy_problem` for dataset roots without an audit (a saved fix
    plan, the Python API's correction): their policies loaded the audit's way."""
    broken: dict[Path, Finding] = {}
    _policies(roots, policy_file, [], broken)
    return _first_broken({str(r): f for r, f in broken.items()})


def policy_accepts(root: Path, policy_file: Path | None = None) -> tuple[AcceptEntry, ...]:
    """The ``[[accept]]`` entries of the dataset's lab policy (as ``AuditResult.accepts``
    gives them for one root), loaded the audit's way; none when there is no policy."""
    policy = _policies([root], policy_file, []).get(Path(root))
    return policy.accepts if policy is not None else ()


def _policies(
    roots: Iterable[Path], policy_file: Path | None, problems: list[Finding],
    broken: dict[Path, Finding] | None = None,
) -> dict[Path, Policy | None]:
    """The policy of each root: the one given (errors propagate: exit 2), else the
    root's own file (a broken one becomes a dataset finding, is not used and is named
    in ``broken``)."""
    return root_policies(roots, policy_file, known_codes(), problems, renamed=RENAMED,
                         broken=broken)


def check_paths_hold_runs(paths: Sequence[Path], **include: bool) -> None:
    """Walk ``paths`` (names only, no file is read) and raise :class:`NoRunsError` for
    the first that holds no run; for commands that find their runs another way."""
    _check_every_path_has_runs(paths, list(iter_runs(
        paths, include_derivatives=include.get("include_derivatives", False),
        include_sourcedata=include.get("include_sourcedata", False),
        include_hidden=include.get("include_hidden", False))))


@dataclass
class AuditTotals:
    """What a streamed audit knows at the end: everything but the run objects.

    ``facts[i]`` describes run ``i`` (in report order); ``extras[i]`` holds the
    findings the dataset rules add to run ``i`` (after the policy), already
    counted in ``facts[i].counts`` and in ``counts``; ``folds[i]`` those that
    follow from one of the run's own root causes (root number among
    ``facts[i].fold_roots``, finding): writers list them under that root's
    ``evidence["folded"]``, not as findings."""

    roots: list[str]
    names: dict[str, str] = field(default_factory=dict)  # root -> dataset name
    policies: dict[str, str] = field(default_factory=dict)
    #: root -> the problem of its broken own policy (as ``AuditResult.broken_policies``)
    broken_policies: dict[str, Finding] = field(default_factory=dict)
    #: root -> the policy's [[accept]] entries (as ``AuditResult.accepts``)
    accepts: dict[str, tuple[AcceptEntry, ...]] = field(default_factory=dict)
    facts: list[RunFacts] = field(default_factory=list)
    extras: dict[int, tuple[Finding, ...]] = field(default_factory=dict)
    folds: dict[int, tuple[tuple[int, Finding], ...]] = field(default_factory=dict)
    dataset_findings: list[Finding] = field(default_factory=list)
    counts: dict[str, int] = field(default_factory=lambda: {s.value: 0 for s in Severity})
    ignored: int = 0
    #: what the policy ignored of the dataset rules' findings: per run, and overall
    ignored_extras: dict[int, tuple[IgnoredFinding, ...]] = field(default_factory=dict)
    ignored_overall: list[IgnoredFinding] = field(default_factory=list)
    judged_by_policy: int = 0  # runs judged by a policy protocol instead of the majority

    @property
    def runs(self) -> int:
        return len(self.facts)

    def exit_code(self, fail_on: str | FailOn) -> int:
        """0 when nothing reaches ``fail_on`` (error|warning|never), else 1."""
        counts = self.counts
        return FailOn.parse(fail_on).exit_code(
            Counts(counts["error"], counts["warning"], counts["note"]))


def dataset_name(root: str) -> str:
    """How reports name a dataset root: the ``Name`` of its
    ``dataset_description.json`` when it is a non-empty string, else the root's
    folder name (never ``.``)."""
    import json

    from slicetime.readers.errors import open_regular, read_bounded

    path = os.path.join(root, "dataset_description.json")
    try:
        # a regular file only, read with a bound: a FIFO or device never blocks a report
        fh, st = open_regular(path, path)
        with fh:
            data = json.loads(read_bounded(fh, st.st_size, 1 << 20))
        name = data.get("Name") if isinstance(data, dict) else None
        if isinstance(name, str) and name.strip():
            return " ".join(name.split())
    except (OSError, ValueError, RecursionError, ReadError):
        pass
    return os.path.basename(os.path.abspath(root).rstrip(os.sep)) or os.sep


def dataset_names(roots: Iterable[str]) -> dict[str, str]:
    """Each root's :func:`dataset_name`; equal names get the root's path beside them."""
    names = {root: dataset_name(root) for root in roots}
    seen = Counter(names.values())
    return {root: name if seen[name] == 1 else f"{name} ({root})" for root, name in names.items()}


#: runs handed to the executor at once by a streamed audit: bounds the results held
STREAM_BATCH = 4096


def audit_stream(
    paths: Sequence[Path],
    on_run: Callable[[Any], None],  # a RunResult, or what ``prepare`` made of it
    *,
    include_derivatives: bool = False,
    include_sourcedata: bool = False,
    include_hidden: bool = False,
    progress: Progress | None = None,
    policy_file: Path | None = None,
    executor: Executor | None = None,
    verify: bool = False,
    source: SourceOptions | None = None,
    require_runs: bool = True,
    batch: int = STREAM_BATCH,
    on_start: Callable[[AuditTotals], None] | None = None,
    prepare: Callable[[RunResult], Any] | None = None,
) -> AuditTotals:
    """The audit of :func:`audit_paths`, streamed: ``on_run`` gets every run's result
    in report order as soon as its batch is done (without the findings of the
    dataset rules, which need every run: they come back in ``extras``, and those
    folded into a root cause of the run in ``folds``), and only :class:`RunFacts`
    are kept. ``on_start`` sees the totals before the first run (roots, names and
    policies are set). Interrupted carries one entry per run (None where not
    finished).

    With ``prepare`` (picklable), ``on_run`` gets ``prepare(result)`` instead of the
    result, made where the run was audited: a worker process then sends back only
    that and the run's facts, not the whole record (the report line of a run is
    encoded in parallel, and this process does little per run)."""
    listings: dict[str, tuple[str, ...]] = {}
    not_plain: dict[str, frozenset[str]] = {}
    broken: dict[Path, Finding] = {}
    targets, roots, policies, walk_problems = _targets(
        paths, policy_file, include_derivatives, include_sourcedata, include_hidden,
        require_runs, listings, broken, not_plain)
    totals = AuditTotals(roots=roots, names=dataset_names(roots))
    totals.broken_policies = {str(r): f for r, f in broken.items()}
    totals.policies = {str(r): p.file or "" for r, p in policies.items() if p is not None}
    totals.accepts = {str(r): p.accepts for r, p in policies.items()
                      if p is not None and p.accepts}
    if on_start is not None:
        on_start(totals)
    job: Callable[[Sequence[tuple[Path, Path]]], list[Any]] = functools.partial(
        audit_chunk, policies=policies, verify=verify, source=source,
        store=SidecarStore(listings=listings, not_plain=not_plain))
    lost: Callable[[tuple[Path, Path], str], Any] = _lost_target
    # runs audited in this process are prepared here, with the one interner of the
    # audit; a worker prepares its own and sends back only that (see _prepared_chunk)
    here = prepare if prepare is not None and type(executor) in (Executor, type(None)) \
        else _itself
    if prepare is not None and here is _itself:
        job = functools.partial(_prepared_chunk, job=job, prepare=prepare)
        lost = functools.partial(_prepared_lost, prepare=prepare)
    shared = Interner()
    total = len(targets)
    done_before = failed_before = 0
    counts = totals.counts
    settle = _Settler()
    try:
        for start in range(0, total, max(1, batch)):
            part = targets[start:start + batch]

            def step(done: int, _total: int, failed: int, base: int = done_before,
                     base_failed: int = failed_before) -> None:
                if progress is not None:
                    progress(base + done, total, base_failed + failed)

            try:
                results = map_chunks(job, part, lost=lost, executor=executor,
                                     progress=step, failed_of=_failed)
            except Interrupted as stop:
                left = total - start - len(part)
                raise Interrupted([True] * start + stop.results + [None] * left) from None
            seen: dict[int, Any] = {}
            for result in results:
                if isinstance(result, _Prepared):  # made in a worker: its values made ours
                    item = result
                    facts = shared.adopt(item.facts, seen)
                else:
                    item = _prepare(result, here, shared)
                    facts = item.facts
                totals.ignored += item.ignored
                failed_before += item.failed
                own = facts.counts
                counts["error"] += own[0]
                counts["warning"] += own[1]
                counts["note"] += own[2]
                totals.facts.append(facts)
                on_run(item.prepared)
            done_before += len(part)
            del results, seen
            settle()
        totals.dataset_findings.extend(walk_problems)
        phase = dataset_phase(totals.facts, policies)
        totals.judged_by_policy = phase.judged
        for index, facts in enumerate(totals.facts):
            found = phase.extras.get(facts.abs_path)
            if found is None:
                continue
            kept, ignored = found
            totals.ignored += len(ignored)
            if ignored:
                totals.ignored_extras[index] = ignored
            kept, folds = fold(kept, facts.fold_roots)
            if folds:
                totals.folds[index] = folds
            if kept:
                totals.extras[index] = kept
                more = Counts.of(kept)
                facts.counts = facts.counts.plus(more)
                for key, value in zip(("error", "warning", "note"), more, strict=True):
                    counts[key] += value
        totals.dataset_findings.extend(phase.overall)
        totals.ignored += len(phase.overall_ignored)
        totals.ignored_overall.extend(phase.overall_ignored)
        for finding in totals.dataset_findings:
            counts[finding.severity.value] += 1
        return totals
    finally:
        settle.release()


@dataclass
class _Prepared:
    """What a worker sends back for one run of a prepared stream (see ``audit_stream``)."""

    facts: RunFacts
    ignored: int
    failed: bool
    prepared: Any


def _prepare(result: RunResult, prepare: Callable[[RunResult], Any],
             shared: Interner) -> _Prepared:
    return _Prepared(RunFacts(result.record, Counts.of(result.findings), shared,
                              result.findings, result.content),
                     len(result.ignored), _not_processed(result), prepare(result))


def _prepared_chunk(targets: Sequence[tuple[Path, Path]], *,
                    job: Callable[[Sequence[tuple[Path, Path]]], list[RunResult]],
                    prepare: Callable[[RunResult], Any]) -> list[_Prepared]:
    # one interner per chunk: equal values of the chunk's runs are sent once
    shared = Interner()
    return [_prepare(result, prepare, shared) for result in job(targets)]


def _prepared_lost(item: tuple[Path, Path], why: str, *,
                   prepare: Callable[[RunResult], Any]) -> _Prepared:
    return _prepare(_lost_target(item, why), prepare, Interner())


def _itself(result: RunResult) -> RunResult:
    return result


def _failed(result: RunResult | _Prepared) -> bool:
    if isinstance(result, _Prepared):
        return result.failed
    return _not_processed(result)


class _Settler:
    """Keeps what a streamed audit holds for every run (the facts) out of the cyclic
    garbage collector's walks. Each full collection walks every tracked object; with
    100,000 runs' facts held, those walks took a quarter of the audit. After a batch,
    ``settle()`` freezes what exists (the facts, the shared values: they live until
    the report is written; a batch's results are freed by reference counting);
    ``release()`` returns them to the collector. Nothing is frozen when the process
    already froze objects of its own (``gc.freeze`` is process-wide)."""

    def __init__(self) -> None:
        self.active = gc.get_freeze_count() == 0

    def __call__(self) -> None:
        if self.active:
            gc.freeze()

    def release(self) -> None:
        if self.active:
            gc.unfreeze()


@dataclass
class DatasetPhase:
    """What the dataset rules add, with each root's policy applied."""

    #: per run ``abs_path``: the findings kept and those the policy ignored
    extras: dict[str, tuple[tuple[Finding, ...], tuple[IgnoredFinding, ...]]]
    overall: list[Finding]  # about the whole dataset
    overall_ignored: list[IgnoredFinding]
    judged: int  # runs judged by a policy protocol instead of the majority


def dataset_phase(
    records: Sequence[RunView], policies: Mapping[Path, Policy | None],
) -> DatasetPhase:
    """The dataset rules over every run, with each root's policy applied. A run whose
    policy protocol states a value is judged by the protocol, not by the majority
    (:func:`slicetime.policy.checks.dataset_codes_judged`)."""
    exempt: dict[str, set[str]] = {}
    judged = 0
    # each root's policy by the root's text (as the runs give it): no Path per run
    by_root = {str(root): policy for root, policy in policies.items()}
    for record in records:
        policy = by_root.get(record.root)
        if policy is None:
            continue
        codes = dataset_codes_judged(policy, record)
        for code in codes:
            exempt.setdefault(code, set()).add(record.abs_path)
        judged += bool(codes)
    per_run, overall = check_dataset(records, exempt)
    by_path = {r.abs_path: r for r in records}
    extras: dict[str, tuple[tuple[Finding, ...], tuple[IgnoredFinding, ...]]] = {}
    for abs_path, found in per_run.items():
        owner = by_path.get(abs_path)
        policy = policies.get(Path(owner.root)) if owner is not None else None
        if policy is not None and found and owner is not None:
            outcome = apply_overrides_and_ignores(policy, owner.path, found)
            extras[abs_path] = (tuple(outcome.kept), tuple(outcome.ignored))
        else:
            extras[abs_path] = (tuple(found), ())
    only = {p.file: p for p in policies.values() if p is not None}
    if len(only) == 1 and overall:
        outcome = apply_overrides_and_ignores(next(iter(only.values())), None, overall)
        return DatasetPhase(extras, list(outcome.kept), list(outcome.ignored), judged)
    return DatasetPhase(extras, list(overall), [], judged)


def _targets(
    paths: Sequence[Path], policy_file: Path | None, include_derivatives: bool,
    include_sourcedata: bool, include_hidden: bool, require_runs: bool = True,
    listings: dict[str, tuple[str, ...]] | None = None,
    broken: dict[Path, Finding] | None = None,
    not_plain: dict[str, frozenset[str]] | None = None,
) -> tuple[list[tuple[Path, Path]], list[str], dict[Path, Policy | None], list[Finding]]:
    """The runs to audit, the roots, each root's policy, and the walk's problems;
    :class:`NoRunsError` when a given path holds no run and ``require_runs``.
    ``listings`` receives the folder listings of the walk (see ``iter_runs``)."""
    walk_problems: list[Finding] = []
    targets: list[tuple[Path, Path]] = list(
        iter_runs(
            paths,
            include_derivatives=include_derivatives,
            include_sourcedata=include_sourcedata,
            include_hidden=include_hidden,
            on_error=walk_problems.append,
            listings=listings,
            not_plain=not_plain,
        )
    )
    if require_runs:
        _check_every_path_has_runs(paths, targets)
    roots = sorted({str(root) for root, _ in targets}) or [str(find_root(p)) for p in paths]
    policies = _policies(sorted({root for root, _ in targets}), policy_file, walk_problems,
                         broken)
    return targets, roots, policies, walk_problems


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
    runs: list[RunResult] = []
    sharer = ValueSharer()  # one copy of each inherited value, as chunks come back

    def collect(run: RunResult) -> None:
        sharer.add(run.record)
        runs.append(run)

    if executor is None and jobs > 1:
        executor = ProcessExecutor(jobs)
    totals = audit_stream(
        paths, collect, include_derivatives=include_derivatives,
        include_sourcedata=include_sourcedata, include_hidden=include_hidden,
        progress=progress, policy_file=policy_file, executor=executor, verify=verify,
        source=source, require_runs=require_runs)
    return collected(totals, runs)


def collected(totals: AuditTotals, runs: list[RunResult]) -> AuditResult:
    """The in-memory result: the stream's runs with what the dataset rules added to
    each (kept, and folded into the run's own root causes: decided once in the stream,
    written into the findings here), the dataset's findings and what was ignored."""
    for index, run in enumerate(runs):
        folded, more = totals.folds.get(index), totals.extras.get(index)
        if folded or more:
            run.findings[:] = [*attach_folded(run.findings, folded or ()), *(more or ())]
        run.ignored.extend(totals.ignored_extras.get(index, ()))
    return AuditResult(roots=totals.roots, runs=runs,
                       dataset_findings=list(totals.dataset_findings),
                       ignored=list(totals.ignored_overall), policies=dict(totals.policies),
                       accepts=dict(totals.accepts), judged_by_policy=totals.judged_by_policy,
                       broken_policies=dict(totals.broken_policies))


def inspect_run(image: Path, *, policy_file: Path | None = None,
                source: SourceOptions | None = None) -> RunResult:
    """One run with exactly the findings :func:`audit_paths` gives it: its dataset is
    audited (header bytes only) with the lab policy, so the dataset-wide checks are
    included (what ``slicetime show`` prints). A file that cannot be read at all gives
    a result with that one finding; a missing file raises ReadError."""
    return inspect_run_policy(image, policy_file=policy_file, source=source)[0]


def inspect_run_policy(
    image: Path, *, policy_file: Path | None = None, source: SourceOptions | None = None
) -> tuple[RunResult, str | None, tuple[AcceptEntry, ...]]:
    """:func:`inspect_run`, with what its audit found of the run's dataset's lab policy
    (as :func:`policy_problem` and :func:`policy_accepts` give it), from the audit's own
    loading of the policy: the policy is read once. A run whose file cannot be read at
    all was not audited: its policy is then loaded on its own."""
    absolute = image if image.is_absolute() else image.absolute()
    root = find_root(absolute.parent)
    try:
        result = audit_paths([root, absolute], policy_file=policy_file, source=source,
                             require_runs=False)
        run = next(r for r in result.runs if r.record.abs_path == str(absolute))
        # the dataset's broken lab policy was not used: the run's findings say so,
        # as the audit's report does (one loading path: audit_paths)
        broken = result.broken_policies.get(run.record.root)
        if broken is not None:
            run.findings.insert(0, broken)
        problem = _first_broken({} if broken is None else {run.record.root: broken})
        return run, problem, result.accepts.get(run.record.root, ())
    except ReadError as exc:
        if exc.code == "file/missing":
            raise
        shown = relative_display(absolute, root)
        run = RunResult(RunRecord(path=shown, abs_path=str(absolute), root=str(root)),
                        [exc.to_finding()])
        where = Path(run.record.root)
        return (run, policy_problem([where], policy_file),
                policy_accepts(where, policy_file))
    except StopIteration:  # not a run the walker recognises (a name it skips)
        why = not_a_run(absolute.name) or "not an image the audit reads as a run"
        raise ReadError("file/not-nifti", str(absolute), None, f"{absolute}: {why}") from None


__all__ = [
    "AuditResult",
    "AuditTotals",
    "NoRunsError",
    "ReadError",
    "RunFacts",
    "RunResult",
    "audit_one",
    "audit_paths",
    "audit_stream",
    "check_paths_hold_runs",
    "dataset_name",
    "failed_run",
    "inspect_run",
    "inspect_run_policy",
    "policy_accepts",
    "policy_problem",
]
