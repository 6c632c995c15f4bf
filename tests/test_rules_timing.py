"""Single-run rules on the defects that happen in practice."""

from __future__ import annotations

from slicetime.model import Severity
from slicetime.rules import check_run
from slicetime.schemes.generate import Protocol, slice_timing
from tests.factories import header_info, record

H = header_info((8, 8, 12, 20), tr=2.0)


def codes(metadata: dict, header=H) -> dict[str, Severity]:
    return {f.code: f.severity for f in check_run(record(metadata, header))}


def test_milliseconds_are_named_as_such_with_the_fix() -> None:
    # common practice (no source): converters sometimes write SliceTiming in ms
    seconds = slice_timing(Protocol(n_slices=12, order="interleaved", repetition_time=2.0))
    found = check_run(record({"RepetitionTime": 2.0,
                              "SliceTiming": [t * 1000 for t in seconds]}, H))
    ms = [f for f in found if f.code == "timing/units-ms"]
    assert len(ms) == 1 and ms[0].severity is Severity.ERROR
    assert "1000" in (ms[0].hint or "")
    assert ms[0].evidence["as_seconds_max"] < 2.0
    assert "timing/exceeds-tr" not in {f.code for f in found}  # one problem, one finding


def test_milliseconds_judged_against_the_headers_tr_name_it_so() -> None:
    # BIDS: RepetitionTime is a sidecar field; without it the TR is the NIfTI header's
    # pixdim[4] (NIfTI-1 standard), which the finding must not call RepetitionTime
    seconds = slice_timing(Protocol(n_slices=12, order="interleaved", repetition_time=2.0))
    found = check_run(record({"SliceTiming": [t * 1000 for t in seconds]}, H))
    ms = [f for f in found if f.code == "timing/units-ms"]
    assert len(ms) == 1
    assert "RepetitionTime" not in ms[0].message
    assert "the TR in the header's pixdim[4] (2 s)" in ms[0].message
    assert ms[0].evidence["window_from"] == "the TR in the header's pixdim[4]"
    # the decision reads the typed kind: the header's TR bounds the window like a TR
    from slicetime.model import WindowKind

    rec = record({"SliceTiming": [t * 1000 for t in seconds]}, H)
    assert rec.timing.window_kind is WindowKind.REPETITION
    assert rec.timing.repetition_origin == "header"
    # with a sidecar RepetitionTime the BIDS name stays
    side = record({"RepetitionTime": 2.0, "SliceTiming": [t * 1000 for t in seconds]}, H)
    assert side.timing.window_name == "RepetitionTime"


def test_a_tr_no_unit_makes_plausible_is_not_divided_in_the_message() -> None:
    # BIDS: RepetitionTime in seconds; a TR lies between 0.05 and 100 s (the model's
    # bounds, common practice (no source)): 1e12 read as milliseconds is 1e9 s, no TR
    found = [f for f in check_run(record({"RepetitionTime": 1e12, "SliceTiming": [0, 1, 0.5]},
                                         header_info((8, 8, 3, 20), tr=2.0)))
             if f.code == "tr/units-ms"]
    assert len(found) == 1
    assert "far more likely" not in found[0].message
    assert "no plausible TR" in found[0].message
    assert "1000" not in (found[0].hint or "")  # no "divide by 1000"
    # 2000 is the ordinary case: 2 s, and the hint divides
    ordinary = [f for f in check_run(record({"RepetitionTime": 2000, "SliceTiming": [0, 1, 0.5]},
                                            header_info((8, 8, 3, 20), tr=2.0)))
                if f.code == "tr/units-ms"]
    assert "2 s is far more likely" in ordinary[0].message and "1000" in (ordinary[0].hint or "")


def test_negative_times() -> None:
    assert codes({"RepetitionTime": 2.0,
                  "SliceTiming": [-0.1] + [i * 0.15 for i in range(1, 12)]}).get(
        "timing/negative") is Severity.ERROR


