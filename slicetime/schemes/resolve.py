"""Resolve a run's schedule from its merged sidecar metadata and header fields.

Pure: takes values already read (sidecar dict, :class:`HeaderInfo`) and decides
which value wins, recording the source of each. The problems that make timing
unusable are described by :func:`slice_timing_problems`, which the audit
rules reuse so that "the schedule could not be built" and "the audit reports
an error" never disagree.
"""

from __future__ import annotations

import dataclasses
import functools
import itertools
import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any, TypedDict, TypeGuard, cast

from slicetime.model import (
    AXES,
    MAX_REPETITION_TIME,
    Axis,
    Direction,
    HeaderInfo,
    ResolvedTiming,
    Scheme,
    SliceSchedule,
    Source,
    TimingProblem,
    UnitVerdict,
    outside_window,
    window_label,
)
from slicetime.schemes.niftcodes import header_slice_times
from slicetime.words import agree, count

SLICE_ENCODING_VALUES = ("i", "j", "k", "i-", "j-", "k-")


def is_number(value: Any) -> TypeGuard[int | float]:
    """A JSON number (bool is not a number in JSON terms)."""
    return isinstance(value, int | float) and not isinstance(value, bool)


def valid_multiband_factor(value: Any) -> TypeGuard[int | float]:
    """A usable MultibandAccelerationFactor: a whole number of at least 1 (JSON ``2`` or
    ``2.0``). The BIDS schema types it only as a number ("the multiband factor, for
    multiband acquisitions"); a factor counts the slices excited together, so 0, a
    negative or a fractional value describes no acquisition (common practice, no source).
    The sidecar check reports any other value, and the rules about the factor use only
    a valid one."""
    return is_number(value) and value >= 1 and float(value).is_integer()


_PLAIN_NUMBERS = frozenset({int, float})


def all_finite_numbers(values: list[Any]) -> bool:
    """True when every entry is a finite JSON number (:func:`is_number` and finite)."""
    if _PLAIN_NUMBERS.issuperset(map(type, values)):
        try:  # the sum of finite numbers is finite unless it overflows
            if math.isfinite(sum(values)):
                return True
        except OverflowError:
            pass
    return all(is_number(v) and math.isfinite(float(v)) for v in values)


def positive_number(value: Any) -> float | None:
    if is_number(value) and math.isfinite(value) and value > 0:
        return float(value)
    return None


def parse_direction(value: Any) -> tuple[Axis, Direction] | None:
    """``SliceEncodingDirection`` → (axis, direction), or None when invalid."""
    if isinstance(value, str) and value in SLICE_ENCODING_VALUES:
        axis = cast(Axis, value[0])  # one of i, j, k: value is a known direction
        return axis, ("-" if value.endswith("-") else "+")
    return None


def slice_timing_problems(value: Any, expected_count: int | None) -> list[TimingProblem]:
    """Structural problems that make a SliceTiming value unusable."""
    if not isinstance(value, list):
        return [
            TimingProblem(
                "timing/not-a-list",
                f"SliceTiming must be a list of numbers, found {type(value).__name__}",
                {"value": value if is_number(value) or isinstance(value, str) else repr(value)},
            )
        ]
    if not value:
        return [TimingProblem("timing/not-a-list", "SliceTiming is an empty list", {"value": []})]
    bad: list[int] = []
    if not all_finite_numbers(value):  # the common case needs no per-entry look
        bad = [i for i, v in enumerate(value) if not (is_number(v) and math.isfinite(float(v)))]
    problems: list[TimingProblem] = []
    if bad:
        shown = {
            str(i): (value[i] if not isinstance(value[i], float) else repr(value[i]))
            for i in bad[:5]
        }
        problems.append(
            TimingProblem(
                "timing/bad-entry",
                f"SliceTiming has {count(len(bad), 'entry')} that {agree(len(bad), 'is')} not "
                f"{'a finite number' if len(bad) == 1 else 'finite numbers'} (first at index "
                f"{bad[0]})",
                {"indices": bad[:20], "values": shown},
            )
        )
    if expected_count is not None and len(value) != expected_count:
        problems.append(
            TimingProblem(
                "timing/count-mismatch",
                f"SliceTiming has {count(len(value), 'entry')} but the image has "
                f"{count(expected_count, 'slice')} along the slice axis",
                {"entries": len(value), "slices": expected_count},
            )
        )
    return problems


