"""Checks on one run's slice timing, repetition time and scheme."""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

from slicetime.model import RunRecord, Severity, SliceSchedule, before_start, past_end
from slicetime.numbers import as_written, plain, secs
from slicetime.rules.registry import Hit, run_rule
from slicetime.schemes.resolve import is_number
from slicetime.words import count

E, W, N = Severity.ERROR, Severity.WARNING, Severity.NOTE

#: suffixes whose runs need slice timing for slice-timing correction
TIMED_SUFFIXES = frozenset({"bold", "cbv", "asl", "m0scan"})


def _problem_rule(code: str, title: str, rationale: str, fix: str,
                  standard: str | None = None) -> None:
    """A rule that reports the resolver's structural problem with this code."""

    def check(record: RunRecord) -> Iterator[Hit]:
        for problem in record.timing_problems:
            if problem.code == code:
                field = "SliceEncodingDirection" if code.startswith("axis/") else "SliceTiming"
                if code.startswith("header/"):
                    field = "slice_code"
                    yield Hit(problem.message, field, problem.evidence, file=record.path)
                else:
                    yield Hit(problem.message, field, problem.evidence)

    run_rule(code, title=title, severity=E, rationale=rationale, fix=fix,
             standard=standard)(check)


_problem_rule(
    "timing/not-a-list",
    "SliceTiming is not a list of numbers",
    "BIDS defines SliceTiming as an array of numbers, one per slice, in seconds.",
    "Write SliceTiming as a JSON array of numbers (slicetime timing can generate one).",
    "BIDS objects.metadata.SliceTiming",
)
_problem_rule(
    "timing/bad-entry",
    "SliceTiming holds entries that are not finite numbers",
    "null, strings, booleans, NaN or Infinity cannot be acquisition times.",
    "Replace the entries with the slices' acquisition times in seconds.",
)
_problem_rule(
    "timing/count-mismatch",
    "SliceTiming has the wrong number of entries",
    "There must be one entry per slice along the axis that SliceEncodingDirection names "
    "(k when it is absent). A different count usually means the list belongs to another "
    "protocol, or the axis is wrong.",
    "Use the SliceTiming of the protocol that produced this image, or set "
    "SliceEncodingDirection to the axis the list was written for.",
    "BIDS rules.checks.mri.SliceTimingElements / SliceTimingElementsWithDirection",
)
_problem_rule(
    "axis/unknown-direction",
    "SliceEncodingDirection is not one of the standard's values",
    "BIDS allows i, j, k, i-, j-, k-. Without a valid axis the slice times cannot be mapped "
    "onto the image.",
    "Set SliceEncodingDirection to the acquisition's slice axis, e.g. k.",
    "BIDS objects.metadata.SliceEncodingDirection",
)
_problem_rule(
    "header/bad-slice-fields",
    "the header's slice timing fields are inconsistent",
    "slice_code, slice_start, slice_end and slice_duration must describe a valid order "
    "within the slice dimension (NIfTI-1 nifti1.h).",
    "Ignore the header fields and give SliceTiming in the sidecar.",
)
_problem_rule(
    "header/padded-slices",
    "the header times only part of the slices",
    "NIfTI slice_start/slice_end may leave padding slices with no acquisition time; such a "
    "run cannot be corrected from the header alone.",
    "Give SliceTiming for every slice in the sidecar.",
)


def _sidecar_times(record: RunRecord) -> list[float] | None:
    """The sidecar's SliceTiming as written (sidecar order), when it gave the times."""
    schedule = record.schedule
    if schedule is None or record.timing_origin != "sidecar":
        return None
    return list(schedule.sidecar_order())


def _in_ms(record: RunRecord) -> bool:
    """The resolved verdict: the sidecar's SliceTiming was written in milliseconds."""
    return record.timing.unit("SliceTiming") == "ms"


@run_rule(
    "timing/missing",
    fixable=True,
    title="no slice timing for a run that needs it",
    severity=W,
    rationale=(
        "Slice-timing correction and event-related models need each slice's acquisition "
        "time. BIDS recommends SliceTiming for functional runs and requires it for sparse "
        "acquisitions without DelayTime; neither the sidecars nor the NIfTI header "
        "(slice_code, slice_duration, dim_info) give it here."
    ),
    fix="Add SliceTiming from the protocol (slicetime timing prints it) or from the "
    "scanner's export.",
    standard="BIDS objects.metadata.SliceTiming (RECOMMENDED for func)",
)
def missing(record: RunRecord) -> Iterator[Hit]:
    if record.suffix not in TIMED_SUFFIXES or record.header is None:
        return
    if record.metadata.get("SliceTimingCorrected") is True:
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


