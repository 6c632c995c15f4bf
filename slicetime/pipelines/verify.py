"""The verify pipeline: does a run's own data support its claimed slice schedule?

For one run: read the header and resolve the claimed schedule (the audit's
record), stream the image once in batches of volumes and reduce it to channel
courses (the mean over in-brain voxels of each quarter of each slice, the mask
taken from the first batch), build the candidate schedules (the claim, common
orders and multiband variants over the same acquisition window, the claim
flipped along the slice axis and reversed in time, no offsets, and shuffled
orders as the null), score them with :mod:`slicetime.engines.verify` and turn
the verdict into a finding (``verify/supported``, ``verify/consistent``,
``verify/contradicted``, ``verify/undecidable``). Every alternative is named by its
scheme label (the words ``show`` uses, from :mod:`slicetime.schemes.labels` and
:func:`slicetime.schemes.infer.infer_scheme`); a contradiction carries the better
order's slice times (``best_slice_times``, the sidecar's order, seconds). Units are not
decided here: the times and the TR are read in seconds as the run's one resolved timing
(``RunRecord.timing``) gives them; the audit reports the units.

Memory: one batch of volumes plus the channel courses (channels × volumes).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from slicetime.codes import make_finding
from slicetime.engines import verify as ev
from slicetime.model import (
    Finding,
    RunRecord,
    Severity,
    SliceSchedule,
    implausible_repetition,
)
from slicetime.numbers import as_written, secs
from slicetime.readers.errors import ReadError
from slicetime.readers.volumes import VolumeReader, scaling
from slicetime.rules.correction import not_bold_series, series_kind
from slicetime.rules.timing import already_corrected
from slicetime.schemes.generate import Protocol, array_times
from slicetime.schemes.infer import infer_scheme
from slicetime.schemes.labels import IRREGULAR, LabelParts, format_label

if TYPE_CHECKING:
    from slicetime.pipelines.executor import Executor

#: volumes per read; the mask comes from the first batch
BATCH_VOLUMES = 16
MAX_MULTIBAND = 6


#: the name of the candidate without offsets (every slice at the volume's start): the
#: answer only when the data look already slice-time corrected
NO_OFFSETS = "no offsets"


@dataclass(frozen=True)
class VerifyOutcome:
    """What verify found for one run: the decision (None when the run cannot be
    checked), the verdict's finding, and the claimed order's label."""

    path: str
    decision: ev.Decision | None
    finding: Finding
    claimed_label: str | None = None


# --------------------------------------------------------------------------- candidates


def _label(order: str, ascending: bool, step: int, start: int, multiband: int) -> str:
    return format_label(LabelParts(1 if order == "sequential" else step, ascending, start, None,
                                   multiband))


def standard_schedules(n_slices: int, window: float) -> list[tuple[str, tuple[float, ...]]]:
    """Common orders (sequential, interleaved steps 2 and 3 from every start, both
    directions) for every multiband factor up to 6 that divides the slice count,
    spread over ``window`` seconds, in data-array order."""
    out: list[tuple[str, tuple[float, ...]]] = []
    for m in range(1, MAX_MULTIBAND + 1):
        if n_slices % m:
            continue
        groups = n_slices // m
        for ascending in (True, False):
            p = Protocol(n_slices, "sequential", ascending, multiband=m, repetition_time=window)
            out.append((_label("sequential", ascending, 1, 0, m), array_times(p)))
        for step in (2, 3):
            if groups < step + 1:
                continue
            for ascending in (True, False):
                starts = range(step) if ascending else range(groups - 1, groups - 1 - step, -1)
                for start in starts:
                    p = Protocol(n_slices, "interleaved", ascending, step, start, m,
                                 repetition_time=window)
                    out.append((_label("interleaved", ascending, step, start, m),
                                array_times(p)))
    return out


def _key(times: Sequence[float]) -> tuple[int, ...]:
    low = min(times) if times else 0.0
    return tuple(round((t - low) * 1000) for t in times)  # 1 ms, offset removed


def order_label(times: Sequence[float]) -> str:
    """The scheme label of a list of slice times, as ``show`` prints it."""
    try:
        return infer_scheme(times).label
    except ValueError:
        return IRREGULAR


def candidates(claimed: Sequence[float], window: float) -> list[ev.Candidate]:
    """The claim first, then the alternatives, each named by its scheme label: the
    common orders, the claim flipped along the slice axis and reversed in time (when they
    are not common orders themselves), and no offsets. Identical time lists (up to a
    common offset, which the data cannot see) are scored once, under the first name."""
    claim = tuple(float(t) for t in claimed)
    n = len(claim)
    listed: list[ev.Candidate] = [ev.Candidate("claimed schedule", claim, "claimed")]
    seen = {_key(claim)}

    def add(name: str, times: Sequence[float]) -> None:
        key = _key(times)
        if key not in seen:
            seen.add(key)
            listed.append(ev.Candidate(name, tuple(float(t) for t in times)))

    for name, times in standard_schedules(n, window):
        add(name, times)
    top = max(claim) if claim else 0.0
    for times in (claim[::-1], tuple(top - t for t in claim)):
        add(order_label(times), times)
    add(NO_OFFSETS, (0.0,) * n)
    return listed


# --------------------------------------------------------------------------- reading


@dataclass(frozen=True)
class Channels:
    """Channel courses ``(channels, volumes)``, each channel's slice and its half of
    the in-plane grid (0 or 1)."""

    courses: np.ndarray
    slice_of: np.ndarray
    region_of: np.ndarray


class Reducer:
    """Channel courses from batches of volumes, fed in order: ``add(first, batch)`` with
    ``batch`` shaped ``(volumes, n_slices, rows, cols)``. The in-brain mask comes from
    the first batch's temporal mean (so the run is read once)."""

    def __init__(self, n_volumes: int, *, parts: int = 2) -> None:
        self.n_volumes = n_volumes
        self.parts = parts
        self.layout: ev.ChannelLayout | None = None
        self.courses: np.ndarray | None = None

    def add(self, first: int, batch: np.ndarray) -> None:
        count, n_slices = batch.shape[:2]
        flat = batch.reshape(count, n_slices, -1)
        if self.layout is None:
            with np.errstate(invalid="ignore", over="ignore"):
                mean = np.asarray(flat, dtype=np.float64).mean(axis=0)
            self.layout = ev.make_layout(mean.reshape(batch.shape[1:]), parts=self.parts)
            self.courses = np.empty((self.layout.n_channels, self.n_volumes), dtype=np.float64)
        assert self.courses is not None
        self.courses[:, first:first + count] = ev.channel_sums(flat, self.layout)

    def result(self, scale: tuple[float, float] | None = None) -> Channels:
        """The courses of the channels with in-brain voxels and finite values."""
        assert self.layout is not None and self.courses is not None
        assert self.layout.region_of is not None
        courses = self.courses
        if scale is not None:
            courses = courses * scale[0] + scale[1]
        keep = (self.layout.voxels > 0) & np.isfinite(courses).all(axis=1)
        return Channels(courses[keep], self.layout.slice_of[keep],
                        self.layout.region_of[keep])