@dataclass(frozen=True)
class _Slices:
    """The slice-time part of a resolution: a schedule, or why there is none."""

    schedule: SliceSchedule | None
    origin: str | None
    problems: tuple[TimingProblem, ...] = ()
    axis_length: int | None = None


def resolve_timing(
    metadata: Mapping[str, Any],
    metadata_sources: Mapping[str, str],
    header: HeaderInfo | None,
    image_file: str,
) -> ResolvedTiming:
    """The one resolved timing of a run (:class:`~slicetime.model.ResolvedTiming`):
    the schedule or why there is none, the repetition time with its source, a unit
    verdict per timing field, and the acquisition window and the slices outside it,
    in seconds."""
    slices = _resolve_slices(metadata, metadata_sources, header, image_file)
    return _complete(slices, metadata, metadata_sources, header, image_file)


class _Volume(TypedDict):
    """The volume-level fields of a schedule (:class:`SliceSchedule`'s names), in seconds."""

    repetition_time: float | None
    volume_times: tuple[float, ...] | None
    acquisition_duration: float | None
    delay_time: float | None


def _resolve_slices(
    metadata: Mapping[str, Any],
    metadata_sources: Mapping[str, str],
    header: HeaderInfo | None,
    image_file: str,
) -> _Slices:
    """Build the schedule of one run, or say why it cannot be built.

    Precedence (documented in DEVELOPERS.md):
      * axis/direction: ``SliceEncodingDirection`` from the sidecar; when absent
        the BIDS default (``k``, positive) — except that header-rebuilt timing
        runs along the header's ``dim_info`` slice dimension;
      * slice times: sidecar ``SliceTiming``; else the header's ``slice_code`` /
        ``slice_duration`` / ``dim_info`` when all are set;
      * TR: sidecar ``RepetitionTime``; else ``VolumeTiming``; else header pixdim[4].
    """

    def sidecar_source(key: str) -> Source:
        return Source("sidecar", key, metadata_sources.get(key))

    sources: dict[str, Source] = {}
    volume = _volume_fields(metadata, header, image_file, sources, sidecar_source)
    found = _slice_direction(metadata.get("SliceEncodingDirection"), sources, sidecar_source)
    if isinstance(found, TimingProblem):
        return _Slices(None, None, (found,))
    axis, direction = found

    def axis_length(ax: Axis) -> int | None:
        if header is None:
            return None
        index = AXES.index(ax)
        return header.shape[index] if len(header.shape) > index else 1

    def build(times: Sequence[float], origin: str, ax: Axis, dr: Direction) -> _Slices:
        schedule = SliceSchedule(times=tuple(times), axis=ax, direction=dr, sources=sources,
                                 **volume)
        return _Slices(schedule, origin, (), axis_length(ax))

    # --- slice times -----------------------------------------------------------
    if "SliceTiming" in metadata:
        value = metadata["SliceTiming"]
        length = axis_length(axis)
        problems = slice_timing_problems(value, length)
        if problems:
            return _Slices(None, None, tuple(problems), length)
        times = list(map(float, value))
        if direction == "-":
            times.reverse()
        sources["SliceTiming"] = sidecar_source("SliceTiming")
        return build(times, "sidecar", axis, direction)

    if (
        header is not None
        and header.slice_code > 0
        and header.slice_duration
        and header.slice_dim is not None
        and header.slice_dim < min(3, len(header.shape))
    ):
        n = header.shape[header.slice_dim]
        rebuilt = _header_times(header, header.slice_duration, n)
        if isinstance(rebuilt, TimingProblem):
            return _Slices(None, None, (rebuilt,), n)
        sources["SliceTiming"] = Source(
            "header", "slice_code, slice_duration, dim_info", image_file
        )
        sources["SliceEncodingDirection"] = Source("header", "dim_info", image_file)
        return build(rebuilt, "header", AXES[header.slice_dim], "+")

    return _Slices(None, None, (), axis_length(axis))


