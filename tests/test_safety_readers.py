"""Readers that tell the truth about odd files (issue 26, item 7): a sidecar with a
UTF-8 byte-order mark is read, reported as a note and repaired with the mark kept;
a series folder's unreadable files are reported while its readable files still
give their verdict."""

from __future__ import annotations

import json
import os
from pathlib import Path

import pytest
from click.testing import CliRunner

from slicetime.interfaces.cli import cli
from slicetime.pipelines.audit import audit_paths
from tests.helpers_bids import tree_hashes
from tests.test_adversarial_fix import ms_dataset
from tests.test_dicom_source import resting_tree

BOM = b"\xef\xbb\xbf"  # the UTF-8 encoding of U+FEFF (Unicode standard, from memory)


def test_a_sidecar_with_a_bom_is_read_noted_and_repaired_with_the_mark_kept(
    tmp_path: Path,
) -> None:
    ds = ms_dataset(tmp_path / "ds")
    sidecar = next(ds.rglob("sub-01_*_bold.json"))
    original = BOM + sidecar.read_bytes()
    sidecar.write_bytes(original)
    audit = CliRunner().invoke(cli, ["audit", str(ds), "--format", "json"])
    findings = [f for run in json.loads(audit.output)["runs"] for f in run["findings"]
                if f["file"] == sidecar.relative_to(ds).as_posix()]
    # RFC 8259 section 8.1: a parser may ignore a byte-order mark, so it is only a note
    assert ("sidecar/bad-encoding", "note") in [(f["code"], f["severity"]) for f in findings]
    assert "timing/units-ms" in [f["code"] for f in findings]  # the content was read
    others = {k: v for k, v in tree_hashes(ds).items() if not k.endswith("_bold.json")}
    fixed = CliRunner().invoke(cli, ["fix", str(ds), "--apply",
                                     "--backup-dir", str(tmp_path / "backups")])
    assert fixed.exit_code == 0, fixed.output
    after = sidecar.read_bytes()
    assert after.startswith(BOM + b"{") and after != original
    assert json.loads(after[len(BOM):])["SliceTiming"][1] == 1.0  # 1000 ms -> 1 s
    assert {k: v for k, v in tree_hashes(ds).items() if not k.endswith("_bold.json")} == others


@pytest.mark.parametrize("stray", [b"", b"notes taken at the scanner\n"])
def test_a_stray_file_first_in_a_series_folder_hides_nothing(
    tmp_path: Path, stray: bytes
) -> None:
    # nibabel's mosaic: its private header lists the slice times (as test_dicom_source)
    root, _run, _truth = resting_tree(tmp_path, [i * 0.06 for i in range(32)])
    folder = root / "sourcedata" / "sub-01" / "rest"
    (folder / "000.dcm").write_bytes(stray)  # sorted before the series' files
    before = tree_hashes(root)
    result = audit_paths([root])
    found = {f.code: f for run in result.runs for f in run.findings
             if f.code.startswith("source/")}
    # the readable files still give their verdict: the times differ (an error, exit 1)
    assert found["source/times-differ"].severity.value == "error"
    assert "000.dcm" in found["source/files-skipped"].message
    assert found["source/files-skipped"].severity.value == "note"
    assert tree_hashes(root) == before


@pytest.mark.skipif(not hasattr(os, "O_NOFOLLOW") or not hasattr(os, "mkfifo"),
                    reason="POSIX open flags and FIFOs")
@pytest.mark.parametrize("kind", ["regular", "inner-link", "outer-link", "dangling",
                                  "fifo", "folder", "missing"])
def test_a_file_the_walk_listed_as_plain_is_opened_as_without_the_listing(
        tmp_path: Path, kind: str) -> None:
    # the audit's walk tells open_regular a file is a regular file and not a link
    # (plain=True) so that no lstat precedes the open; what stands at the path by then
    # must give the outcome the checked open gives: POSIX open(2) refuses a link as the
    # last part of the path with O_NOFOLLOW (ELOOP), and returns at once for a FIFO
    # with O_NONBLOCK, so neither is followed or waited on
    from slicetime.readers.errors import ReadError, open_regular

    root = tmp_path / "ds"
    root.mkdir()
    outside = tmp_path / "outside.json"
    outside.write_text('{"secret": 1}')
    inside = root / "other.json"
    inside.write_text('{"a": 1}')
    path = root / "sub-01_bold.json"
    if kind == "regular":
        path.write_text('{"b": 2}')
    elif kind == "inner-link":
        path.symlink_to(inside)
    elif kind == "outer-link":
        path.symlink_to(outside)
    elif kind == "dangling":
        path.symlink_to(root / "nothing.json")
    elif kind == "fifo":
        os.mkfifo(path)
    elif kind == "folder":
        path.mkdir()

    def outcome(plain: bool) -> tuple[str, str]:
        try:
            fh, _st = open_regular(str(path), "x.json", what="JSON file", root=str(root),
                                   plain=plain)
        except ReadError as err:
            return "refused", repr(err.to_finding())
        with fh:
            return "read", fh.read().decode()

    checked = outcome(False)
    assert outcome(True) == checked
    assert checked[0] == ("read" if kind in ("regular", "inner-link") else "refused")
