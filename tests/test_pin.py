"""``slicetime pin``: the dataset's protocol written as a lab policy (issue 27).

Outside references: nibabel (the slice count read from each image), the sidecars'
own JSON (the TR and SliceEncodingDirection written there), tomllib (the file is
TOML), and the BIDS specification (task and acq entities select runs).
"""

from __future__ import annotations

import itertools
import json
import re
from pathlib import Path

import nibabel as nib
import pytest
from click.testing import CliRunner

from slicetime.interfaces.cli import cli
from slicetime.pipelines.demo import build_demo_dataset

tomllib = pytest.importorskip("tomllib")  # Python 3.11+: the standard library's TOML reader
PATH_LINE = re.compile(r"^#   (\S+)$")
CODE_LINE = re.compile(r"^#     (policy/[a-z-]+) \(has .*\)$")


def listed_runs(text: str) -> set[tuple[str, str]]:
    """(path, code) of the disagreeing runs the file lists: a path line, then its code."""
    lines = text.splitlines()
    return {(p.group(1), c.group(1)) for a, b in itertools.pairwise(lines)
            if (p := PATH_LINE.match(a)) and (c := CODE_LINE.match(b))}


@pytest.fixture(scope="module")
def study(tmp_path_factory: pytest.TempPathFactory) -> Path:
    root = tmp_path_factory.mktemp("pin") / "study"
    build_demo_dataset(root)
    # one more deviation: a chirp run whose slices run the other way
    run = root / "sub-02/ses-2/func/sub-02_ses-2_task-chirp_bold.json"
    run.write_text(json.dumps({"SliceEncodingDirection": "k-"}))
    return root


def test_the_written_policy_reports_exactly_the_runs_it_lists(study: Path,
                                                               tmp_path: Path) -> None:
    policy = tmp_path / "policy.toml"
    out = CliRunner().invoke(cli, ["pin", str(study), "--output", str(policy)])
    assert out.exit_code == 0, out.output
    text = policy.read_text()
    document = tomllib.loads(text)  # the file is TOML
    listed = listed_runs(text)
    assert all(len(line) <= 80 for line in text.splitlines() if line.startswith("#"))
    assert ("sub-02/ses-2/func/sub-02_ses-2_task-chirp_bold.nii.gz",
            "policy/direction-mismatch") in listed
    audited = CliRunner().invoke(cli, ["audit", str(study), "--policy", str(policy),
                                       "--format", "json"])
    assert audited.exit_code in (0, 1), audited.output
    report = json.loads(audited.output)
    reported = {(run["path"], f["code"]) for run in report["runs"] for f in run["findings"]
                if f["code"].startswith("policy/")}
    assert reported == listed and listed
    # the majority's values, against the files themselves
    hum = next(p for p in document["protocols"] if p["match"] == {"task": "hum"})
    top = json.loads((study / "task-hum_bold.json").read_text())
    assert hum["repetition_time"] == top["RepetitionTime"]
    image = nib.load(study / "sub-01/ses-1/func/sub-01_ses-1_task-hum_bold.nii.gz")
    assert hum["slices"] == image.shape[2]  # nibabel: slices along k
    assert hum["slice_encoding_direction"] == "k"  # BIDS default when absent


def test_pin_never_overwrites_and_changes_nothing(study: Path, tmp_path: Path) -> None:
    from tests.helpers_bids import tree_hashes

    before = tree_hashes(study)
    printed = CliRunner().invoke(cli, ["pin", str(study)])
    assert printed.exit_code == 0 and printed.output.count("[[protocols]]") == 4
    existing = tmp_path / "policy.toml"
    existing.write_text("version = 1\n")
    refused = CliRunner().invoke(cli, ["pin", str(study), "--output", str(existing)])
    assert refused.exit_code == 2 and "already exists" in refused.output
    assert existing.read_text() == "version = 1\n"
    assert tree_hashes(study) == before
