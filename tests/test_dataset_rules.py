"""Dataset-level rules on generated layouts: consensus, echoes, overrides, --jobs."""

from __future__ import annotations

from pathlib import Path

from slicetime.interfaces.report_json import audit_object
from slicetime.model import Severity
from slicetime.pipelines.audit import audit_paths
from slicetime.schemes.generate import Protocol, slice_timing
from tests.helpers_bids import write_description, write_run, write_sidecar

INTERLEAVED = slice_timing(Protocol(n_slices=10, order="interleaved", repetition_time=2.0))
DESCENDING = slice_timing(Protocol(n_slices=10, ascending=False, repetition_time=2.0))


def findings_by_run(root: Path, **kw: object) -> dict[str, dict[str, Severity]]:
    result = audit_paths([root], **kw)  # type: ignore[arg-type]
    return {r.record.path: {f.code: f.severity for f in r.findings} for r in result.runs}


def study(tmp_path: Path, n_subjects: int = 4) -> Path:
    root = tmp_path / "ds"
    write_description(root)
    write_sidecar(root, "task-tap_bold.json", {"RepetitionTime": 2.0, "SliceTiming": INTERLEAVED})
    for i in range(1, n_subjects + 1):
        write_run(root, f"sub-0{i}/func/sub-0{i}_task-tap_bold.nii.gz", shape=(4, 4, 10, 5))
    return root


def test_one_subjects_override_is_an_outlier_and_a_noted_override(tmp_path: Path) -> None:
    root = study(tmp_path)
    # BIDS inheritance principle: a subject-level sidecar overrides the top-level one
    write_sidecar(root, "sub-03/sub-03_task-tap_bold.json", {"SliceTiming": DESCENDING})
    found = findings_by_run(root)
    odd = found["sub-03/func/sub-03_task-tap_bold.nii.gz"]
    assert odd.get("dataset/outlier-scheme") is Severity.WARNING
    assert odd.get("inherit/timing-override") is Severity.NOTE
    for path, codes in found.items():
        if "sub-03" not in path:
            assert "dataset/outlier-scheme" not in codes
            assert "inherit/timing-override" not in codes


def test_broken_override_is_an_error(tmp_path: Path) -> None:
    root = study(tmp_path)
    # a list of 7 entries for 10 slices (BIDS rules.checks.mri.SliceTimingElements)
    write_sidecar(root, "sub-02/sub-02_task-tap_bold.json", {"SliceTiming": INTERLEAVED[:7]})
    odd = findings_by_run(root)["sub-02/func/sub-02_task-tap_bold.nii.gz"]
    assert odd.get("inherit/timing-override") is Severity.ERROR
    assert odd.get("timing/count-mismatch") is Severity.ERROR


def test_override_in_milliseconds_is_folded_into_the_unit_finding(tmp_path: Path) -> None:
    root = study(tmp_path)
    write_sidecar(root, "sub-02/sub-02_task-tap_bold.json",
                  {"SliceTiming": [t * 1000 for t in INTERLEAVED]})
    result = audit_paths([root])
    odd = next(r for r in result.runs if r.record.path.startswith("sub-02/"))
    # one root cause, reported once: the broken override follows from the unit
    assert [f.code for f in odd.findings] == ["timing/units-ms"]
    folded = odd.findings[0].evidence["folded"]
    assert {"code": "inherit/timing-override", "severity": "error"}.items() <= folded[0].items()


def test_no_consensus_without_a_strict_majority(tmp_path: Path) -> None:
    root = study(tmp_path, n_subjects=4)
    write_sidecar(root, "sub-03/sub-03_task-tap_bold.json", {"SliceTiming": DESCENDING})
    write_sidecar(root, "sub-04/sub-04_task-tap_bold.json", {"SliceTiming": DESCENDING})
    found = findings_by_run(root)
    assert not any("dataset/outlier-scheme" in codes for codes in found.values())


