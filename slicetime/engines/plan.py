"""The resampling plan: which time each slice is moved to, and by how much.

A plan turns a run's ``SliceSchedule`` and a reference choice into per-slice
sample grids: slice ``z`` of volume ``v`` was acquired at ``onset[v] + t[z]``
and is resampled to ``onset[v] + reference``. Slices acquired together (one
excitation group under multiband) share one shift, so the plan groups them and
an engine runs once per distinct shift.

Pure: no files, no arrays larger than the number of volumes.
"""

from __future__ import annotations

import itertools
import math
import re
from dataclasses import dataclass

import numpy as np

from slicetime.model import (
    BOUNDARY_SLACK,
    MAX_REPETITION_TIME,
    MIN_REPETITION_TIME,
    TIME_TOLERANCE,
    SliceSchedule,
    before_start,
    implausible_repetition,
    outside_window,
)
from slicetime.numbers import as_written, plain, secs
from slicetime.schemes.infer import median
from slicetime.schemes.resolve import looks_like_milliseconds

#: the reference used when the user does not choose one (see ``ReferenceChoice``)
DEFAULT_REFERENCE = "middle"

_SLICE_RE = re.compile(r"^slice[:=](\d+)$")


class PlanError(ValueError):
    """The run cannot be planned (no usable grid, bad reference for this run)."""


class ImplausibleTiming(PlanError):
    """The timing is physically impossible for an fMRI run: refused even with --force.
    ``field`` names the value (a sidecar key), so the caller can add the audit's advice
    for it."""

    def __init__(self, message: str, field: str | None = None) -> None:
        super().__init__(message)
        self.field = field


#: The physical plausibility gate, in one place (README, "Safety"). A functional run
#: whose timing falls outside these bounds is refused even with ``--force``, because
#: no judgement can make it usable: the values are almost always in the wrong unit.
#: Seconds. A functional TR above 100 s is the threshold ``tr/units-ms`` already uses
#: (common practice (no source): fMRI repetition times run from about 0.1 s for fast
#: multiband or inverse imaging to a few tens of seconds for sparse designs).


def check_plausible(schedule: SliceSchedule) -> None:
    """Raise :class:`ImplausibleTiming` when a value of the schedule is physically
    impossible: a repetition time (or spacing of ``VolumeTiming``) outside
    [``MIN_REPETITION_TIME``, ``MAX_REPETITION_TIME``], a non-finite or negative
    time, ``DelayTime`` or ``AcquisitionDuration`` beyond ``MAX_REPETITION_TIME``,
    or slice times outside the acquisition window (which would move the
    output's ``StartTime`` outside the volume)."""
    low_tr, high_tr = MIN_REPETITION_TIME, MAX_REPETITION_TIME
    bounds = f"{plain(low_tr)} to {secs(high_tr)}"
    tr = schedule.repetition_time
    problem = implausible_repetition(tr) if tr is not None else None
    if tr is not None and problem is not None:
        guess = " (milliseconds?)" if tr > high_tr else ""
        # the field the TR was read from: the header's pixdim[4] when no sidecar gives one
        source = schedule.sources.get("RepetitionTime")
        name = source.field if source is not None and source.kind == "header" \
            else "RepetitionTime"
        raise ImplausibleTiming(
            f"{name} {as_written(tr)} is {problem}{guess}, so the run cannot be "
            "corrected even with --force", name)
    if schedule.volume_times is not None:
        onsets = np.asarray(schedule.volume_times, dtype=np.float64)
        steps = np.diff(onsets)
        if not np.all(np.isfinite(onsets)) or (onsets.size and onsets.min() < 0):
            raise ImplausibleTiming("VolumeTiming holds a negative or non-finite time",
                                    "VolumeTiming")
        if steps.size and (implausible_repetition(float(steps.max())) is not None
                           or implausible_repetition(float(steps.min())) is not None):
            raise ImplausibleTiming(
                f"VolumeTiming spaces volumes {as_written(float(steps.min()))} to "
                f"{as_written(float(steps.max()))} apart, "
                f"outside the plausible {bounds} (milliseconds?), so the run cannot be "
                "corrected even with --force", "VolumeTiming")
    for name, value in (("DelayTime", schedule.delay_time),
                        ("AcquisitionDuration", schedule.acquisition_duration)):
        if value is not None and not (math.isfinite(value) and 0.0 <= value <= high_tr):
            raise ImplausibleTiming(
                f"{name} {as_written(value)} is outside the plausible 0 to {secs(high_tr)}, so "
                "the run cannot be corrected even with --force", name)
    times = schedule.times
    if times and not all(math.isfinite(t) for t in times):
        raise ImplausibleTiming("SliceTiming holds a non-finite value", "SliceTiming")
    window = schedule.acquisition_window
    if times:
        low, high = min(times), max(times)
        limit = min(window, high_tr) if window is not None else high_tr
        if outside_window((low, high), limit):  # the one boundary rule
            if looks_like_milliseconds(times, window):  # resolve's verdict, the audit's too
                # the values are milliseconds: say so plainly, never call them seconds
                source = schedule.sources.get("SliceTiming")
                where = f" in {source.file}" if source is not None and source.file else ""
                raise ImplausibleTiming(
                    f"SliceTiming{where} looks like milliseconds: it runs from "
                    f"{as_written(low)} to {as_written(high)}, which divided by 1000 is "
                    f"{secs(low / 1000)} to {secs(high / 1000)} (the acquisition window is 0 "
                    f"to {secs(limit)}); BIDS times are seconds, so the values cannot be used "
                    "as written, even with --force", "SliceTiming")
            raise ImplausibleTiming(
                f"slice times run from {secs(low)} to {secs(high)}, outside the acquisition "
                f"window of 0 to {secs(limit)}, so they cannot be used even with --force",
                "SliceTiming")


