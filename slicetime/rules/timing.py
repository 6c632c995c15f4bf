"""Checks on one run's slice timing, repetition time and scheme."""

from __future__ import annotations

import itertools
from collections.abc import Callable, Iterator
from typing import Any

from slicetime.model import (
    MAX_REPETITION_TIME,
    MIN_REPETITION_TIME,
    RunRecord,
    SliceSchedule,
    WindowKind,
    before_start,
    implausible_repetition,
    past_end,
    window_label,
)
from slicetime.numbers import as_written, plain, secs
from slicetime.rules.registry import Hit
from slicetime.rules.repairs import window_distrust
from slicetime.schemes.resolve import is_number, valid_multiband_factor
from slicetime.words import count

#: suffixes whose runs need slice timing for slice-timing correction
TIMED_SUFFIXES = frozenset({"bold", "cbv", "asl", "m0scan"})


#: the codes of the resolver's structural problems (``record.timing_problems``), each
#: reported by its own check (:func:`problem_check`)
PROBLEM_CODES = ("timing/not-a-list", "timing/bad-entry", "timing/count-mismatch",
                 "axis/unknown-direction", "header/bad-slice-fields", "header/padded-slices")


def problem_check(code: str) -> Callable[[RunRecord], Iterator[Hit]]:
    """The check that reports the resolver's structural problem ``code``."""

    def check(record: RunRecord) -> Iterator[Hit]:
        for problem in record.timing_problems:
            if problem.code == code:
                field = "SliceEncodingDirection" if code.startswith("axis/") else "SliceTiming"
                if code.startswith("header/"):
                    field = "slice_code"
                    yield Hit(problem.message, field, problem.evidence, file=record.path)
                else:
                    yield Hit(problem.message, field, problem.evidence)

    return check


def _sidecar_times(record: RunRecord) -> list[float] | None:
    """The sidecar's SliceTiming as written (sidecar order), when it gave the times."""
    schedule = record.schedule
    if schedule is None or record.timing_origin != "sidecar":
        return None
    return list(schedule.sidecar_order())


def _in_ms(record: RunRecord) -> bool:
    """The resolved verdict: the sidecar's SliceTiming was written in milliseconds."""
    return record.timing.unit("SliceTiming") == "ms"


def already_corrected(record: RunRecord) -> bool:
    """The run says it is slice-time corrected (BIDS ``SliceTimingCorrected`` true): its
    slices are aligned to one reference time, so no slice times are expected and there
    is no acquisition order left to check (the one judgement, for the rules and for
    ``verify``)."""
    return record.metadata.get("SliceTimingCorrected") is True


def missing(record: RunRecord) -> Iterator[Hit]:
    if record.suffix not in TIMED_SUFFIXES or record.header is None:
        return
    if already_corrected(record):
        return  # already aligned to one reference time: no slice times expected
    if "SliceTiming" in record.metadata or record.schedule is not None:
        return
    yield Hit(
        "no SliceTiming in any applicable sidecar, and the header does not encode slice timing",
        "SliceTiming",
        {"slice_code": record.header.slice_code, "slice_duration": record.header.slice_duration,
         "sidecars": list(record.sidecar_chain)},
        file=record.sidecar_chain[-1] if record.sidecar_chain else record.path,
    )


def corrected_still_timed(record: RunRecord) -> Iterator[Hit]:
    if not already_corrected(record):
        return
    if "SliceTiming" in record.metadata:
        yield Hit(
            "SliceTimingCorrected is true but SliceTiming is still given: a later step would "
            "correct this run twice",
            "SliceTiming",
            {"SliceTimingCorrected_from": record.metadata_sources.get("SliceTimingCorrected")},
        )
    else:
        yield from _header_timing_hit(
            record, "slice_code", "SliceTimingCorrected is true but the header still encodes "
            "slice timing (slice_code {code}, slice_duration {duration}): a later step would "
            "correct this run twice")


def _header_timing_hit(record: RunRecord, field: str, message: str) -> Iterator[Hit]:
    """A hit about the slice timing the image header encodes, when the run's timing
    was rebuilt from it: ``message`` with the header's ``{code}`` and ``{duration}``,
    those fields as its evidence, the image as its file."""
    header = record.header
    if record.timing_origin != "header" or header is None:
        return
    yield Hit(message.format(code=header.slice_code, duration=secs(header.slice_duration)),
              field, {"slice_code": header.slice_code, "slice_duration": header.slice_duration},
              file=record.path)


def from_header(record: RunRecord) -> Iterator[Hit]:
    yield from _header_timing_hit(
        record, "SliceTiming",
        "SliceTiming rebuilt from header slice_code {code} and slice_duration {duration}")