def channel_courses(path: Path, record: RunRecord, axis: int, *,
                    batch: int = BATCH_VOLUMES) -> Channels:
    """Channel means ``(channels, volumes)``, read in one pass
    with :class:`VolumeReader` (one batch of volumes in memory at a time)."""
    assert record.header is not None
    with VolumeReader(path, record.header, record.path) as reader:
        reducer = Reducer(reader.n_volumes)
        dim = 3 - axis  # reader batches are (volumes, k, j, i)
        for first, volumes in reader.batches(batch):
            reducer.add(first, np.moveaxis(volumes, dim, 1))
    return reducer.result(scaling(record.header))


def array_courses(data: np.ndarray, axis: int = 2, *,
                  batch: int = BATCH_VOLUMES) -> Channels:
    """The same reduction for an in-memory ``(i, j, k, volumes)`` array (studies, tests)."""
    volumes = np.moveaxis(data, (3, axis), (0, 1))
    reducer = Reducer(data.shape[3])
    for first in range(0, data.shape[3], batch):
        reducer.add(first, np.ascontiguousarray(volumes[first:first + batch]))
    return reducer.result()


def verify_array(data: np.ndarray, claimed: Sequence[float], repetition_time: float, *,
                 axis: int = 2, window: float | None = None, seed: int = 0) -> ev.Decision:
    """Verify a claimed schedule against an in-memory run (no files)."""
    channels = array_courses(data, axis)
    span = window if window is not None else repetition_time
    listed = candidates(claimed, span)
    return ev.evaluate(channels.courses, channels.slice_of, repetition_time, listed, span,
                       seed=seed, region_of=channels.region_of)


# --------------------------------------------------------------------------- verdict


def _finding(record: RunRecord, verdict: ev.Verdict, message: str,
             evidence: dict[str, object], hint: str | None = None) -> Finding:
    file = record.metadata_sources.get("SliceTiming", record.path)
    return make_finding(f"verify/{verdict}", message, file=file, field="SliceTiming",
                        evidence=evidence, hint=hint)


def _undecidable(record: RunRecord, why: str, **evidence: object) -> VerifyOutcome:
    message = f"{record.path}: the slice order cannot be checked from the data: {why}"
    return VerifyOutcome(record.path, None,
                         _finding(record, "undecidable", message, {"reason": why, **evidence}))


