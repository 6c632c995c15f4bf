"""The committed fixtures (fixtures/): header-only timing and a hostile tree."""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import nibabel as nib
import numpy as np
from click.testing import CliRunner

from slicetime.interfaces.cli import cli
from slicetime.pipelines.audit import audit_paths

FIXTURES = Path(__file__).resolve().parents[1] / "fixtures"


def tree_digest(root: Path) -> str:
    h = hashlib.sha256()
    for path in sorted(root.rglob("*")):
        if path.is_file():
            h.update(path.relative_to(root).as_posix().encode())
            h.update(path.read_bytes())
    return h.hexdigest()


def test_header_only_runs_are_reconstructed_exactly_as_nibabel_reads_them() -> None:
    result = audit_paths([FIXTURES / "header-only"])
    by_path = {r.record.path: r for r in result.runs}
    full = by_path["sub-01/func/sub-01_task-tick_bold.nii.gz"].record
    # source: nibabel Nifti1Header.get_slice_times on the committed file
    expected = nib.load(FIXTURES / "header-only" / full.path).header.get_slice_times()
    assert full.schedule is not None and full.timing_origin == "header"
    assert np.allclose(full.schedule.times, expected)
    assert full.scheme is not None
    assert full.scheme.label == "interleaved ascending from 1"  # nifti1.h code 5
    padded = by_path["sub-02/func/sub-02_task-tick_bold.nii.gz"]
    # nibabel gives None for padding slices outside slice_start..slice_end
    times = nib.load(FIXTURES / "header-only" / padded.record.path).header.get_slice_times()
    assert times[0] is None and times[-1] is None
    assert padded.record.schedule is None
    assert "header/padded-slices" in {f.code for f in padded.findings}


def test_hostile_tree_is_audited_without_a_traceback_and_unchanged() -> None:
    root = FIXTURES / "hostile"
    before = tree_digest(root)
    result = CliRunner().invoke(cli, ["audit", str(root), "--format", "json"])
    assert result.exception is None or isinstance(result.exception, SystemExit)
    assert result.exit_code == 1
    report = json.loads(result.stdout)
    codes = {r["path"].split("task-")[1].split("_")[0]: {f["code"] for f in r["findings"]}
             for r in report["runs"]}
    # a 0-byte image is a placeholder: audited from its sidecars (issue 27)
    assert "file/not-retrieved" in codes["empty"] and "file/not-nifti" in codes["noise"]
    assert "file/truncated" in codes["cut"]
    assert "sidecar/bad-json" in codes["brokenjson"]
    # one problem told once (RFC 8259: NaN is no JSON number): the entry it leaves
    # unusable is folded into the finding that names the literal
    assert "sidecar/non-finite-number" in codes["nan"] and "timing/bad-entry" not in codes["nan"]
    nan = next(r for r in report["runs"] if "task-nan" in r["path"])
    root_finding = next(f for f in nan["findings"] if f["code"] == "sidecar/non-finite-number")
    assert [f["code"] for f in root_finding["evidence"]["folded"]] == ["timing/bad-entry"]
    fine = next(r for r in report["runs"] if "task-fine" in r["path"])
    assert [f for f in fine["findings"] if f["severity"] != "note"] == []
    assert fine["scheme"]["label"] == "ascending"
    assert tree_digest(root) == before  # nothing in the input tree is modified
