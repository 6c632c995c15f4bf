"""The correction pipeline: audit, plan, resample and write BIDS-derivative runs.

For each run (found by the audit's walker), :func:`correct_run` composes:

1. the gate (:func:`_refusal`), in this order: a series that may not be
   interpolated (``rules.correction.interpolation_refusal``: only BOLD-type series),
   a run without a resolved schedule, an impossible timing, a bad scaling and a run
   shorter than ``MIN_VOLUMES`` are refused whatever the options; a run whose timing
   stands in doubt (``rules.correction.judge_trust``) is refused unless every doubt is
   accepted (``--accept``, the policy's ``[[accept]]``); a run with other error
   findings is refused unless ``force``. This is the one place ``--force`` is
   decided: it covers audit errors that do not put the timing in doubt, nothing
   else;
2. the plan (``engines.plan``) and the output's place
   (:mod:`slicetime.pipelines.outputs`); a run whose output sidecar records the
   same inputs (SHA-256), settings and output checksum is reused
   (:mod:`slicetime.pipelines.provenance`);
3. the memory budget (:mod:`slicetime.pipelines.memory`), then the image read a
   batch of volumes at a time into a slice-major float32 buffer
   (:mod:`slicetime.readers.scratch`: in memory, or a scratch file under ``out``
   with ``max_memory``), each excitation group resampled with the chosen engine
   (``engines.align``), and the volumes written back out, compressed like the
   input;
4. the commit: the image, then the sidecar (which records the provenance and
   acts as the "done" marker) appear under their final names by atomic rename;
   a failure at any point removes the temporary files.

:func:`~slicetime.pipelines.correct_batch.correct_paths` maps this over a batch and
writes the dataset's description and provenance file.
"""

from __future__ import annotations

import contextlib
import math
import os
import time
from collections import Counter
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, TypeVar

import numpy as np

from slicetime import __version__
from slicetime.codes import make_finding
from slicetime.engines.align import align_slice, noise_per_slice, run_tasks, slice_tasks
from slicetime.engines.interpolate import (
    Engine,
    IrregularGridError,
    ResampleStats,
    get_engine,
    prepare,
)
from slicetime.engines.plan import (
    ImplausibleTiming,
    PlanError,
    ReferenceChoice,
    ResamplingPlan,
    ShiftGroup,
    check_plausible,
    make_plan,
    slice_time_ref,
)
from slicetime.model import Finding, RunRecord, Severity
from slicetime.numbers import ratio
from slicetime.pipelines.audit import RunResult
from slicetime.pipelines.correct_events import (
    RestatedEvents,
    put_in_place,
    recorded_events,
    restate_events,
    run_inputs,
)
from slicetime.pipelines.correct_gate import judge_run
from slicetime.pipelines.errors import (
    CLASH_CODE,
    DOUBT_CODE,
    IMPLAUSIBLE_CODE,
    NOT_INTERPOLABLE_CODE,
    SCALING_CODE,
    TOO_FEW_CODE,
    CorrectionError,
)
from slicetime.pipelines.memory import (
    Budget,
    allocator_tuning,
    parse_size,
    plan_budget,
    release_memory,
)
from slicetime.pipelines.outputs import (
    DEFAULT_DESC,
    check_output_location,
    output_name,
    output_path,
    remove_stale_temporaries,
)
from slicetime.pipelines.provenance import (
    PROVENANCE_FILE,
    PROVENANCE_KEY,
    CorrectionFacts,
    dataset_uri,
    entry_of,
    json_safe,
    output_sidecar,
    pascal_keys,
    provenance_entry,
    recorded_input,
    up_to_date,
    write_json_atomic,
)
from slicetime.policy.model import AcceptEntry
from slicetime.readers.atomic import (
    WriteRefused,
    make_folders,
    temp_path,
    write_atomic,
)
from slicetime.readers.entities import sidecar_name
from slicetime.readers.errors import ReadError, is_regular_file
from slicetime.readers.scratch import (
    DiskBuffer,
    MemoryBuffer,
    OutputCast,
    ScalingRangeError,
    SliceBuffer,
    c_axis,
    slice_major_view,
    volume_major_target,
)
from slicetime.readers.volumes import (
    FLOAT32_CODE,
    VolumeReader,
    VolumeWriter,
    patched_prefix,
    scaling,
    scaling_problem,
)
from slicetime.rules.correction import (
    doubt_refusal,
    interpolation_refusal,
    shape_refusal,
    too_few_volumes_of,
)
from slicetime.words import count

