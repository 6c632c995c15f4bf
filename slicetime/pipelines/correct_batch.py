"""Correcting a batch: find the runs, hold the output folder's lock, run them
(in worker processes when asked), keep the input order, withdraw stale outputs,
and finish the output folder (description, provenance, empty folders).

One run is corrected by :func:`slicetime.pipelines.correct.correct_run`.
"""

from __future__ import annotations

import contextlib
import dataclasses
import os
import time
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

from slicetime.codes import make_finding
from slicetime.engines.interpolate import (
    get_engine,
)
from slicetime.model import Severity
from slicetime.pipelines.audit import AuditResult, RunResult, audit_paths
from slicetime.pipelines.correct import (
    CorrectOptions,
    CorrectResult,
    RunOutcome,
    correct_run,
)
from slicetime.pipelines.correct_events import recorded_events
from slicetime.pipelines.errors import (
    UNWRITTEN_CODE,
)
from slicetime.pipelines.executor import (
    Executor,
    Interrupted,
    Progress,
    available_cpus,
    map_chunks,
)
from slicetime.pipelines.outputs import (
    check_desc,
    check_output_location,
    clashing_runs,
    output_files,
    output_path,
    prune_empty_folders,
    remove_stale_temporaries,
)
from slicetime.pipelines.provenance import (
    PROVENANCE_FILE,
    dataset_names,
    dataset_uri,
    entry_of,
    json_safe,
    read_json_object,
    recorded_input,
    write_description,
    write_provenance,
)
from slicetime.pipelines.signals import signals_noted, test_point
from slicetime.readers.atomic import (
    FolderBusy,
    folder_lock,
    link_between,
)
from slicetime.readers.dataset import find_root
from slicetime.readers.errors import is_regular_file
from slicetime.readers.volumes import (
    file_sha256,
)


def _correct_chunk(
    items: Sequence[tuple[RunResult, str]], options: CorrectOptions
) -> list[RunOutcome]:
    outcomes = []
    for run, name in items:
        test_point(f"correct:run:{run.record.path}")  # tests: Ctrl-C before this run
        outcomes.append(correct_run(run, options, name))
    return outcomes


def correct_paths(
    paths: Sequence[Path],
    options: CorrectOptions,
    *,
    jobs: int = 1,
    progress: Progress | None = None,
    policy_file: Path | None = None,
    include_derivatives: bool = False,
    include_sourcedata: bool = False,
    include_hidden: bool = False,
    executor: Executor | None = None,
    verify: bool = False,
) -> CorrectResult:
    """Correct every run under ``paths`` into ``options.out``.

    ``verify`` checks each run's claimed slice order against its image data first
    (the audit's ``verify``): a contradicted claim puts the timing in doubt.

    Raises ``ValueError`` for a bad output location or a dataset whose own lab policy
    is broken (usage errors) and
    ``ReadError`` for a missing given path; everything about a single run
    becomes its outcome.
    """
    get_engine(options.method)
    check_desc(options.desc)
    try:
        audit: AuditResult = audit_paths(
            paths,
            include_derivatives=include_derivatives,
            include_sourcedata=include_sourcedata,
            include_hidden=include_hidden,
            policy_file=policy_file,
            verify=verify,
            executor=executor if verify else None,
            jobs=jobs if verify else 1,
        )
        test_point("correct:audit")
    except KeyboardInterrupt:
        raise NotStarted("while the runs were audited") from None
    broken = audit.policy_problem()
    if broken is not None:
        # the lab's policy (its accepted doubts, severities, protocols) decides what may
        # be corrected: without it correct would judge every run by other rules
        raise ValueError(f"{broken} (correct does not run without the dataset's lab policy)")
    options = dataclasses.replace(options, policy_accepts=audit.accepts)
    roots = sorted({r.record.root for r in audit.runs})
    given_roots = {str(find_root(Path(p))) for p in paths} | set(audit.roots) | set(roots)
    try:
        check_output_location(
            options.out, [Path(r) for r in sorted(given_roots)], list(paths),
            include_derivatives=include_derivatives,
        )
    except KeyboardInterrupt:
        raise NotStarted("while the output folder was checked") from None
    created_out = not options.out.exists()
    options.out.mkdir(parents=True, exist_ok=True)
    try:
        with folder_lock(options.out):
            return _correct_locked(audit, roots, options, created_out, executor, jobs,
                                   progress)
    except FolderBusy:
        raise ValueError(
            f"--out {options.out}: another slicetime correct is writing to this folder now; "
            "run this batch when it has ended"
        ) from None
    finally:
        if created_out:  # nothing was written (a refusal before the batch): no folder left
            with contextlib.suppress(OSError):
                options.out.rmdir()


