"""The audit catches every slice-timing condition that the BIDS standard encodes.

Source: the machine-readable BIDS specification shipped in bidsschematools
(``bidsschematools/data/schema.json``, ``rules.checks``). Each timing-related
check there is mapped to the slicetime code that reports it, with a fixture that
violates it; a new timing check in a future schema release fails this test
until it is mapped.
"""

from __future__ import annotations

import json
from importlib import resources
from typing import Any

import pytest

from slicetime.model import HeaderInfo
from slicetime.rules import RULES, check_run
from tests.factories import header_info, record

TIMING_WORDS = ("SliceTiming", "VolumeTiming", "DelayTime", "RepetitionTime",
                "SliceEncodingDirection", "FrameAcquisitionDuration")
#: checks that mention a timing word but are not about slice timing
NOT_SLICE_TIMING = {
    "mri.EffectiveEchoSpacingTooLarge",  # distortion correction, not timing
    "mri.BolusCutOffDelayTimeNotMonotonicallyIncreasing",  # ASL labelling
    "mri.RepetitionTimePreparationNotConsistent",  # quantitative MRI
    "asl.BolusCutOffDelayTimeGreater",
    "asl.ASLRepetitionTimePreparationASLContextLength",  # ASL preparation TRs
}

ST40 = [round(i * 0.05, 4) for i in range(40)]
H40 = header_info((8, 8, 40, 20), tr=2.0)

# standard check -> (our code, sidecar fixture that violates it, header)
FIXTURES: dict[str, tuple[str, dict[str, Any], HeaderInfo]] = {
    "func.RepetitionTimeGreaterThan": (
        "tr/units-ms", {"RepetitionTime": 2000, "SliceTiming": ST40}, H40),
    "func.RepetitionTimeMismatch": (
        "header/tr-disagrees", {"RepetitionTime": 2.0, "SliceTiming": ST40},
        header_info((8, 8, 40, 20), tr=2.5)),
    "func.SliceTimingGreaterThanRepetitionTime": (
        "timing/exceeds-tr", {"RepetitionTime": 1.5, "SliceTiming": ST40}, H40),
    "func.VolumeTimingRepetitionTimeMutex": (
        "tr/both-present",
        {"RepetitionTime": 2.0, "VolumeTiming": [2.0 * i for i in range(20)],
         "SliceTiming": ST40}, H40),
    "func.RepetitionTimeFrameAcquisitionDurationMutex": (
        "tr/frame-duration-conflict",
        {"RepetitionTime": 2.0, "FrameAcquisitionDuration": 1.5, "SliceTiming": ST40}, H40),
    "func.VolumeTimingDelayTimeMutex": (
        "tr/volume-timing-delay",
        {"VolumeTiming": [3.0 * i for i in range(20)], "DelayTime": 1.0,
         "SliceTiming": ST40}, H40),
    "func.VolumeTimingMissingFrameAcquisitionDuration": (
        "tr/volume-timing-acquisition", {"VolumeTiming": [3.0 * i for i in range(20)]}, H40),
    "func.DeprecatedAcquisitionDuration": (
        "tr/deprecated-acquisition-duration",
        {"VolumeTiming": [3.0 * i for i in range(20)], "AcquisitionDuration": 2.0,
         "SliceTiming": ST40}, H40),
    "mri.SliceTimingElements": (
        "timing/count-mismatch", {"RepetitionTime": 2.0, "SliceTiming": ST40[:39]}, H40),
    "mri.SliceTimingElementsWithDirection": (
        "timing/count-mismatch",
        {"RepetitionTime": 2.0, "SliceTiming": ST40, "SliceEncodingDirection": "j"}, H40),
    "mri.VolumeTimingNotMonotonicallyIncreasing": (
        "tr/volume-timing-order",
        {"VolumeTiming": [0.0, 3.0, 2.0] + [3.0 * i for i in range(3, 20)],
         "SliceTiming": ST40}, H40),
}


def standard_timing_checks() -> set[str]:
    text = resources.files("bidsschematools").joinpath("data/schema.json").read_text("utf-8")
    checks = json.loads(text)["rules"]["checks"]
    found = set()
    for area, entries in checks.items():
        for name, check in entries.items():
            body = json.dumps({k: v for k, v in check.items() if k != "issue"})
            if any(word in body for word in TIMING_WORDS):
                found.add(f"{area}.{name}")
    return found - NOT_SLICE_TIMING


def test_every_timing_check_of_the_standard_is_mapped() -> None:
    missing = standard_timing_checks() - set(FIXTURES)
    assert not missing, f"standard timing checks without a slicetime rule: {sorted(missing)}"


@pytest.mark.parametrize("check", sorted(FIXTURES))
def test_fixture_violating_the_standard_is_reported(check: str) -> None:
    code, metadata, header = FIXTURES[check]
    assert code in RULES
    findings = check_run(record(metadata, header))
    assert code in {f.code for f in findings}, [f.one_line() for f in findings]
    for f in findings:
        if f.code == code:
            assert f.field is not None and f.message
            # the finding names where the value came from
            assert f.file in ("task-x_bold.json", "sub-01/func/sub-01_task-x_bold.nii.gz")


def test_clean_run_has_no_warning_or_error() -> None:
    # common practice (no source): 40 ascending slices spread evenly over a 2 s TR
    findings = check_run(record({"RepetitionTime": 2.0, "SliceTiming": ST40}, H40))
    assert [f.one_line() for f in findings if f.severity.value != "note"] == []