_Result = TypeVar("_Result")


@dataclass(frozen=True)
class CorrectOptions:
    out: Path
    method: str = "fourier"
    reference: ReferenceChoice = field(default_factory=lambda: ReferenceChoice("middle"))
    desc: str = DEFAULT_DESC
    keep_dtype: bool = False
    force: bool = False
    max_memory: int | None = None
    threads: int = 1  # engine and gzip helper threads per run; 0: share the CPUs
    #: allow an --out folder made from other input datasets (their links are kept)
    mix_inputs: bool = False
    #: when the batch began (time.time()): an output already in place that this batch
    #: wrote (its worker was lost before it could say so) is reported as corrected
    batch_started: float | None = None
    #: doubts about the timing accepted on the command line (``--accept``)
    accepts: tuple[AcceptEntry, ...] = ()
    #: the same from each dataset root's lab policy (root -> its ``[[accept]]`` entries)
    policy_accepts: Mapping[str, tuple[AcceptEntry, ...]] = field(default_factory=dict)
    #: leading volumes left out of the outputs (still used to interpolate the others)
    omit_leading: int = 0

    def settings(self, engine: Engine) -> dict[str, Any]:
        """What must match for an earlier output to be reused."""
        return {
            "Method": engine.name,
            "Parameters": pascal_keys(engine.parameters),
            "Reference": pascal_keys(self.reference.to_json()),
            "KeepDataType": self.keep_dtype,
            "Desc": self.desc,
            "Version": __version__,
            **({"LeadingVolumesLeftOut": self.omit_leading} if self.omit_leading else {}),
        }

    def accepts_for(self, root: str) -> tuple[AcceptEntry, ...]:
        return (*self.accepts, *self.policy_accepts.get(root, ()))


@dataclass
class RunOutcome:
    """What happened to one run."""

    path: str  # input, relative to its root
    root: str
    status: str  # corrected | up-to-date | refused | failed
    reason: str | None = None
    output: str | None = None  # relative to out
    reference: float | None = None
    warnings: list[str] = field(default_factory=list)
    blocking: list[Finding] = field(default_factory=list)
    seconds: float = 0.0
    provenance: dict[str, Any] | None = None
    removed: str | None = None  # an earlier output of this run, removed as stale (rel. to out)
    #: the doubts about the timing the user accepted (code, message, accepted by, reason)
    accepted: list[dict[str, str]] = field(default_factory=list)
    #: what a model of the output needs: StartTime / RepetitionTime (None: VolumeTiming)
    slice_time_ref: float | None = None

    @property
    def ok(self) -> bool:
        return self.status in ("corrected", "up-to-date")


@dataclass
class CorrectResult:
    out: str
    runs: list[RunOutcome] = field(default_factory=list)
    dataset_findings: list[Finding] = field(default_factory=list)
    omitted: int = 0  # --omit-leading
    #: a Ctrl-C (or SIGTERM) arrived after every run was done, while the records were
    #: written: noted, not obeyed (the batch finished; ``pipelines.signals``)
    late_signal: bool = False

    def counts(self) -> dict[str, int]:
        counts = {"corrected": 0, "up-to-date": 0, "refused": 0, "failed": 0}
        for run in self.runs:
            counts[run.status] += 1
        return counts

    def batch_findings(self) -> list[Finding]:
        """The batch's own problems (``correct/*`` codes), not the audit's."""
        return [f for f in self.dataset_findings if f.code.startswith("correct/")]

    def exit_code(self) -> int:
        return 0 if all(r.ok for r in self.runs) and not self.batch_findings() else 1

    def hand_off(self) -> str | None:
        """The one line a model of the outputs needs: the slice-time reference
        ``StartTime / RepetitionTime`` (the same for every output, or each value with
        its count), the frame times of ``VolumeTiming`` outputs, and the shift of the
        event onsets when leading volumes were left out. None: nothing corrected."""
        done = [r for r in self.runs if r.ok]
        if not done:
            return None
        values = [r.slice_time_ref for r in done if r.slice_time_ref is not None]
        parts = []
        if values:
            counts = Counter(values)
            if len(counts) == 1:
                every = "every output" if len(values) == len(done) else count(
                    len(values), "output")
                parts.append(f"slice_time_ref = StartTime / RepetitionTime = {ratio(values[0])} "
                             f"({every})")
            else:
                listed = ", ".join(f"{ratio(v)} ({count(n, 'output')})"
                                   for v, n in sorted(counts.items()))
                parts.append(f"slice_time_ref = StartTime / RepetitionTime: {listed}; each "
                             "output's in its sidecar and in --format json")
        timed = len(done) - len(values)
        if timed:
            parts.append(f"frame times = VolumeTiming + StartTime ({count(timed, 'output')} "
                         "without RepetitionTime)")
        if self.omitted:
            restated = sum(1 for r in done if (r.provenance or {}).get("Events"))
            beside = (f"; events tables restated beside {count(restated, 'output')}"
                      if restated else "")
            parts.append(f"event onsets count from volume {self.omitted} now "
                         f"(NumberOfVolumesDiscardedByUser){beside}")
        return "for the model: " + "; ".join(parts)


