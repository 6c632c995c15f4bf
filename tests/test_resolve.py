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