def _correct_locked(
    audit: AuditResult,
    roots: list[str],
    options: CorrectOptions,
    created_out: bool,
    executor: Executor | None,
    jobs: int,
    progress: Progress | None,
) -> CorrectResult:
    """The batch, while this process holds the lock of ``--out``: the description's
    ``DatasetLinks`` and the provenance file are read and rewritten by one batch at a
    time."""
    describing = False
    try:
        names, links = dataset_names(options.out, roots, mix_inputs=options.mix_inputs)
        result = CorrectResult(out=str(options.out), omitted=options.omit_leading)
        result.dataset_findings = [
            f for f in audit.dataset_findings if f.severity is Severity.ERROR
        ]
        clashes = _clash_outcomes(audit.runs, options.desc)
        remove_stale_temporaries(options.out)
        if any(r.record.abs_path not in clashes for r in audit.runs):
            # before any output: a batch killed half way still names its inputs
            describing = True
            test_point("correct:describe")
            _describe(options.out, roots, links, options)
    except KeyboardInterrupt:
        # written atomically: absent now, it was not written (and a --out this batch made
        # is taken away again, empty)
        description = options.out / "dataset_description.json"
        raise NotStarted("while the output folder was prepared",
                         f"no output written, {description} (naming the inputs) may have "
                         "been" if describing and description.exists() else None) from None
    items = [(run, names[run.record.root]) for run in audit.runs
             if run.record.abs_path not in clashes]
    started = time.time()
    options = dataclasses.replace(options, batch_started=started)
    if options.threads <= 0:
        options = dataclasses.replace(options, threads=_auto_threads(executor, jobs, len(items)))
    job = _ChunkJob(options)
    try:
        done = map_chunks(
            job,
            items,
            lost=_lost_run,
            executor=executor,
            jobs=jobs,
            chunk_size=1,
            progress=progress,
            failed_of=lambda outcome: not outcome.ok,
        )
    except Interrupted as stop:
        # the workers are gone: what is on disk now is final; report exactly that, with
        # the records written whole (another Ctrl-C meanwhile is noted, not obeyed)
        remove_stale_temporaries(options.out)
        with signals_noted():
            finished: list[RunOutcome] = []
            for item, outcome in zip(items, stop.results, strict=True):
                found = (outcome if outcome is not None
                         else _found_on_disk(item, options, started))
                if found is not None:
                    finished.append(found)
            result.runs = _in_input_order(audit.runs, finished, clashes)
            _withdraw_stale(options, audit.runs, result.runs)
            done_paths = {r.path for r in finished}
            _finish(options, roots, links, result, created_out,
                    unfinished=[run.record.path for run, _ in items
                                if run.record.path not in done_paths])
            description = options.out / "dataset_description.json"
            # no run finished: the description written before the batch is all there is,
            # unless this batch made --out and so took it away again (_finish)
            kept = (f"no run written, only {description} (naming the inputs)"
                    if describing and not finished and description.exists() else None)
        raise CorrectInterrupted(result, len(items) - len(finished), kept) from None
    # every run is done: the outputs in place and the records written whole, whatever
    # signal arrives now (noted: the batch is reported finished, and says so)
    with signals_noted() as late:
        result.runs = _in_input_order(audit.runs, done, clashes)
        _withdraw_stale(options, audit.runs, result.runs)
        remove_stale_temporaries(options.out)  # of a worker that was lost
        test_point("correct:records")
        _finish(options, roots, links, result, created_out)
    result.late_signal = bool(late)
    return result


def _in_input_order(
    runs: Sequence[RunResult], outcomes: Sequence[RunOutcome], clashes: dict[str, RunOutcome]
) -> list[RunOutcome]:
    by_key = {(o.root, o.path): o for o in outcomes}
    ordered = []
    for run in runs:
        record = run.record
        outcome = clashes.get(record.abs_path) or by_key.get((record.root, record.path))
        if outcome is not None:
            ordered.append(outcome)
    return ordered


def _found_on_disk(
    item: tuple[RunResult, str], options: CorrectOptions, since: float
) -> RunOutcome | None:
    """After Ctrl-C, a run whose worker was stopped: ``corrected`` when this batch put
    its image and sidecar in place (the image matches the sidecar's checksum), else
    nothing, after removing a sidecar or image of this batch that lacks its partner."""
    record = item[0].record
    rel_out = output_path(record.path, options.desc)
    if rel_out is None:
        return None
    image, sidecar = output_files(options.out, rel_out.as_posix())
    if link_between(sidecar, options.out) is not None or link_between(image, options.out):
        return None  # reached through a link: this batch wrote nothing there

    def fresh(path: Path) -> bool:
        try:
            return path.stat().st_mtime >= since - 0.05
        except OSError:
            return False

    if not (fresh(image) or fresh(sidecar)):
        return None  # untouched by this batch: left as it was
    content = read_json_object(sidecar)
    entry = entry_of(content, rel_out.as_posix()) if content is not None else None
    output = entry.get("Output") if entry is not None else None
    if (is_regular_file(image) and isinstance(output, dict)
            and output.get("SHA256") == file_sha256(image)
            and recorded_input(sidecar) == (dataset_uri(record.root), json_safe(record.path))):
        outcome = RunOutcome(record.path, record.root, "corrected", output=rel_out.as_posix())
        outcome.provenance = entry
        return outcome
    for path in (image, sidecar):
        if fresh(path):
            with contextlib.suppress(OSError):
                os.unlink(path)
    return None


