"""The resampling plan: which time each slice is moved to, and by how much.

A plan turns a run's ``SliceSchedule`` and a reference choice into per-slice
sample grids: slice ``z`` of volume ``v`` was acquired at ``onset[v] + t[z]``
and is resampled to ``onset[v] + reference``. Slices acquired together (one
excitation group under multiband) share one shift, so the plan groups them and
an engine runs once per distinct shift.

Pure: no files, no arrays larger than the number of volumes.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

import numpy as np

from slicetime.model import SliceSchedule

#: the reference used when the user does not choose one (see ``ReferenceChoice``)
DEFAULT_REFERENCE = "middle"

_SLICE_RE = re.compile(r"^slice[:=](\d+)$")


class PlanError(ValueError):
    """The run cannot be planned (no usable grid, bad reference for this run)."""


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
            return f"{self.value:g} s"
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
    if window is not None and not (0.0 <= ref <= window + 1e-9):
        raise PlanError(
            f"reference time {ref:g} s is outside this run's acquisition window "
            f"(0 to {window:g} s)"
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
    window = schedule.acquisition_window
    if window is not None and schedule.times:
        low, high = min(schedule.times), max(schedule.times)
        if low < -1e-6 or high > window + 1e-6:
            raise PlanError(
                f"slice times run from {low:g} to {high:g} s, outside the acquisition "
                f"window of 0 to {window:g} s, so they cannot be used even with --force"
            )
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


def _group(members: list[int], schedule: SliceSchedule, reference: float) -> ShiftGroup:
    t = float(np.mean([schedule.times[z] for z in members]))
    return ShiftGroup(tuple(sorted(members)), t, reference - t)


__all__ = [
    "DEFAULT_REFERENCE",
    "PlanError",
    "ReferenceChoice",
    "ResamplingPlan",
    "ShiftGroup",
    "make_plan",
    "reference_time",
]
