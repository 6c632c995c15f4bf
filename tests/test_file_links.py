"""File links that leave the dataset are reported and never read (a follow-up of issue
26, item 3): a run image or a sidecar that is a symbolic link to a file outside the
dataset root gets ``file/link-leaves-dataset`` and what it points at is not opened, in
audit, show, fix (plan and apply), correct and verify; links that stay inside the
dataset (an annex store, a sibling file) are read as before.

Link resolution is checked against the Python standard library (``os.path.realpath``,
the POSIX rules for resolving a path through symbolic links); that a dataset's reader
should not read files outside the tree it was given is common practice (no source).
"""

from __future__ import annotations

import json
import os
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from click.testing import CliRunner

from slicetime.interfaces.cli import cli
from slicetime.pipelines.audit import audit_paths
from tests.helpers_bids import symlink, tree_hashes, write_description, write_run, write_sidecar

MARKER = "private-value-7f3a"  # invented; must never appear in any output
TIMES = [0.0, 0.5, 1.0]
TR = 1.5
RUN = "sub-{s}/func/sub-{s}_task-x_bold.nii.gz"
OWN = "sub-{s}/func/sub-{s}_task-x_bold.json"


def invoke(*args: Any) -> tuple[int, str]:
    result = CliRunner().invoke(cli, [str(a) for a in args], catch_exceptions=False)
    return result.exit_code, result.output


@pytest.fixture
def linked(tmp_path: Path) -> Path:
    """sub-01's own sidecar and sub-02's image are links to files outside the dataset;
    sub-03 is plain. The timing comes from the top-level sidecar."""
    ds = tmp_path / "ds"
    write_description(ds)
    write_sidecar(ds, "task-x_bold.json", {"TaskName": "x", "RepetitionTime": TR,
                                           "SliceTiming": TIMES})
    for s in ("01", "02", "03"):
        write_run(ds, RUN.format(s=s), shape=(4, 4, 3, 8), tr=TR,
                  sidecar={"RepetitionTime": TR})
    outside = tmp_path / "home"
    outside.mkdir()
    secret = outside / "notes.json"
    secret.write_text(json.dumps({"RepetitionTime": TR, "Secret": MARKER}))
    (ds / OWN.format(s="01")).unlink()
    symlink(ds / OWN.format(s="01"), secret)
    image = ds / RUN.format(s="02")
    image.rename(outside / "image.nii.gz")
    symlink(image, outside / "image.nii.gz")
    return ds


@pytest.fixture
def opened(monkeypatch: pytest.MonkeyPatch) -> Iterator[list[str]]:
    """Every path this process opens with ``os.open`` (the readers' one way in)."""
    seen: list[str] = []
    real = os.open

    def recording(path: Any, *args: Any, **kwargs: Any) -> int:
        seen.append(os.fspath(path))
        return real(path, *args, **kwargs)

    monkeypatch.setattr(os, "open", recording)
    yield seen


def _links(ds: Path) -> list[Path]:
    return [ds / OWN.format(s="01"), ds / RUN.format(s="02")]


def test_audit_reports_file_links_out_and_never_opens_them(linked: Path,
                                                           opened: list[str]) -> None:
    result = audit_paths([linked])
    runs = {r.record.path: r for r in result.runs}
    assert len(runs) == 3  # no run silently missing
    for link in _links(linked):
        assert str(link) not in opened
    side = [f for f in runs[RUN.format(s="01")].findings
            if f.code == "file/link-leaves-dataset"]
    assert [(f.file, f.evidence["link_target"]) for f in side] == [
        (OWN.format(s="01"), os.path.realpath(linked / OWN.format(s="01")))]  # stdlib
    assert "Secret" not in runs[RUN.format(s="01")].record.metadata
    image = runs[RUN.format(s="02")]
    assert image.record.header is None
    assert [f.code for f in image.findings if f.code.startswith("file/")] == [
        "file/link-leaves-dataset"]
    assert [f.code for f in runs[RUN.format(s="03")].findings
            if f.code.startswith("file/")] == []


def test_show_and_the_json_report_carry_no_byte_of_the_target(linked: Path) -> None:
    _, shown = invoke("show", linked / RUN.format(s="01"), "--format", "json")
    assert MARKER not in shown
    assert "file/link-leaves-dataset" in shown
    _, report = invoke("audit", linked, "--format", "json")
    assert MARKER not in report
    codes = [f["code"] for r in json.loads(report)["runs"] for f in r["findings"]]
    assert codes.count("file/link-leaves-dataset") == 2


