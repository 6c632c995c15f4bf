"""The demo: the whole job on the invented study, deterministic and complete."""

from __future__ import annotations

import json
from pathlib import Path

import jsonschema
import pytest

from slicetime.interfaces.demo_tour import run_demo
from slicetime.interfaces.report_json import report_schema


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
    assert a == b