def test_outlier_tr_and_slice_count(tmp_path: Path) -> None:
    root = study(tmp_path)
    write_sidecar(root, "sub-01/sub-01_task-tap_bold.json", {"RepetitionTime": 2.5})
    write_run(root, "sub-04/func/sub-04_task-tap_bold.nii.gz", shape=(4, 4, 12, 5))
    found = findings_by_run(root)
    assert "dataset/outlier-tr" in found["sub-01/func/sub-01_task-tap_bold.nii.gz"]
    four = found["sub-04/func/sub-04_task-tap_bold.nii.gz"]
    assert "dataset/outlier-slices" in four and "timing/count-mismatch" in four


def test_echoes_must_share_timing(tmp_path: Path) -> None:
    root = tmp_path / "ds"
    write_description(root)
    write_sidecar(root, "task-me_bold.json", {"RepetitionTime": 2.0, "SliceTiming": INTERLEAVED})
    for echo in (1, 2, 3):
        write_run(root, f"sub-01/func/sub-01_task-me_echo-{echo}_bold.nii.gz",
                  shape=(4, 4, 10, 5), sidecar={"EchoTime": 0.012 * echo})
    # common practice (no source): echoes of one run come from the same excitations
    assert not any("dataset/echo-mismatch" in c for c in findings_by_run(root).values())
    write_sidecar(root, "sub-01/func/sub-01_task-me_echo-3_bold.json",
                  {"EchoTime": 0.036, "SliceTiming": DESCENDING})
    found = findings_by_run(root)
    assert found["sub-01/func/sub-01_task-me_echo-3_bold.nii.gz"].get(
        "dataset/echo-mismatch") is Severity.ERROR
    # two echoes of three agree: only the odd one out is in doubt
    for echo in (1, 2):
        assert "dataset/echo-mismatch" not in found[
            f"sub-01/func/sub-01_task-me_echo-{echo}_bold.nii.gz"]


def test_two_echoes_that_disagree_are_both_in_doubt(tmp_path: Path) -> None:
    # common practice (no source): the echoes of one run share its excitations; with two
    # that disagree there is no majority, so neither can be trusted over the other
    root = tmp_path / "ds"
    write_description(root)
    for echo, times in ((1, INTERLEAVED), (2, DESCENDING)):
        write_run(root, f"sub-01/func/sub-01_task-me_echo-{echo}_bold.nii.gz",
                  shape=(4, 4, 10, 5), sidecar={"EchoTime": 0.012 * echo,
                                                "RepetitionTime": 2.0, "SliceTiming": times})
    found = findings_by_run(root)
    for echo in (1, 2):
        assert found[f"sub-01/func/sub-01_task-me_echo-{echo}_bold.nii.gz"].get(
            "dataset/echo-mismatch") is Severity.ERROR


def test_local_processes_give_the_same_report_as_serial(tmp_path: Path) -> None:
    root = tmp_path / "ds"
    write_description(root)
    write_sidecar(root, "task-tap_bold.json", {"RepetitionTime": 2.0, "SliceTiming": INTERLEAVED})
    for i in range(70):  # more than one chunk of work
        write_run(root, f"sub-{i:03d}/func/sub-{i:03d}_task-tap_bold.nii.gz", shape=(2, 2, 10, 3))
    write_sidecar(root, "sub-005/sub-005_task-tap_bold.json", {"SliceTiming": DESCENDING})
    serial = audit_object(audit_paths([root], jobs=1), str(root))
    parallel = audit_object(audit_paths([root], jobs=2), str(root))
    assert serial == parallel
    assert [r["path"] for r in serial["runs"]] == sorted(r["path"] for r in serial["runs"])


def test_dataset_findings_stay_with_their_own_root(tmp_path: Path) -> None:
    # two datasets whose runs have the same relative paths
    first = study(tmp_path / "a")
    second = study(tmp_path / "b")
    write_sidecar(first, "sub-03/sub-03_task-tap_bold.json", {"SliceTiming": DESCENDING})
    result = audit_paths([first, second])
    flagged = [(r.record.root, r.record.path) for r in result.runs
               if any(f.code == "dataset/outlier-scheme" for f in r.findings)]
    assert flagged == [(str(first), "sub-03/func/sub-03_task-tap_bold.nii.gz")]