def _engine_pass(
    buffer: SliceBuffer,
    plan: ResamplingPlan,
    engine: Engine,
    budget: Budget,
    stats: ResampleStats,
) -> None:
    """Resample every slice that is not already at the reference, one slice per task
    (slices run in ``budget.threads`` threads: the transforms release the GIL), with
    the same per-slice code as ``slicetime.correct_array`` (``engines.align``)."""

    def work(task: tuple[ShiftGroup, int]) -> ResampleStats:
        group, z = task
        local = ResampleStats()
        view = buffer.get_slice(z)  # (volume, plane)
        align_slice(view, plan, group, engine, stats=local, rows_per_block=budget.rows_per_block)
        buffer.put_slice(z, view)
        return local

    stats.add(run_tasks(slice_tasks(plan), work, budget.threads))


def correct_run(
    run: RunResult, options: CorrectOptions, dataset_name: str = "raw"
) -> RunOutcome:
    """Correct one audited run. Never raises for a bad run: returns an outcome
    (Ctrl-C still propagates, after the run's temporary files are removed)."""
    started = time.perf_counter()
    record = run.record
    outcome = RunOutcome(record.path, record.root, "refused")
    forced: list[str] = []
    try:
        forced = _correct(run, options, dataset_name, outcome)
    except (CorrectionError, PlanError, IrregularGridError, ReadError) as exc:
        refused = isinstance(exc, PlanError | IrregularGridError) or (
            isinstance(exc, CorrectionError) and exc.code is not None
        )
        outcome.status = "refused" if refused else "failed"
        message = exc.message if isinstance(exc, ReadError) else str(exc)
        outcome.reason = message if message.startswith(record.path) else f"{record.path}: {message}"
        code = (IMPLAUSIBLE_CODE if isinstance(exc, ImplausibleTiming)
                else exc.code if isinstance(exc, CorrectionError) else None)
        if code is not None:
            field_name = exc.field if isinstance(exc, CorrectionError | ImplausibleTiming) \
                else None
            outcome.blocking.append(
                make_finding(code, message, file=record.path, field=field_name)
            )
    except OSError as exc:
        outcome.status = "failed"
        outcome.reason = f"{record.path}: cannot write the output ({exc.strerror or exc})"
    except Exception as exc:  # a bug on one run never stops the batch
        outcome.status = "failed"
        outcome.reason = f"{record.path}: internal error ({type(exc).__name__}: {exc})"
    if outcome.ok:
        # said once, and only of a run that was corrected (never of a refused one)
        outcome.warnings[:0] = forced
    outcome.seconds = time.perf_counter() - started
    return outcome


