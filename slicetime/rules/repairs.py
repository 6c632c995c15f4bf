"""Repairs: the new value a fixable finding calls for, and the evidence for it. No I/O.

Each repair is proposed only when the evidence is unambiguous:

* ``timing/units-ms``: every SliceTiming entry divided by 1000, only when the
  list exceeds a trusted TR (sidecar RepetitionTime or VolumeTiming, plausible)
  and fits it once divided;
* ``timing/from-header``: the times the NIfTI header encodes (slice_code,
  slice_duration, dim_info) written as SliceTiming (and SliceEncodingDirection
  when the header's slice axis is not the BIDS default ``k``);
* ``timing/missing``: SliceTiming from the lab policy's expected protocol when
  exactly one order fits its exact scheme label, slice count and TR; else from
  the runs of the same task and acquisition when at least two have timing and
  all of them agree;
* ``header/slice-code-mismatch``: a SliceTiming list that is exactly the
  reverse of what the header encodes along the same axis is reversed (it was
  written for the opposite direction);
* ``scheme/multiband-mismatch`` / ``scheme/multiband-undeclared``:
  MultibandAccelerationFactor set to the group size the times show;
* ``source/times-absent``, ``source/times-differ``, ``source/reversed``:
  SliceTiming rebuilt from the source DICOM series (the scanner's own record,
  the strongest evidence), slice by slice through the position correspondence,
  and SliceEncodingDirection when the matched slice axis is not ``k``;
  ``source/multiband-differs``: MultibandAccelerationFactor from the source's groups.

A repair that takes one side of a doubt about the timing (the header against the
sidecar, the declared factor against the times) is proposed here but never planned
while the doubt stands: ``rules.correction.undecided_doubt`` decides, ``pipelines.fix``
lists the run as not planned (a person must decide which source is right).

Where the value is written is the pipeline's business (``pipelines.fix``);
a repair only says which sidecar supplies the current value.
"""

from __future__ import annotations

import dataclasses
from collections import defaultdict
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from slicetime.model import (
    AXES,
    MIN_REPETITION_TIME,
    TIME_TOLERANCE,
    Finding,
    RunRecord,
    Severity,
    implausible_repetition,
)
from slicetime.numbers import secs
from slicetime.policy.model import ExpectedProtocol
from slicetime.rules.dataset import protocol_key
from slicetime.rules.registry import RULES
from slicetime.rules.source import matched, source_multiband, source_times
from slicetime.schemes.generate import Protocol, array_times, validate_protocol
from slicetime.schemes.infer import infer_scheme
from slicetime.schemes.niftcodes import SLICE_CODE_NAMES, header_slice_times

#: the codes ``slicetime fix`` can repair: declared on each rule (``fixable=True``);
#: importing this module imported :mod:`slicetime.rules`, so every rule is registered
FIXABLE = frozenset(code for code, rule in RULES.items() if rule.fixable)
#: codes repaired from the source series; they win over every other SliceTiming repair
SOURCE_TIMING_CODES = ("source/times-absent", "source/times-differ", "source/reversed")
DECIMALS = 6  # microseconds: finer than any scanner clock


@dataclass(frozen=True)
class Repair:
    """One field of one run set to a new value, with why."""

    run: str  # the run, relative to its root
    root: str
    code: str  # the finding this repairs
    field: str
    value: Any
    current: Any  # None when the field is absent
    resolved_from: str | None  # sidecar (relative to root) supplying the current value
    source: str  # where the new value comes from, for people
    evidence: Mapping[str, Any] = dataclasses.field(default_factory=dict)
    #: the field whose source file this repair belongs to (itself, unless the field is
    #: absent and belongs beside another one, as a multiband factor beside the times)
    anchor: str | None = None

    @property
    def anchor_field(self) -> str:
        return self.anchor or self.field


def _rounded(times: Sequence[float]) -> list[float]:
    return [round(float(t), DECIMALS) + 0.0 for t in times]


def _repair(record: RunRecord, code: str, key: str, value: Any, source: str,
            evidence: Mapping[str, Any]) -> Repair:
    return Repair(
        run=record.path,
        root=record.root,
        code=code,
        field=key,
        value=value,
        current=record.metadata.get(key),
        resolved_from=record.metadata_sources.get(key),
        source=source,
        evidence=evidence,
    )


