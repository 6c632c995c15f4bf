"""Whatever the audit calls fixable, `fix` plans it or lists it as not planned with the
reason and exits non-zero (issue 23). Every code declared fixable is walked through both."""

from __future__ import annotations

import os
from collections.abc import Callable
from pathlib import Path

import pydicom
import pytest
from click.testing import CliRunner

from slicetime.codes import RULES
from slicetime.interfaces.cli import cli
from slicetime.pipelines.audit import audit_paths
from slicetime.pipelines.fix import UNSETTLED, plan_fix
from slicetime.rules.repairs import FIXABLE
from slicetime.schemes.generate import Protocol, slice_timing
from tests import test_dicom_source as src
from tests.helpers_bids import write_description, write_run

SHAPE = (4, 4, 4, 6)
RUN = "sub-01/func/sub-01_task-x_bold.nii.gz"


def _times(**kw: object) -> list[float]:
    # slicetime's generator, checked against the standard's definitions elsewhere
    # (tests/test_schemes_generate.py)
    return [float(t) for t in slice_timing(Protocol(n_slices=4, repetition_time=2.0,
                                                    **kw))]  # type: ignore[arg-type]


def _dataset(tmp: Path, sidecar: dict[str, object], **header: object) -> Path:
    root = tmp / "ds"
    write_description(root)
    write_run(root, RUN, shape=SHAPE, sidecar={"TaskName": "x", **sidecar},
              **header)  # type: ignore[arg-type]
    return root


def units_ms(tmp: Path) -> Path:
    # BIDS: SliceTiming in seconds; these are the same times in milliseconds (1 ms = 1e-3 s)
    return _dataset(tmp, {"RepetitionTime": 2.0, "SliceTiming": [t * 1000 for t in _times()]})


def from_header(tmp: Path) -> Path:
    # NIfTI-1 nifti1.h: slice_code 1 is NIFTI_SLICE_SEQ_INC, one slice_duration apart
    return _dataset(tmp, {"RepetitionTime": 2.0}, slice_code=1, slice_duration=0.5)


def missing(tmp: Path) -> Path:
    return _dataset(tmp, {"RepetitionTime": 2.0})


def slice_code_mismatch(tmp: Path) -> Path:
    # NIfTI-1 nifti1.h: slice_code 2 is NIFTI_SLICE_SEQ_DEC: the last slice first; the
    # sidecar lists the same times for the opposite direction
    return _dataset(tmp, {"RepetitionTime": 2.0, "SliceTiming": [0.0, 0.5, 1.0, 1.5]},
                    slice_code=2, slice_duration=0.5)


def multiband_mismatch(tmp: Path) -> Path:
    return _dataset(tmp, {"RepetitionTime": 2.0, "SliceTiming": _times(multiband=2),
                          "MultibandAccelerationFactor": 4})


def multiband_undeclared(tmp: Path) -> Path:
    return _dataset(tmp, {"RepetitionTime": 2.0, "SliceTiming": _times(multiband=2)})


def _resting(tmp: Path, times: list[float] | None) -> Path:
    root, _, _ = src.resting_tree(tmp, times)
    return root


def times_absent(tmp: Path) -> Path:
    return _resting(tmp, None)


def times_differ(tmp: Path) -> Path:
    return _resting(tmp, [i * 0.06 for i in range(32)])


def reversed_times(tmp: Path) -> Path:
    # pydicom and nibabel read the series' times; written backwards they are reversed
    return _resting(tmp, src.nib_times(pydicom.dcmread(src.RESTING))[::-1])


def multiband_differs(tmp: Path) -> Path:
    root, _ = src.multiband_tree(tmp, TaskName="x", MultibandAccelerationFactor=3,
                                 SliceTiming=[0.0, 0.5, 1.0, 0.0, 0.5, 1.0])
    return root


#: one dataset per fixable code, and whether fix can settle it there
BUILDERS: dict[str, tuple[Callable[[Path], Path], bool]] = {
    "timing/units-ms": (units_ms, True),
    "timing/from-header": (from_header, True),
    "timing/missing": (missing, False),  # no policy, no agreeing runs: nothing settles it
    # the header (or the declared factor) and the times contradict each other: a person
    # must decide which is right, fix takes no side (rules.correction.undecided_doubt)
    "header/slice-code-mismatch": (slice_code_mismatch, False),
    "scheme/multiband-mismatch": (multiband_mismatch, False),
    "scheme/multiband-undeclared": (multiband_undeclared, True),
    "source/times-absent": (times_absent, True),
    "source/times-differ": (times_differ, True),
    "source/reversed": (reversed_times, True),
    "source/multiband-differs": (multiband_differs, True),
}


def test_every_fixable_code_has_a_walk() -> None:
    assert set(BUILDERS) == set(FIXABLE)


@pytest.mark.parametrize("code", sorted(BUILDERS))
def test_fix_plans_or_says_why_not(code: str, tmp_path: Path) -> None:
    build, settled = BUILDERS[code]
    root = build(tmp_path)
    audited = {(r.record.path, f.code) for r in audit_paths([root]).runs for f in r.findings}
    runs = [run for run, found in audited if found == code]
    assert runs, f"the audit does not report {code}"
    plan = plan_fix([root])
    planned = {(r.run, r.code) for c in plan.changes for r in c.repairs}
    unplanned = {(u.run, u.code): u.reason for u in plan.unplanned}
    for run in runs:
        assert ((run, code) in planned) == settled
        assert ((run, code) in unplanned) == (not settled)
    dry = CliRunner().invoke(cli, ["fix", str(root)])
    assert dry.exit_code == 1, dry.output  # changes to review, or findings not planned
    applied = CliRunner().invoke(cli, ["fix", str(root), "--apply", "--backup-dir",
                                       str(tmp_path / "backups")])
    assert applied.exit_code == (0 if settled else 1), applied.output
    if not settled:
        doubted = RULES[code].timing_in_doubt
        assert unplanned[(runs[0], code)] == (
            f"the timing is in doubt ({code}): a person must decide which source is right"
            if doubted else UNSETTLED)
        assert "not planned" in applied.output


def test_a_subject_folder_linked_from_outside_is_not_planned(tmp_path: Path) -> None:
    # the linked subject, given as a path of its own (a walk of the root does not follow a
    # link out of the dataset), is audited and the unit called fixable; fix never writes
    # outside the root, so it says so and exits 1 (it said "nothing to fix" and exited 0)
    outside = tmp_path / "elsewhere"
    write_run(outside, "sub-02/func/sub-02_task-x_bold.nii.gz", shape=SHAPE,
              sidecar={"TaskName": "x", "RepetitionTime": 2.0,
                       "SliceTiming": [t * 1000 for t in _times()]})
    root = tmp_path / "ds"
    write_description(root)
    os.symlink(outside / "sub-02", root / "sub-02")
    given = [root, root / "sub-02"]
    (run,) = audit_paths(given).runs
    assert "timing/units-ms" in {f.code for f in run.findings}
    plan = plan_fix(given)
    assert plan.changes == []
    (item,) = plan.unplanned
    assert (item.run, item.code) == (run.record.path, "timing/units-ms")
    assert "link" in item.reason and "root" in item.reason
    for args in ([], ["--apply", "--backup-dir", str(tmp_path / "b")]):
        result = CliRunner().invoke(cli, ["fix", *map(str, given), *args])
        assert result.exit_code == 1, result.output
        assert "timing/units-ms not planned" in result.output
