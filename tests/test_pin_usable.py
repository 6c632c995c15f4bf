"""``slicetime pin`` takes a protocol only from runs with usable timing, counts in proper
English, and writes comment lines that fit 80 columns."""

from __future__ import annotations

from pathlib import Path

import pytest
from click.testing import CliRunner

from slicetime.interfaces.cli import cli
from tests.helpers_bids import write_description, write_run

tomllib = pytest.importorskip("tomllib")  # Python 3.11+: the standard library's TOML reader

# BIDS "Task imaging data": SliceTiming in seconds, below RepetitionTime
GOOD = {"RepetitionTime": 2.0, "SliceTiming": [0.0, 0.5, 1.0, 1.5]}
LONG = "sub-01/ses-baseline/func/sub-01_ses-baseline_task-{}_acq-hires_bold.nii.gz"


def pin(root: Path) -> str:
    result = CliRunner().invoke(cli, ["pin", str(root)])
    assert result.exit_code == 0, result.output
    return result.stdout


def test_a_single_run_agrees_in_the_singular(tmp_path: Path) -> None:
    write_description(tmp_path)
    write_run(tmp_path, "sub-01/func/sub-01_task-a_bold.nii.gz", shape=(4, 4, 4, 5), tr=2.0,
              sidecar=GOOD)
    text = pin(tmp_path)
    assert "# the only run agrees" in text and "1 runs" not in text


def test_runs_without_usable_timing_give_no_protocol(tmp_path: Path) -> None:
    write_description(tmp_path)
    for sub in ("01", "02"):
        write_run(tmp_path, LONG.format("a").replace("01", sub), shape=(4, 4, 4, 5), tr=2.0,
                  sidecar=GOOD)
    # an image not retrieved (0 bytes) whose sidecar states another protocol
    empty = tmp_path / LONG.format("b")
    empty.parent.mkdir(parents=True, exist_ok=True)
    empty.write_bytes(b"")
    empty.with_name(empty.name.replace(".nii.gz", ".json")).write_text(
        '{"RepetitionTime": 3.0, "SliceTiming": [2.25, 1.5, 0.75, 0.0]}')
    # and one more such run among the good ones of task a
    lost = tmp_path / LONG.format("a").replace("sub-01", "sub-03")
    lost.parent.mkdir(parents=True, exist_ok=True)
    lost.write_bytes(b"")
    text = pin(tmp_path)
    document = tomllib.loads(text)  # the file is TOML
    assert [p["match"] for p in document["protocols"]] == [{"task": "a", "acq":
                                                           "hires"}]
    assert document["protocols"][0]["repetition_time"] == GOOD["RepetitionTime"]
    assert "no run has usable timing; no entry written" in text
    comments = "\n".join(line for line in text.splitlines() if line.startswith("#"))
    assert LONG.format("b") in comments and "sub-03" in comments
    assert "all 2 runs agree" in text  # the lost run is not counted among them
    assert all(len(line) <= 80 for line in comments.splitlines())


def test_a_run_whose_tr_no_run_can_have_gives_no_protocol(tmp_path: Path) -> None:
    # a TR of 0.01 s (the audit's tr/implausible, model.implausible_repetition): pin
    # would otherwise write it as the lab's expected TR, which the policy loader refuses
    write_description(tmp_path)
    write_run(tmp_path, "sub-01/func/sub-01_task-a_bold.nii.gz", shape=(4, 4, 4, 5), tr=0.01,
              sidecar={"RepetitionTime": 0.01, "SliceTiming": [0.0, 0.005, 0.0025, 0.0075]})
    text = pin(tmp_path)
    assert "repetition_time" not in tomllib.loads(text).get("protocols", [{}])[0]
    assert "below the shortest plausible TR" in text
