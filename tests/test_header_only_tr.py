"""A TR that only the image header gives is said to be the header's only, on every
screen and in every report, and the run-group table counts runs.

BIDS ("Task imaging data", "Required fields"): RepetitionTime belongs in the
sidecar; the NIfTI header's pixdim[4] (nibabel: ``header.get_zooms()[3]``) is what is
left when no sidecar gives it, which ``tr/missing`` reports.
"""

from __future__ import annotations

import csv
import io
import json
from pathlib import Path

import jsonschema
import nibabel as nib
import pytest
from click.testing import CliRunner

from slicetime.interfaces.cli import cli
from slicetime.interfaces.report_json import report_schema
from tests.helpers_bids import write_description, write_run

HEADER_ONLY = "sub-01/func/sub-01_task-a_bold.nii.gz"
SIDECAR_TR = "sub-02/func/sub-02_task-a_bold.nii.gz"


def invoke(*args: str) -> tuple[int, str]:
    result = CliRunner().invoke(cli, list(args), env={"COLUMNS": "200"})
    return result.exit_code, result.stdout


@pytest.fixture()
def root(tmp_path: Path) -> Path:
    write_description(tmp_path)
    # no RepetitionTime in any sidecar, and SliceTiming in milliseconds: two errors
    write_run(tmp_path, HEADER_ONLY, shape=(4, 4, 3, 8), tr=2.0,
              sidecar={"SliceTiming": [0, 500, 1000]})
    write_run(tmp_path, SIDECAR_TR, shape=(4, 4, 3, 8), tr=2.0,
              sidecar={"RepetitionTime": 2.0, "SliceTiming": [0, 0.5, 1.0]})
    # the header holds the TR the screens show (nibabel reads pixdim[4])
    assert nib.load(tmp_path / HEADER_ONLY).header.get_zooms()[3] == 2.0
    return tmp_path


def test_the_resolved_timing_says_where_the_tr_came_from(root: Path) -> None:
    from slicetime.pipelines.audit import audit_paths

    result = audit_paths([root])
    origin = {r.record.path: r.record.timing.repetition_origin for r in result.runs}
    assert origin == {HEADER_ONLY: "header", SIDECAR_TR: "sidecar"}
    codes = {r.record.path: {f.code for f in r.findings} for r in result.runs}
    assert "tr/missing" in codes[HEADER_ONLY] and "tr/missing" not in codes[SIDECAR_TR]


def test_every_screen_says_the_tr_is_the_headers_only(root: Path) -> None:
    code, text = invoke("audit", str(root), "--all")
    assert code == 1
    line = next(x for x in text.splitlines() if x.startswith(HEADER_ONLY))
    assert "TR 2 s (header only)" in line
    other = next(x for x in text.splitlines() if x.startswith(SIDECAR_TR))
    assert "TR 2 s" in other and "header only" not in other
    # the run group's TR: one of its two runs has the header's only
    row = next(x for x in text.splitlines() if x.startswith("func: task-a_bold"))
    assert "2 s (1 run: header only)" in row

    _, shown = invoke("show", str(root / HEADER_ONLY))
    assert any(x.split() == ["repetition", "time", "2", "s", "(header", "only)"]
               for x in shown.splitlines()), shown
    _, shown = invoke("show", str(root / SIDECAR_TR))
    assert "header only" not in shown

    _, tsv = invoke("audit", str(root), "--format", "tsv")
    rows = {r["path"]: r for r in csv.DictReader(io.StringIO(tsv), delimiter="\t")}
    assert rows[HEADER_ONLY]["repetition_time_source"] == "header"
    assert rows[SIDECAR_TR]["repetition_time_source"] == "sidecar"

    _, report = invoke("audit", str(root), "--format", "json")
    doc = json.loads(report)
    jsonschema.validate(doc, report_schema())
    runs = {r["path"]: r for r in doc["runs"]}
    assert runs[HEADER_ONLY]["repetition_time_source"] == "header"
    assert runs[SIDECAR_TR]["repetition_time_source"] == "sidecar"
    _, one = invoke("show", str(root / HEADER_ONLY), "--format", "json")
    assert json.loads(one)["repetition_time_source"] == "header"

    page = root.parent / "report.html"
    invoke("audit", str(root), "--html", str(page))
    html = page.read_text(encoding="utf-8")
    assert html.count('"2 s (header only)"') == 2  # the run's facts and its row


