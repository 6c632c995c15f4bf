"""Tests for protocol generation (slicetime.schemes.generate) and its round trip.

Facts of the trade (common practice, no source) used as check values:
- N slices spread evenly over a TR are TR/N apart; 40 slices in a 2 s TR are
  50 ms apart.
- With odd-then-even interleaving, array-neighbouring slices are about TR/2
  apart, because the second half of the slices starts half a TR later.
- Some scanners start an interleaved series at the second slice when the slice
  count is even.
- Under multiband with factor m, each excitation group holds m slices spaced
  N/m apart, and SliceTiming holds N/m distinct values, each repeated m times.
- BIDS: with a negative SliceEncodingDirection, SliceTiming runs from the
  highest slice index down to slice 0 (BIDS specification).
"""

from __future__ import annotations

from collections import Counter
from dataclasses import replace
from typing import Any

import numpy as np
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st

from slicetime.schemes import (
    Protocol,
    array_groups,
    array_times,
    infer_scheme,
    slice_timing,
    validate_protocol,
)

# --------------------------------------------------------------------------- facts of the trade


def test_sequential_40_in_2s_are_50ms_apart() -> None:
    # common practice (no source): slices TR/N apart
    t = array_times(Protocol(40, repetition_time=2.0))
    assert np.diff(t) == pytest.approx([0.05] * 39)
    assert infer_scheme(t).spacing == pytest.approx(0.05)


def test_odd_then_even_neighbours_are_half_a_tr_apart() -> None:
    # common practice (no source): about TR/2 between array neighbours
    t = array_times(Protocol(40, "interleaved", start=0, repetition_time=2.0))
    gaps = np.abs(np.diff(t))
    assert np.all(np.abs(gaps - 1.0) <= 0.05 + 1e-9)
    assert infer_scheme(t).spacing == pytest.approx(0.05)
    # odd-then-even: slices 0, 2, 4, ... first (common practice, no source)
    assert t[0] == 0.0 and t[2] == pytest.approx(0.05) and t[1] == pytest.approx(1.0)


def test_multiband_groups_and_repeated_values() -> None:
    p = Protocol(48, "interleaved", start=0, multiband=4, repetition_time=0.8)
    t = slice_timing(p)
    counts = Counter(t)
    # N/m distinct values, each repeated m times (common practice, no source)
    assert len(counts) == 12 and set(counts.values()) == {4}
    # each group holds m slices spaced N/m apart (common practice, no source)
    for group in array_groups(p):
        assert np.all(np.diff(group) == 12)


def test_negative_direction_reverses_the_list() -> None:
    # BIDS specification: with direction "-", SliceTiming[0] is the highest array index
    p = Protocol(10, repetition_time=1.0, direction="-")
    st_list = slice_timing(p)
    arr = array_times(p)
    assert st_list == list(arr[::-1])
    # ascending along the encoding direction: SliceTiming[0] (array slice 9) first
    assert st_list[0] == 0.0 and arr[9] == 0.0
    assert infer_scheme(arr).label == "descending"


def test_sparse_active_time() -> None:
    p = Protocol(20, repetition_time=3.0, active_time=1.0)
    t = array_times(p)
    assert max(t) == pytest.approx(0.95)
    s = infer_scheme(t)
    assert s.regular and s.spacing == pytest.approx(0.05)


def test_active_time_alone() -> None:
    assert array_times(Protocol(4, active_time=1.0)) == pytest.approx((0, 0.25, 0.5, 0.75))


def test_decimals_round_output() -> None:
    t = array_times(Protocol(3, repetition_time=1.0, decimals=4))
    assert t == (0.0, 0.3333, 0.6667)


# --------------------------------------------------------------------------- start


@pytest.mark.parametrize(
    ("n", "ascending", "first"),
    [
        # start "auto": from the second slice when the count is even (common practice)
        (40, True, 1),
        (39, True, 0),
        (40, False, 38),
        (39, False, 38),
    ],
)
def test_auto_start(n: int, ascending: bool, first: int) -> None:
    p = Protocol(n, "interleaved", ascending=ascending, start="auto", repetition_time=2.0)
    t = array_times(p)
    assert t.index(0.0) == first


def test_auto_start_under_multiband_counts_groups() -> None:
    # 60 slices, factor 4: 15 groups (odd) -> from 0; factor 3: 20 groups (even) -> from 1
    assert (
        infer_scheme(
            array_times(Protocol(60, "interleaved", start="auto", multiband=4, repetition_time=1.0))
        ).start
        == 0
    )
    assert (
        infer_scheme(
            array_times(Protocol(60, "interleaved", start="auto", multiband=3, repetition_time=1.0))
        ).start
        == 1
    )


def test_default_start() -> None:
    assert infer_scheme(array_times(Protocol(9, "interleaved", repetition_time=1.0))).label == (
        "interleaved ascending from 0"
    )
    p = Protocol(9, "interleaved", ascending=False, repetition_time=1.0)
    assert infer_scheme(array_times(p)).label == "interleaved descending from 8"


def test_step_three_from_each_start() -> None:
    for start in range(3):
        p = Protocol(10, "interleaved", step=3, start=start, repetition_time=1.0)
        assert infer_scheme(array_times(p)).label == f"interleaved step 3 ascending from {start}"
    for start in (7, 8, 9):
        p = Protocol(10, "interleaved", ascending=False, step=3, start=start, repetition_time=1.0)
        label = infer_scheme(array_times(p)).label
        assert label == f"interleaved step 3 descending from {start}"


# --------------------------------------------------------------------------- validation