def test_bad_entries_and_not_a_list() -> None:
    st = [i * 0.15 for i in range(12)]
    st[3] = None
    assert "timing/bad-entry" in codes({"RepetitionTime": 2.0, "SliceTiming": st})
    assert "timing/not-a-list" in codes({"RepetitionTime": 2.0, "SliceTiming": "0,0.1"})
    assert "timing/bad-entry" in codes({"RepetitionTime": 2.0,
                                        "SliceTiming": [float("nan")] * 12})


def test_all_equal_without_multiband() -> None:
    assert codes({"RepetitionTime": 2.0, "SliceTiming": [0.5] * 12}).get(
        "timing/all-equal") is Severity.WARNING


def test_duplicates_without_multiband_structure() -> None:
    st = [i * 0.15 for i in range(12)]
    st[5] = st[4]  # a copy error: one time appears twice on neighbouring slices
    assert "timing/duplicates" in codes({"RepetitionTime": 2.0, "SliceTiming": st})


def test_uneven_spacing() -> None:
    st = [i * 0.1 for i in range(12)]
    st[6:] = [t + 0.05 for t in st[6:]]  # one gap of 150 ms among gaps of 100 ms
    assert codes({"RepetitionTime": 2.0, "SliceTiming": st}).get(
        "timing/uneven") is Severity.WARNING


def test_multiband_factor_against_the_times() -> None:
    # common practice (no source): with factor m and N slices, SliceTiming holds N/m
    # distinct values, each repeated m times on slices N/m apart.
    st = slice_timing(Protocol(n_slices=12, multiband=3, order="interleaved",
                               repetition_time=2.0))
    assert len(set(st)) == 4
    assert "scheme/multiband-mismatch" not in codes(
        {"RepetitionTime": 2.0, "SliceTiming": st, "MultibandAccelerationFactor": 3})
    assert codes({"RepetitionTime": 2.0, "SliceTiming": st,
                  "MultibandAccelerationFactor": 2}).get(
        "scheme/multiband-mismatch") is Severity.ERROR
    assert "scheme/multiband-undeclared" in codes({"RepetitionTime": 2.0, "SliceTiming": st})


def test_sparse_run_times_beyond_the_acquisition_window() -> None:
    # BIDS DelayTime: slices are acquired within RepetitionTime - DelayTime
    st = slice_timing(Protocol(n_slices=12, repetition_time=3.0))  # spread over all 3 s
    found = codes({"RepetitionTime": 3.0, "DelayTime": 1.0, "SliceTiming": st},
                  header_info((8, 8, 12, 20), tr=3.0))
    assert found.get("timing/exceeds-acquisition") is Severity.ERROR
    ok = slice_timing(Protocol(n_slices=12, repetition_time=3.0, active_time=2.0))
    assert "timing/exceeds-acquisition" not in codes(
        {"RepetitionTime": 3.0, "DelayTime": 1.0, "SliceTiming": ok},
        header_info((8, 8, 12, 20), tr=3.0))


def test_a_delay_time_not_shorter_than_the_tr_is_named_not_a_negative_window() -> None:
    # BIDS DelayTime: the silent part of each TR, so it is shorter than RepetitionTime;
    # 5 s in a 2 s TR leaves no acquisition window (not one of -3 s)
    found = [f for f in check_run(record({"RepetitionTime": 2.0, "DelayTime": 5.0,
                                          "SliceTiming": [0, 1.0, 0.5]},
                                         header_info((8, 8, 3, 20), tr=2.0)))
             if f.code == "timing/exceeds-acquisition"]
    assert len(found) == 1 and found[0].field == "DelayTime"
    assert "-3" not in found[0].message and "not shorter than RepetitionTime" in found[0].message
    # a negative DelayTime is no delay (BIDS: a time "to delay the acquisition")
    from slicetime.readers.sidecar import check_types

    wrong = check_types({"DelayTime": -1.0}, "sub-01_task-x_bold.json")
    assert [(f.code, f.field) for f in wrong] == [("sidecar/wrong-type", "DelayTime")]
    assert check_types({"DelayTime": 0}, "x.json") == []  # BIDS: absent means zero


