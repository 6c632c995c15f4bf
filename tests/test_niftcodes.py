"""Tests for the NIfTI-1 slice_code mapping (slicetime.schemes.niftcodes).

Source for the check values: nibabel, ``nibabel.nifti1.Nifti1Header``'s
``get_slice_times()`` / ``set_slice_times()``, an independent implementation of
the nifti1.h slice codes.
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence

import nibabel as nib
import pytest

from slicetime.schemes import (
    SLICE_CODE_NAMES,
    HeaderTiming,
    Protocol,
    array_times,
    header_slice_times,
    header_timing_for,
    infer_scheme,
)

COUNTS = [*range(1, 13), 31, 40]
DURATION = 0.0625  # exactly representable in float32, the header's storage type


def nib_header(n: int) -> nib.Nifti1Header:
    hdr = nib.Nifti1Header()
    hdr.set_dim_info(slice=2)
    hdr.set_data_shape((2, 2, n))
    return hdr


def nib_slice_times(
    code: int, start: int, end: int, duration: float, n: int
) -> tuple[float | None, ...]:
    hdr = nib_header(n)
    hdr.set_slice_duration(duration)
    hdr["slice_code"] = code
    hdr["slice_start"] = start
    hdr["slice_end"] = end
    return tuple(hdr.get_slice_times())


def paddings(n: int) -> list[tuple[int, int]]:
    """(slice_start, slice_end) pairs: none, slice_end 0 (= last), and padding at either end."""
    out = [(0, n - 1), (0, 0)]
    for start in (1, 2):
        for end in (n - 1, n - 2, n - 3, 0):
            stop = n - 1 if end == 0 else end
            if 0 <= start <= stop < n:
                out.append((start, end))
    for end in (n - 2, n - 3):
        if end >= 0:
            out.append((0, end) if end > 0 else (0, 0))
    return sorted(set(out))


def same_times(a: Sequence[float | None], b: Sequence[float | None]) -> bool:
    if len(a) != len(b):
        return False
    for x, y in zip(a, b, strict=True):
        if (x is None) != (y is None):
            return False
        if x is not None and y is not None and abs(x - y) > 1e-6:
            return False
    return True


def test_code_names_match_nibabel() -> None:
    # source: nibabel's slice_order_codes (the nifti1.h names)
    for code, name in SLICE_CODE_NAMES.items():
        assert nib.nifti1.slice_order_codes.label[code] == name


@pytest.mark.parametrize("code", range(1, 7))
@pytest.mark.parametrize("n", COUNTS)
def test_header_slice_times_match_nibabel(code: int, n: int) -> None:
    for start, end in paddings(n):
        ours = header_slice_times(code, start, end, DURATION, n)
        # source: nibabel Nifti1Header.get_slice_times()
        theirs = nib_slice_times(code, start, end, DURATION, n)
        assert same_times(ours, theirs), (code, n, start, end, ours, theirs)


def nib_matching_codes(
    times: Sequence[float | None], start: int, end: int, duration: float
) -> set[int]:
    """Every code for which nibabel's get_slice_times reproduces ``times``."""
    n = len(times)
    return {
        code
        for code in range(1, 7)
        if same_times(nib_slice_times(code, start, end, duration, n), times)
    }


@pytest.mark.parametrize("code", range(1, 7))
@pytest.mark.parametrize("n", COUNTS)
def test_header_timing_for_matches_nibabel(code: int, n: int) -> None:
    for start, end in paddings(n):
        times = nib_slice_times(code, start, end, DURATION, n)
        n_timed = sum(t is not None for t in times)
        ours = header_timing_for(times)
        if n_timed == 1:
            # nibabel cannot tell the duration of a single timed slice
            assert ours is None
            fallback = header_timing_for(times, fallback_duration=DURATION)
            assert fallback is not None and fallback.slice_code == 1
            continue
        assert ours is not None
        hdr = nib_header(n)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            # source: nibabel Nifti1Header.set_slice_times()
            hdr.set_slice_times(list(times))
        assert ours.slice_start == int(hdr["slice_start"])
        assert ours.slice_end == int(hdr["slice_end"])
        assert ours.slice_duration == pytest.approx(float(hdr["slice_duration"]), rel=1e-6)
        matching = nib_matching_codes(times, start, end, DURATION)
        assert ours.slice_code in matching
        if len(matching) == 1:
            assert ours.slice_code == int(hdr["slice_code"])
        else:
            assert ours.slice_code == min(matching)
        # and back again
        back = header_slice_times(
            ours.slice_code, ours.slice_start, ours.slice_end, ours.slice_duration, n
        )
        assert same_times(back, times)