def negative(record: RunRecord) -> Iterator[Hit]:
    times = _sidecar_times(record)
    if times and before_start(min(times)):
        idx = [i for i, t in enumerate(times) if before_start(t)]
        yield Hit(
            f"{len(idx)} SliceTiming entr{'y is' if len(idx) == 1 else 'ies are'} negative "
            f"(smallest {secs(min(times))})",
            "SliceTiming",
            {"indices": idx[:20], "min": min(times)},
        )


#: what follows from SliceTiming in milliseconds, on the same field: folded into it
_MS_CONSEQUENCES = (
    "timing/exceeds-tr", "timing/exceeds-acquisition", "timing/uneven", "timing/duplicates",
    "scheme/unrecognised-order", "inherit/timing-override", "dataset/outlier-scheme",
    "dataset/echo-mismatch", "policy/scheme-mismatch", "policy/multiband-mismatch",
)


def units_ms(record: RunRecord) -> Iterator[Hit]:
    verdict = record.timing.units.get("SliceTiming")
    if verdict is None or verdict.unit != "ms":
        return
    ev = verdict.evidence
    window, name = record.timing.window, record.timing.window_name
    # the catalogue's hint says fix divides; where fix will not (its one owner says why),
    # the hint says what a person does instead, so the audit and fix agree
    distrust = window_distrust(record)
    yield Hit(
        f"SliceTiming goes up to {as_written(ev['max'])}, above {name} ({secs(window)}); "
        f"divided by 1000 it fits"
        + (f" ({record.scheme.label} in seconds)" if record.scheme is not None else ""),
        "SliceTiming",
        {"max": ev["max"], "window": window, "window_from": name,
         "as_seconds_max": ev["as_seconds_max"],
         "scheme_in_seconds": record.scheme.label if record.scheme is not None else None},
        hint=None if distrust is None else
        f"Divide every SliceTiming entry by 1000; slicetime fix will not, because {distrust}.",
    )


def exceeds_tr(record: RunRecord) -> Iterator[Hit]:
    timing = record.timing
    tr, times = timing.repetition_time, timing.times
    if times is None or tr is None or record.timing_origin != "sidecar" or _in_ms(record):
        return  # no sidecar times, no TR, or reported as timing/units-ms
    if not past_end(max(times), tr):
        return  # the common case, decided with one max()
    late = [i for i, t in enumerate(_sidecar_order(timing.schedule, times)) if past_end(t, tr)]
    yield Hit(
        f"{len(late)} SliceTiming entr{'y is' if len(late) == 1 else 'ies are'} at or "
        f"beyond RepetitionTime {secs(tr)} (largest {secs(max(times))})",
        "SliceTiming",
        {"indices": late[:20], "max": max(times), "RepetitionTime": tr},
    )


def _sidecar_order(schedule: SliceSchedule | None, times: tuple[float, ...]) -> tuple[float, ...]:
    """Times in seconds in the order the sidecar lists them (indices name its entries)."""
    return times if schedule is None or schedule.direction == "+" else times[::-1]


def exceeds_acquisition(record: RunRecord) -> Iterator[Hit]:
    timing = record.timing
    delay = timing.schedule.delay_time if timing.schedule is not None else None
    tr = timing.repetition_time
    if delay is not None and tr is not None and delay >= tr \
            and timing.unit("RepetitionTime") == "s":
        # no window is left (SliceSchedule.window ignores such a DelayTime)
        name = window_label(WindowKind.REPETITION, timing.repetition_origin)
        yield Hit(f"DelayTime {secs(delay)} is not shorter than {name} ({secs(tr)}): it "
                  "leaves no time to acquire the slices", "DelayTime",
                  {"DelayTime": delay, "RepetitionTime": tr})
        return
    window, name, times = timing.window, timing.window_name, timing.times
    if times is None or window is None or timing.window_kind is WindowKind.REPETITION \
            or record.timing_origin != "sidecar" or _in_ms(record) or not timing.outside:
        return
    tr = timing.repetition_time
    if tr is not None and past_end(max(times), tr):
        return  # reported as exceeds-tr
    late = [i for i, t in enumerate(_sidecar_order(timing.schedule, times))
            if past_end(t, window)]
    if late:
        yield Hit(
            f"{len(late)} SliceTiming entr{'y is' if len(late) == 1 else 'ies are'} at or after "
            f"the end of acquisition ({name} = {secs(window)})",
            "SliceTiming",
            {"indices": late[:20], "max": max(times), "window": window, "window_from": name},
        )


def all_equal(record: RunRecord) -> Iterator[Hit]:
    scheme = record.scheme
    if scheme is None or len(scheme.groups) != 1 or scheme.n_slices < 2:
        return
    mb = record.metadata.get("MultibandAccelerationFactor")
    if is_number(mb) and mb == scheme.n_slices:
        return
    yield Hit(
        f"all {scheme.n_slices} slices are at {secs(scheme.group_times[0])}",
        "SliceTiming",
        {"time": scheme.group_times[0], "slices": scheme.n_slices},
    )


