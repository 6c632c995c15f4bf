"""Issue 23: what users saw disagree, each checked once through the commands they typed."""

from __future__ import annotations

import json
from pathlib import Path

from click.testing import CliRunner

from slicetime.interfaces.cli import cli
from slicetime.schemes.generate import Protocol, slice_timing
from tests.helpers_bids import write_description, write_json, write_run


def _times(n: int, tr: float) -> list[float]:
    # an ascending protocol as slicetime's generator (checked against the standard's
    # definition in test_schemes_generate.py) writes it
    return [float(t) for t in slice_timing(Protocol(n_slices=n, repetition_time=tr))]


def test_the_run_group_table_and_the_run_line_show_one_tr(tmp_path: Path) -> None:
    # BIDS: RepetitionTime lives in the sidecar, in seconds, and the sidecar wins over the
    # header's pixdim[4] (from memory). Without SliceTiming the run still has that TR, in
    # the JSON run object, the run line and the run-group table alike.
    root = tmp_path / "ds"
    write_description(root)
    write_run(root, "sub-01/func/sub-01_task-x_bold.nii.gz", tr=2000.0,
              sidecar={"TaskName": "x", "RepetitionTime": 2.0})
    report = CliRunner().invoke(cli, ["audit", str(root), "--format", "json"])
    (run,) = json.loads(report.output)["runs"]
    assert run["repetition_time"] == 2.0
    assert run["sources"]["RepetitionTime"].endswith("sub-01_task-x_bold.json")
    text = CliRunner().invoke(cli, ["audit", str(root), "--format", "text"],
                              env={"COLUMNS": "120"}).output
    group = next(line for line in text.splitlines() if line.startswith("func: task-x_bold"))
    assert " 2 s " in group + " "
    line = next(line for line in text.splitlines() if line.startswith("sub-01/func/"))
    assert "TR 2 s" in line


def test_a_run_level_direction_is_reported_at_the_run_and_its_field(tmp_path: Path) -> None:
    # BIDS specification, SliceEncodingDirection: a "-" sign reverses what SliceTiming
    # lists. Six runs read the shared list ascending; the seventh reverses it in its own
    # sidecar, so its own file and field are what differs, not the shared SliceTiming.
    root = tmp_path / "ds"
    write_description(root)
    write_json(root / "task-x_bold.json",
               {"TaskName": "x", "RepetitionTime": 2.0, "SliceTiming": _times(3, 2.0)})
    for i in range(1, 8):
        write_run(root, f"sub-0{i}/func/sub-0{i}_task-x_bold.nii.gz",
                  sidecar={"SliceEncodingDirection": "k-"} if i == 7 else {})
    report = json.loads(CliRunner().invoke(cli, ["audit", str(root), "--format",
                                                 "json"]).output)
    found = [(run["path"], f) for run in report["runs"] for f in run["findings"]
             if f["code"] == "dataset/outlier-scheme"]
    assert len(found) == 1
    path, finding = found[0]
    assert path == "sub-07/func/sub-07_task-x_bold.nii.gz"
    assert finding["file"] == "sub-07/func/sub-07_task-x_bold.json"
    assert finding["field"] == "SliceEncodingDirection"