def test_the_run_group_table_counts_runs(root: Path) -> None:
    code, text = invoke("audit", str(root))
    assert code == 1  # the header-only TR is an error (tr/missing)
    head, row = text.splitlines()[:2]
    columns = head.split("  ")
    columns = [c.strip() for c in columns if c.strip()]
    assert columns[:6] == ["run group", "runs", "TR", "with errors", "with warnings",
                           "with notes"]
    # the run group: 2 runs, one of them with two errors; the with-columns count runs
    _, report = invoke("audit", str(root), "--format", "json")
    summary = json.loads(report)["summary"]
    assert summary["error"] >= 2 and summary["runs_affected"]["error"] == 1
    cells = row.split()
    # run group name (2 words), runs, TR (2 words + "(1 run: header only)" = 4 words)
    numbers = [c for c in cells[2:] if c.isdigit()]
    assert numbers[0] == "2"  # runs
    assert numbers[-3:] == [str(summary["runs_affected"][k])
                            for k in ("error", "warning", "note")]


NIB_DATA = Path(nib.__file__).parent / "tests" / "data"


def test_a_header_tr_that_is_no_plausible_tr_in_its_unit_gives_no_tr(tmp_path: Path) -> None:
    # a real file shipped with nibabel: example4d.nii.gz stores pixdim[4] = 2000 with
    # xyzt_units seconds (read with nibabel below), a TR in milliseconds under the wrong
    # unit label; BIDS times are in seconds, and no functional TR is 2000 s (the
    # project's MAX_REPETITION_TIME, 100 s, common practice (no source))
    source = NIB_DATA / "example4d.nii.gz"
    header = nib.load(source).header
    assert header.get_xyzt_units()[1] == "sec" and float(header["pixdim"][4]) == 2000.0
    write_description(tmp_path)
    rel = "sub-01/func/sub-01_task-a_bold.nii.gz"
    (tmp_path / rel).parent.mkdir(parents=True)
    (tmp_path / rel).write_bytes(source.read_bytes())
    code, out = invoke("audit", str(tmp_path), "--format", "json")
    run = json.loads(out)["runs"][0]
    assert code == 1
    assert run["repetition_time"] is None  # not 2000 s, and not a guessed 2 s
    missing = next(f for f in run["findings"] if f["code"] == "tr/missing")
    assert "no plausible TR" in missing["hint"] and "2 s if" in missing["hint"]
    code, out = invoke("show", str(tmp_path / rel))
    assert "repetition time  not usable" in out and "2000 s" not in out


def test_correct_names_pixdim4_when_the_headers_tr_is_refused(tmp_path: Path) -> None:
    # NIfTI-1 (nifti1.h): pixdim[4] is the time step, in the unit xyzt_units states;
    # with no RepetitionTime in any sidecar that is the run's TR, so a refusal of it
    # names pixdim[4] in the image, not a "RepetitionTime 2000" no sidecar holds
    import numpy as np

    root = tmp_path / "ds"
    write_description(root)
    rel = "sub-01/func/sub-01_task-a_bold.nii.gz"
    (root / rel).parent.mkdir(parents=True)
    image = nib.Nifti1Image(np.ones((4, 4, 4, 10), np.int16), np.eye(4))
    image.header.set_xyzt_units("mm", "sec")
    image.header["pixdim"][4] = 2000.0
    nib.save(image, root / rel)
    (root / rel.replace(".nii.gz", ".json")).write_text(json.dumps(
        {"TaskName": "a", "SliceTiming": [0.0, 0.5, 0.25, 0.75]}))
    code, out = invoke("correct", str(root), "--out", str(tmp_path / "out"),
                       "--format", "json", "--no-progress")
    run = json.loads(out)["runs"][0]
    refusal = next(f for f in run["blocking_findings"]
                   if f["code"] == "correct/implausible-timing")
    assert code == 1 and run["status"] == "refused"
    assert refusal["field"] == "pixdim[4]" and refusal["file"] == rel
    assert refusal["message"].startswith("pixdim[4] 2000 ")
    assert "RepetitionTime 2000" not in run["reason"]
    assert "write RepetitionTime from the protocol" in run["reason"]  # the audit's advice


def test_a_file_given_by_a_name_that_is_not_bids_is_said_so(tmp_path: Path) -> None:
    # nibabel's functional.nii: a real 4-D image, named as no BIDS run is (BIDS file
    # naming: sub-<label>[_<key>-<label>...]_<suffix>); given by path it is audited, and
    # the audit says which checks it could not apply instead of reporting it clean
    given = tmp_path / "functional.nii"
    given.write_bytes((NIB_DATA / "functional.nii").read_bytes())
    code, out = invoke("audit", str(given), "--format", "json")
    findings = json.loads(out)["runs"][0]["findings"]
    named = [f for f in findings if f["code"] == "file/bad-run-name"]
    assert len(named) == 1 and "were not applied" in named[0]["message"]
    assert code == 0  # a warning: below the default --fail-on error
