"""Every file the tool writes is refused when it would land in the data (issue 26,
item 1): one decision (``readers.atomic.check_write_target``) for reports, pages,
plans, backups and correction outputs. Each case hashes the dataset (and the
other inputs) before and after."""

from __future__ import annotations

import os
from pathlib import Path

import pytest
from click.testing import CliRunner

from slicetime.interfaces.cli import cli
from slicetime.readers.atomic import WriteRefused, check_write_target
from tests.helpers_bids import symlink, tree_hashes, write_description, write_run
from tests.test_adversarial_fix import ms_dataset

RUN = "sub-01/func/sub-01_task-x_bold.nii.gz"
SIDECAR = {"SliceTiming": [0.0, 0.5, 1.0], "TaskName": "x"}


@pytest.fixture
def ds(tmp_path: Path) -> Path:
    root = tmp_path / "ds"
    write_description(root)
    write_run(root, RUN, sidecar=SIDECAR)
    write_run(root, RUN.replace("01", "02"), sidecar=SIDECAR)
    return root


def run(*args: object) -> tuple[int, str]:
    result = CliRunner().invoke(cli, [str(a) for a in args])
    return result.exit_code, result.output


def refused(code: int, output: str, shown: Path | str) -> bool:
    lines = output.strip().splitlines()
    return code == 2 and len(lines) == 1 and str(shown) in lines[0]


@pytest.mark.parametrize("option", ["--output", "--html"])
def test_audit_reports_never_replace_a_file_of_the_dataset(
    ds: Path, tmp_path: Path, option: str
) -> None:
    before = tree_hashes(ds)
    for target in (ds / RUN, ds / "report.json", ds / "sub-01" / "new-folder" / "r.json"):
        code, output = run("audit", ds, option, target)
        assert refused(code, output, target), output
    assert tree_hashes(ds) == before
    code, _ = run("audit", ds, option, tmp_path / f"report{option}")
    assert code in (0, 1) and (tmp_path / f"report{option}").is_file()


def test_a_report_path_through_a_link_into_the_dataset_is_refused(
    ds: Path, tmp_path: Path
) -> None:
    side = symlink(tmp_path / "reports", ds / "sub-01" / "func")  # looks outside, is inside
    link_file = symlink(tmp_path / "report.json", ds / RUN)  # a link at the name itself
    before = tree_hashes(ds)
    for target in (side / "report.json", link_file):
        code, output = run("audit", ds, "--output", target)
        assert refused(code, output, target), output
    assert tree_hashes(ds) == before and os.readlink(link_file) == str(ds / RUN)


def test_a_report_is_never_written_onto_another_input_file(ds: Path, tmp_path: Path) -> None:
    policy = tmp_path / "lab-policy.toml"
    policy.write_text("")
    code, output = run("audit", ds, "--policy", policy, "--output", policy)
    assert refused(code, output, policy)
    assert policy.read_text() == ""


def test_a_run_given_as_a_file_outside_any_dataset_is_an_input(tmp_path: Path) -> None:
    loose = write_run(tmp_path / "loose", "sub-01_task-x_bold.nii.gz", sidecar=SIDECAR)
    before = tree_hashes(tmp_path / "loose")
    code, output = run("audit", loose, "--output", loose)
    assert refused(code, output, loose)
    assert tree_hashes(tmp_path / "loose") == before


def test_fix_plans_and_backups_never_land_in_the_dataset(tmp_path: Path) -> None:
    ds = ms_dataset(tmp_path / "ms")
    before = tree_hashes(ds)
    plan = ds / "plan.json"
    code, output = run("fix", ds, "--plan", plan)
    assert refused(code, output, plan)
    backups = ds / "derivatives" / "backups"
    code, output = run("fix", ds, "--apply", "--backup-dir", backups)
    assert refused(code, output, backups)
    assert tree_hashes(ds) == before and not (ds / "derivatives").exists()
    code, _ = run("fix", ds, "--plan", tmp_path / "plan.json")  # outside: written
    assert code == 1 and (tmp_path / "plan.json").is_file()


def test_correct_out_follows_the_same_decision(ds: Path, tmp_path: Path) -> None:
    before = tree_hashes(ds)
    for out in (ds / "sub-01", ds / "derivatives"):
        code, output = run("correct", ds, "--out", out)
        assert refused(code, output, out), output
    assert tree_hashes(ds) == before


def test_the_decision_allows_derivatives_only_when_asked(ds: Path) -> None:
    inside = ds / "derivatives" / "aligned"
    check_write_target(inside, [ds], what="--out", folder=True, derivatives=True)
    with pytest.raises(WriteRefused, match="inside the input dataset"):
        check_write_target(inside, [ds], what="--output")
    with pytest.raises(WriteRefused, match="contains the input dataset"):
        check_write_target(ds.parent, [ds], what="--out", folder=True)