@pytest.mark.parametrize(
    ("changes", "word"),
    [
        ({"n_slices": 0}, "n_slices"),
        ({"multiband": 3}, "multiband"),
        ({"multiband": 0}, "multiband"),
        ({"order": "spiral"}, "order"),
        ({"order": "interleaved", "step": 1}, "step"),
        ({"order": "interleaved", "step": 10}, "step"),
        ({"order": "interleaved", "n_slices": 2}, "step"),
        ({"order": "interleaved", "start": 2}, "start"),
        ({"order": "interleaved", "ascending": False, "start": 0}, "start"),
        ({"start": 3}, "start"),
        ({"repetition_time": None}, "repetition_time"),
        ({"repetition_time": -1.0}, "repetition_time"),
        ({"active_time": 3.0}, "active_time"),
        ({"active_time": 0.0}, "active_time"),
        ({"direction": "x"}, "direction"),
        ({"decimals": -1}, "decimals"),
    ],
)
def test_validation_names_the_parameter(changes: dict[str, Any], word: str) -> None:
    p = replace(Protocol(10, repetition_time=2.0), **changes)
    with pytest.raises(ValueError, match=word) as info:
        validate_protocol(p)
    assert "\n" not in str(info.value)
    with pytest.raises(ValueError):
        array_times(p)


# --------------------------------------------------------------------------- canonical labels


@pytest.mark.parametrize("m", [1, 2, 3, 4, 5, 6, 7, 8])
def test_canonical_labels(m: int) -> None:
    prefix = "" if m == 1 else f"multiband ×{m}, "
    for nb in (7, 8):
        n = nb * m
        cases = {
            Protocol(n, multiband=m, repetition_time=1.0): "ascending",
            Protocol(n, ascending=False, multiband=m, repetition_time=1.0): "descending",
            Protocol(n, "interleaved", start=0, multiband=m, repetition_time=1.0): (
                "interleaved ascending from 0"
            ),
            Protocol(n, "interleaved", start=1, multiband=m, repetition_time=1.0): (
                "interleaved ascending from 1"
            ),
            Protocol(n, "interleaved", ascending=False, multiband=m, repetition_time=1.0): (
                f"interleaved descending from {nb - 1}"
            ),
            Protocol(n, "interleaved", step=3, multiband=m, repetition_time=1.0): (
                "interleaved step 3 ascending from 0"
            ),
        }
        for p, inner in cases.items():
            s = infer_scheme(array_times(p))
            assert s.label == prefix + inner, (p, s.label)
            assert s.multiband_factor == m and s.groups == array_groups(p)


# --------------------------------------------------------------------------- round trip


@st.composite
def protocols(draw: st.DrawFn) -> tuple[Protocol, float | None, float, int]:
    m = draw(st.integers(1, 8))
    nb = draw(st.integers(1, 60))
    n = m * nb
    order = draw(st.sampled_from(["sequential", "interleaved"])) if nb >= 3 else "sequential"
    ascending = draw(st.booleans())
    step = draw(st.integers(2, nb - 1)) if order == "interleaved" else 2
    start: int | str | None
    if order == "interleaved":
        low, high = (0, step - 1) if ascending else (nb - step, nb - 1)
        start = draw(st.one_of(st.none(), st.just("auto"), st.integers(low, high)))
    else:
        start = draw(st.sampled_from([None, "auto"]))
    tr = draw(st.floats(0.4, 4.0))
    ta = draw(st.one_of(st.none(), st.floats(0.2, 1.0).map(lambda f: f * tr)))
    # realistic: groups at least 10 ms apart, so rounding cannot merge distinct groups
    assume((ta or tr) / nb >= 0.010)
    p = Protocol(
        n,
        order,  # type: ignore[arg-type]
        ascending=ascending,
        step=step,
        start=start,  # type: ignore[arg-type]
        multiband=m,
        repetition_time=tr,
        active_time=ta,
        direction=draw(st.sampled_from(["+", "-"])),
    )
    quantum = draw(st.sampled_from([None, 0.001, 0.0025]))
    jitter = draw(st.sampled_from([0.0, 1e-9, 1e-6]))
    seed = draw(st.integers(0, 2**31 - 1))
    return p, quantum, jitter, seed


@settings(max_examples=300, deadline=None)
@given(protocols())
def test_round_trip(case: tuple[Protocol, float | None, float, int]) -> None:
    p, quantum, jitter, seed = case
    times = np.asarray(array_times(p))
    if quantum is not None:
        times = np.round(times / quantum) * quantum  # as converters round sidecar values
    times = times + np.random.default_rng(seed).uniform(-jitter, jitter, times.size)
    s = infer_scheme(times.tolist())
    # the generator is the ground truth of the round trip
    assert s.groups == array_groups(p)
    assert s.regular, s.evidence
    assert s.multiband_factor == p.multiband
    nb = p.n_groups
    if nb >= 2:
        assert s.spacing == pytest.approx(p.window / nb, abs=(quantum or 0) + 3 * jitter + 1e-9)
    if p.order == "sequential" and nb >= 2:
        # along the array, direction "-" mirrors the order
        ascending = p.ascending == (p.direction == "+")
        expected = "ascending" if ascending else "descending"
        prefix = "" if p.multiband == 1 else f"multiband ×{p.multiband}, "
        assert s.label == prefix + expected
    if p.order == "interleaved" and s.step == p.step:
        assert s.ascending == (p.ascending == (p.direction == "+"))


@settings(max_examples=200, deadline=None)
@given(protocols())
def test_slice_timing_is_array_times_along_direction(
    case: tuple[Protocol, float | None, float, int],
) -> None:
    p = case[0]
    arr = list(array_times(p))
    assert slice_timing(p) == (arr if p.direction == "+" else arr[::-1])
    assert min(arr) == 0.0
    assert max(arr) < p.window + 1e-9