def _trusted_window(record: RunRecord) -> tuple[float, float] | None:
    """The TR and the window the times must fit, when it comes from evidence that is itself trusted.

    Only a RepetitionTime (or VolumeTiming) written in a sidecar in seconds, a plausible
    TR (``model.implausible_repetition``, the one judgement of the bounds), qualifies:
    a TR from the header (whose units may be wrong), one written in milliseconds or an
    implausible one settles nothing. A
    shorter FrameAcquisitionDuration or DelayTime window narrows it only when it is
    itself plausible (inside the TR and not below the lower bound); otherwise it is
    ignored. Every value is the resolved timing's (seconds, one unit verdict each).
    """
    timing = record.timing
    schedule = timing.schedule
    if schedule is None:
        return None
    tr: float | None = None
    source = timing.repetition_source
    if timing.repetition_time is not None and source is not None and source.kind == "sidecar" \
            and timing.unit("RepetitionTime") == "s":
        tr = timing.repetition_time
    elif schedule.volume_times is not None and len(schedule.volume_times) > 1 \
            and timing.unit("VolumeTiming") == "s":
        vt = schedule.volume_times
        tr = min(vt[i + 1] - vt[i] for i in range(len(vt) - 1))
    if tr is None or implausible_repetition(tr) is not None:
        return None
    acq = timing.window
    if acq is not None and MIN_REPETITION_TIME <= acq <= tr:
        return tr, acq
    return tr, tr


def window_distrust(record: RunRecord) -> str | None:
    """Why a millisecond verdict cannot be repaired here, when the reason is the window
    it was judged against (:func:`_trusted_window`); None when that window is trusted
    or the reason is another."""
    if _trusted_window(record) is not None:
        return None
    if record.timing.repetition_origin == "header":
        return ("the only TR is the header's pixdim[4], whose unit may be wrong: add "
                "RepetitionTime to the sidecar, then fix again")
    return None


def _units_ms(record: RunRecord) -> list[Repair]:
    """Every SliceTiming entry ÷ 1000, when the resolved verdict says milliseconds and
    the window it was judged against is trusted."""
    if record.timing.unit("SliceTiming") != "ms":
        return []
    times = record.metadata.get("SliceTiming")
    trusted = _trusted_window(record)
    if trusted is None or not isinstance(times, list):
        return []
    tr, window = trusted
    # the list must be impossible in seconds (beyond the trusted TR) and fit once divided
    if max(times) < tr or max(times) / 1000.0 >= window:
        return []
    value = _rounded([t / 1000.0 for t in times])
    return [_repair(record, "timing/units-ms", "SliceTiming", value,
                    "the same list divided by 1000 (milliseconds to seconds)",
                    {"max_before": max(times), "max_after": max(value), "window": window})]


def _from_header(record: RunRecord) -> list[Repair]:
    schedule, header = record.schedule, record.header
    if schedule is None or header is None or record.timing_origin != "header":
        return []
    name = SLICE_CODE_NAMES.get(header.slice_code, str(header.slice_code))
    source = (f"the NIfTI header: slice_code {header.slice_code} ({name}), slice_duration "
              f"{secs(header.slice_duration)}, slice axis {schedule.axis}")
    evidence = {"slice_code": header.slice_code, "slice_duration": header.slice_duration,
                "slice_axis": schedule.axis}
    repairs = [_repair(record, "timing/from-header", "SliceTiming",
                       _rounded(schedule.sidecar_order()), source, evidence)]
    if schedule.axis != "k" and "SliceEncodingDirection" not in record.metadata:
        repairs.append(_repair(record, "timing/from-header", "SliceEncodingDirection",
                               schedule.axis, source, evidence))
    return repairs


def _policy_times(protocol: ExpectedProtocol, record: RunRecord) -> list[float] | None:
    """The one SliceTiming list that the protocol's exact label, count and TR allow."""
    if protocol.scheme is None or protocol.slices is None or protocol.repetition_time is None:
        return None
    n, tr = protocol.slices, protocol.repetition_time
    if record.axis_length is not None and record.axis_length != n:
        return None
    delay = record.metadata.get("DelayTime")
    window = tr - float(delay) if isinstance(delay, int | float) and 0 < delay < tr else None
    multiband = protocol.multiband_factor or 1
    found: set[tuple[float, ...]] = set()
    candidates: list[Protocol] = [
        Protocol(n_slices=n, order="sequential", ascending=asc, multiband=multiband,
                 repetition_time=tr, active_time=window)
        for asc in (True, False)
    ]
    groups = n // multiband if multiband else n
    for step in range(2, min(6, max(2, groups - 1)) + 1):
        for asc in (True, False):
            starts = range(step) if asc else range(groups - step, groups)
            candidates.extend(
                Protocol(n_slices=n, order="interleaved", ascending=asc, step=step, start=s,
                         multiband=multiband, repetition_time=tr, active_time=window)
                for s in starts
            )
    for candidate in candidates:
        try:
            validate_protocol(candidate)
        except ValueError:
            continue
        times = array_times(candidate)
        if infer_scheme(times).label == protocol.scheme:
            found.add(tuple(_rounded(times)))
    if len(found) != 1:
        return None
    chosen = list(next(iter(found)))
    direction = record.metadata.get("SliceEncodingDirection")
    return chosen[::-1] if isinstance(direction, str) and direction.endswith("-") else chosen


