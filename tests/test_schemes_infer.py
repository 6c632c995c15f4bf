"""Tests for scheme inference (slicetime.schemes.infer).

Check values come from the definitions of the slice orders (common practice, no
source): sequential orders acquire slices one after another; odd-then-even
interleaving acquires 0, 2, 4, ... then 1, 3, 5, ...; under multiband with
factor m and N slices each excitation group holds m slices spaced N/m apart and
the times hold N/m distinct values, each repeated m times. Converters round
slice times to 1 ms or 2.5 ms steps (common practice, no source).
"""

from __future__ import annotations

import math
import random
from collections.abc import Sequence

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from slicetime.schemes import (
    DEFAULT_TOLERANCE,
    Protocol,
    base_order,
    describe_order,
    grouping_threshold,
    infer_scheme,
)


def times_for_order(order: Sequence[int], spacing: float, offset: float = 0.0) -> list[float]:
    """Times (array order) for single-band slices acquired in ``order``."""
    times = [0.0] * len(order)
    for rank, index in enumerate(order):
        times[index] = offset + rank * spacing
    return times


def multiband_times(base_order_: Sequence[int], m: int, spacing: float) -> list[float]:
    """Times for groups {b, b+Nb, ...} acquired in ``base_order_``."""
    nb = len(base_order_)
    times = [0.0] * (nb * m)
    for rank, base in enumerate(base_order_):
        for j in range(m):
            times[base + j * nb] = rank * spacing
    return times


def odd_then_even(n: int) -> list[int]:
    # interleaved from slice 0: 0, 2, 4, ..., then 1, 3, ... (common practice, no source)
    return list(range(0, n, 2)) + list(range(1, n, 2))


def even_then_odd(n: int) -> list[int]:
    # interleaved from slice 1: 1, 3, ..., then 0, 2, ... (common practice, no source)
    return list(range(1, n, 2)) + list(range(0, n, 2))


def quantise(times: Sequence[float], step: float) -> list[float]:
    return [round(t / step) * step for t in times]


# --------------------------------------------------------------------------- trivial


def test_single_slice() -> None:
    s = infer_scheme([0.0])
    assert s.label == "single slice"
    assert s.regular and s.multiband_factor == 1
    assert s.groups == ((0,),) and s.spacing is None


def test_simultaneous() -> None:
    s = infer_scheme([0.5, 0.5, 0.5, 0.5])
    assert s.label == "simultaneous"
    assert s.multiband_factor == 4 and s.groups == ((0, 1, 2, 3),)
    assert s.group_times == pytest.approx((0.5,))


@pytest.mark.parametrize("bad", [[], [0.0, math.nan], [math.inf, 0.0], [0.0, -math.inf]])
def test_rejects_empty_and_non_finite(bad: list[float]) -> None:
    with pytest.raises(ValueError):
        infer_scheme(bad)


def test_default_tolerance_is_a_few_ms() -> None:
    # comparisons need a tolerance of a few ms (common practice, no source)
    assert 0.0025 < DEFAULT_TOLERANCE <= 0.005


# --------------------------------------------------------------------------- sequential


def test_two_slices_in_order_are_ascending_not_interleaved() -> None:
    s = infer_scheme([0.0, 1.0])
    assert s.label == "ascending" and s.step == 1 and s.ascending is True


def test_two_slices_reversed_are_descending() -> None:
    s = infer_scheme([1.0, 0.0])
    assert s.label == "descending" and s.start == 1


def test_sequential_40_slices_in_2s() -> None:
    # 40 slices in a 2 s TR: one slice every 50 ms (common practice, no source)
    s = infer_scheme([i * 0.05 for i in range(40)])
    assert s.label == "ascending"
    assert s.spacing == pytest.approx(0.05)
    assert s.groups == tuple((i,) for i in range(40))
    assert s.step == 1 and s.start == 0 and s.residue_order is None


def test_descending_40() -> None:
    s = infer_scheme([(39 - i) * 0.05 for i in range(40)])
    assert s.label == "descending"
    assert s.start == 39 and s.ascending is False
    assert s.groups[0] == (39,)


# --------------------------------------------------------------------------- interleaved


@pytest.mark.parametrize("n", [3, 5, 7, 31, 33])
def test_interleaved_from_0_odd(n: int) -> None:
    s = infer_scheme(times_for_order(odd_then_even(n), 2.0 / n))
    assert s.label == "interleaved ascending from 0"
    assert (s.step, s.ascending, s.start) == (2, True, 0)
    assert s.residue_order == (0, 1)


@pytest.mark.parametrize("n", [4, 6, 40, 64])
def test_interleaved_from_0_even(n: int) -> None:
    s = infer_scheme(times_for_order(odd_then_even(n), 2.0 / n))
    assert s.label == "interleaved ascending from 0"