def test_fix_neither_shows_nor_replaces_a_linked_sidecar(linked: Path, tmp_path: Path) -> None:
    before = tree_hashes(tmp_path)
    _, plan = invoke("fix", linked, "--spread", "SliceTiming")
    assert MARKER not in plan
    # the shared file keeps SliceTiming: sub-01 could not receive its own copy
    assert "SliceTiming not spread: sub-01/func/sub-01_task-x_bold.json cannot be changed" \
        in plan
    _, applied = invoke("fix", linked, "--apply", "--replace-links", "--spread",
                        "SliceTiming", "--backup-dir", tmp_path / "backups")
    assert MARKER not in applied
    after = tree_hashes(tmp_path)
    assert {k for k in before if after.get(k) != before[k]} == set()
    assert (linked / OWN.format(s="01")).is_symlink()


def test_a_saved_plan_is_refused_on_a_sidecar_that_now_links_out(tmp_path: Path) -> None:
    ds = tmp_path / "ds"
    write_description(ds)
    write_run(ds, RUN.format(s="01"), tr=TR,
              sidecar={"RepetitionTime": TR, "SliceTiming": [t * 1000 for t in TIMES]})
    own = ds / OWN.format(s="01")
    plan = tmp_path / "plan.json"
    code, _ = invoke("fix", ds, "--plan", plan)
    assert code == 1 and plan.exists()
    # the same bytes, now outside the dataset behind a link: the plan's checksum matches
    moved = tmp_path / "elsewhere.json"
    own.rename(moved)
    symlink(own, moved)
    before = tree_hashes(tmp_path)
    code, output = invoke("fix", "--apply", "--plan", plan, "--replace-links",
                          "--backup-dir", tmp_path / "backups")
    assert code != 0
    assert "outside the dataset" in output
    after = {k: v for k, v in tree_hashes(tmp_path).items() if not k.startswith("backups")}
    assert after == before


def test_correct_copies_nothing_from_a_linked_sidecar_and_reads_no_linked_image(
    linked: Path, tmp_path: Path
) -> None:
    out = tmp_path / "out"
    code, output = invoke("correct", linked, "--out", out, "--format", "json")
    assert code == 1  # one run not corrected
    assert MARKER not in output
    report = json.loads(output)
    status = {r["path"]: (r["status"], r.get("reason") or "") for r in report["runs"]}
    assert status[RUN.format(s="01")][0] == "corrected"  # its timing is inherited
    assert status[RUN.format(s="02")][0] != "corrected"
    assert "outside the dataset" in status[RUN.format(s="02")][1]
    for path in out.rglob("*.json"):
        assert MARKER not in path.read_text()


def test_correct_names_the_own_sidecar_link_as_the_audit_does(tmp_path: Path) -> None:
    # the run's only timing is in its own sidecar, a link out of the dataset (not read):
    # correct's refusal gives the audit's own finding (file and message), not only "no
    # usable slice timing"
    ds = tmp_path / "ds"
    write_description(ds)
    write_run(ds, RUN.format(s="01"), shape=(4, 4, 3, 8), tr=TR)
    outside = tmp_path / "home" / "own.json"
    outside.parent.mkdir()
    outside.write_text(json.dumps({"RepetitionTime": TR, "SliceTiming": TIMES}))
    symlink(ds / OWN.format(s="01"), outside)
    audit = audit_paths([ds]).runs[0]
    link = next(f for f in audit.findings if f.code == "file/link-leaves-dataset")
    assert link.file == OWN.format(s="01")
    code, output = invoke("correct", ds, "--out", tmp_path / "out", "--format", "json")
    assert code == 1
    reason = json.loads(output)["runs"][0]["reason"]
    assert "no usable slice timing" in reason
    assert link.message.startswith(f"{link.file}: ")  # the audit's message names the file
    assert link.message in reason, reason


def test_verify_does_not_read_a_linked_image(linked: Path) -> None:
    code, output = invoke("verify", linked / RUN.format(s="02"))
    assert code == 2
    assert "outside the dataset" in output and "not read" in output


def test_links_that_stay_in_the_dataset_are_read(tmp_path: Path) -> None:
    ds = tmp_path / "ds"
    write_description(ds)
    store = ds / ".git" / "annex" / "objects" / "Ab" / "KEY" / "KEY"
    store.parent.mkdir(parents=True)
    store.write_text(json.dumps({"RepetitionTime": TR, "SliceTiming": TIMES}))
    write_run(ds, RUN.format(s="01"), tr=TR)
    symlink(ds / OWN.format(s="01"), os.path.relpath(store, (ds / OWN.format(s="01")).parent))
    write_run(ds, RUN.format(s="02"), tr=TR, sidecar={"RepetitionTime": TR, "SliceTiming": TIMES})
    twin = ds / "sub-02/func/sub-02_task-y_bold.json"
    symlink(twin, "sub-02_task-x_bold.json")  # a sibling in the same folder
    write_run(ds, "sub-02/func/sub-02_task-y_bold.nii.gz", tr=TR)
    result = audit_paths([ds])
    for run in result.runs:
        assert run.record.metadata.get("SliceTiming") == TIMES, run.record.path
        assert "file/link-leaves-dataset" not in {f.code for f in run.findings}
