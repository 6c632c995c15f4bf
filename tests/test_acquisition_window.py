"""The acquisition window has one owner (SliceSchedule.window); its precedence is
tested here once, and the rules, the plan and the diagrams all call it."""

from __future__ import annotations

import pytest

from slicetime.model import TIME_TOLERANCE, SliceSchedule, Source

TIMES = (0.0, 0.4, 0.8)


@pytest.mark.parametrize(
    ("fields", "expected"),
    [
        # BIDS (RepetitionTime, DelayTime): DelayTime is the time between the end of
        # one acquisition and the start of the next volume, so TA = TR - DelayTime
        ({"repetition_time": 2.0, "delay_time": 0.5}, (1.5, "RepetitionTime - DelayTime")),
        # TA given (as the resolver derives it from DelayTime): it wins
        ({"repetition_time": 2.0, "delay_time": 0.5, "acquisition_duration": 1.5,
          "sources": {"AcquisitionDuration": Source("derived", "RepetitionTime - DelayTime")}},
         (1.5, "RepetitionTime - DelayTime")),
        # TA from FrameAcquisitionDuration wins over the TR
        ({"repetition_time": 2.0, "acquisition_duration": 1.2}, (1.2, "FrameAcquisitionDuration")),
        # ... and over an unusable DelayTime (not below the TR: the resolver took the TA)
        ({"repetition_time": 2.0, "delay_time": 2.5, "acquisition_duration": 1.2,
          "sources": {"AcquisitionDuration": Source("sidecar", "FrameAcquisitionDuration")}},
         (1.2, "FrameAcquisitionDuration")),
        ({"repetition_time": 2.0}, (2.0, "RepetitionTime")),
        # a DelayTime not shorter than the TR leaves TR - DelayTime <= 0: no window at
        # all, so it is ignored as the resolver ignores it for the TA (BIDS: DelayTime
        # is part of the TR); timing/exceeds-acquisition reports it
        ({"repetition_time": 2.0, "delay_time": 5.0}, (2.0, "RepetitionTime")),
        # BIDS VolumeTiming without a TR: a slice is acquired before the next volume starts
        ({"volume_times": (0.0, 3.0, 5.5, 9.0)}, (2.5, "the shortest VolumeTiming interval")),
        ({"volume_times": (0.0,)}, (None, "")),
        ({}, (None, "")),
    ],
)
def test_the_window_precedence(fields: dict, expected: tuple) -> None:
    schedule = SliceSchedule(times=TIMES, **fields)
    assert schedule.window() == expected
    assert schedule.acquisition_window == expected[0]


def test_one_tolerance() -> None:
    # converters round slice times to 1 ms or 2.5 ms (common practice, no source)
    from slicetime.policy.model import ExpectedProtocol
    from slicetime.schemes.infer import DEFAULT_TOLERANCE

    assert DEFAULT_TOLERANCE is TIME_TOLERANCE
    assert ExpectedProtocol(index=0).tolerance == TIME_TOLERANCE
    assert 0.0025 < TIME_TOLERANCE <= 0.005
