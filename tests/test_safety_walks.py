"""Walks and reads confined to what the user named (issue 26, items 3 and 7): folder
links that leave the dataset are reported once and not followed, a link to the
dataset given beside it audits the dataset, user-named files are read only when
they are regular files and only up to a bound; and the one test of "a path inside a
folder" every caller uses."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest
from click.testing import CliRunner

from slicetime.interfaces.cli import cli
from slicetime.readers.atomic import real_within, within
from slicetime.readers.source import MAX_SOURCE_MAP_BYTES
from tests.helpers_bids import symlink, tree_hashes, write_description, write_run

REPO = Path(__file__).resolve().parents[1]
DEADLINE = 60.0  # seconds: a hang is a failure, not a slow pass
SIDECAR = {"SliceTiming": [0.0, 0.5, 1.0], "TaskName": "x"}


def audit_json(*args: object) -> tuple[int, dict, str]:
    """``slicetime audit --format json`` in a subprocess, killed at the deadline."""
    done = subprocess.run(
        [sys.executable, "-c", "from slicetime.interfaces.cli import main; main()", "audit",
         *map(str, args),
         "--format", "json"],
        capture_output=True, text=True, timeout=DEADLINE, cwd=REPO, stdin=subprocess.DEVNULL,
    )
    try:
        return done.returncode, json.loads(done.stdout), done.stderr
    except ValueError:
        return done.returncode, {}, done.stderr


@pytest.fixture
def ds(tmp_path: Path) -> Path:
    root = tmp_path / "ds"
    write_description(root)
    for subject in ("01", "02"):
        write_run(root, f"sub-{subject}/func/sub-{subject}_task-x_bold.nii.gz", sidecar=SIDECAR)
    return root


def test_within_compares_whole_components() -> None:
    # os.path.commonpath (Python standard library) as the reference
    cases = [("/data/a/b", "/data/a"), ("/data/ab", "/data/a"), ("/data/a", "/data/a"),
             ("/data", "/data/a"), ("/x", "/"), ("/data/a/", "/data/a"), ("/data/a", "/data/a/")]
    for path, folder in cases:
        expected = os.path.commonpath([path, folder]) == os.path.normpath(folder)
        assert within(path.rstrip("/") or "/", folder) == expected, (path, folder)


def test_real_within_follows_links(tmp_path: Path) -> None:
    (tmp_path / "real" / "inner").mkdir(parents=True)
    symlink(tmp_path / "alias", tmp_path / "real")
    assert real_within(tmp_path / "alias" / "inner", tmp_path / "real")
    assert not real_within(tmp_path / "alias", tmp_path / "real" / "inner")


@pytest.mark.skipif(not os.path.isdir("/proc/self"), reason="needs /proc (Linux)")
def test_links_to_the_root_and_proc_are_reported_once_and_not_followed(ds: Path) -> None:
    symlink(ds / "sub-99", "/")
    symlink(ds / "sub-01" / "proc", "/proc")
    before = tree_hashes(ds)
    code, report, _ = audit_json(ds)
    assert code in (0, 1) and report["summary"]["runs"] == 2
    leaving = [f for f in report["dataset_findings"] if f["code"] == "file/link-leaves-dataset"]
    assert sorted(f["file"] for f in leaving) == [str(ds / "sub-01" / "proc"),
                                                  str(ds / "sub-99")]
    assert tree_hashes(ds) == before


def test_a_link_to_another_study_is_not_audited_unless_given(ds: Path, tmp_path: Path) -> None:
    other = tmp_path / "other" / "sub-07"
    write_run(other, "func/sub-07_task-x_bold.nii.gz", sidecar=SIDECAR)
    symlink(ds / "sub-07", other)
    _, report, _ = audit_json(ds)
    assert report["summary"]["runs"] == 2
    _, report, _ = audit_json(ds, ds / "sub-07")  # named: audited under its name in ds
    assert sorted(r["path"] for r in report["runs"])[-1] == "sub-07/func/sub-07_task-x_bold.nii.gz"


def test_a_link_to_the_dataset_given_beside_it_audits_the_dataset(
    ds: Path, tmp_path: Path
) -> None:
    link = symlink(tmp_path / "dslink", ds)
    alone_code, alone, _ = audit_json(link)
    both_code, both, stderr = audit_json(ds, link)
    assert both_code == alone_code and "no functional runs" not in stderr
    assert both["summary"]["runs"] == alone["summary"]["runs"] == 2


def test_a_folder_link_loop_ends(ds: Path) -> None:
    symlink(ds / "sub-01" / "func" / "again", "../..")
    symlink(ds / "sub-02" / "twin", ds / "sub-02")
    _, report, _ = audit_json(ds)
    assert report["summary"]["runs"] == 2


@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="needs FIFOs (POSIX)")
@pytest.mark.parametrize("option", ["--source-map", "--policy"])
@pytest.mark.parametrize("kind", ["fifo", "/dev/urandom", "/dev/zero"])
def test_user_named_special_files_are_refused_at_once(
    ds: Path, tmp_path: Path, option: str, kind: str
) -> None:
    if kind == "fifo":
        target = tmp_path / "named-pipe"
        os.mkfifo(target)
    else:
        if not os.path.exists(kind):
            pytest.skip(f"no {kind}")
        target = Path(kind)
    before = tree_hashes(ds)
    code, _, stderr = audit_json(ds, option, target)
    assert code == 2
    assert stderr.count("\n") == 1 and "not a regular file" in stderr and str(target) in stderr
    assert tree_hashes(ds) == before


def test_a_source_map_larger_than_its_bound_is_not_read(ds: Path, tmp_path: Path) -> None:
    huge = tmp_path / "map.tsv"
    with open(huge, "wb") as fh:
        fh.truncate(MAX_SOURCE_MAP_BYTES + 1)  # sparse: no real disk use
    result = CliRunner().invoke(cli, ["audit", str(ds), "--source-map", str(huge)])
    assert result.exit_code == 2
    assert f"larger than {MAX_SOURCE_MAP_BYTES} bytes" in result.output