@pytest.mark.parametrize("n", [3, 4, 5, 36, 40, 41])
def test_interleaved_from_1(n: int) -> None:
    s = infer_scheme(times_for_order(even_then_odd(n), 2.0 / n))
    assert s.label == "interleaved ascending from 1"
    assert s.start == 1 and s.residue_order == (1, 0)


@pytest.mark.parametrize("n", [5, 40])
def test_interleaved_descending(n: int) -> None:
    # mirror images of odd-then-even: from the last slice, and from the one below it
    from_top = list(range(n - 1, -1, -2)) + list(range(n - 2, -1, -2))
    from_below = list(range(n - 2, -1, -2)) + list(range(n - 1, -1, -2))
    assert infer_scheme(times_for_order(from_top, 0.05)).label == (
        f"interleaved descending from {n - 1}"
    )
    s = infer_scheme(times_for_order(from_below, 0.05))
    assert s.label == f"interleaved descending from {n - 2}"
    assert s.ascending is False and s.step == 2


def test_interleaved_step_3() -> None:
    # every third slice: 0, 3, 6, 9, then 1, 4, 7, then 2, 5, 8 (common practice, no source)
    order = [0, 3, 6, 9, 1, 4, 7, 2, 5, 8]
    s = infer_scheme(times_for_order(order, 0.1))
    assert s.label == "interleaved step 3 ascending from 0"
    assert s.step == 3 and s.residue_order == (0, 1, 2)
    order = [1, 4, 7, 2, 5, 8, 0, 3, 6, 9]
    assert infer_scheme(times_for_order(order, 0.1)).label == "interleaved step 3 ascending from 1"


def test_interleaved_step_3_descending() -> None:
    order = [9, 6, 3, 0, 8, 5, 2, 7, 4, 1]
    s = infer_scheme(times_for_order(order, 0.1))
    assert s.label == "interleaved step 3 descending from 9"
    assert s.residue_order == (0, 2, 1)


def test_interleaved_step_4() -> None:
    order = sorted(range(12), key=lambda x: (x % 4, x))
    assert infer_scheme(times_for_order(order, 0.1)).label == "interleaved step 4 ascending from 0"


def test_non_consecutive_residue_order() -> None:
    order = [0, 3, 6, 2, 5, 1, 4]  # residues 0, then 2, then 1
    s = infer_scheme(times_for_order(order, 0.1))
    assert s.label == "interleaved step 3 ascending, residue order 0,2,1"
    assert s.regular and s.residue_order == (0, 2, 1) and s.start == 0


# --------------------------------------------------------------------------- multiband


def _inner_orders(nb: int) -> dict[str, list[int]]:
    return {
        "ascending": list(range(nb)),
        "descending": list(range(nb - 1, -1, -1)),
        "interleaved ascending from 0": odd_then_even(nb),
        "interleaved ascending from 1": even_then_odd(nb),
        f"interleaved descending from {nb - 1}": list(range(nb - 1, -1, -2))
        + list(range(nb - 2, -1, -2)),
        "interleaved step 3 ascending from 0": sorted(range(nb), key=lambda x: (x % 3, x)),
    }


@pytest.mark.parametrize("m", [2, 3, 4, 5, 6, 7, 8])
@pytest.mark.parametrize("nb", [6, 9])
def test_multiband_each_inner_order(m: int, nb: int) -> None:
    for inner, order in _inner_orders(nb).items():
        times = multiband_times(order, m, 0.8 / nb)
        # N/m distinct values, each repeated m times (common practice, no source)
        assert len(set(times)) == nb
        s = infer_scheme(times)
        assert s.label == f"multiband ×{m}, {inner}", inner
        assert s.multiband_factor == m and s.regular
        for group, base in zip(s.groups, order, strict=True):
            assert group == tuple(range(base, nb * m, nb))


def test_multiband_rounded_sidecar() -> None:
    # 60 slices, factor 4, 15 groups in TR 0.8 s, rounded to 2.5 ms
    order = odd_then_even(15)
    times = quantise(multiband_times(order, 4, 0.8 / 15), 0.0025)
    s = infer_scheme(times)
    assert s.label == "multiband ×4, interleaved ascending from 0"


# --------------------------------------------------------------------------- robustness


@pytest.mark.parametrize("quantum", [0.001, 0.0025])
@pytest.mark.parametrize("n", [36, 44, 52, 62, 74])
def test_rounded_times(quantum: float, n: int) -> None:
    tr = 2.0
    times = quantise(times_for_order(odd_then_even(n), tr / n), quantum)
    s = infer_scheme(times)
    assert s.label == "interleaved ascending from 0"
    assert s.spacing == pytest.approx(tr / n, abs=quantum)