def _volume_fields(
    metadata: Mapping[str, Any],
    header: HeaderInfo | None,
    image_file: str,
    sources: dict[str, Source],
    sidecar_source: Callable[[str], Source],
) -> _Volume:
    """The volume-level fields of the schedule, each source recorded in ``sources``:
    TR from the sidecar, else (without VolumeTiming) the header's pixdim[4]; the
    acquisition duration is TR - DelayTime, else FrameAcquisitionDuration."""
    tr = positive_number(metadata.get("RepetitionTime"))
    if tr is not None:
        sources["RepetitionTime"] = sidecar_source("RepetitionTime")
    volume_times: tuple[float, ...] | None = None
    vt = metadata.get("VolumeTiming")
    if isinstance(vt, list) and vt and all(is_number(v) and math.isfinite(v) for v in vt):
        volume_times = tuple(float(v) for v in vt)
        sources["VolumeTiming"] = sidecar_source("VolumeTiming")
    if tr is None and volume_times is None and header is not None and header.repetition_time:
        tr = header.repetition_time
        sources["RepetitionTime"] = Source("header", "pixdim[4]", image_file)

    delay = metadata.get("DelayTime")
    delay_time = float(delay) if is_number(delay) and math.isfinite(delay) and delay > 0 else None
    if delay_time is not None:
        sources["DelayTime"] = sidecar_source("DelayTime")
    acq: float | None = None
    if delay_time is not None and tr is not None and delay_time < tr:
        acq = tr - delay_time
        sources["AcquisitionDuration"] = Source("derived", "RepetitionTime - DelayTime")
    else:
        fad = positive_number(metadata.get("FrameAcquisitionDuration"))
        if fad is not None:
            acq = fad
            sources["AcquisitionDuration"] = sidecar_source("FrameAcquisitionDuration")
    return _Volume(repetition_time=tr, volume_times=volume_times, acquisition_duration=acq,
                   delay_time=delay_time)


def _slice_direction(
    sed: Any, sources: dict[str, Source], sidecar_source: Callable[[str], Source]
) -> tuple[Axis, Direction] | TimingProblem:
    """The sidecar's SliceEncodingDirection, else the BIDS default ``k``; the problem
    ``axis/unknown-direction`` for a value that is none of the six."""
    parsed = parse_direction(sed)
    if sed is not None and parsed is None:
        return TimingProblem(
            "axis/unknown-direction",
            f"SliceEncodingDirection {sed!r} is not one of " + ", ".join(SLICE_ENCODING_VALUES),
            {"value": sed if isinstance(sed, str) else repr(sed)},
        )
    if parsed is not None:
        sources["SliceEncodingDirection"] = sidecar_source("SliceEncodingDirection")
        return parsed
    sources["SliceEncodingDirection"] = Source(
        "default", "k (BIDS: SliceTiming runs along k when SliceEncodingDirection is absent)"
    )
    return "k", "+"


def _header_times(header: HeaderInfo, duration: float, n: int) -> list[float] | TimingProblem:
    """The times of the ``n`` slices along the header's slice dimension that its
    slice_code and slice_duration (``duration``) encode, in data-array order; the
    problem when they cannot be rebuilt (fields that contradict each other, padding
    slices without a time)."""
    try:
        raw = header_slice_times(
            header.slice_code,
            header.slice_start,
            header.slice_end,
            duration,
            n,
        )
    except ValueError as exc:
        return TimingProblem(
            "header/bad-slice-fields",
            str(exc),
            {
                "slice_code": header.slice_code,
                "slice_start": header.slice_start,
                "slice_end": header.slice_end,
                "slice_duration": header.slice_duration,
            },
        )
    if any(t is None for t in raw):
        return TimingProblem(
            "header/padded-slices",
            f"the header times only slices {header.slice_start}..{header.slice_end} "
            f"of {n}; padding slices have no acquisition time",
            {
                "slice_start": header.slice_start,
                "slice_end": header.slice_end,
                "slices": n,
            },
        )
    return [float(t) for t in raw if t is not None]


