"""Rules that compare a run with its source DICOM series (``source/*``). No I/O.

The reader (:mod:`slicetime.readers.source`) puts a
:class:`~slicetime.model_source.SourceEvidence` on the record; these rules
compare it with the sidecar. Times are compared slice by slice after matching
slices by position (:mod:`slicetime.schemes.correspond`), with a tolerance of
the 2.5 ms step in which scanners commonly quantise slice times (common
practice, no source).
"""

from __future__ import annotations

from collections.abc import Iterator

from slicetime.model import TIME_TOLERANCE, RunRecord
from slicetime.model_source import SeriesTiming, SourceEvidence
from slicetime.numbers import plain, secs
from slicetime.rules.registry import Hit
from slicetime.schemes.correspond import Correspondence, Mismatch, correspond
from slicetime.schemes.infer import infer_scheme
from slicetime.words import agree, count


def _declared_axis(record: RunRecord) -> int | None:
    value = record.metadata.get("SliceEncodingDirection")
    if isinstance(value, str) and value[:1] in ("i", "j", "k"):
        return "ijk".index(value[0])
    return None


def matched(record: RunRecord) -> tuple[SourceEvidence, SeriesTiming] | None:
    evidence = record.source
    if evidence is None or evidence.status != "matched" or evidence.series is None:
        return None
    return evidence, evidence.series


def correspondence(record: RunRecord) -> Correspondence | Mismatch | None:
    """How the run's slices map onto the matched series; None without a match or geometry."""
    found = matched(record)
    if found is None:
        return None
    evidence, series = found
    if evidence.affine is None or evidence.shape is None:
        return None
    return correspond(series, evidence.affine, evidence.shape, _declared_axis(record))


def source_times(record: RunRecord) -> tuple[Correspondence, tuple[float, ...]] | None:
    """The source's times in the run's array order (with the correspondence used)."""
    found = matched(record)
    outcome = correspondence(record)
    if found is None or not isinstance(outcome, Correspondence):
        return None
    times = outcome.times(found[1])
    return (outcome, times) if times is not None else None


def _series_facts(series: SeriesTiming) -> dict[str, object]:
    return {"series": series.series, "layout": series.layout,
            "times_from": series.times_source.field if series.times_source else None}


def _ms(values: tuple[float, ...]) -> list[float]:
    return [round(v * 1000.0, 2) for v in values]


# --------------------------------------------------------------------------- matching


def no_match(record: RunRecord) -> Iterator[Hit]:
    evidence = record.source
    if evidence is not None and evidence.status == "no-match":
        yield Hit(f"no source series matched: {evidence.reason}",
                  evidence={"candidates": list(evidence.candidates)})


def ambiguous(record: RunRecord) -> Iterator[Hit]:
    evidence = record.source
    if evidence is not None and evidence.status == "ambiguous":
        yield Hit(f"the source series is ambiguous: {evidence.reason}",
                  evidence={"candidates": list(evidence.candidates)})


def unreadable(record: RunRecord) -> Iterator[Hit]:
    evidence = record.source
    if evidence is not None and evidence.status == "unreadable" and evidence.error is not None:
        error = evidence.error
        yield Hit(error.message, field=error.field, file=error.file,
                  evidence={**error.evidence, "how": evidence.how})


def files_skipped(record: RunRecord) -> Iterator[Hit]:
    evidence = record.source
    if evidence is not None and evidence.status == "matched" and evidence.skipped:
        first = evidence.skipped[0]
        more = f" (and {len(evidence.skipped) - 1} more)" if len(evidence.skipped) > 1 else ""
        yield Hit(f"{count(len(evidence.skipped), 'file')} beside the source series could "
                  f"not be read and were left out: {first}{more}",
                  evidence={"skipped": list(evidence.skipped)})


def geometry_differs(record: RunRecord) -> Iterator[Hit]:
    outcome = correspondence(record)
    found = matched(record)
    if isinstance(outcome, Mismatch) and found is not None:
        yield Hit(f"the geometry differs from the source series {found[1].series} "
                  f"({outcome.reason}); no slice times compared",
                  field="SliceEncodingDirection" if _declared_axis(record) is not None
                  else None, evidence=_series_facts(found[1]))


def mixed_folder(record: RunRecord) -> Iterator[Hit]:
    found = matched(record)
    if found is not None and found[1].neighbours:
        yield Hit(f"the source series {found[1].series} shares its folder with "
                  f"{found[1].neighbours} other series; only its own "
                  "images were read (by SeriesInstanceUID)", evidence=_series_facts(found[1]))


# --------------------------------------------------------------------------- times


def no_times(record: RunRecord) -> Iterator[Hit]:
    found = matched(record)
    if found is not None and found[1].times is None:
        why = "; ".join(found[1].notes) or "no per-slice times"
        yield Hit(f"source holds no slice times: the series {found[1].series} ({why})",
                  evidence=_series_facts(found[1]))