def _refusal(
    run: RunResult, options: CorrectOptions, outcome: RunOutcome
) -> tuple[str | None, list[str]]:
    """Why the run is not corrected (None: it is), and the warnings when forced.

    Refusals that no option lifts come first (raised with their ``correct/*`` code):
    a series that must not be interpolated (by its kind or its shape), too few
    volumes, an impossible timing (before ``force``:
    no judgement makes it usable), a bad scaling. Then the doubts
    about the timing, lifted only by accepting each one; then the audit's other
    errors, lifted by ``force``. ``outcome.blocking`` holds the audit's errors on
    entry; a refusal for doubts puts the doubting findings first."""
    record = run.record
    errors = outcome.blocking
    if record.header is None:
        # the reader's own reason (an error, or a link out of the dataset: not read)
        unread = [*errors, *(f for f in run.findings if f.code.startswith("file/"))]
        raise CorrectionError(unread[0].message if unread else "the image header cannot be read")
    not_series = interpolation_refusal(record)
    if not_series is not None:
        raise CorrectionError(not_series, code=NOT_INTERPOLABLE_CODE, field="suffix")
    stacked = shape_refusal(record.header)
    if stacked is not None:
        raise CorrectionError(stacked, code=NOT_INTERPOLABLE_CODE, field="dim")
    short = too_few_volumes_of(record.header)
    if short is not None:
        raise CorrectionError(short, code=TOO_FEW_CODE, field="dim")
    if record.schedule is None:
        why = "; ".join([p.message for p in record.timing_problems]
                        or _unread_sidecars(run) or ["no slice timing found"])
        return f"{record.path}: no usable slice timing ({why})", []
    try:
        check_plausible(record.schedule)
    except ImplausibleTiming as exc:
        if not errors:
            raise
        codes = ", ".join(sorted({f.code for f in errors}))
        # what to do is the audit's own advice for the value (its finding's hint), so
        # correct and audit say the same of the run
        # (a header's pixdim[4] stands in for a missing RepetitionTime: the audit's advice
        # on RepetitionTime, tr/missing, is about it)
        fields = {exc.field, "RepetitionTime"} if exc.field == "pixdim[4]" else {exc.field}
        advice = next((f.hint for f in errors if f.field in fields and f.hint), None)
        then = f". {advice}" if advice else "; see slicetime show"
        raise ImplausibleTiming(f"{exc} (the audit found {codes}){then}", exc.field) from None
    problem = scaling_problem(record.header)
    if problem is not None:
        raise CorrectionError(f"{problem}, so the run is refused", code=SCALING_CODE,
                              field="scl_inter")
    verdict = judge_run(run, options.accepts_for(record.root))
    outcome.accepted = [
        {"code": f.code, "message": f.message, "accepted_by": entry.given,
         "reason": entry.reason} for f, entry in verdict.accepted]
    doubted = doubt_refusal(verdict, record.path, _command_line_accepts)
    if doubted is not None:
        outcome.blocking = [*verdict.standing, *(f for f in errors
                                                 if f not in verdict.standing)]
        raise CorrectionError(doubted, code=DOUBT_CODE)
    accepted = {id(f) for f, _ in verdict.accepted}
    errors = [f for f in errors if id(f) not in accepted]
    if errors and not options.force:
        codes = ", ".join(sorted({f.code for f in errors}))
        return (
            f"{record.path}: the audit found errors that make the timing untrustworthy "
            f"({codes}); fix them (see slicetime show), or pass --force if you judge them "
            "harmless",
            [],
        )
    return None, [f"corrected despite audit error {f.code}: {f.message}" for f in errors]


def _unread_sidecars(run: RunResult) -> list[str]:
    """What the reader said of the run's sidecars it could not use (a link leading out
    of the dataset, a file that is no JSON object, ...), each as ``file: message``, in
    the audit's own words (its findings checked while reading, warnings and errors,
    about a file other than the image)."""
    from slicetime.codes import RULES

    return [f.message if f.message.startswith(f"{f.file}: ") else f"{f.file}: {f.message}"
            for f in run.findings
            if f.severity is not Severity.NOTE and f.file not in (None, run.record.path)
            and f.code in RULES and RULES[f.code].checked == "reading"]


def _command_line_accepts(specs: list[str]) -> str:
    return " ".join(f"--accept {spec}" for spec in specs)


@dataclass(frozen=True)
class _Target:
    """Where one run's output goes."""

    rel: Path  # the image, relative to --out
    image: Path
    sidecar: Path