def in_sidecar_order(times: Sequence[float], schedule: SliceSchedule) -> list[float]:
    """Data-array order -> the order of the sidecar's SliceTiming list (reversed when
    SliceEncodingDirection is negative, BIDS), rounded to the microsecond."""
    ordered = list(times) if schedule.direction == "+" else list(times)[::-1]
    return [round(float(t), 6) for t in ordered]


def seconds_schedule(record: RunRecord) -> SliceSchedule | None:
    """The run's schedule with SliceTiming and RepetitionTime in seconds, as the project's
    one resolution of a run's timing (``RunRecord.timing``, :mod:`slicetime.schemes.resolve`)
    gives it; verify decides no unit itself."""
    if record.timing.schedule is not None:
        return record.timing.seconds_schedule()
    return record.schedule


def verify_record(record: RunRecord, *, seed: int = 0) -> VerifyOutcome:
    """Verify one run whose record was built by the audit's reader.

    Raises ReadError when the image data cannot be read (truncated, corrupt)."""
    header = record.header
    schedule = seconds_schedule(record)
    if header is None:
        return _undecidable(record, "the header could not be read")
    if schedule is None and already_corrected(record):
        return _undecidable(record, "the run is already slice-time corrected "
                            "(SliceTimingCorrected is true, BIDS), so it has no slice order "
                            "to check")
    if schedule is None or schedule.repetition_time is None:
        return _undecidable(record, "no slice schedule or repetition time is known")
    implausible = implausible_repetition(schedule.repetition_time)
    if implausible is not None:  # the audit's tr/implausible, correct's gate: one owner
        return _undecidable(record, f"RepetitionTime ({as_written(schedule.repetition_time)} "
                            f"s) is {implausible} (slicetime audit reports it)")
    if schedule.volume_times is not None:
        return _undecidable(record, "volumes are not evenly spaced (VolumeTiming)")
    kind = not_bold_series(series_kind(record))
    if kind is not None:  # correct refuses such a series (rules.correction)
        return _undecidable(record, f"{kind}: the slice order is read from a slowly "
                            "varying signal the volumes share, which such a series' volumes "
                            "do not have")
    if not header.is_four_d:  # as the audit's file/series-shape says it
        return _undecidable(record, f"the image is not a 4-D time series (shape "
                            f"{list(header.shape)})", volumes=1)
    if header.n_volumes < ev.MIN_VOLUMES:
        return _undecidable(record, f"fewer than {ev.MIN_VOLUMES} volumes",
                            volumes=header.n_volumes)
    if schedule.n_slices < 3:
        return _undecidable(record, "fewer than 3 slices")
    tr = float(schedule.repetition_time)
    window = record.timing.window or schedule.acquisition_window or tr
    if not (math.isfinite(window) and window > 0):
        return _undecidable(record, "the acquisition window is not positive")
    if max(schedule.times) - min(schedule.times) <= 0:
        return _undecidable(record, "the claimed schedule has no offsets to check")
    if max(schedule.times) > window + 1e-6 or min(schedule.times) < -1e-6:
        return _undecidable(record, "the claimed slice times (up to "
                            f"{as_written(max(schedule.times))}) do not fit in the acquisition "
                            f"window ({secs(window)})")
    channels = channel_courses(Path(record.abs_path), record, schedule.axis_index)
    if np.unique(channels.slice_of).size < 3:
        return _undecidable(record, "fewer than 3 slices hold in-brain voxels")
    listed = candidates(schedule.times, window)
    decision = ev.evaluate(channels.courses, channels.slice_of, tr, listed, window, seed=seed,
                           region_of=channels.region_of)
    return outcome_of(record, schedule, window, decision, len(listed))