@run_rule(
    "timing/corrected-still-timed",
    title="a slice-time corrected run still claims per-slice times",
    severity=E,
    rationale=(
        "SliceTimingCorrected: true says every slice was already aligned to one reference time "
        "(StartTime). A run that still gives SliceTiming (or header slice_code/slice_duration) "
        "invites the next processing step to correct it again, shifting every slice a second "
        "time."
    ),
    fix="Remove SliceTiming from the corrected run's sidecar (and clear slice_code and "
    "slice_duration in its header); keep the original times in a provenance record instead.",
)
def corrected_still_timed(record: RunRecord) -> Iterator[Hit]:
    if record.metadata.get("SliceTimingCorrected") is not True:
        return
    if "SliceTiming" in record.metadata:
        yield Hit(
            "SliceTimingCorrected is true but SliceTiming is still given: a later step would "
            "correct this run twice",
            "SliceTiming",
            {"SliceTimingCorrected_from": record.metadata_sources.get("SliceTimingCorrected")},
        )
    elif record.timing_origin == "header" and record.header is not None:
        yield Hit(
            "SliceTimingCorrected is true but the header still encodes slice timing "
            f"(slice_code {record.header.slice_code}, slice_duration "
            f"{secs(record.header.slice_duration)}): a later step would correct this run twice",
            "slice_code",
            {"slice_code": record.header.slice_code,
             "slice_duration": record.header.slice_duration},
            file=record.path,
        )


@run_rule(
    "timing/from-header",
    fixable=True,
    title="slice timing rebuilt from the NIfTI header",
    severity=N,
    rationale=(
        "No sidecar gives SliceTiming, but the header's slice_code, slice_duration and "
        "dim_info encode an order. Header fields are often left at converter defaults, so the "
        "rebuilt timing deserves a look before it is trusted."
    ),
    fix="Confirm the order against the protocol and write SliceTiming into the sidecar.",
)
def from_header(record: RunRecord) -> Iterator[Hit]:
    if record.timing_origin == "header" and record.header is not None:
        yield Hit(
            "SliceTiming rebuilt from header slice_code "
            f"{record.header.slice_code} and slice_duration "
            f"{secs(record.header.slice_duration)}",
            "SliceTiming",
            {"slice_code": record.header.slice_code,
             "slice_duration": record.header.slice_duration},
            file=record.path,
        )


@run_rule(
    "timing/negative",
    title="negative slice times",
    severity=E,
    rationale="Slice times are seconds from the start of each volume, so none can be negative.",
    fix="Shift or regenerate the list so that the first slice is at or after 0.",
)
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


@run_rule(
    "timing/units-ms",
    fixable=True,
    title="slice times look like milliseconds",
    severity=E,
    rationale=(
        "BIDS slice times are in seconds. Values above the TR that fit inside it once divided "
        "by 1000 were almost always written in milliseconds by a converter or by hand."
    ),
    fix="Divide every SliceTiming entry by 1000 (slicetime fix does this).",
    standard="BIDS rules.checks.func.SliceTimingGreaterThanRepetitionTime",
    subsumes=_MS_CONSEQUENCES,
)
def units_ms(record: RunRecord) -> Iterator[Hit]:
    verdict = record.timing.units.get("SliceTiming")
    if verdict is None or verdict.unit != "ms":
        return
    ev = verdict.evidence
    window, name = record.timing.window, record.timing.window_name
    yield Hit(
        f"SliceTiming goes up to {as_written(ev['max'])}, above {name} ({secs(window)}); "
        f"divided by 1000 it fits"
        + (f" ({record.scheme.label} in seconds)" if record.scheme is not None else ""),
        "SliceTiming",
        {"max": ev["max"], "window": window, "window_from": name,
         "as_seconds_max": ev["as_seconds_max"],
         "scheme_in_seconds": record.scheme.label if record.scheme is not None else None},
    )


