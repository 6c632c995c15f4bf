"""The CI recipes in examples/ci/ work as pasted (issue 27).

Outside references: the JUnit XML report is parsed with the standard library's
``xml.etree`` (the format's ``testsuite``/``testcase``/``failure`` elements, from
memory); the workflow and the pre-commit configuration are read with PyYAML; the
shell script runs under ``/bin/sh``. The planted defect is SliceTiming in
milliseconds (BIDS: SliceTiming is in seconds).
"""

from __future__ import annotations

import os
import shlex
import subprocess
import sys
import xml.etree.ElementTree as ET
from pathlib import Path

import pytest

from slicetime.schemes.generate import Protocol, slice_timing
from tests.helpers_bids import write_description, write_run, write_sidecar

REPO = Path(__file__).resolve().parents[1]
CI = REPO / "examples" / "ci"
RUN = "sub-01/func/sub-01_task-tap_bold.nii.gz"


def _dataset(root: Path, *, broken: bool) -> Path:
    times = slice_timing(Protocol(n_slices=10, order="interleaved", repetition_time=2.0))
    write_description(root)
    write_sidecar(root, "task-tap_bold.json", {
        "RepetitionTime": 2.0, "SliceTiming": [t * 1000 for t in times] if broken else times})
    write_run(root, RUN, shape=(4, 4, 10, 5), tr=2.0)
    return root


def _env(**extra: str) -> dict[str, str]:
    env = dict(os.environ)
    # the slicetime command of this test environment is on PATH (a CI that installed it)
    env["PATH"] = f"{Path(sys.executable).parent}{os.pathsep}{env.get('PATH', '')}"
    env.pop("SLICETIME_SPEC", None)
    env.update(extra)
    return env


@pytest.mark.parametrize("broken", [True, False])
def test_the_shell_script_writes_both_reports_and_keeps_the_exit_status(
        tmp_path: Path, broken: bool) -> None:
    root = _dataset(tmp_path / "ds", broken=broken)
    done = subprocess.run(["sh", str(CI / "slicetime-audit.sh"), "."], cwd=root,
                          env=_env(), capture_output=True, text=True, timeout=300)
    assert done.returncode == (1 if broken else 0), done.stdout + done.stderr
    reports = root.parent / "ds-slicetime-reports"  # beside the dataset, never inside it
    suite = ET.parse(reports / "audit.xml").getroot()
    failures = suite.findall(".//failure")
    assert bool(failures) == broken
    if broken:
        assert any(f.get("type") == "timing/units-ms" for f in failures)
    assert (reports / "audit.html").read_text(encoding="utf-8").lstrip().lower().startswith(
        "<!doctype html")
    assert not (root / ".slicetime-venv").exists()  # the command on PATH was used


def test_the_hosted_ci_job_runs_as_pasted(tmp_path: Path) -> None:
    yaml = pytest.importorskip("yaml")
    job = yaml.safe_load((CI / "github-workflow.yml").read_text())
    steps = job["jobs"]["slicetime"]["steps"]
    runs = [s["run"] for s in steps if "run" in s]
    assert "pip install slicetime-bids" in runs[0]  # the distribution's name, not `slicetime`
    checkout = next(s for s in steps if s.get("uses", "").startswith("actions/checkout"))
    workspace = tmp_path / "workspace"
    root = _dataset(workspace / checkout["with"]["path"], broken=True)
    before = {p for p in root.rglob("*")}
    done = subprocess.run(["sh", "-ec", runs[1]], cwd=workspace, env=_env(),
                          capture_output=True, text=True, timeout=300)
    assert done.returncode == 1, done.stdout + done.stderr  # the job fails on the error
    kept = next(s for s in steps if s.get("uses", "").startswith("actions/upload-artifact"))
    assert kept["if"] == "always()"  # the reports are kept when the audit fails
    folder = workspace / kept["with"]["path"]
    assert {p.name for p in folder.iterdir()} == {"audit.xml", "audit.html"}
    assert {p for p in root.rglob("*")} == before  # nothing written inside the dataset
    ET.parse(folder / "audit.xml")


def test_the_pre_commit_example_runs_its_entry(tmp_path: Path) -> None:
    yaml = pytest.importorskip("yaml")
    config = yaml.safe_load((CI / "pre-commit-config.yaml").read_text())
    (repo,) = config["repos"]
    assert repo["repo"] == "local"  # the framework's spelling for hooks defined in place
    (hook,) = repo["hooks"]
    published = yaml.safe_load((REPO / ".pre-commit-hooks.yaml").read_text())[0]
    for key in ("id", "entry", "pass_filenames", "always_run", "args"):
        assert hook[key] == published[key]
    for broken, status in ((True, 1), (False, 0)):
        root = _dataset(tmp_path / f"ds{int(broken)}", broken=broken)
        command = [*shlex.split(hook["entry"]), *hook["args"]]
        done = subprocess.run(command, cwd=root, env=_env(), capture_output=True, text=True,
                              timeout=300)
        assert done.returncode == status, done.stdout + done.stderr