def outcome_of(record: RunRecord, schedule: SliceSchedule, window: float,
               decision: ev.Decision, n_candidates: int) -> VerifyOutcome:
    """The finding of a decision: its message in plain words, and in the evidence the
    numbers, the claimed order's label and, for a contradiction, the order to adopt
    (``best_order``, ``best_slice_times`` in the sidecar's order, seconds)."""
    claimed = order_label(schedule.times)
    evidence = decision.to_json()
    evidence["candidates"] = n_candidates
    evidence["claimed_order"] = claimed
    evidence["strength"] = ev.strength(decision)
    words = evidence["strength"]
    where = record.path
    if decision.verdict == "contradicted" and decision.rival_times is not None:
        evidence["best_slice_times"] = in_sidecar_order(decision.rival_times, schedule)
        if decision.rival_name == NO_OFFSETS:
            evidence["best_order"] = NO_OFFSETS
            evidence["already_corrected"] = True
            message = (f"{where}: the data look already slice-time corrected: all slices fit "
                       f"one time better than the claimed {claimed} order ({words} evidence)")
            hint = ("Corrected data need no further slice-time correction; check where the "
                    "run came from before correcting it again.")
        else:
            evidence["best_order"] = decision.rival_name
            message = (f"{where}: the data contradict the claimed order ({claimed}); they fit "
                       f"{decision.rival_name} ({words} evidence)")
            hint = ("Check the slice order on the protocol sheet or in the scanner's export; "
                    "best_slice_times holds the times of the order that fits better.")
        return VerifyOutcome(record.path, decision,
                             _finding(record, "contradicted", message, evidence, hint), claimed)
    if decision.verdict == "supported":
        message = (f"{where}: the data support the claimed order ({claimed}): it fits better "
                   f"than every other order tried ({words} evidence)")
        return VerifyOutcome(record.path, decision,
                             _finding(record, "supported", message, evidence), claimed)
    if decision.verdict == "consistent":
        message = (f"{where}: the data fit the claimed order ({claimed}) but do not single "
                   f"it out: {plain_reason(decision, schedule.times, window)}")
        return VerifyOutcome(record.path, decision,
                             _finding(record, "consistent", message, evidence), claimed)
    message = (f"{where}: the data neither support nor contradict the claimed order "
               f"({claimed}): {plain_reason(decision, schedule.times, window)}")
    return VerifyOutcome(record.path, decision,
                         _finding(record, "undecidable", message, evidence), claimed)


def plain_reason(decision: ev.Decision, claimed: Sequence[float], window: float) -> str:
    """Why a run is neither supported nor contradicted, in plain words: the engine's
    reason, or that the order named is too close in time to the claim to tell apart."""
    rival = decision.rival_name
    close = (decision.rival_times is not None
             and ev.schedule_distance(decision.rival_times, claimed)
             < ev.CLOSE_FRACTION * window)
    if rival is not None and close and decision.verdict in ("consistent", "undecidable"):
        return (f"{rival} differs from it so little in time that the data cannot tell the "
                "two apart")
    return decision.reason


def verify_run(root: Path, path: Path, *, seed: int = 0) -> tuple[RunRecord, VerifyOutcome]:
    """Build the run's record (as the audit does) and verify it.

    Raises ReadError when the header or the image data cannot be read."""
    from slicetime.readers.record import build_record

    record = build_record(root, path)
    fatal = [f for f in record.findings if f.code.startswith("file/")
             and (f.severity is Severity.ERROR or record.header is None)]
    if record.header is None or fatal:
        first = fatal[0] if fatal else None
        raise ReadError(first.code if first else "file/not-nifti", record.path, None,
                        first.message if first else f"{record.path}: cannot read the header")
    return record, verify_record(record, seed=seed)


@dataclass(frozen=True)
class FileResult:
    """One file given to ``verify``: its outcome, or why it could not be read."""

    file: str
    outcome: VerifyOutcome | None = None
    code: str | None = None
    message: str | None = None


def verify_file(file: str) -> FileResult:
    """Verify one run file (as given on the command line); never raises ReadError."""
    from slicetime.readers.dataset import find_root
    from slicetime.readers.errors import check_regular_file

    try:
        check_regular_file(file, file, what="image")
        path = Path(file)
        path = path if path.is_absolute() else path.absolute()
        _, outcome = verify_run(find_root(path.parent), path)
    except ReadError as exc:
        return FileResult(file, code=exc.code, message=exc.message)
    return FileResult(file, outcome)


def _verify_chunk(files: Sequence[str]) -> list[FileResult]:
    from slicetime.pipelines.signals import test_point

    test_point("verify:run")
    return [verify_file(f) for f in files]


def _lost_file(file: str, why: str) -> FileResult:
    return FileResult(file, code="file/unreadable", message=f"{file}: {why}")


def verify_files(files: Sequence[str], executor: Executor | None = None) -> list[FileResult]:
    """Verify run files, one per task, on ``executor`` (default: in this process);
    results in input order."""
    from slicetime.pipelines.executor import map_chunks

    return map_chunks(_verify_chunk, list(files), lost=_lost_file, executor=executor,
                      chunk_size=1)


def verify_finding(record: RunRecord, *, seed: int = 0) -> Finding:
    """The verify finding of a run for the audit; a run whose data cannot be read
    gets an undecidable note (its reading problem is reported by the audit itself)."""
    try:
        return verify_record(record, seed=seed).finding
    except ReadError as exc:
        return _undecidable(record, f"the image data cannot be read ({exc.code})").finding


__all__ = [
    "NO_OFFSETS",
    "Channels",
    "FileResult",
    "Reducer",
    "VerifyOutcome",
    "array_courses",
    "candidates",
    "channel_courses",
    "in_sidecar_order",
    "order_label",
    "outcome_of",
    "plain_reason",
    "seconds_schedule",
    "standard_schedules",
    "verify_array",
    "verify_file",
    "verify_files",
    "verify_finding",
    "verify_record",
    "verify_run",
]
