"""The resampling plan: reference choices, windows, excitation groups."""

from __future__ import annotations

import pytest

from slicetime.engines.plan import PlanError, ReferenceChoice, make_plan, reference_time
from slicetime.model import SliceSchedule
from slicetime.schemes.generate import Protocol, array_times


def schedule(times: list[float], tr: float = 2.0, **kw: object) -> SliceSchedule:
    return SliceSchedule(times=tuple(times), repetition_time=tr, **kw)  # type: ignore[arg-type]


@pytest.mark.parametrize(
    ("text", "kind", "value", "index"),
    [
        ("1.0", "seconds", 1.0, None),
        ("0", "seconds", 0.0, None),
        ("first", "first", None, None),
        ("Middle", "middle", None, None),
        ("last", "last", None, None),
        ("slice:12", "slice", None, 12),
        ("slice=0", "slice", None, 0),
    ],
)
def test_reference_choices_parse(text: str, kind: str, value: float | None, index: int | None):
    choice = ReferenceChoice.parse(text)
    assert (choice.kind, choice.value, choice.index) == (kind, value, index)


@pytest.mark.parametrize("text", ["soon", "-0.5", "nan", "inf", "slice:", "slice:-1", ""])
def test_bad_reference_choices_are_refused(text: str) -> None:
    with pytest.raises(ValueError, match="reference"):
        ReferenceChoice.parse(text)


def test_reference_times_for_an_interleaved_run() -> None:
    # Common practice (no source): 10 slices over a 2 s TR are 0.2 s apart.
    times = list(array_times(Protocol(n_slices=10, order="interleaved", repetition_time=2.0)))
    s = schedule(times)
    assert reference_time(ReferenceChoice.parse("first"), s) == pytest.approx(0.0)
    assert reference_time(ReferenceChoice.parse("last"), s) == pytest.approx(1.8)
    assert reference_time(ReferenceChoice.parse("middle"), s) == pytest.approx(0.9)
    assert reference_time(ReferenceChoice.parse("slice:1"), s) == pytest.approx(times[1])


def test_reference_outside_the_window_is_refused() -> None:
    s = schedule([0.0, 0.5, 1.0, 1.5])
    with pytest.raises(PlanError, match=r"outside this run's acquisition window \(0 to 2 s\)"):
        reference_time(ReferenceChoice.parse("2.5"), s)
    with pytest.raises(PlanError, match="slice:4 does not exist; the run has 4 slices"):
        reference_time(ReferenceChoice.parse("slice:4"), s)


def test_sparse_window_excludes_the_silent_gap() -> None:
    # BIDS: with DelayTime the slices are acquired within TR - DelayTime.
    s = schedule([0.0, 0.25, 0.5, 0.75], tr=3.0, delay_time=2.0)
    assert reference_time(ReferenceChoice.parse("0.9"), s) == pytest.approx(0.9)
    with pytest.raises(PlanError, match="0 to 1 s"):
        reference_time(ReferenceChoice.parse("1.5"), s)


def test_multiband_groups_share_one_shift() -> None:
    # Common practice (no source): multiband factor m repeats each time m times.
    times = list(array_times(Protocol(n_slices=12, order="interleaved", multiband=3,
                                      repetition_time=1.0)))
    plan = make_plan(schedule(times, tr=1.0), 5, ReferenceChoice.parse("first"))
    assert len(plan.groups) == 4
    assert sorted(z for g in plan.groups for z in g.slices) == list(range(12))
    for group in plan.groups:
        assert len(group.slices) == 3
        assert {times[z] for z in group.slices} == {group.slice_time}
        assert group.shift == pytest.approx(0.0 - group.slice_time)
    assert plan.regular and plan.period == 1.0
    assert plan.onsets == (0.0, 1.0, 2.0, 3.0, 4.0)


def test_volume_timing_gives_an_uneven_grid() -> None:
    s = SliceSchedule(times=(0.0, 0.3), volume_times=(0.0, 2.0, 5.0))
    plan = make_plan(s, 3, ReferenceChoice.parse("0.1"))
    assert not plan.regular and plan.period is None
    assert list(plan.target_times()) == pytest.approx([0.1, 2.1, 5.1])
    with pytest.raises(PlanError, match="VolumeTiming has 3 entries but the image has 4"):
        make_plan(s, 4, ReferenceChoice.parse("0.1"))


def test_a_single_volume_cannot_be_corrected() -> None:
    with pytest.raises(PlanError, match="at least 2"):
        make_plan(schedule([0.0, 1.0]), 1, ReferenceChoice.parse("middle"))
