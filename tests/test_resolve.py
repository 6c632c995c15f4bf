"""Schedule resolution: precedence of sidecar and header, direction, sources."""

from __future__ import annotations

import nibabel as nib
import numpy as np
import pytest

from slicetime.schemes.generate import Protocol, array_times, slice_timing
from tests.factories import header_info, record


def test_negative_direction_reverses_the_sidecar_list() -> None:
    # BIDS specification, SliceEncodingDirection: with a "-" sign the first entry of
    # SliceTiming corresponds to the slice with the largest index.
    listed = [0.0, 0.5, 1.0, 1.5]
    rec = record({"SliceTiming": listed, "SliceEncodingDirection": "k-",
                  "RepetitionTime": 2.0}, header_info((8, 8, 4, 10)))
    assert rec.schedule is not None
    assert rec.schedule.times == (1.5, 1.0, 0.5, 0.0)
    assert rec.schedule.sidecar_order() == tuple(listed)
    assert rec.scheme is not None and rec.scheme.label == "descending"


@pytest.mark.parametrize("axis,shape", [("i", (5, 8, 9, 10)), ("j", (8, 5, 9, 10))])
def test_slice_axis_length_comes_from_the_named_axis(axis: str, shape: tuple[int, ...]) -> None:
    # BIDS rules.checks.mri.SliceTimingElementsWithDirection: the entry count must equal
    # the image dimension that SliceEncodingDirection names.
    times = [0.0, 0.4, 0.8, 1.2, 1.6]
    rec = record({"SliceTiming": times, "SliceEncodingDirection": axis,
                  "RepetitionTime": 2.0}, header_info(shape))
    assert rec.schedule is not None and rec.schedule.axis == axis
    assert rec.axis_length == 5
    wrong = record({"SliceTiming": times, "RepetitionTime": 2.0}, header_info(shape))
    assert wrong.schedule is None  # k (the default) has 9 slices
    assert [p.code for p in wrong.timing_problems] == ["timing/count-mismatch"]


def test_sidecar_timing_wins_over_the_header_and_sources_say_so() -> None:
    hdr = header_info((8, 8, 4, 10), slice_code=2, slice_duration=0.5)
    rec = record({"SliceTiming": [0.0, 0.5, 1.0, 1.5], "RepetitionTime": 2.0}, hdr)
    assert rec.timing_origin == "sidecar"
    assert rec.schedule is not None
    assert rec.schedule.sources["SliceTiming"].file == "task-x_bold.json"
    assert rec.schedule.sources["SliceEncodingDirection"].kind == "default"


def test_header_tr_used_when_sidecar_has_none() -> None:
    rec = record({"SliceTiming": [0.0, 1.0]}, header_info((8, 8, 2, 10), tr=2.5))
    assert rec.schedule is not None
    assert rec.schedule.repetition_time == 2.5
    assert rec.schedule.sources["RepetitionTime"].kind == "header"


@pytest.mark.parametrize("code", [1, 2, 3, 4, 5, 6])
@pytest.mark.parametrize("n", [7, 10])
def test_header_only_schedule_equals_nibabel(code: int, n: int) -> None:
    hdr = nib.Nifti1Header()
    hdr.set_data_shape((4, 4, n, 3))
    hdr.set_dim_info(slice=2)
    hdr.set_slice_duration(0.1)
    hdr["slice_code"] = code
    expected = hdr.get_slice_times()  # source: nibabel Nifti1Header.get_slice_times
    rec = record({"RepetitionTime": 2.0},
                 header_info((4, 4, n, 3), slice_code=code, slice_duration=0.1))
    assert rec.timing_origin == "header"
    assert rec.schedule is not None
    assert np.allclose(rec.schedule.times, expected)


def test_padded_header_gives_no_schedule_but_a_reason() -> None:
    # nibabel returns None for padding slices (outside slice_start..slice_end)
    rec = record({"RepetitionTime": 2.0},
                 header_info((4, 4, 8, 3), slice_code=1, slice_start=1, slice_end=6,
                             slice_duration=0.1))
    assert rec.schedule is None
    assert [p.code for p in rec.timing_problems] == ["header/padded-slices"]


def test_sparse_window_from_delay_time() -> None:
    # BIDS DelayTime: the acquisition occupies RepetitionTime - DelayTime
    p = Protocol(n_slices=10, repetition_time=3.0, active_time=2.0)
    rec = record({"SliceTiming": slice_timing(p), "RepetitionTime": 3.0, "DelayTime": 1.0},
                 header_info((8, 8, 10, 10), tr=3.0))
    assert rec.schedule is not None
    assert rec.schedule.acquisition_window == pytest.approx(2.0)
    assert rec.schedule.times == pytest.approx(array_times(p))
    assert rec.scheme is not None and rec.scheme.regular


# --------------------------------------------------------------------------- one resolved timing


