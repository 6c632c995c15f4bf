"""First-day trips of issue 27: each one with the behaviour a new user expects.

Outside references: BIDS (runs and their sidecars; `.nii` and `.nii.gz` are both
NIfTI file extensions of one run), click's documented behaviour for flags; the
rest is common practice (no source): Ctrl-C must not leave half-made folders.
"""

from __future__ import annotations

import contextlib
import re
from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import Any

import pytest
from click.testing import CliRunner

import slicetime.interfaces.terminal as terminal
import slicetime.pipelines.correct as correct_module
import slicetime.pipelines.correct_batch as batch_module
from slicetime.interfaces.cli import cli
from slicetime.pipelines.executor import Interrupted
from slicetime.readers.entities import sidecar_name
from slicetime.schemes.generate import Protocol, slice_timing
from tests.helpers_bids import write_description, write_run, write_sidecar

TIMES = slice_timing(Protocol(n_slices=6, order="interleaved", repetition_time=2.0))


def _dataset(root: Path, runs: int = 3) -> Path:
    write_description(root)
    write_sidecar(root, "task-x_bold.json", {"RepetitionTime": 2.0, "SliceTiming": TIMES})
    for n in range(1, runs + 1):
        write_run(root, f"sub-0{n}/func/sub-0{n}_task-x_bold.nii.gz", shape=(4, 4, 6, 8),
                  tr=2.0)
    return root


def test_correct_no_progress_asks_for_no_progress(tmp_path: Path,
                                                  monkeypatch: pytest.MonkeyPatch) -> None:
    root = _dataset(tmp_path / "ds", runs=1)
    asked: list[str] = []

    @contextlib.contextmanager
    def recording(what: str, **_: Any) -> Iterator[None]:
        asked.append(what)
        yield None

    monkeypatch.setattr(terminal, "progress_reporter", recording)
    quiet = CliRunner().invoke(cli, ["correct", str(root), "--out", str(tmp_path / "a"),
                                     "--no-progress"])
    assert quiet.exit_code == 0, quiet.output
    assert asked == []
    loud = CliRunner().invoke(cli, ["correct", str(root), "--out", str(tmp_path / "b")])
    assert loud.exit_code == 0 and asked == ["correcting"]  # the flag makes the difference


def test_a_very_early_ctrl_c_in_correct_leaves_nothing(tmp_path: Path,
                                                        monkeypatch: pytest.MonkeyPatch) -> None:
    root = _dataset(tmp_path / "ds")
    out = tmp_path / "aligned"

    def stopped(job: Any, items: Sequence[Any], **_: Any) -> list[Any]:
        # a worker had made its run's folder when Ctrl-C came; no run finished
        record = items[0][0].record
        target = correct_module.output_path(record.path, "timealigned")
        assert target is not None
        (out / target).parent.mkdir(parents=True, exist_ok=True)
        raise Interrupted([None] * len(items))

    monkeypatch.setattr(batch_module, "map_chunks", stopped)
    result = CliRunner().invoke(cli, ["correct", str(root), "--out", str(out)])
    assert result.exit_code == 130
    assert "nothing to do" not in result.output  # no summary of zero runs ...
    assert "before any run was corrected" in result.output  # ... one consistent line
    assert not out.exists()  # this batch made the folder, and leaves none behind


def test_a_ctrl_c_before_any_run_in_a_reused_out_names_the_description_it_left(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # --out existed before the batch, so the dataset_description.json written before the
    # first run (BIDS derivatives: a derivative dataset has its own description) stays;
    # the line says exactly that, never "nothing written"
    root = _dataset(tmp_path / "ds")
    out = tmp_path / "aligned"
    out.mkdir()

    def stopped(job: Any, items: Sequence[Any], **_: Any) -> list[Any]:
        raise Interrupted([None] * len(items))

    monkeypatch.setattr(batch_module, "map_chunks", stopped)
    result = CliRunner().invoke(cli, ["correct", str(root), "--out", str(out)])
    description = out / "dataset_description.json"
    assert result.exit_code == 130 and description.is_file()
    lines = [line for line in result.output.splitlines() if "interrupted" in line]
    assert len(lines) == 1 and "before any run was corrected" in lines[0], result.output
    assert "nothing written" not in lines[0] and str(description) in lines[0]
    assert sorted(p.name for p in out.iterdir()) == [description.name]


def test_nii_and_nii_gz_copies_of_one_run_are_flagged(tmp_path: Path) -> None:
    root = _dataset(tmp_path / "ds", runs=1)
    write_run(root, "sub-01/func/sub-01_task-x_bold.nii", shape=(4, 4, 6, 8), tr=2.0)
    assert sidecar_name("sub-01_task-x_bold.nii") == sidecar_name("sub-01_task-x_bold.nii.gz")
    result = CliRunner().invoke(cli, ["audit", str(root), "--format", "json"])
    import json

    report = json.loads(result.output)
    flagged = {run["path"] for run in report["runs"] for f in run["findings"]
               if f["code"] == "dataset/duplicate-run"}
    assert flagged == {"sub-01/func/sub-01_task-x_bold.nii",
                       "sub-01/func/sub-01_task-x_bold.nii.gz"}
    assert result.exit_code == 1


def test_fix_takes_source_and_no_source_like_audit(tmp_path: Path) -> None:
    # nibabel's resting mosaic as the source (see tests/test_dicom_source.py): the sidecar's
    # wrong times are rebuilt from it, unless the cross-check is switched off
    from tests.test_dicom_source import resting_tree

    root, _, _ = resting_tree(tmp_path, [i * 0.06 for i in range(32)])
    with_source = CliRunner().invoke(cli, ["fix", str(root), "--source"])
    assert with_source.exit_code == 1 and "source/times-differ" in with_source.output
    without = CliRunner().invoke(cli, ["fix", str(root), "--no-source"])
    assert without.exit_code == 0, without.output
    assert "source/" not in without.output


def test_the_fix_plan_lists_what_it_leaves_and_why(tmp_path: Path) -> None:
    import json

    from slicetime.pipelines.demo import build_demo_dataset
    from slicetime.pipelines.fix import plan_fix

    root = tmp_path / "study"
    build_demo_dataset(root)
    shown = CliRunner().invoke(cli, ["fix", str(root)])
    assert shown.exit_code == 1
    listed = dict(re.findall(r"^  ([a-z]+/[a-z-]+) ×(\d+): ", shown.output, flags=re.M))
    # the audit's own report, minus what the plan repairs, is what the plan leaves
    report = json.loads(CliRunner().invoke(cli, ["audit", str(root), "--format",
                                                 "json"]).output)
    plan = plan_fix([root])
    repaired = {(r.run, r.code) for c in plan.changes for r in c.repairs}
    expected: dict[str, int] = {}
    for run in report["runs"]:
        for f in run["findings"]:
            if f["severity"] != "note" and (run["path"], f["code"]) not in repaired:
                expected[f["code"]] = expected.get(f["code"], 0) + 1
    for f in report.get("dataset_findings", []):
        if f["severity"] != "note":
            expected[f["code"]] = expected.get(f["code"], 0) + 1
    assert {k: int(v) for k, v in listed.items()} == expected
    assert "file/truncated" in listed  # a defect no sidecar edit can repair
    assert "Copy or convert the run again" in shown.output  # and what to do instead