# --------------------------------------------------------------------------- units

#: a list in milliseconds has its largest value at least this many times the window
#: in seconds (a protocol's times in seconds never exceed the window)
MS_FACTOR_MIN = 50.0


def looks_like_milliseconds(times: Sequence[float], window: float | None) -> bool:
    """True when slice times were evidently written in milliseconds: the largest is
    many times the window (in seconds) yet fits inside it once divided by 1000."""
    if not times or window is None or window <= 0:
        return False
    top = max(times)
    return top >= MS_FACTOR_MIN * window and top / 1000.0 < window


#: the verdict for a sidecar time in seconds (one shared object per field)
_SECONDS = {field: UnitVerdict(field, "s", {"at_most": MAX_REPETITION_TIME})
            for field in ("RepetitionTime", "VolumeTiming")}


def repetition_time_unit(value: float, field: str = "RepetitionTime") -> UnitVerdict:
    """A sidecar repetition time (or ``VolumeTiming`` spacing) above the largest
    plausible TR (``model.MAX_REPETITION_TIME``) was written in milliseconds. One that
    is still above it read as milliseconds is no TR in any unit: the verdict says so
    (``usable`` False, :attr:`UnitVerdict.usable`) and the value gives no TR."""
    if value > MAX_REPETITION_TIME:
        evidence: dict[str, Any] = {"value": value, "above": MAX_REPETITION_TIME,
                                    "as_seconds": value / 1000.0}
        if value / 1000.0 > MAX_REPETITION_TIME:
            evidence.update(usable=False, reason="no plausible TR in seconds or read as "
                                                 "milliseconds")
        return UnitVerdict(field, "ms", evidence)
    return _SECONDS[field]


@functools.lru_cache(maxsize=256)
def _header_unit(field: str, unit: str, raw: float) -> UnitVerdict:
    evidence: dict[str, Any] = {"xyzt_units": unit, "as_written": raw}
    seconds = raw * UnitVerdict(field, unit).factor
    if field == "pixdim[4]" and seconds > MAX_REPETITION_TIME:
        # the stated unit makes no plausible TR (2000 labelled seconds): the header gives
        # no TR; a sidecar TR in milliseconds is read as such, a header's is not guessed
        evidence.update(usable=False, above=MAX_REPETITION_TIME, as_seconds=seconds,
                        reason="no plausible TR in the unit xyzt_units states")
    return UnitVerdict(field, unit, evidence)


def header_unit(field: str, header: HeaderInfo, raw: float) -> UnitVerdict:
    """A header time's unit is what ``xyzt_units`` states (``unknown`` reads as seconds);
    a ``pixdim[4]`` that is no plausible TR in that unit (above
    ``model.MAX_REPETITION_TIME``) is not usable (:attr:`UnitVerdict.usable`), and the
    header then gives the run no TR."""
    return _header_unit(field, header.time_unit, raw)


def _volume_times(metadata: Mapping[str, Any]) -> tuple[float, ...] | None:
    vt = metadata.get("VolumeTiming")
    if isinstance(vt, list) and vt and all(is_number(v) and math.isfinite(v) for v in vt):
        return tuple(float(v) for v in vt)
    return None