@dataclass(frozen=True)
class ReferenceChoice:
    """How the reference time is chosen for each run.

    kind:
      ``seconds`` - a fixed time from the start of each volume (``value``)
      ``first``   - the time of the earliest excitation group
      ``middle``  - halfway between the earliest and the latest group (default:
                    it halves the largest shift any slice needs, so the
                    interpolation error is balanced between early and late slices)
      ``last``    - the time of the latest group
      ``slice``   - the time of slice ``index`` (0-based, data-array order)
    """

    kind: str
    value: float | None = None
    index: int | None = None

    @classmethod
    def parse(cls, text: str) -> ReferenceChoice:
        """Parse ``1.0``, ``first``, ``middle``, ``last`` or ``slice:N``."""
        word = text.strip().lower()
        if word in ("first", "middle", "last"):
            return cls(word)
        match = _SLICE_RE.match(word)
        if match:
            return cls("slice", index=int(match.group(1)))
        try:
            seconds = float(word)
        except ValueError:
            raise ValueError(
                f"reference {text!r} is not a time in seconds, 'first', 'middle', "
                "'last' or 'slice:N'"
            ) from None
        if not math.isfinite(seconds) or seconds < 0:
            raise ValueError(f"reference {text!r} must be a non-negative time in seconds")
        return cls("seconds", value=seconds)

    def describe(self) -> str:
        if self.kind == "seconds":
            return secs(self.value)
        if self.kind == "slice":
            return f"slice:{self.index}"
        return self.kind

    def to_json(self) -> dict[str, object]:
        return {"kind": self.kind, "value": self.value, "index": self.index}


def reference_time(choice: ReferenceChoice, schedule: SliceSchedule) -> float:
    """The reference time for one run, checked against its acquisition window."""
    times = schedule.times
    if not times:
        raise PlanError("the run has no slice times")
    if choice.kind == "first":
        ref = min(times)
    elif choice.kind == "last":
        ref = max(times)
    elif choice.kind == "middle":
        ref = (min(times) + max(times)) / 2.0
    elif choice.kind == "slice":
        assert choice.index is not None
        if choice.index >= len(times):
            raise PlanError(
                f"reference slice:{choice.index} does not exist; the run has "
                f"{len(times)} slices (0 to {len(times) - 1})"
            )
        ref = times[choice.index]
    else:
        assert choice.value is not None
        ref = choice.value
    window = schedule.acquisition_window
    # a reference may be the window's end itself (it is not a slice)
    if window is not None and (before_start(ref) or ref > window + BOUNDARY_SLACK):
        raise PlanError(
            f"reference time {secs(ref)} is outside this run's acquisition window "
            f"(0 to {secs(window)})"
        )
    return float(ref)


@dataclass(frozen=True)
class ShiftGroup:
    """Slices acquired at the same time, moved together."""

    slices: tuple[int, ...]
    slice_time: float
    shift: float  # seconds: reference - slice_time (positive: look later in time)


@dataclass(frozen=True)
class ResamplingPlan:
    """Everything an engine needs to align one run, independent of the data."""

    reference: float
    onsets: tuple[float, ...]  # start of each volume, seconds
    regular: bool  # onsets evenly spaced (a repetition time)
    period: float | None  # the repetition time when regular
    groups: tuple[ShiftGroup, ...]
    axis_index: int

    @property
    def n_volumes(self) -> int:
        return len(self.onsets)

    @property
    def max_shift(self) -> float:
        return max((abs(g.shift) for g in self.groups), default=0.0)

    def sample_times(self, group: ShiftGroup) -> np.ndarray:
        return np.asarray(self.onsets, dtype=np.float64) + group.slice_time

    def target_times(self) -> np.ndarray:
        return np.asarray(self.onsets, dtype=np.float64) + self.reference


#: times closer than this are one excitation group (seconds); matches scheme inference
_SAME_TIME = 1e-4