def _where(corr: Correspondence, series: SeriesTiming) -> str:
    direction = "against" if corr.against_normal else "along"
    return (f"run slices along {'ijk'[corr.axis]} matched by position ({direction} the "
            f"series' normal; largest offset {max(corr.offsets, default=0):.2f} mm)")


def times_absent(record: RunRecord) -> Iterator[Hit]:
    if "SliceTiming" in record.metadata:
        return
    found, both = matched(record), source_times(record)
    if found is None or both is None:
        return
    corr, times = both
    yield Hit(f"no SliceTiming, but the source series {found[1].series} records it "
              f"({_where(corr, found[1])})", field="SliceTiming",
              evidence={**_series_facts(found[1]), "source_ms": _ms(times)})


def _compare(record: RunRecord) -> tuple[str, dict[str, object]] | None:
    """('differ'|'reversed', evidence) when the sidecar's times disagree with the source."""
    schedule, sidecar = record.schedule, record.timing.times  # sidecar: seconds
    found, both = matched(record), source_times(record)
    if schedule is None or sidecar is None or record.timing_origin != "sidecar" \
            or found is None or both is None:
        return None
    corr, times = both
    evidence: dict[str, object] = {**_series_facts(found[1]), "source_ms": _ms(times),
                                   "sidecar_ms": _ms(sidecar)}
    if schedule.axis_index != corr.axis or len(sidecar) != len(times):
        evidence["reason"] = (f"the sidecar's times run along {schedule.axis}, the source's "
                              f"slices along {'ijk'[corr.axis]}")
        return "differ", evidence
    diffs = [abs(a - b) for a, b in zip(sidecar, times, strict=True)]
    if max(diffs) <= TIME_TOLERANCE:
        return None
    flipped = [abs(a - b) for a, b in zip(sidecar, reversed(times), strict=True)]
    evidence["largest_difference_ms"] = round(max(diffs) * 1000.0, 3)
    evidence["slices_differing"] = sum(d > TIME_TOLERANCE for d in diffs)
    if max(flipped) <= TIME_TOLERANCE:
        return "reversed", evidence
    return "differ", evidence


def reversed_times(record: RunRecord) -> Iterator[Hit]:
    outcome = _compare(record)
    if outcome is not None and outcome[0] == "reversed":
        yield Hit(f"SliceTiming is the source series {outcome[1]['series']}'s times in "
                  "reverse slice order", field="SliceTiming", evidence=outcome[1])


def times_differ(record: RunRecord) -> Iterator[Hit]:
    outcome = _compare(record)
    if outcome is None or outcome[0] != "differ":
        return
    facts = outcome[1]
    detail = facts.get("reason") or (
        f"{count(_int(facts['slices_differing']), 'slice')} "
        f"{agree(_int(facts['slices_differing']), 'differs')}, by up to "
        f"{plain(facts['largest_difference_ms'])} ms")
    yield Hit(f"SliceTiming disagrees with the source series {facts['series']} ({detail})",
              field="SliceTiming", evidence=facts)


# --------------------------------------------------------------------------- TR, multiband


def tr_differs(record: RunRecord) -> Iterator[Hit]:
    found = matched(record)
    tr = record.timing.repetition_time  # seconds, the sidecar's before the header's
    if found is None or tr is None or found[1].repetition_time is None:
        return
    if abs(tr - found[1].repetition_time) > TIME_TOLERANCE:
        yield Hit(f"the repetition time is {secs(tr)}, the source series {found[1].series} "
                  f"says {secs(found[1].repetition_time)}", field="RepetitionTime",
                  evidence={**_series_facts(found[1]), "run": tr,
                            "source": found[1].repetition_time})


def source_multiband(series: SeriesTiming) -> int | None:
    """The group size of the source's times when every excitation group has it."""
    if series.times is None or len(series.times) < 2:
        return None
    scheme = infer_scheme(series.times)
    sizes = {len(g) for g in scheme.groups}
    return scheme.multiband_factor if len(sizes) == 1 and len(scheme.groups) > 1 else None


def multiband_differs(record: RunRecord) -> Iterator[Hit]:
    found = matched(record)
    declared = record.metadata.get("MultibandAccelerationFactor")
    if found is None or not isinstance(declared, int | float) or isinstance(declared, bool):
        return
    factor = source_multiband(found[1])
    if factor is not None and factor != declared:
        yield Hit(f"MultibandAccelerationFactor is {plain(declared)}, the source series "
                  f"{found[1].series} excites {factor} slices at a time",
                  field="MultibandAccelerationFactor",
                  evidence={**_series_facts(found[1]), "declared": declared, "source": factor})


__all__ = ["correspondence", "matched", "source_multiband", "source_times"]


def _int(value: object) -> int:
    return value if isinstance(value, int) else 0
