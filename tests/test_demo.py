"""The demo: the whole job on the invented study, deterministic and complete."""

from __future__ import annotations

import json
import sys
from pathlib import Path

import jsonschema
import pytest
from click.testing import CliRunner

from slicetime.interfaces.cli import cli
from slicetime.interfaces.demo_tour import command_name, run_demo
from slicetime.interfaces.report_json import report_schema
from tests.helpers_bids import tree_hashes


def test_the_demo_runs_the_whole_job(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "demo"
    assert run_demo(out) == 0
    printed = capsys.readouterr().out
    # the planted override (descending) is contradicted by the simulated data, which
    # were acquired interleaved (see tests/test_verify.py for the method's rates)
    assert printed.count("verify/contradicted") == 2
    report = json.loads((out / "audit.json").read_text())
    jsonschema.validate(report, report_schema())  # the JSON report contract
    codes = {f["code"] for run in report["runs"] for f in run["findings"]}
    # every planted defect is found
    assert {"timing/units-ms", "header/tr-disagrees", "scheme/multiband-undeclared",
            "file/truncated", "inherit/timing-override"} <= codes
    fixed = out / "quiet-rooms-fixed"
    top = json.loads((fixed / "task-chirp_bold.json").read_text())
    assert top["MultibandAccelerationFactor"] == 3
    rest = json.loads((fixed / "sub-01/ses-1/func/sub-01_ses-1_task-rest_bold.json").read_text())
    assert max(rest["SliceTiming"]) < 2.5
    assert (out / "fix-backups" / "journal.json").exists()
    derivatives = fixed / "derivatives" / "slicetime"
    corrected = sorted(derivatives.rglob("*_desc-timealigned_bold.nii.gz"))
    # all but the truncated file, the wrong header TR and sub-03's two hum runs, whose
    # override the dataset's other runs (and the images, step 3) contradict: their
    # timing stands in doubt, so correct refuses them and says how a doubt is accepted
    assert len(corrected) == 17
    assert not list(derivatives.glob("sub-03/*/func/*task-hum*"))
    assert "refused for doubt: 2 runs" in printed
    assert "--accept 'dataset/outlier-scheme:sub-03/**'" in printed
    # the command to paste is whole on one line (not wrapped, not shortened)
    command = next(line.strip() for line in printed.splitlines()
                   if line.strip().startswith("slicetime correct "))
    assert command.endswith("--accept 'dataset/outlier-scheme:sub-03/**'")
    assert f"--out {derivatives}" in command
    assert (derivatives / "dataset_description.json").exists()
    # the planted study itself was never modified by the repairs
    original = json.loads((out / "quiet-rooms/task-chirp_bold.json").read_text())
    assert "MultibandAccelerationFactor" not in original


def test_the_demo_is_deterministic(tmp_path: Path) -> None:
    run_demo(tmp_path / "a")
    run_demo(tmp_path / "b")
    a = json.loads((tmp_path / "a" / "audit.json").read_text())
    b = json.loads((tmp_path / "b" / "audit.json").read_text())
    for report in (a, b):  # the only differences allowed: where it was written
        report.pop("root", None)
        report.pop("roots", None)
        for dataset in report["datasets"]:
            dataset.pop("root")
        for shared in report["shared_findings"]:
            shared.pop("root")
    assert a == b


def test_the_demo_runs_again_in_the_same_folder(tmp_path: Path) -> None:
    # `make demo` twice in one clone: the second run rebuilds the output cleanly
    out = tmp_path / "demo-output"
    first = CliRunner().invoke(cli, ["demo", "--out", str(out)])
    assert first.exit_code == 0, first.output
    before = json.loads((out / "audit.json").read_text())
    second = CliRunner().invoke(cli, ["demo", "--out", str(out)])
    assert second.exit_code == 0, second.output
    assert "internal error" not in second.output
    assert json.loads((out / "audit.json").read_text()) == before
    # one journal: the earlier run's backups were removed with the rest of its output
    assert [p.name for p in (out / "fix-backups").iterdir()].count("journal.json") == 1


def test_the_demo_refuses_a_folder_that_is_not_its_own(tmp_path: Path) -> None:
    dataset = tmp_path / "study"
    dataset.mkdir()
    (dataset / "dataset_description.json").write_text('{"Name": "a lab study"}')
    before = tree_hashes(dataset)
    out = CliRunner().invoke(cli, ["demo", "--out", str(dataset)])
    assert out.exit_code == 2 and "not an earlier demo output" in out.output
    assert tree_hashes(dataset) == before  # nothing written
    empty = tmp_path / "empty"
    empty.mkdir()
    assert CliRunner().invoke(cli, ["demo", "--out", str(empty)]).exit_code == 0


def test_the_demo_names_a_command_that_works_in_this_shell(
        monkeypatch: pytest.MonkeyPatch) -> None:
    # not on PATH: the tour names the command installed beside this Python
    monkeypatch.setenv("PATH", "/nonexistent")
    name = command_name()
    beside = Path(sys.executable).parent / "slicetime"
    if beside.exists():
        assert Path(name).resolve() == beside.resolve()
    else:
        assert name == "slicetime"