def _withdraw_stale(
    options: CorrectOptions, runs: Sequence[RunResult], outcomes: Sequence[RunOutcome]
) -> None:
    """A run refused or failed now whose earlier output is still in ``out`` (written
    from this very input): remove that output (and the events table it recorded, unless
    a run of this batch wrote it too: echoes share one), so nothing stale looks valid,
    and say so in the run's reason and in the provenance file (``Removed``)."""
    kept = {events.get("Output") for o in outcomes if o.ok
            for events in [(o.provenance or {}).get("Events")] if isinstance(events, dict)}
    for outcome in outcomes:
        if outcome.ok:
            continue
        rel_out = output_path(outcome.path, options.desc)
        if rel_out is None:
            continue
        image, sidecar = output_files(options.out, rel_out.as_posix())
        if link_between(sidecar, options.out) is not None or link_between(image, options.out):
            continue  # reached through a link: not in --out, never removed
        if recorded_input(sidecar) != (dataset_uri(outcome.root), json_safe(outcome.path)):
            continue  # not an output of this run (or not one slicetime wrote)
        events = recorded_events(sidecar, options.out)
        if events is not None and events.relative_to(options.out).as_posix() not in kept:
            with contextlib.suppress(FileNotFoundError):
                os.unlink(events)
        for path in (image, sidecar):
            with contextlib.suppress(FileNotFoundError):
                os.unlink(path)
        outcome.removed = rel_out.as_posix()
        note = f"its earlier output {rel_out.as_posix()} was removed, as it no longer holds"
        outcome.reason = f"{outcome.reason}; {note}" if outcome.reason else note



def _clash_outcomes(runs: Sequence[RunResult], desc: str) -> dict[str, RunOutcome]:
    """The runs refused because they would be written onto one output."""
    found = clashing_runs((r.record for r in runs), desc)
    return {
        r.record.abs_path: RunOutcome(r.record.path, r.record.root, "refused",
                                      reason=found[r.record.abs_path].message,
                                      blocking=[found[r.record.abs_path]])
        for r in runs if r.record.abs_path in found
    }


def _auto_threads(executor: Executor | None, jobs: int, n_runs: int) -> int:
    """Threads per run so that the runs corrected at once share the CPUs."""
    if executor is not None and executor.name == "dask":
        return 1  # a Dask worker runs as many tasks as it has threads
    at_once = getattr(executor, "jobs", jobs) if executor is not None else jobs
    return max(1, available_cpus() // max(1, min(at_once, n_runs)))


class NotStarted(KeyboardInterrupt):
    """Ctrl-C before any run was started (``stage``: what was being done): nothing
    was corrected and no output written (``written``: what may have been written,
    said in full, instead of "nothing written")."""

    def __init__(self, stage: str, written: str | None = None) -> None:
        super().__init__("interrupted")
        self.stage = stage
        self.written = written


class CorrectInterrupted(KeyboardInterrupt):
    """Ctrl-C during a batch: ``result`` holds the runs that finished; ``written``, when
    none did, says what is on disk all the same (None: nothing)."""

    def __init__(self, result: CorrectResult, not_finished: int,
                 written: str | None = None) -> None:
        super().__init__("interrupted")
        self.result = result
        self.not_finished = not_finished
        self.written = written


def _finish(
    options: CorrectOptions,
    roots: Sequence[str],
    links: dict[str, str],
    result: CorrectResult,
    created_out: bool,
    unfinished: Sequence[str] = (),
) -> None:
    """Describe the output when it holds corrected runs; else remove what this batch
    made. The folders of runs that produced nothing (failed, refused, or ``unfinished``
    when the batch was interrupted) are removed when empty."""
    withdrawn = any(r.removed for r in result.runs)
    if any(r.ok for r in result.runs) or withdrawn:
        try:
            _describe(options.out, roots, links, options)
            write_provenance(options.out, result.runs)
        except OSError as exc:  # a full disk: the runs in place are still reported
            result.dataset_findings.append(make_finding(
                UNWRITTEN_CODE,
                f"{options.out}: the description and provenance file could not be brought "
                f"up to date ({exc.strerror or exc}); rerun when the folder is writable",
                file=str(options.out),
            ))
    elif created_out:  # nothing was written: leave no folder behind
        for name in ("dataset_description.json", PROVENANCE_FILE):
            with contextlib.suppress(FileNotFoundError):
                os.unlink(options.out / name)
    prune_empty_folders(options.out, [*(r.path for r in result.runs if not r.ok), *unfinished],
                        options.desc, remove_out=created_out)


def _lost_run(item: tuple[RunResult, str], why: str) -> RunOutcome:
    record = item[0].record
    return RunOutcome(record.path, record.root, "failed", reason=f"{record.path}: {why}")



@dataclass(frozen=True)
class _ChunkJob:
    options: CorrectOptions

    def __call__(self, items: Sequence[tuple[RunResult, str]]) -> list[RunOutcome]:
        return _correct_chunk(items, self.options)



def _describe(
    out: Path, roots: Sequence[str], links: dict[str, str], options: CorrectOptions
) -> None:
    write_description(out, roots, links, get_engine(options.method),
                      options.reference.describe())
