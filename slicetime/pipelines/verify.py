"""The verify pipeline: does a run's own data support its claimed slice schedule?

For one run: read the header and resolve the claimed schedule (the audit's
record), stream the image once in batches of volumes and reduce it to channel
courses (the mean over in-brain voxels of each quarter of each slice, the mask
taken from the first batch), build the candidate schedules (the claim, common
orders and multiband variants over the same acquisition window, the claim
flipped along the slice axis and reversed in time, no offsets, and shuffled
orders as the null), score them with :mod:`slicetime.engines.verify` and turn
the verdict into a finding (``verify/supported``, ``verify/consistent``,
``verify/contradicted``, ``verify/undecidable``). Timing fields written in milliseconds
are converted to seconds first and reported with the audit's own codes.

Memory: one batch of volumes plus the channel courses (channels × volumes).
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

import slicetime.rules  # noqa: F401  (registers the verify/* and units codes it makes)
from slicetime.codes import make_finding
from slicetime.engines import verify as ev
from slicetime.model import MAX_REPETITION_TIME, Finding, RunRecord, Severity, SliceSchedule
from slicetime.numbers import plain
from slicetime.readers.errors import ReadError
from slicetime.readers.volumes import VolumeReader, scaling
from slicetime.schemes.generate import Protocol, array_times
from slicetime.schemes.labels import LabelParts, format_label
from slicetime.schemes.resolve import looks_like_milliseconds

#: volumes per read; the mask comes from the first batch
BATCH_VOLUMES = 16
MAX_MULTIBAND = 6


@dataclass(frozen=True)
class VerifyOutcome:
    """What verify found for one run: the verdict's finding, and findings about the units
    of the timing fields when they had to be converted to seconds first."""

    path: str
    decision: ev.Decision | None
    finding: Finding
    units: tuple[Finding, ...] = ()


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


def candidates(claimed: Sequence[float], window: float) -> list[ev.Candidate]:
    """The claim first, then the alternatives (identical time lists, up to a common
    offset, are scored once, under the first name)."""
    claim = tuple(float(t) for t in claimed)
    n = len(claim)
    listed: list[ev.Candidate] = [ev.Candidate("claimed schedule", claim, "claimed")]
    seen = {_key(claim)}

    def add(name: str, times: Sequence[float]) -> None:
        key = _key(times)
        if key not in seen:
            seen.add(key)
            listed.append(ev.Candidate(name, tuple(float(t) for t in times)))

    add("claimed schedule flipped along the slice axis", claim[::-1])
    top = max(claim) if claim else 0.0
    add("claimed order reversed in time", tuple(top - t for t in claim))
    add("no offsets (all slices at once)", (0.0,) * n)
    for name, times in standard_schedules(n, window):
        add(name, times)
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


#: a RepetitionTime above this many seconds was written in milliseconds (as the audit's
#: ``tr/units-ms``)
TR_MS_ABOVE = MAX_REPETITION_TIME


def in_seconds(record: RunRecord) -> tuple[SliceSchedule | None, tuple[Finding, ...]]:
    """The run's schedule with RepetitionTime and SliceTiming in seconds, and a finding
    (the audit's ``tr/units-ms`` and ``timing/units-ms`` codes) for each field that had to
    be divided by 1000. BIDS times are in seconds."""
    schedule = record.schedule
    if schedule is None or schedule.repetition_time is None or not schedule.times:
        return schedule, ()
    found: list[Finding] = []
    tr = float(schedule.repetition_time)
    changes: dict[str, Any] = {}
    tr_file = record.metadata_sources.get("RepetitionTime", record.path)
    st_file = record.metadata_sources.get("SliceTiming", record.path)
    if tr > TR_MS_ABOVE:
        tr /= 1000.0
        changes["repetition_time"] = tr
        for name in ("acquisition_duration", "delay_time"):
            value = getattr(schedule, name)
            if value is not None and value > TR_MS_ABOVE / 10:
                changes[name] = value / 1000.0
        found.append(make_finding(
            "tr/units-ms",
            f"{record.path}: RepetitionTime is {plain(schedule.repetition_time)}, "
            f"milliseconds; verified with {plain(tr)} s", file=tr_file, field="RepetitionTime",
            evidence={"value": schedule.repetition_time, "as_seconds": tr},
            hint="Divide RepetitionTime by 1000."))
    converted = dataclasses.replace(schedule, **changes) if changes else schedule
    window = converted.acquisition_window or tr
    times = converted.times
    if max(times) >= window and (looks_like_milliseconds(times, window) or (
            "repetition_time" in changes and max(times) / 1000.0 < window)):
        converted = dataclasses.replace(converted, times=tuple(t / 1000.0 for t in times))
        found.append(make_finding(
            "timing/units-ms",
            f"{record.path}: SliceTiming goes up to {plain(max(times))}, milliseconds; the "
            f"order was verified with the times divided by 1000 (up to "
            f"{plain(max(times) / 1000)} s)", file=st_file, field="SliceTiming",
            evidence={"max": max(times), "window": window,
                      "as_seconds_max": max(times) / 1000.0},
            hint="Divide every SliceTiming entry by 1000 (slicetime fix does this)."))
    return converted, tuple(found)


def _units_note(units: Sequence[Finding]) -> str:
    if not units:
        return ""
    fields = " and ".join(f.field or "" for f in units)
    return f" (read in seconds: {fields} {'was' if len(units) == 1 else 'were'} in milliseconds)"


def verify_record(record: RunRecord, *, seed: int = 0) -> VerifyOutcome:
    """Verify one run whose record was built by the audit's reader. Timing fields written
    in milliseconds are converted to seconds first and reported (``outcome.units``).

    Raises ReadError when the image data cannot be read (truncated, corrupt)."""
    schedule, units = in_seconds(record)
    outcome = _verify_schedule(record, schedule, seed=seed)
    if not units:
        return outcome
    finding = outcome.finding
    evidence = dict(finding.evidence or {})
    evidence["units"] = {f.field: "milliseconds" for f in units}
    message = finding.message + _units_note(units)
    return dataclasses.replace(outcome, units=units, finding=dataclasses.replace(
        finding, message=message, evidence=evidence))


def _verify_schedule(record: RunRecord, schedule: SliceSchedule | None, *, seed: int
                     ) -> VerifyOutcome:
    header = record.header
    if header is None:
        return _undecidable(record, "the header could not be read")
    if schedule is None or schedule.repetition_time is None:
        return _undecidable(record, "no slice schedule or repetition time is known")
    if schedule.volume_times is not None:
        return _undecidable(record, "volumes are not evenly spaced (VolumeTiming)")
    if len(header.shape) != 4 or header.n_volumes < ev.MIN_VOLUMES:
        return _undecidable(record, f"fewer than {ev.MIN_VOLUMES} volumes",
                            volumes=header.n_volumes if len(header.shape) == 4 else 1)
    if schedule.n_slices < 3:
        return _undecidable(record, "fewer than 3 slices")
    tr = float(schedule.repetition_time)
    window = schedule.acquisition_window or tr
    if not (math.isfinite(window) and window > 0):
        return _undecidable(record, "the acquisition window is not positive")
    if max(schedule.times) - min(schedule.times) <= 0:
        return _undecidable(record, "the claimed schedule has no offsets to check")
    if max(schedule.times) > window + 1e-6 or min(schedule.times) < -1e-6:
        return _undecidable(record, f"the claimed slice times (up to {max(schedule.times):g} "
                            f"s) do not fit in the acquisition window ({window:g} s)")
    channels = channel_courses(Path(record.abs_path), record, schedule.axis_index)
    if np.unique(channels.slice_of).size < 3:
        return _undecidable(record, "fewer than 3 slices hold in-brain voxels")
    listed = candidates(schedule.times, window)
    decision = ev.evaluate(channels.courses, channels.slice_of, tr, listed, window, seed=seed,
                           region_of=channels.region_of)
    evidence = decision.to_json()
    evidence["candidates"] = len(listed)
    if decision.verdict == "contradicted":
        message = (f"{record.path}: the data contradict the claimed slice order: "
                   f"'{decision.rival_name}' aligns the slices better "
                   f"(effect {decision.effect:.2f}, z {decision.z_rival:.1f})")
        hint = ("Check the slice order on the protocol sheet or in the scanner's export; the "
                "named alternative fits the data better. Data that were already slice-time "
                "corrected fit 'no offsets'.")
        return VerifyOutcome(record.path, decision,
                             _finding(record, "contradicted", message, evidence, hint))
    if decision.verdict == "supported":
        message = (f"{record.path}: the data support the claimed slice order: it aligns the "
                   f"slices better than any other order tried (p {decision.p_claimed:.3f} "
                   "against shuffled slice orders)")
        return VerifyOutcome(record.path, decision,
                             _finding(record, "supported", message, evidence))
    if decision.verdict == "consistent":
        message = (f"{record.path}: the data fit the claimed slice order but do not single "
                   f"it out: '{decision.rival_name}' fits about as well")
        return VerifyOutcome(record.path, decision,
                             _finding(record, "consistent", message, evidence))
    message = f"{record.path}: the data neither support nor contradict the claimed slice " \
              f"order ({decision.reason})"
    return VerifyOutcome(record.path, decision,
                         _finding(record, "undecidable", message, evidence))


def verify_run(root: Path, path: Path, *, seed: int = 0) -> tuple[RunRecord, VerifyOutcome]:
    """Build the run's record (as the audit does) and verify it.

    Raises ReadError when the header or the image data cannot be read."""
    from slicetime.readers.record import build_record

    record = build_record(root, path)
    fatal = [f for f in record.findings if f.code.startswith("file/")
             and f.severity is Severity.ERROR]
    if record.header is None or fatal:
        first = fatal[0] if fatal else None
        raise ReadError(first.code if first else "file/not-nifti", record.path, None,
                        first.message if first else f"{record.path}: cannot read the header")
    return record, verify_record(record, seed=seed)


def verify_finding(record: RunRecord, *, seed: int = 0) -> Finding:
    """The verify finding of a run for the audit; a run whose data cannot be read
    gets an undecidable note (its reading problem is reported by the audit itself)."""
    try:
        return verify_record(record, seed=seed).finding
    except ReadError as exc:
        return _undecidable(record, f"the image data cannot be read ({exc.code})").finding


__all__ = [
    "Channels",
    "Reducer",
    "VerifyOutcome",
    "array_courses",
    "candidates",
    "channel_courses",
    "in_seconds",
    "standard_schedules",
    "verify_array",
    "verify_finding",
    "verify_record",
    "verify_run",
]