@pytest.mark.parametrize("n", [3, 4, 5, 6, 7, 8, 9, 10, 11, 12, 31, 40])
def test_generated_protocols_map_to_codes(n: int) -> None:
    # expected codes from the nifti1.h order definitions, cross-checked with nibabel
    cases = {
        1: Protocol(n, repetition_time=2.0),
        2: Protocol(n, ascending=False, repetition_time=2.0),
        3: Protocol(n, "interleaved", start=0, repetition_time=2.0),
        5: Protocol(n, "interleaved", start=1, repetition_time=2.0),
        4: Protocol(n, "interleaved", ascending=False, start=n - 1, repetition_time=2.0),
        6: Protocol(n, "interleaved", ascending=False, start=n - 2, repetition_time=2.0),
    }
    for code, p in cases.items():
        times = array_times(p)
        ht = header_timing_for(times)
        assert ht == HeaderTiming(code, 0, n - 1, pytest.approx(2.0 / n)), (code, ht)
        assert header_slice_times(code, 0, n - 1, 2.0 / n, n) == pytest.approx(times)
        # source: nibabel get_slice_times agrees on the same fields
        assert nib_slice_times(code, 0, n - 1, 2.0 / n, n) == pytest.approx(times, rel=1e-6)


@pytest.mark.parametrize("n", [3, 4, 5, 6, 7, 8, 31, 40])
def test_infer_labels_for_each_code(n: int) -> None:
    expected = {
        1: "ascending",
        2: "descending",
        3: "interleaved ascending from 0",
        4: f"interleaved descending from {n - 1}",
        5: "interleaved ascending from 1",
        6: f"interleaved descending from {n - 2}",
    }
    for code, label in expected.items():
        # source: nibabel get_slice_times gives the times for the code
        nib_times = nib_slice_times(code, 0, n - 1, DURATION, n)
        assert infer_scheme([float(t) for t in nib_times if t is not None]).label == label
        ours = header_slice_times(code, 0, n - 1, DURATION, n)
        assert infer_scheme([float(t) for t in ours if t is not None]).label == label


@pytest.mark.parametrize(
    ("args", "word"),
    [
        ((0, 0, 0, 0.1, 10), "slice_code"),
        ((7, 0, 0, 0.1, 10), "slice_code"),
        ((-1, 0, 0, 0.1, 10), "slice_code"),
        ((1, -1, 0, 0.1, 10), "slice_start"),
        ((1, 5, 3, 0.1, 10), "slice_end"),
        ((1, 0, 10, 0.1, 10), "slice_end"),
        ((1, 11, 0, 0.1, 10), "slice_end"),
        ((1, 0, 9, 0.0, 10), "slice_duration"),
        ((1, 0, 9, -0.1, 10), "slice_duration"),
    ],
)
def test_header_slice_times_errors(args: tuple[int, int, int, float, int], word: str) -> None:
    with pytest.raises(ValueError, match=word):
        header_slice_times(*args)


@pytest.mark.parametrize(
    "times",
    [
        [0.0, 0.0, 0.1, 0.1],  # multiband: two slices share each time
        [0.0, 0.1, 0.25, 0.3],  # uneven
        [0.05, 0.1, 0.15, 0.2],  # first time not 0
        [0.0, None, 0.1, 0.2],  # padding in the middle
        [None, None],  # nothing timed
        [0.0, 0.3, 0.6, 0.1, 0.4, 0.7, 0.2, 0.5],  # step 3: no NIfTI code
        [0.0, 0.0],  # simultaneous
    ],
)
def test_header_timing_for_no_code(times: list[float | None]) -> None:
    assert header_timing_for(times) is None


def test_header_timing_for_lowest_code_when_ambiguous() -> None:
    # two slices 0, d: sequential increasing, alternating increasing and
    # alternating decreasing 2 all fit (source: nibabel reports the same set)
    times = [0.0, DURATION]
    assert nib_matching_codes(times, 0, 1, DURATION) == {1, 3, 6}
    assert header_timing_for(times) == HeaderTiming(1, 0, 1, DURATION)


def test_header_timing_for_tolerance() -> None:
    times = [0.0, 0.0334, 0.0666, 0.1]  # rounded to 0.1 ms
    assert header_timing_for(times) is not None
    assert header_timing_for([0.0, 0.033, 0.067, 0.1]) is None
    assert header_timing_for([0.0, 0.033, 0.067, 0.1], tolerance=0.001) is not None