def _irregular_reason(record: RunRecord) -> str | None:
    scheme = record.scheme
    if scheme is None or scheme.regular or len(scheme.groups) < 2:
        return None
    return str(scheme.evidence.get("kind", ""))


def duplicates(record: RunRecord) -> Iterator[Hit]:
    reason = _irregular_reason(record)
    scheme = record.scheme
    if reason is None or scheme is None or reason not in ("unequal-groups", "group-spacing"):
        return
    sizes = sorted({len(g) for g in scheme.groups})
    shown = [list(g) for g in scheme.groups if len(g) > 1][:5]
    yield Hit(
        f"repeated times do not form multiband groups: {scheme.evidence.get('reason', reason)}",
        "SliceTiming",
        {"group_sizes": sizes, "repeated_groups": shown, **_plain(scheme.evidence)},
    )


def uneven(record: RunRecord) -> Iterator[Hit]:
    reason = _irregular_reason(record)
    scheme = record.scheme
    if scheme is not None and reason == "uneven-gaps":
        yield Hit(
            f"slice times are unevenly spaced: {scheme.evidence.get('reason', '')}",
            "SliceTiming",
            _plain(scheme.evidence),
        )


def unrecognised(record: RunRecord) -> Iterator[Hit]:
    scheme = record.scheme
    if scheme is not None and _irregular_reason(record) == "order":
        yield Hit(
            "the acquisition order is not sequential or interleaved: "
            + ",".join(str(g[0]) for g in scheme.groups[:12])
            + ("…" if len(scheme.groups) > 12 else ""),
            "SliceTiming",
            _plain(scheme.evidence),
        )


def multiband_mismatch(record: RunRecord) -> Iterator[Hit]:
    scheme = record.scheme
    mb = record.metadata.get("MultibandAccelerationFactor")
    if scheme is None or not valid_multiband_factor(mb) or scheme.n_slices < 2:
        return  # an invalid factor (0, 1.5) is the sidecar check's sidecar/wrong-type
    if _irregular_reason(record) in ("unequal-groups",):
        return
    if len(scheme.groups) == 1:
        return  # reported as timing/all-equal
    if int(mb) != mb or int(mb) != scheme.multiband_factor:
        yield Hit(
            f"MultibandAccelerationFactor is {plain(mb)} but the slice times form groups of "
            f"{scheme.multiband_factor}",
            "MultibandAccelerationFactor",
            {"declared": mb, "from_times": scheme.multiband_factor},
        )


def multiband_undeclared(record: RunRecord) -> Iterator[Hit]:
    scheme = record.scheme
    if (
        scheme is not None
        and scheme.regular
        and scheme.multiband_factor > 1
        and len(scheme.groups) > 1
        and "MultibandAccelerationFactor" not in record.metadata
    ):
        yield Hit(
            f"slice times form multiband groups of {scheme.multiband_factor}",
            "MultibandAccelerationFactor",
            {"from_times": scheme.multiband_factor},
            file=record.metadata_sources.get("SliceTiming"),
        )


def tr_missing(record: RunRecord) -> Iterator[Hit]:
    if record.suffix != "bold" or (record.header is None and record.content_missing is None):
        return
    if "RepetitionTime" in record.metadata or "VolumeTiming" in record.metadata:
        return
    ev: dict[str, Any] = {"sidecars": list(record.sidecar_chain)}
    hint = None
    if record.header is not None and record.header.repetition_time:
        ev["header_tr"] = record.header.repetition_time
        verdict = record.timing.units.get("pixdim[4]")
        if verdict is not None and not verdict.usable:  # resolve decides it
            header = record.header
            hint = (f"The header's pixdim[4] is {plain(header.raw_pixdim4)} with time unit "
                    f"{header.time_unit}: no plausible TR ({secs(header.raw_pixdim4 / 1000)} if "
                    "it was written in milliseconds); write RepetitionTime from the protocol.")
        else:
            hint = f"The header's pixdim[4] says {secs(record.header.repetition_time)}."
    yield Hit(
        "neither RepetitionTime nor VolumeTiming is given by any applicable sidecar",
        "RepetitionTime", ev, hint=hint,
        file=record.sidecar_chain[-1] if record.sidecar_chain else record.path,
    )


def tr_both(record: RunRecord) -> Iterator[Hit]:
    if "RepetitionTime" in record.metadata and "VolumeTiming" in record.metadata:
        yield Hit(
            "RepetitionTime and VolumeTiming are mutually exclusive",
            "VolumeTiming",
            {"RepetitionTime_from": record.metadata_sources.get("RepetitionTime"),
             "VolumeTiming_from": record.metadata_sources.get("VolumeTiming")},
        )