def _correct(
    run: RunResult, options: CorrectOptions, dataset_name: str, outcome: RunOutcome
) -> list[str]:
    """Correct the run into ``outcome``; return the warnings about forced audit errors."""
    record = run.record
    outcome.blocking = [f for f in run.findings if f.severity is Severity.ERROR]
    reason, forced = _refusal(run, options, outcome)
    if reason is not None:
        outcome.reason = reason
        return []
    engine = get_engine(options.method)
    plan = _plan(record, options, engine)
    outcome.reference = plan.reference
    assert record.schedule is not None
    outcome.slice_time_ref = slice_time_ref(plan.reference, record.schedule.repetition_time)
    target = _target(record, options)
    outcome.output = target.rel.as_posix()
    settings = options.settings(engine)
    if outcome.accepted:  # an output made under other acceptances is not reused
        settings["AcceptedDoubts"] = sorted(f"{a['code']} ({a['accepted_by']}: {a['reason']})"
                                            for a in outcome.accepted)
    events, warning = restate_events(record, options.omit_leading, target.image, target.rel)
    if warning is not None:
        outcome.warnings.append(warning)
    if _reuse(record, target, settings, options, outcome, events):
        if events is not None:  # in place again, should it have been removed since
            put_in_place(events)
        return forced
    _resample_and_write(record, plan, engine, options, target, settings, dataset_name, outcome,
                        events)
    return forced


def _plan(record: RunRecord, options: CorrectOptions, engine: Engine) -> ResamplingPlan:
    """The run's resampling plan, after the checks of its image's shape and type."""
    header, schedule = record.header, record.schedule
    assert header is not None and schedule is not None
    if not header.is_four_d:
        raise CorrectionError(
            f"correction needs a 4-D image; this one has {len(header.shape)} dimensions "
            f"{list(header.shape)} (dim)"
        )
    if not header.compressed and not record.path.endswith(".nii"):
        raise CorrectionError("only single-file NIfTI images (.nii, .nii.gz) can be corrected")
    axis_length = header.shape[schedule.axis_index]
    if axis_length != schedule.n_slices:
        raise CorrectionError(
            f"SliceTiming has {schedule.n_slices} entries but the image has {axis_length} "
            f"slices along {schedule.axis}"
        )
    if options.omit_leading >= header.shape[3]:
        raise CorrectionError(
            f"--omit-leading {options.omit_leading} leaves none of the run's "
            f"{header.shape[3]} volumes"
        )
    plan = make_plan(schedule, header.shape[3], options.reference)
    if engine.needs_regular_grid and not plan.regular:
        raise IrregularGridError(
            f"VolumeTiming spaces the volumes unevenly; the {engine.name} method needs evenly "
            "spaced volumes (use --method cubic or --method linear)"
        )
    return plan


def _target(record: RunRecord, options: CorrectOptions) -> _Target:
    """The run's output files, their folder made, refused when they lead outside
    ``--out`` or belong to another input."""
    rel_out = output_path(record.path, options.desc)
    if rel_out is None:
        raise CorrectionError("the run is outside its dataset root, so its path cannot be mirrored")
    image_out = options.out / rel_out
    sidecar_out = image_out.with_name(sidecar_name(image_out.name))
    try:
        make_folders(image_out.parent, options.out)
    except WriteRefused as exc:
        raise CorrectionError(f"{exc} (inside --out); nothing was written") from None
    for path in (image_out, sidecar_out):
        if path.is_symlink():
            raise CorrectionError(f"{path} is a symbolic link; nothing is written through it")
    owner = recorded_input(sidecar_out)
    if owner is not None and owner != (dataset_uri(record.root), json_safe(record.path)):
        raise CorrectionError(
            f"{rel_out.as_posix()} in --out was written from {owner[1]} of {owner[0]}, not "
            "from this run; it is kept and this run is not written",
            code=CLASH_CODE,
        )
    return _Target(rel_out, image_out, sidecar_out)


def _reuse(
    record: RunRecord,
    target: _Target,
    settings: dict[str, Any],
    options: CorrectOptions,
    outcome: RunOutcome,
    events: RestatedEvents | None = None,
) -> bool:
    """Whether an output already in place is this run's, with these settings (then
    ``outcome`` says so)."""
    if not (is_regular_file(target.sidecar) and is_regular_file(target.image)):
        return False
    if not up_to_date(target.image, target.sidecar, settings, run_inputs(record, None, events)):
        return False
    since = options.batch_started
    fresh = since is not None and _mtime(target.image) >= since
    outcome.status = "corrected" if fresh else "up-to-date"
    outcome.provenance = provenance_entry(target.sidecar, target.rel.as_posix())
    return True


