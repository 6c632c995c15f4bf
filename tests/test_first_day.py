"""First-day trips of issue 27: each one with the behaviour a new user expects.

Outside references: BIDS (runs and their sidecars; `.nii` and `.nii.gz` are both
NIfTI file extensions of one run), click's documented behaviour for flags; the
rest is common practice (no source): Ctrl-C must not leave half-made folders.
"""

from __future__ import annotations

import contextlib
from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import Any

import pytest
from click.testing import CliRunner

import slicetime.interfaces.terminal as terminal
import slicetime.pipelines.correct as correct_module
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

    monkeypatch.setattr(correct_module, "map_chunks", stopped)
    result = CliRunner().invoke(cli, ["correct", str(root), "--out", str(out)])
    assert result.exit_code == 130
    assert "nothing to do" not in result.output  # no summary of zero runs ...
    assert "before any run was corrected" in result.output  # ... one consistent line
    assert not out.exists()  # this batch made the folder, and leaves none behind


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