def vt_delay(record: RunRecord) -> Iterator[Hit]:
    if "VolumeTiming" in record.metadata and "DelayTime" in record.metadata:
        yield Hit("VolumeTiming and DelayTime are mutually exclusive", "DelayTime")


def vt_acq(record: RunRecord) -> Iterator[Hit]:
    md = record.metadata
    if "VolumeTiming" in md and not (
        "SliceTiming" in md or "FrameAcquisitionDuration" in md or "AcquisitionDuration" in md
    ):
        yield Hit("VolumeTiming is given without SliceTiming or FrameAcquisitionDuration",
                  "VolumeTiming")


def vt_order(record: RunRecord) -> Iterator[Hit]:
    vt = record.metadata.get("VolumeTiming")
    if not isinstance(vt, list) or not vt or not all(is_number(v) for v in vt):
        return
    back = [i for i in range(1, len(vt)) if vt[i] <= vt[i - 1]]
    if back or min(vt) < 0:
        yield Hit(
            "VolumeTiming is not strictly increasing from a non-negative onset"
            + (f" (first at index {back[0]})" if back else ""),
            "VolumeTiming", {"indices": back[:20], "min": min(vt)},
        )
    if record.header is not None and len(vt) != record.header.n_volumes:
        yield Hit(
            f"VolumeTiming has {count(len(vt), 'entry')} but the image has "
            f"{count(record.header.n_volumes, 'volume')}",
            "VolumeTiming", {"entries": len(vt), "volumes": record.header.n_volumes},
        )


def tr_frame_duration(record: RunRecord) -> Iterator[Hit]:
    if "RepetitionTime" in record.metadata and "FrameAcquisitionDuration" in record.metadata:
        yield Hit("RepetitionTime and FrameAcquisitionDuration are mutually exclusive",
                  "FrameAcquisitionDuration")


def deprecated_acq(record: RunRecord) -> Iterator[Hit]:
    md = record.metadata
    if "VolumeTiming" in md and "FrameAcquisitionDuration" not in md \
            and "AcquisitionDuration" in md:
        yield Hit("AcquisitionDuration beside VolumeTiming is deprecated",
                  "AcquisitionDuration")


def tr_units(record: RunRecord) -> Iterator[Hit]:
    verdict = record.timing.units.get("RepetitionTime")
    if verdict is not None and verdict.unit == "ms":
        tr = verdict.evidence["value"]
        if not verdict.usable:  # read as milliseconds it is no TR either (resolve decides)
            yield Hit(f"RepetitionTime is {as_written(tr)}, no plausible TR in seconds or "
                      f"read as milliseconds ({secs(tr / 1000)}; a TR lies between "
                      f"{secs(MIN_REPETITION_TIME)} and {secs(MAX_REPETITION_TIME)})",
                      "RepetitionTime", {"value": tr, "as_seconds": tr / 1000},
                      hint="Write RepetitionTime in seconds, from the protocol.")
            return
        yield Hit(f"RepetitionTime is {plain(tr)}; {secs(tr / 1000)} is far more likely",
                  "RepetitionTime", {"value": tr, "as_seconds": tr / 1000})


def tr_implausible(record: RunRecord) -> Iterator[Hit]:
    """The run's resolved TR (seconds, after the unit verdicts) or its VolumeTiming's
    shortest spacing is no TR an fMRI run can have (``model.implausible_repetition``,
    the bounds the correction's gate refuses by): a TR of 0.01 s. Values above the
    upper bound are read as milliseconds or found unusable by ``tr/units-ms``."""
    timing = record.timing
    tr = timing.repetition_time
    if tr is not None:
        problem = implausible_repetition(tr)
        if problem is not None:
            header = timing.repetition_origin == "header"
            yield Hit(f"{'pixdim[4]' if header else 'RepetitionTime'} gives a TR of "
                      f"{as_written(tr)} s, {problem}", "pixdim[4]" if header else
                      "RepetitionTime", {"seconds": tr, "origin": timing.repetition_origin},
                      file=record.path if header else None)
        return
    schedule = timing.schedule
    onsets = schedule.volume_times if schedule is not None else None
    if onsets is None or len(onsets) < 2:
        return
    factor = timing.units["VolumeTiming"].factor if "VolumeTiming" in timing.units else 1.0
    spacing = min(b - a for a, b in itertools.pairwise(onsets)) * factor
    if spacing > 0:
        problem = implausible_repetition(spacing)
        if problem is not None:
            yield Hit(f"VolumeTiming spaces volumes as little as {as_written(spacing)} s apart, "
                      f"{problem}", "VolumeTiming", {"seconds": spacing})


def _plain(evidence: Any) -> dict[str, Any]:
    return {str(k): v for k, v in dict(evidence).items() if k not in ("reason", "kind")}