def _resample_and_write(
    record: RunRecord,
    plan: ResamplingPlan,
    engine: Engine,
    options: CorrectOptions,
    target: _Target,
    settings: dict[str, Any],
    dataset_name: str,
    outcome: RunOutcome,
    events: RestatedEvents | None = None,
) -> None:
    """Read the run into the buffer, resample it, write it out and commit it (with its
    restated events table, when there is one: written before the sidecar, the "done"
    marker; an events table an earlier output recorded is removed when this one has
    none or another)."""
    header = record.header
    assert header is not None
    n_slices = header.shape[plan.axis_index]
    n_volumes = header.shape[3]
    spatial = tuple(header.shape[:3])
    plane = math.prod(spatial) // n_slices
    budget = plan_budget(
        n_slices,
        n_volumes,
        plane,
        _stored_itemsize(header),
        options.max_memory,
        record.path,
        threads=max(1, options.threads),
        compressed=header.compressed,
    )
    tmp_image = temp_path(target.image)
    stats = ResampleStats()
    buffer: SliceBuffer | None = None
    writer: VolumeWriter | None = None
    # the engine's imports load before the decoder starts: loading them beside it
    # holds the interpreter lock the reading thread needs
    prepare(engine)
    try:
        if budget.on_disk:
            scratch = temp_path(options.out / "scratch")
            buffer = DiskBuffer(scratch, n_slices, n_volumes, plane)
        else:
            buffer = MemoryBuffer(n_slices, n_volumes, plane)
        try:
            prefix, image_sha, stored_dtype = _fill(buffer, record, plan, budget, options.threads)
        except ScalingRangeError as exc:
            raise CorrectionError(str(exc), code=SCALING_CODE, field=exc.field) from None
        if budget.on_disk:
            release_memory()
        with allocator_tuning(keep_freed=not budget.on_disk):
            _engine_pass(buffer, plan, engine, budget, stats)
            if budget.on_disk:
                release_memory()
            out_dtype, code, bitpix, out_scale = _output_type(
                header, stored_dtype, options.keep_dtype
            )
            cast = OutputCast(out_dtype, out_scale)
            slope, inter = out_scale if out_scale is not None else (1.0, 0.0)
            skip = options.omit_leading
            new_prefix = patched_prefix(
                prefix, header, datatype=code, bitpix=bitpix, slope=slope, inter=inter,
                volumes=n_volumes - skip if skip else None,
            )
            writer = VolumeWriter(
                tmp_image, new_prefix, compress=header.compressed, threads=options.threads
            )
            _drain(buffer, writer, cast, plan, budget, header.shape, skip)
            noise = _closing_with(writer, lambda: noise_per_slice(plan, engine, n_slices))
            output_sha = writer.sha256()
            writer = None
            buffer.close()
            buffer = None
        if cast.clipped:
            outcome.warnings.append(
                f"{cast.clipped} values were clipped to the range of {out_dtype.name}"
            )
        if cast.nonfinite:
            outcome.warnings.append(
                f"{cast.nonfinite} non-finite values were stored as 0 in {out_dtype.name}"
            )
        inputs = run_inputs(record, image_sha, events)
        sidecar = output_sidecar(
            record, plan, settings, inputs, output_sha, dataset_name, stats,
            CorrectionFacts(accepted=outcome.accepted, omitted=options.omit_leading,
                            noise=noise,
                            events=events.record() if events is not None else None))
        earlier = recorded_events(target.sidecar, options.out)
        if events is not None:
            write_atomic(events.output, events.shifted.text)
        _commit(tmp_image, target.image, target.sidecar, sidecar)
        if earlier is not None and (events is None or earlier != events.output):
            with contextlib.suppress(FileNotFoundError):
                os.unlink(earlier)
        outcome.status = "corrected"
        outcome.provenance = entry_of(sidecar, target.rel.as_posix())
    finally:
        if writer is not None:
            writer.abort()
        if buffer is not None:
            buffer.close()
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp_image)


def _fill(
    buffer: SliceBuffer, record: RunRecord, plan: ResamplingPlan, budget: Budget, threads: int
) -> tuple[bytes, str, np.dtype[Any]]:
    """Read the image into the buffer, a batch of volumes at a time; return its header
    bytes, its SHA-256 and its stored type."""
    header = record.header
    assert header is not None
    n_volumes = header.shape[3]
    spatial_c = tuple(reversed(header.shape[:3]))
    scale = scaling(header)
    with VolumeReader(Path(record.abs_path), header, record.path, threads=threads,
                      checksum=True, decode_blocks=budget.decode_blocks) as reader:
        batch = np.empty((budget.volumes_per_batch, *spatial_c), dtype=reader.dtype)
        for first in range(0, n_volumes, budget.volumes_per_batch):
            count = min(budget.volumes_per_batch, n_volumes - first)
            reader.read_into(batch[:count])
            buffer.put_volumes(first, slice_major_view(batch[:count], plan.axis_index), scale)
        del batch
        return reader.prefix, reader.sha256(), reader.dtype


