"""Runs whose image content is not retrieved are audited from their sidecars (issue 27).

Outside references:
- the BIDS specification: SliceTiming and RepetitionTime live in the sidecars, so the
  schedule and scheme need no image; the inheritance principle gives a run every
  sidecar above it;
- annexed datasets keep large files as symbolic links into ``.git/annex/objects``
  whose target is absent until the content is fetched: common practice (no source).
"""

from __future__ import annotations

import json
from pathlib import Path

from click.testing import CliRunner

from slicetime.interfaces.cli import cli
from slicetime.rules.header import header_checks
from tests.helpers_bids import symlink, write_description, write_run, write_sidecar

TIMES = [0.0, 1.0, 0.5, 1.5]  # the sidecar's values; expectations are read back from it


def _tree(tmp_path: Path) -> Path:
    root = tmp_path / "ds"
    write_description(root)
    write_sidecar(root, "task-rest_bold.json", {"RepetitionTime": 2.0, "SliceTiming": TIMES})
    for sub in ("01", "02"):  # retrieved runs, the reference for the others
        write_run(root, f"sub-{sub}/func/sub-{sub}_task-rest_bold.nii.gz", shape=(4, 4, 4, 5),
                  tr=2.0)
    key = "MD5E-s1234--0123456789abcdef.nii.gz"
    symlink(root / "sub-03/func/sub-03_task-rest_bold.nii.gz",
            f"../../.git/annex/objects/Qx/7K/{key}/{key}")
    (root / "sub-04/func").mkdir(parents=True)
    (root / "sub-04/func/sub-04_task-rest_bold.nii.gz").write_bytes(b"")
    # an outlier TR in an unretrieved run: the dataset consensus still sees it
    (root / "sub-04/func/sub-04_task-rest_bold.json").write_text(
        json.dumps({"RepetitionTime": 2.5}))
    return root


def test_unretrieved_runs_keep_schedule_scheme_and_consensus(tmp_path: Path) -> None:
    root = _tree(tmp_path)
    out = CliRunner().invoke(cli, ["audit", str(root), "--format", "json"])
    assert out.exit_code == 0, out.output  # warnings only: the exit status of any warning
    runs = {r["path"]: r for r in json.loads(out.output)["runs"]}
    reference = runs["sub-01/func/sub-01_task-rest_bold.nii.gz"]
    for path, reason in (("sub-03/func/sub-03_task-rest_bold.nii.gz", "annex"),
                         ("sub-04/func/sub-04_task-rest_bold.nii.gz", "placeholder")):
        run = runs[path]
        assert run["scheme"] == reference["scheme"]  # the same sidecar times, the same scheme
        codes = [f["code"] for f in run["findings"]]
        assert codes.count("file/not-retrieved") == 1
        assert "file/not-nifti" not in codes and "file/no-content" not in codes
        finding = next(f for f in run["findings"] if f["code"] == "file/not-retrieved")
        assert finding["evidence"]["reason"] == reason
        assert set(finding["evidence"]["not_checked"]) == set(header_checks())
        assert "header/tr-disagrees" in finding["evidence"]["not_checked"]
    annexed = next(f for f in runs["sub-03/func/sub-03_task-rest_bold.nii.gz"]["findings"]
                   if f["code"] == "file/not-retrieved")
    assert "git annex get sub-03/func/sub-03_task-rest_bold.nii.gz" in annexed["message"]
    outlier = [f["code"] for f in runs["sub-04/func/sub-04_task-rest_bold.nii.gz"]["findings"]]
    assert "dataset/outlier-tr" in outlier  # 2.5 s against the other three runs' 2 s
    strict = CliRunner().invoke(cli, ["audit", str(root), "--fail-on", "warning", "-q"])
    assert strict.exit_code == 1


def test_show_on_an_annexed_run_shows_its_sidecar_schedule(tmp_path: Path) -> None:
    root = _tree(tmp_path)
    run_path = root / "sub-03/func/sub-03_task-rest_bold.nii.gz"
    out = CliRunner().invoke(cli, ["show", str(run_path), "--format", "json", "--fail-on", "error"])
    assert out.exit_code == 0, out.output
    run = json.loads(out.output)
    assert run["slice_times"] == TIMES and run["repetition_time"] == 2.0  # the sidecar's
    assert run["shape"] is None  # the header was not read