def _missing_from_policy(record: RunRecord, protocol: ExpectedProtocol | None) -> list[Repair]:
    if protocol is None:
        return []
    times = _policy_times(protocol, record)
    if times is None:
        return []
    where = protocol.name or f"protocols[{protocol.index}]"
    return [_repair(record, "timing/missing", "SliceTiming", times,
                    f"the lab policy's protocol {where} ('{protocol.scheme}', "
                    f"{protocol.slices} slices, TR {secs(protocol.repetition_time)})",
                    {"protocol": where, "scheme": protocol.scheme})]


def _multiband(record: RunRecord, code: str) -> list[Repair]:
    scheme = record.scheme
    if scheme is None or not scheme.regular or len(scheme.groups) < 2:
        return []
    if len({len(g) for g in scheme.groups}) != 1:
        return []
    repair = _repair(record, code, "MultibandAccelerationFactor", scheme.multiband_factor,
                     f"the slice times: {len(scheme.groups)} excitation groups of "
                     f"{scheme.multiband_factor} slices ('{scheme.label}')",
                     {"groups": len(scheme.groups), "group_size": scheme.multiband_factor})
    if repair.resolved_from is None:
        # an undeclared factor belongs beside the times that show it
        repair = dataclasses.replace(
            repair, resolved_from=record.metadata_sources.get("SliceTiming"),
            anchor="SliceTiming",
        )
    return [repair]


def _reversed_list(record: RunRecord) -> list[Repair]:
    header, schedule = record.header, record.schedule
    times = record.metadata.get("SliceTiming")
    if header is None or schedule is None or not isinstance(times, list):
        return []
    if header.slice_dim is None or AXES.index(schedule.axis) != header.slice_dim:
        return []
    if not header.slice_duration or header.slice_code <= 0:
        return []
    try:
        encoded = header_slice_times(header.slice_code, header.slice_start, header.slice_end,
                                     header.slice_duration, schedule.n_slices)
    except ValueError:
        return []
    known = [t for t in encoded if t is not None]
    if len(known) != len(encoded):
        return []
    flipped = list(reversed(schedule.times))
    if any(abs(float(a) - b) > TIME_TOLERANCE for a, b in zip(known, flipped, strict=True)):
        return []
    name = SLICE_CODE_NAMES.get(header.slice_code, str(header.slice_code))
    return [_repair(record, "header/slice-code-mismatch", "SliceTiming", list(reversed(times)),
                    f"the NIfTI header: slice_code {header.slice_code} ({name}) describes "
                    "exactly this list in reverse, along the same slice axis",
                    {"slice_code": header.slice_code, "direction": schedule.direction})]


def _from_source(record: RunRecord, code: str) -> list[Repair]:
    found, both = matched(record), source_times(record)
    if found is None or both is None:
        return []
    series = found[1]
    corr, times = both
    axis = "ijk"[corr.axis]
    declared = record.metadata.get("SliceEncodingDirection")
    negative = isinstance(declared, str) and declared == f"{axis}-"
    value = _rounded(times[::-1] if negative else times)
    pairs = corr.pairs(series)
    shown = ", ".join(f"{k}↔{label}" for k, label in pairs[:4]) + (", …" if len(pairs) > 4
                                                                    else "")
    what = series.times_source.field if series.times_source else "slice times"
    source = (f"the source DICOM series {series.series} ({what}); run slices along {axis} "
              f"matched by position along its slice normal: {shown}")
    evidence = {"series": series.series, "files_read": list(series.files_read),
                "times_from": what, "slice_axis": axis,
                "correspondence": [[k, label] for k, label in pairs],
                "largest_offset_mm": round(max(corr.offsets, default=0.0), 3)}
    repairs = [_repair(record, code, "SliceTiming", value, source, evidence)]
    if axis != "k" and not (isinstance(declared, str) and declared[:1] == axis):
        repairs.append(_repair(record, code, "SliceEncodingDirection", axis, source, evidence))
    return repairs