def _drain(
    buffer: SliceBuffer,
    writer: VolumeWriter,
    cast: OutputCast,
    plan: ResamplingPlan,
    budget: Budget,
    shape: tuple[int, ...],
    skip: int = 0,
) -> None:
    """Write the buffer's volumes out in file order (the caller closes the writer),
    leaving out the first ``skip``; ``shape`` is the image's NIfTI shape (i, j, k,
    volumes)."""
    n_slices, n_volumes = shape[plan.axis_index], shape[3]
    spatial_c = tuple(reversed(shape[:3]))
    others = [d for i, d in enumerate(spatial_c) if i != c_axis(plan.axis_index) - 1]
    # two arrays of half a batch in turn when the buffer is in memory (the writer may
    # still be writing one while the other is filled: the same memory as one batch,
    # so the peak does not rise); one batch array from a scratch file
    step = budget.volumes_per_batch
    arrays = 1 if budget.on_disk or step < 2 else 2
    step = -(-step // arrays)
    outgoing = [np.empty((step, *spatial_c), dtype=cast.dtype) for _ in range(arrays)]
    for i, first in enumerate(range(skip, n_volumes, step)):
        count = min(step, n_volumes - first)
        block = buffer.get_volumes(first, count).reshape(n_slices, count, *others)
        target = outgoing[i % arrays][:count]
        if arrays == 1:
            writer.settle()  # the one batch array is free again
        cast(volume_major_target(target, plan.axis_index), block)
        del block
        writer.write(target)
    writer.settle()  # the last batch array is written before it is freed
    del outgoing


def _closing_with(writer: VolumeWriter, work: Callable[[], _Result]) -> _Result:
    """Close ``writer`` (the encoder's last blocks, then ``fsync``: mostly a wait on the
    disk) in a helper thread while ``work`` runs here; return what ``work`` returns,
    after the close (whose error, if any, is raised). A Ctrl-C is raised after both,
    never inside the helper's thread pool (``readers.signals``: it could leave the
    pool's lock held and the close waiting for ever)."""
    from concurrent.futures import ThreadPoolExecutor

    from slicetime.readers.signals import signals_held

    with signals_held(), \
            ThreadPoolExecutor(max_workers=1, thread_name_prefix="slicetime-close") as closer:
        closed = closer.submit(writer.close)
        try:
            done = work()
        finally:
            closed.result()
    return done


def _mtime(path: Path) -> float:
    try:
        return path.stat().st_mtime
    except OSError:
        return 0.0


def _commit(tmp_image: Path, image_out: Path, sidecar_out: Path, sidecar: dict[str, Any]) -> None:
    """Put a finished run in place as one unit: an earlier image goes first, then the
    new sidecar, then the image by atomic rename. Whatever stops this half way
    leaves at most a sidecar without an image, which never counts as a result (it
    is not up to date, and the next batch or an interrupted one removes it); a
    sidecar that cannot be written leaves no image at all."""
    content = json_safe(sidecar)
    with contextlib.suppress(FileNotFoundError):
        os.unlink(image_out)
    try:
        write_json_atomic(sidecar_out, content)
        os.replace(tmp_image, image_out)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(sidecar_out)
        raise


def _stored_itemsize(header: Any) -> int:
    return max(1, header.bitpix // 8)


def _output_type(
    header: Any, stored: np.dtype[Any], keep: bool
) -> tuple[np.dtype[Any], int, int, tuple[float, float] | None]:
    """(numpy type with byte order, NIfTI code, bitpix, scaling) of the output."""
    if keep:
        return stored, header.datatype, header.bitpix, scaling(header)
    return np.dtype(np.float32).newbyteorder(header.byte_order), FLOAT32_CODE, 32, None


__all__ = [
    "DEFAULT_DESC",
    "PROVENANCE_FILE",
    "PROVENANCE_KEY",
    "CorrectOptions",
    "CorrectResult",
    "CorrectionError",
    "RunOutcome",
    "check_output_location",
    "correct_run",
    "output_name",
    "parse_size",
    "remove_stale_temporaries",
]