def make_plan(
    schedule: SliceSchedule, n_volumes: int, choice: ReferenceChoice
) -> ResamplingPlan:
    """Plan the correction of a run with ``n_volumes`` volumes."""
    if n_volumes < 2:
        raise PlanError(f"the run has {n_volumes} volume(s); correction needs at least 2")
    check_plausible(schedule)
    reference = reference_time(choice, schedule)
    if schedule.volume_times is not None:
        onsets = tuple(float(t) for t in schedule.volume_times)
        if len(onsets) != n_volumes:
            raise PlanError(
                f"VolumeTiming has {len(onsets)} entries but the image has "
                f"{n_volumes} volumes"
            )
        steps = np.diff(onsets)
        if np.any(steps <= 0):
            raise PlanError("VolumeTiming is not strictly increasing")
        regular = bool(np.ptp(steps) <= 1e-6 * max(float(np.mean(steps)), 1e-9))
        period = float(np.mean(steps)) if regular else None
    else:
        tr = schedule.repetition_time
        if tr is None or not tr > 0:
            raise PlanError("the run has no repetition time, so volume times are unknown")
        onsets = tuple(v * tr for v in range(n_volumes))
        regular, period = True, float(tr)
    order = sorted(range(len(schedule.times)), key=lambda z: (schedule.times[z], z))
    groups: list[ShiftGroup] = []
    members: list[int] = []
    for z in order:
        if members and schedule.times[z] - schedule.times[members[0]] > _SAME_TIME:
            groups.append(_group(members, schedule, reference))
            members = []
        members.append(z)
    if members:
        groups.append(_group(members, schedule, reference))
    return ResamplingPlan(
        reference=reference,
        onsets=onsets,
        regular=regular,
        period=period,
        groups=tuple(groups),
        axis_index=schedule.axis_index,
    )


def slice_time_ref(reference: float, repetition_time: float | None) -> float | None:
    """What a model of the corrected run needs: ``StartTime / RepetitionTime``, the
    fraction of the TR at which every slice now sits (a GLM's frame times are
    ``volume * TR + slice_time_ref * TR``). None without a RepetitionTime (a
    ``VolumeTiming`` run: its frame times are ``VolumeTiming + StartTime``)."""
    if repetition_time is None or not repetition_time > 0:
        return None
    return round(reference / repetition_time, 6)


def _excitation_step(times: tuple[float, ...] | list[float]) -> tuple[float, float] | None:
    """The last excitation's time and the step between successive excitations (the
    median gap between distinct slice times), or None when all slices share one time."""
    distinct = sorted({round(t, 6) for t in times})
    if len(distinct) < 2:
        return None
    return distinct[-1], median([b - a for a, b in itertools.pairwise(distinct)])


def occupied_span(times: tuple[float, ...] | list[float]) -> float | None:
    """How long the slices of one volume take: the last excitation's time plus one step
    between successive excitations (the median gap between distinct slice times), or
    None when all slices share one time (no step to measure)."""
    found = _excitation_step(times)
    return None if found is None else found[0] + found[1]


def window_fields(schedule: SliceSchedule, metadata_keys: set[str] | frozenset[str]
                  ) -> dict[str, float]:
    """The BIDS fields a corrected output needs, beside what its input already states
    (``metadata_keys``), so that it still tells the acquisition window once its
    ``SliceTiming`` is gone:

    * ``VolumeTiming`` without ``FrameAcquisitionDuration`` (or the older
      ``AcquisitionDuration``): ``FrameAcquisitionDuration`` (BIDS requires it, or
      ``SliceTiming``, beside ``VolumeTiming``; ``AcquisitionDuration`` there is
      deprecated), the time the slices occupy (:func:`occupied_span`), within the
      run's window;
    * ``RepetitionTime`` without ``DelayTime`` or ``AcquisitionDuration`` whose slices
      leave more than one excitation step of the TR silent (a sparse run described by
      its slice times alone): ``DelayTime``, the silent part of the TR.
    """
    found = _excitation_step(schedule.times)
    window = schedule.acquisition_window
    if found is None or window is None:
        return {}
    last, step = found
    span = min(last + step, window)
    if schedule.volume_times is not None:
        if metadata_keys & {"FrameAcquisitionDuration", "AcquisitionDuration"}:
            return {}
        return {"FrameAcquisitionDuration": round(span, 6)}
    tr = schedule.repetition_time
    if tr is None or metadata_keys & {"DelayTime", "AcquisitionDuration"}:
        return {}
    silent = tr - span
    # silent beyond one step by more than the project's timing tolerance: a sparse run
    return {"DelayTime": round(silent, 6)} if silent > step + TIME_TOLERANCE else {}


def _group(members: list[int], schedule: SliceSchedule, reference: float) -> ShiftGroup:
    t = float(np.mean([schedule.times[z] for z in members]))
    return ShiftGroup(tuple(sorted(members)), t, reference - t)


__all__ = [
    "DEFAULT_REFERENCE",
    "MAX_REPETITION_TIME",
    "MIN_REPETITION_TIME",
    "ImplausibleTiming",
    "PlanError",
    "ReferenceChoice",
    "ResamplingPlan",
    "ShiftGroup",
    "check_plausible",
    "make_plan",
    "occupied_span",
    "reference_time",
    "slice_time_ref",
    "window_fields",
]