def test_header_tr_in_ms_labelled_seconds_gets_a_unit_hint() -> None:
    # BIDS RepetitionTimeMismatch: pixdim[4] after xyzt_units must equal RepetitionTime
    st = [i * 0.15 for i in range(12)]
    hdr = header_info((8, 8, 12, 20), tr=2000.0)
    found = [f for f in check_run(record({"RepetitionTime": 2.0, "SliceTiming": st}, hdr))
             if f.code == "header/tr-disagrees"]
    assert found and "milliseconds" in (found[0].hint or "")
    # a header in ms units that says so is consistent
    ms_header = header_info((8, 8, 12, 20), tr=2.0, time_unit="ms")
    assert "header/tr-disagrees" not in codes({"RepetitionTime": 2.0, "SliceTiming": st},
                                             ms_header)


def test_dim_info_disagreeing_with_the_slice_axis() -> None:
    st = [i * 0.15 for i in range(12)]
    hdr = header_info((8, 12, 12, 20), slice_dim=1)
    assert "axis/dim-info-mismatch" in codes({"RepetitionTime": 2.0, "SliceTiming": st}, hdr)
    assert "axis/dim-info-mismatch" not in codes(
        {"RepetitionTime": 2.0, "SliceTiming": st, "SliceEncodingDirection": "j"}, hdr)


def test_header_slice_code_describing_another_order() -> None:
    # nifti1.h: slice_code 2 is sequential decreasing; the sidecar says ascending
    st = [i * 0.15 for i in range(12)]
    hdr = header_info((8, 8, 12, 20), slice_code=2, slice_duration=0.15)
    assert "header/slice-code-mismatch" in codes({"RepetitionTime": 2.0, "SliceTiming": st},
                                                 hdr)
    hdr1 = header_info((8, 8, 12, 20), slice_code=1, slice_duration=0.15)
    assert "header/slice-code-mismatch" not in codes(
        {"RepetitionTime": 2.0, "SliceTiming": st}, hdr1)


def test_missing_timing_and_tr() -> None:
    found = codes({}, header_info((8, 8, 12, 20), tr=2.0))
    assert found.get("timing/missing") is Severity.WARNING
    assert found.get("tr/missing") is Severity.ERROR


def test_three_dimensional_bold() -> None:
    assert "file/series-shape" in codes({"RepetitionTime": 2.0},
                                        header_info((8, 8, 12), tr=None))


def test_milliseconds_fix_will_not_repair_do_not_promise_the_repair() -> None:
    # BIDS: RepetitionTime is a sidecar field; the NIfTI-1 header's pixdim[4] is in the
    # unit xyzt_units names, which may be wrong, so fix does not divide against it
    # (rules.repairs.window_distrust): the audit's hint must not say fix does it
    from slicetime.rules.repairs import window_distrust

    seconds = slice_timing(Protocol(n_slices=12, order="interleaved", repetition_time=2.0))
    header_only = record({"SliceTiming": [t * 1000 for t in seconds]}, H)
    ms = [f for f in check_run(header_only) if f.code == "timing/units-ms"]
    reason = window_distrust(header_only)
    assert reason is not None and len(ms) == 1
    assert "fix does this" not in (ms[0].hint or "")
    assert reason in (ms[0].hint or "") and "will not" in (ms[0].hint or "")
    # with the sidecar's RepetitionTime the repair is planned: the catalogue's hint stays
    side = record({"RepetitionTime": 2.0, "SliceTiming": [t * 1000 for t in seconds]}, H)
    assert window_distrust(side) is None
    hint = next(f.hint for f in check_run(side) if f.code == "timing/units-ms")
    assert "slicetime fix does this" in (hint or "")
