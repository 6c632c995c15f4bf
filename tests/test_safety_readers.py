"""Readers that tell the truth about odd files (issue 26, item 7): a sidecar with a
UTF-8 byte-order mark is read, reported as a note and repaired with the mark kept;
a series folder's unreadable files are reported while its readable files still
give their verdict."""

from __future__ import annotations

import json
from pathlib import Path

from click.testing import CliRunner

from slicetime.interfaces.cli import cli
from tests.helpers_bids import tree_hashes
from tests.test_adversarial_fix import ms_dataset

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