def test_float_noise_and_boundary_rounding() -> None:
    rng = random.Random(7)
    times = multiband_times(even_then_odd(24), 2, 0.04)
    times = [t + rng.uniform(-1e-9, 1e-9) for t in times]
    # one member of a group pushed by a whole 2.5 ms rounding step stays in the group
    times[5] += 0.0025
    s = infer_scheme(times)
    assert s.multiband_factor == 2 and s.regular


def test_offset_and_sparse_idle_period_are_regular() -> None:
    # sparse: 20 slices in the first 1 s of a 3 s TR, starting 0.2 s in
    s = infer_scheme(times_for_order(list(range(20)), 0.05, offset=0.2))
    assert s.label == "ascending" and s.regular
    assert s.group_times[0] == pytest.approx(0.2)


def test_threshold_shrinks_for_unusually_short_spacing() -> None:
    times = [i * 0.002 for i in range(10)]  # unrounded, 2 ms apart
    assert grouping_threshold(times) < 0.002
    assert infer_scheme(times).label == "ascending"


# --------------------------------------------------------------------------- irregular


def test_shuffled_order_is_irregular() -> None:
    order = [3, 0, 4, 1, 2, 5]
    s = infer_scheme(times_for_order(order, 0.1))
    assert s.label == "irregular" and not s.regular
    assert s.step is None and s.ascending is None and s.start is None
    assert "reason" in s.evidence and s.evidence["base_order"] == order


def test_duplicated_time_without_multiband_structure() -> None:
    times = [i * 0.1 for i in range(10)]
    times[4] = times[3]
    s = infer_scheme(times)
    assert s.label == "irregular"
    assert "unequal sizes" in s.evidence["reason"]
    assert s.evidence["example_group"] == [3, 4]


def test_pairs_not_spaced_n_over_m_apart() -> None:
    times = [(i // 2) * 0.1 for i in range(8)]  # groups {0,1}, {2,3}, ...
    s = infer_scheme(times)
    assert s.label == "irregular" and s.multiband_factor == 2
    assert "not spaced N/m apart" in s.evidence["reason"]
    assert s.evidence["group"] == [0, 1]


def test_uneven_spacing() -> None:
    times = [0.0, 0.1, 0.2, 0.32, 0.4, 0.5]
    s = infer_scheme(times)
    assert s.label == "irregular"
    assert "evenly" in s.evidence["reason"]
    assert len(s.evidence["gaps"]) == 5


def test_gap_in_the_middle() -> None:
    times = [0.0, 0.1, 0.2, 1.2, 1.3, 1.4]
    s = infer_scheme(times)
    assert s.label == "irregular"
    assert s.evidence["pause_after_group"] == [2]
    assert s.evidence["order_label"] == "ascending"
    assert s.spacing == pytest.approx(0.1)


def test_deviation_just_inside_tolerance_is_regular() -> None:
    times = [0.0, 0.1, 0.2, 0.302, 0.4, 0.5]
    assert infer_scheme(times).regular
    assert not infer_scheme(times, tolerance=0.001).regular


# --------------------------------------------------------------------------- order property


def _rebuild(desc_step: int, ascending: bool, residues: Sequence[int], n: int) -> list[int]:
    out: list[int] = []
    for r in residues:
        run = list(range(r, n, desc_step))
        out.extend(run if ascending else run[::-1])
    return out


@settings(max_examples=250, deadline=None)
@given(st.integers(3, 40), st.integers(2, 39), st.booleans(), st.data())
def test_describe_order_round_trip(n: int, step: int, ascending: bool, data: st.DataObject) -> None:
    # the generated order (any residue order) is the ground truth of the round trip
    step = 2 + step % (n - 2)
    residues = data.draw(st.permutations(list(range(step))))
    order = _rebuild(step, ascending, residues, n)
    desc = describe_order(order)
    assert desc is not None
    assert desc.step <= step  # a simpler description may exist, never a worse one
    if desc.step == 1:
        assert order in (list(range(n)), list(range(n - 1, -1, -1)))
    else:
        assert desc.residue_order is not None
        assert _rebuild(desc.step, desc.ascending, desc.residue_order, n) == order
    if desc.consecutive and desc.step > 1:
        p = Protocol(
            n,
            "interleaved",
            ascending=desc.ascending,
            step=desc.step,
            start=desc.start,
            repetition_time=1.0,
        )
        assert list(base_order(p)) == order


@settings(max_examples=200, deadline=None)
@given(st.permutations(list(range(8))))
def test_any_permutation_is_described_or_irregular(order: list[int]) -> None:
    s = infer_scheme(times_for_order(order, 0.1))
    assert s.groups == tuple((i,) for i in order)
    if s.regular:
        assert s.label != "irregular" and s.step is not None
    else:
        assert s.label == "irregular" and "reason" in s.evidence