def _multiband_from_source(record: RunRecord,
                           code: str = "source/multiband-differs") -> list[Repair]:
    """MultibandAccelerationFactor from the source's groups when the sidecar states
    another, or states none for a multiband source: with SliceTiming rebuilt from the
    source (``code`` one of :data:`SOURCE_TIMING_CODES`), the factor comes in the same
    pass, so one ``fix --apply`` leaves nothing for a second one."""
    found = matched(record)
    factor = source_multiband(found[1]) if found is not None else None
    if found is None or factor is None:
        return []
    declared = record.metadata.get("MultibandAccelerationFactor")
    if declared == factor or (declared is None and factor == 1):
        return []
    repair = _repair(record, code, "MultibandAccelerationFactor", factor,
                     f"the source DICOM series {found[1].series}: {factor} slices share each "
                     "time", {"series": found[1].series, "group_size": factor})
    if repair.resolved_from is None:  # beside the times it comes with
        repair = dataclasses.replace(
            repair, resolved_from=record.metadata_sources.get("SliceTiming"),
            anchor="SliceTiming")
    return [repair]


def plan_run(
    record: RunRecord, findings: Sequence[Finding], protocol: ExpectedProtocol | None = None
) -> list[Repair]:
    """Repairs for one run's fixable findings (consensus repairs excluded).

    SliceTiming from the source series, when there is one, replaces every other
    SliceTiming repair of the run."""
    codes = {f.code for f in findings}
    for code in SOURCE_TIMING_CODES:
        if code in codes:
            found = _from_source(record, code)
            if found:
                return found + _multiband_from_source(
                    record, "source/multiband-differs"
                    if "source/multiband-differs" in codes else code)
    repairs: list[Repair] = []
    if "source/multiband-differs" in codes:
        repairs += _multiband_from_source(record)
    if "timing/units-ms" in codes:
        repairs += _units_ms(record)
    if "timing/from-header" in codes:
        repairs += _from_header(record)
    if "timing/missing" in codes:
        repairs += _missing_from_policy(record, protocol)
    if "header/slice-code-mismatch" in codes:
        repairs += _reversed_list(record)
    for code in ("scheme/multiband-mismatch", "scheme/multiband-undeclared"):
        if code in codes:
            repairs += _multiband(record, code)
    return repairs


def _trusted_timing(record: RunRecord, findings: Sequence[Finding]) -> bool:
    return (
        record.schedule is not None
        and record.timing_origin == "sidecar"
        and not any(f.severity is Severity.ERROR for f in findings)
    )


def plan_consensus(
    runs: Sequence[tuple[RunRecord, Sequence[Finding]]], already: Sequence[Repair] = ()
) -> list[Repair]:
    """SliceTiming for runs without timing, from agreeing runs of the same protocol."""
    covered = {(r.root, r.run) for r in already if r.field == "SliceTiming"}
    groups: dict[tuple[str, ...], list[tuple[RunRecord, Sequence[Finding]]]] = defaultdict(list)
    for record, findings in runs:
        groups[protocol_key(record)].append((record, findings))
    repairs: list[Repair] = []
    for members in groups.values():
        timed = [r for r, _ in members if r.schedule is not None]
        donors = [r for r, f in members if _trusted_timing(r, f)]
        if len(donors) < 2 or len(donors) != len(timed):
            continue  # too few, or some run with timing is not trustworthy
        first = donors[0].schedule
        assert first is not None
        reference = first.sidecar_order()
        agree = all(
            d.schedule is not None
            and d.schedule.axis == first.axis
            and d.schedule.direction == first.direction
            and len(d.schedule.times) == len(reference)
            and all(abs(a - b) <= TIME_TOLERANCE
                    for a, b in zip(d.schedule.sidecar_order(), reference, strict=True))
            for d in donors
        )
        if not agree:
            continue
        for record, findings in members:
            if "timing/missing" not in {f.code for f in findings}:
                continue
            if (record.root, record.path) in covered:
                continue
            if record.axis_length is not None and record.axis_length != len(reference):
                continue
            source = (f"the {len(donors)} other runs of the same task and acquisition, which "
                      "all agree")
            evidence = {"runs": [d.path for d in donors][:20], "slice_axis": first.axis}
            listed = donors[0].metadata.get("SliceTiming")
            value = list(listed) if isinstance(listed, list) else _rounded(reference)
            repairs.append(_repair(record, "timing/missing", "SliceTiming", value, source,
                                   evidence))
            direction = donors[0].metadata.get("SliceEncodingDirection")
            if direction is not None and "SliceEncodingDirection" not in record.metadata:
                repairs.append(_repair(record, "timing/missing", "SliceEncodingDirection",
                                       direction, source, evidence))
    return repairs


__all__ = ["DECIMALS", "FIXABLE", "Repair", "plan_consensus", "plan_run", "window_distrust"]