@run_rule(
    "timing/exceeds-tr",
    title="slice times at or beyond the repetition time",
    severity=E,
    rationale=(
        "Every slice of a volume is acquired within one TR; a slice time at or after the TR "
        "belongs to the next volume. The list was written for another protocol, or the TR is "
        "wrong."
    ),
    fix="Check RepetitionTime and SliceTiming against the protocol.",
    standard="BIDS rules.checks.func.SliceTimingGreaterThanRepetitionTime",
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


@run_rule(
    "timing/exceeds-acquisition",
    title="slice times beyond the acquisition window of a sparse run",
    severity=E,
    rationale=(
        "With DelayTime (or FrameAcquisitionDuration) every slice is acquired within TR minus "
        "the delay; a later slice time contradicts the sparse protocol."
    ),
    fix="Check DelayTime against SliceTiming; one of them belongs to another protocol.",
)
def exceeds_acquisition(record: RunRecord) -> Iterator[Hit]:
    timing = record.timing
    window, name, times = timing.window, timing.window_name, timing.times
    if times is None or window is None or name == "RepetitionTime" \
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


@run_rule(
    "timing/all-equal",
    title="every slice has the same time",
    severity=W,
    rationale=(
        "Identical times for all slices describe a 3D acquisition, or a placeholder written "
        "by a converter; for a 2D multi-slice run it means the timing is unknown, and "
        "correction would do nothing."
    ),
    fix="Replace SliceTiming with the protocol's real slice times, or remove it for 3D runs.",
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


@run_rule(
    "timing/duplicates",
    title="repeated slice times without a multiband structure",
    severity=W,
    rationale=(
        "Under multiband factor m every time appears exactly m times, on slices N/m apart. "
        "Repeats that do not follow that pattern are copy errors or a mislabelled protocol."
    ),
    fix="Regenerate SliceTiming from the protocol (slicetime timing --multiband M).",
)
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


@run_rule(
    "timing/uneven",
    title="slice times are unevenly spaced",
    severity=W,
    rationale=(
        "Scanners excite slices (or multiband groups) at a fixed interval. Gaps that differ "
        "by more than a few milliseconds point to a hand-edited or mis-merged list."
    ),
    fix="Compare SliceTiming with the protocol and regenerate it.",
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


@run_rule(
    "scheme/unrecognised-order",
    title="the slice order fits no regular scheme",
    severity=N,
    rationale=(
        "The times are evenly spaced but the order is neither sequential nor interleaved with "
        "a fixed step. That can be a custom protocol; it can also be a shuffled list."
    ),
    fix="Confirm the order against the protocol.",
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


@run_rule(
    "scheme/multiband-mismatch",
    timing_in_doubt=True,
    fixable=True,
    title="MultibandAccelerationFactor disagrees with the slice times",
    severity=E,
    rationale=(
        "Under multiband factor m, m slices share each time. When the declared factor and the "
        "times disagree one of them is wrong, and correction would shift slices that were "
        "acquired together by different amounts (or the reverse)."
    ),
    fix="Set MultibandAccelerationFactor to the group size the times show, or regenerate "
    "SliceTiming for the declared factor.",
)
def multiband_mismatch(record: RunRecord) -> Iterator[Hit]:
    scheme = record.scheme
    mb = record.metadata.get("MultibandAccelerationFactor")
    if scheme is None or not is_number(mb) or scheme.n_slices < 2:
        return
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


@run_rule(
    "scheme/multiband-undeclared",
    fixable=True,
    title="the times show multiband groups but no factor is declared",
    severity=N,
    rationale=(
        "The times form groups of m simultaneous slices N/m apart, which is a multiband "
        "acquisition, but MultibandAccelerationFactor is absent."
    ),
    fix="Add MultibandAccelerationFactor (slicetime fix fills it from the times).",
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


@run_rule(
    "tr/missing",
    title="no RepetitionTime and no VolumeTiming",
    severity=E,
    rationale="BIDS requires one of them for functional runs; without it times cannot be mapped.",
    fix="Add RepetitionTime (seconds) to the run's sidecar or an inherited one.",
    standard="BIDS sidecars.func.MRIFuncRepetitionTime",
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
        hint = f"The header's pixdim[4] says {secs(record.header.repetition_time)}."
    yield Hit(
        "neither RepetitionTime nor VolumeTiming is given by any applicable sidecar",
        "RepetitionTime", ev, hint=hint,
        file=record.sidecar_chain[-1] if record.sidecar_chain else record.path,
    )


@run_rule(
    "tr/both-present",
    title="RepetitionTime and VolumeTiming are both given",
    severity=E,
    rationale="BIDS makes them mutually exclusive: one describes regular, one irregular volumes.",
    fix="Keep RepetitionTime for regular sampling, VolumeTiming for irregular.",
    standard="BIDS rules.checks.func.VolumeTimingRepetitionTimeMutex",
)
def tr_both(record: RunRecord) -> Iterator[Hit]:
    if "RepetitionTime" in record.metadata and "VolumeTiming" in record.metadata:
        yield Hit(
            "RepetitionTime and VolumeTiming are mutually exclusive",
            "VolumeTiming",
            {"RepetitionTime_from": record.metadata_sources.get("RepetitionTime"),
             "VolumeTiming_from": record.metadata_sources.get("VolumeTiming")},
        )


@run_rule(
    "tr/volume-timing-delay",
    title="VolumeTiming and DelayTime are both given",
    severity=E,
    rationale="BIDS makes them mutually exclusive.",
    fix="With VolumeTiming describe the acquisition time by SliceTiming or "
    "FrameAcquisitionDuration.",
    standard="BIDS rules.checks.func.VolumeTimingDelayTimeMutex",
)
def vt_delay(record: RunRecord) -> Iterator[Hit]:
    if "VolumeTiming" in record.metadata and "DelayTime" in record.metadata:
        yield Hit("VolumeTiming and DelayTime are mutually exclusive", "DelayTime")


@run_rule(
    "tr/volume-timing-acquisition",
    title="VolumeTiming without an acquisition duration",
    severity=E,
    rationale="BIDS requires SliceTiming or FrameAcquisitionDuration beside VolumeTiming.",
    fix="Add SliceTiming or FrameAcquisitionDuration.",
    standard="BIDS rules.checks.func.VolumeTimingMissingFrameAcquisitionDuration",
)
def vt_acq(record: RunRecord) -> Iterator[Hit]:
    md = record.metadata
    if "VolumeTiming" in md and not (
        "SliceTiming" in md or "FrameAcquisitionDuration" in md or "AcquisitionDuration" in md
    ):
        yield Hit("VolumeTiming is given without SliceTiming or FrameAcquisitionDuration",
                  "VolumeTiming")


@run_rule(
    "tr/volume-timing-order",
    title="VolumeTiming is not increasing, or has the wrong length",
    severity=E,
    rationale="Volume onsets must be non-negative, strictly increasing, one per volume.",
    fix="Write one onset per volume in increasing order.",
    standard="BIDS rules.checks.mri.VolumeTimingNotMonotonicallyIncreasing",
)
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


@run_rule(
    "tr/frame-duration-conflict",
    title="RepetitionTime and FrameAcquisitionDuration are both given",
    severity=E,
    rationale="BIDS makes them mutually exclusive; the acquisition time of a sparse run with "
    "RepetitionTime is described by DelayTime (TR minus acquisition time) or SliceTiming.",
    fix="Replace FrameAcquisitionDuration by DelayTime = RepetitionTime - acquisition time.",
    standard="BIDS rules.checks.func.RepetitionTimeFrameAcquisitionDurationMutex",
)
def tr_frame_duration(record: RunRecord) -> Iterator[Hit]:
    if "RepetitionTime" in record.metadata and "FrameAcquisitionDuration" in record.metadata:
        yield Hit("RepetitionTime and FrameAcquisitionDuration are mutually exclusive",
                  "FrameAcquisitionDuration")


@run_rule(
    "tr/deprecated-acquisition-duration",
    title="AcquisitionDuration used where FrameAcquisitionDuration is meant",
    severity=W,
    rationale="With VolumeTiming the acquisition time of each volume is FrameAcquisitionDuration; "
    "AcquisitionDuration is deprecated for that use.",
    fix="Rename AcquisitionDuration to FrameAcquisitionDuration.",
    standard="BIDS rules.checks.func.DeprecatedAcquisitionDuration",
)
def deprecated_acq(record: RunRecord) -> Iterator[Hit]:
    md = record.metadata
    if "VolumeTiming" in md and "FrameAcquisitionDuration" not in md \
            and "AcquisitionDuration" in md:
        yield Hit("AcquisitionDuration beside VolumeTiming is deprecated",
                  "AcquisitionDuration")


@run_rule(
    "tr/units-ms",
    title="RepetitionTime looks like milliseconds",
    severity=E,
    rationale="BIDS times are in seconds; a functional TR above 100 was almost always written "
    "in milliseconds. (The standard warns; slicetime makes it an error because every slice "
    "time and correction would be wrong by a factor of 1000.)",
    fix="Divide RepetitionTime by 1000.",
    standard="BIDS rules.checks.func.RepetitionTimeGreaterThan",
    subsumes=("dataset/outlier-tr", "policy/tr-mismatch", "header/tr-disagrees"),
)
def tr_units(record: RunRecord) -> Iterator[Hit]:
    verdict = record.timing.units.get("RepetitionTime")
    if verdict is not None and verdict.unit == "ms":
        tr = verdict.evidence["value"]
        yield Hit(f"RepetitionTime is {plain(tr)}; {secs(tr / 1000)} is far more likely",
                  "RepetitionTime", {"value": tr, "as_seconds": tr / 1000})


def _plain(evidence: Any) -> dict[str, Any]:
    return {str(k): v for k, v in dict(evidence).items() if k not in ("reason", "kind")}