def test_sidecar_repetition_time_wins_over_the_header_without_slice_timing() -> None:
    # BIDS specification (MRI, task imaging): RepetitionTime is given in the sidecar, in
    # seconds; the sidecar is the metadata of record, so a header pixdim[4] that says
    # otherwise does not win, with or without SliceTiming (from memory)
    rec = record({"RepetitionTime": 2.0}, header_info((8, 8, 4, 10), tr=2000.0))
    assert rec.schedule is None  # no slice times at all
    assert rec.timing.repetition_time == 2.0
    assert rec.timing.repetition_source is not None
    assert rec.timing.repetition_source.kind == "sidecar"


def test_header_time_units_come_from_xyzt_units() -> None:
    # NIfTI-1 (nifti1.h): xyzt_units bits 3-5 give the time unit; NIFTI_UNITS_MSEC is 16.
    # nibabel's header reports the same unit, which the header below was written with.
    hdr = nib.Nifti1Header()
    hdr.set_xyzt_units("mm", "msec")
    assert hdr.get_xyzt_units()[1] == "msec"
    rec = record({"SliceTiming": [0.0, 0.5, 1.0, 1.5]},
                 header_info((8, 8, 4, 10), tr=2.0, time_unit="ms"))
    verdict = rec.timing.units["pixdim[4]"]
    assert verdict.unit == "ms" and verdict.factor == 1e-3  # 1 ms = 1e-3 s (SI)
    assert rec.timing.repetition_time == 2.0  # the header's value, in seconds
    assert rec.timing.repetition_source is not None
    assert rec.timing.repetition_source.kind == "header"


def test_repetition_time_in_milliseconds_makes_every_time_seconds() -> None:
    # BIDS rules.checks.func.RepetitionTimeGreaterThan: a functional TR above 100 was
    # written in milliseconds. Slice times in ms beside it are then judged against the TR
    # in seconds (1 ms = 1e-3 s), and one verdict per field says so.
    listed = [float(t) for t in slice_timing(Protocol(n_slices=4, repetition_time=2.0))]
    ms = [t * 1000.0 for t in listed]
    rec = record({"RepetitionTime": 2000.0, "SliceTiming": ms}, header_info((8, 8, 4, 10)))
    assert rec.timing.unit("RepetitionTime") == "ms"
    assert rec.timing.unit("SliceTiming") == "ms"
    assert rec.timing.repetition_time == pytest.approx(2.0)
    assert rec.timing.times == pytest.approx(tuple(listed))
    assert rec.timing.window == pytest.approx(2.0) and rec.timing.outside == ()


def test_a_negative_slice_time_is_drawn_where_it_is() -> None:
    # BIDS: SliceTiming is the time of each slice relative to the start of the volume
    # acquisition; a negative entry lies before the volume began, so neither drawing
    # may put it at 0 s (the text axis starts at the earliest time, the HTML drawing
    # marks the slice as outside the window)
    from slicetime.interfaces.diagram import order_diagram
    from slicetime.interfaces.plots import diagram_spec

    rec = record({"RepetitionTime": 2.0, "SliceTiming": [-0.5, 0.0, 1.0, 0.5]},
                 header_info((8, 8, 4, 10)))
    assert diagram_spec(rec).early == (0,)
    assert diagram_spec(rec).late == ()
    times = [-0.5, 0.0, 1.0, 0.5]
    lines = order_diagram(times, 2.0, width=50, unicode=False)
    rows = {int(line.split("|")[0]): line.split("|")[1] for line in lines[:4]}
    columns = {s: row.index("#") for s, row in rows.items()}
    # slice 0 (-0.5 s) is the first column, slice 1 (0 s) a quarter of the 2.5 s axis on
    assert columns[0] == 0 and columns[1] == 50 * 0.5 // 2.5
    assert columns[1] < columns[3] < columns[2]
    assert lines[-2][3 + columns[1]] == "+"  # the 0 s tick on the axis rule, under slice 1
    assert lines[-1].split()[0] == "-0.5"


def test_one_boundary_rule_for_the_window() -> None:
    # common practice (no source): a slice acquired exactly one TR after the volume began
    # is the first slice of the next volume, so the window is [0, TR)
    from slicetime.engines.plan import ImplausibleTiming, check_plausible
    from slicetime.interfaces.plots import diagram_spec
    from slicetime.rules import check_run

    rec = record({"RepetitionTime": 2.0, "SliceTiming": [0.0, 0.5, 1.0, 2.0]},
                 header_info((8, 8, 4, 10)))
    assert rec.timing.outside == (3,)
    assert diagram_spec(rec).late == (3,)
    assert rec.schedule is not None
    with pytest.raises(ImplausibleTiming):
        check_plausible(rec.schedule)

    assert "timing/exceeds-tr" in {f.code for f in check_run(rec)}
    inside = record({"RepetitionTime": 2.0, "SliceTiming": [0.0, 0.5, 1.0, 1.999]},
                    header_info((8, 8, 4, 10)))
    assert inside.timing.outside == ()
    assert "timing/exceeds-tr" not in {f.code for f in check_run(inside)}