def _complete(slices: _Slices, metadata: Mapping[str, Any],
              metadata_sources: Mapping[str, str], header: HeaderInfo | None,
              image_file: str) -> ResolvedTiming:
    """The unit verdicts, the TR, the window and the slices outside it, in seconds."""
    units: dict[str, UnitVerdict] = {}
    schedule = slices.schedule
    tr: float | None = None
    tr_source: Source | None = None
    written = positive_number(metadata.get("RepetitionTime"))
    if written is not None:  # BIDS: the sidecar wins, with or without slice times
        units["RepetitionTime"] = verdict = repetition_time_unit(written)
        tr = written * verdict.factor if verdict.usable else None
        tr_source = (schedule.sources.get("RepetitionTime") if schedule is not None else None) \
            or Source("sidecar", "RepetitionTime", metadata_sources.get("RepetitionTime"))
    volume_times = schedule.volume_times if schedule is not None else _volume_times(metadata)
    vt_factor = 1.0
    if volume_times is not None:
        spacing = min((b - a for a, b in itertools.pairwise(volume_times)),
                      default=0.0)
        units["VolumeTiming"] = verdict = repetition_time_unit(spacing, "VolumeTiming")
        vt_factor = verdict.factor
    if header is not None:
        if header.raw_pixdim4:
            units["pixdim[4]"] = header_unit("pixdim[4]", header, header.raw_pixdim4)
        if header.raw_slice_duration:
            units["slice_duration"] = header_unit("slice_duration", header,
                                                  header.raw_slice_duration)
        if tr is None and volume_times is None and header.repetition_time \
                and "RepetitionTime" not in units \
                and units["pixdim[4]"].usable:  # an unusable sidecar TR is not replaced
            tr = header.repetition_time
            tr_source = (schedule.sources.get("RepetitionTime") if schedule is not None
                         else None) or Source("header", "pixdim[4]", image_file)
    if schedule is None:
        return ResolvedTiming(None, slices.origin, slices.problems, slices.axis_length,
                              repetition_time=tr, repetition_source=tr_source, units=units)
    # the window in seconds: the schedule's own rule over values in seconds
    if tr == schedule.repetition_time and vt_factor == 1.0:
        window, kind = schedule.window()  # written in seconds: the common case
    else:
        acquisition = schedule.acquisition_duration
        derived = schedule.sources.get("AcquisitionDuration")
        if derived is not None and derived.kind == "derived" and tr is not None \
                and schedule.delay_time is not None:
            acquisition = tr - schedule.delay_time if schedule.delay_time < tr else None
        window, kind = dataclasses.replace(
            schedule, repetition_time=tr, acquisition_duration=acquisition,
            volume_times=None if volume_times is None else tuple(
                v * vt_factor for v in volume_times)).window()
    times = schedule.times
    if slices.origin == "sidecar" and looks_like_milliseconds(times, window):
        units["SliceTiming"] = UnitVerdict(
            "SliceTiming", "ms",
            {"max": max(times), "window": window,
             "window_from": window_label(kind, None if tr_source is None else tr_source.kind),
             "as_seconds_max": max(times) / 1000.0, "at_least": MS_FACTOR_MIN})
        times = tuple(t * 0.001 for t in times)
    return ResolvedTiming(
        schedule, slices.origin, slices.problems, slices.axis_length,
        repetition_time=tr, repetition_source=tr_source, times=times, window=window,
        window_kind=kind, outside=outside_window(times, window), units=units)


def timing_of(schedule: SliceSchedule, origin: str = "sidecar") -> ResolvedTiming:
    """The resolved timing of a schedule given as values (the API, drawings of a
    schedule alone): the same verdicts and window as a run whose sidecar held it."""
    metadata = ({} if schedule.repetition_time is None
                else {"RepetitionTime": schedule.repetition_time})
    return _complete(_Slices(schedule, origin), metadata, {}, None, "")


def infer_run_scheme(timing: ResolvedTiming) -> Scheme | None:
    """The scheme of a resolved timing, inferred from its times in seconds. Times written
    in milliseconds say so in the scheme's evidence (``assumed_unit`` ``ms``), so the
    order, the groups and the spacing describe the protocol and not the unit mistake."""
    from slicetime.schemes.infer import infer_scheme

    if timing.times is None:
        return None
    scheme = infer_scheme(timing.times)
    if timing.unit("SliceTiming") != "ms":
        return scheme
    note = "SliceTiming read as milliseconds (every value ÷ 1000)"
    return dataclasses.replace(
        scheme, evidence={**scheme.evidence, "assumed_unit": "ms", "unit_note": note}
    )
