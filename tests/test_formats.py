"""Every JSON the tool writes validates against its shipped JSON Schema, and the
schemas are strict: a key they do not document fails.

Validation: jsonschema's Draft 2020-12 validator (the reference implementation
of the JSON Schema specification) with the schemas in slicetime/data.
"""

from __future__ import annotations

import copy
import json
import shutil
from pathlib import Path
from typing import Any

import jsonschema
import pytest
from click.testing import CliRunner

from slicetime.interfaces.cli import cli
from slicetime.pipelines.demo import build_demo_dataset
from slicetime.readers.shipped_schemas import SCHEMAS, load_schema, schema_validator

MS_RUN = "sub-01/ses-1/func/sub-01_ses-1_task-rest_bold.nii.gz"
PLAIN_RUN = "sub-01/ses-1/func/sub-01_ses-1_task-hum_bold.nii.gz"


def run_cli(*args: object) -> tuple[int, str]:
    result = CliRunner().invoke(cli, [str(a) for a in args], catch_exceptions=False)
    return result.exit_code, result.stdout


def valid(name: str, obj: Any, pointer: str = "") -> None:
    errors = sorted(schema_validator(name, pointer).iter_errors(obj), key=str)
    assert not errors, [f"{list(e.absolute_path)}: {e.message}" for e in errors[:5]]


def invalid(name: str, obj: Any, pointer: str = "") -> bool:
    return not schema_validator(name, pointer).is_valid(obj)


@pytest.fixture(scope="module")
def study(tmp_path_factory: pytest.TempPathFactory) -> Path:
    root = tmp_path_factory.mktemp("formats") / "quiet-rooms"
    build_demo_dataset(root)
    return root


@pytest.fixture(scope="module")
def repaired(study: Path, tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """A copy of the study with a saved plan, the plan applied (journal) and corrected."""
    work = tmp_path_factory.mktemp("repaired")
    copy_root = work / "ds"
    shutil.copytree(study, copy_root)
    plan = work / "plan.json"
    assert run_cli("fix", copy_root, "--plan", plan)[0] == 1
    backups = work / "backups"
    code, _ = run_cli("fix", "--apply", "--plan", plan, "--backup-dir", backups)
    assert code == 0
    out = work / "out"
    _, text = run_cli("correct", copy_root, "--out", out, "--format", "json")
    (work / "correct.json").write_text(text)
    return {"root": copy_root, "plan": plan, "journal": backups / "journal.json", "out": out,
            "correct": work / "correct.json"}


def test_every_shipped_schema_is_a_valid_draft_2020_12_schema() -> None:
    for file in SCHEMAS.values():
        jsonschema.Draft202012Validator.check_schema(load_schema(file))  # the meta-schema


def test_audit_json_and_jsonl_validate_and_undocumented_keys_fail(study: Path) -> None:
    _, text = run_cli("audit", study, "--format", "json")
    report = json.loads(text)
    valid("report", report)
    scheme = next(r["scheme"] for r in report["runs"] if r["scheme"])
    assert "residue_order" in scheme  # emitted, so documented
    # strict: one undocumented key anywhere fails (top, run, scheme, finding, summary)
    for where in ("top", "run", "scheme", "finding", "summary"):
        broken = copy.deepcopy(report)
        target = {"top": broken, "run": broken["runs"][0],
                  "scheme": next(r["scheme"] for r in broken["runs"] if r["scheme"]),
                  "finding": next(f for r in broken["runs"] for f in r["findings"]),
                  "summary": broken["summary"]}[where]
        target["undocumented"] = 1
        assert invalid("report", broken), where
    # a finding's values have one name, evidence (the contract, DESIGN.md), not two
    for finding in (f for r in report["runs"] for f in r["findings"]):
        assert "evidence" in finding and "grounds" not in finding
    assert len(report["dataset_names"]) == len(report["roots"]) == 1
    _, lines = run_cli("audit", study, "--format", "jsonl")
    for line in lines.splitlines():
        valid("report-lines", json.loads(line))
    first = json.loads(lines.splitlines()[0])
    first["report"]["undocumented"] = 1
    assert invalid("report-lines", first)


def test_show_json_of_runs_and_of_a_dicom_series_validate(study: Path, tmp_path: Path) -> None:
    for rel in (MS_RUN, PLAIN_RUN):
        _, text = run_cli("show", study / rel, "--format", "json")
        obj = json.loads(text)
        valid("show", obj)
        obj["undocumented"] = 1
        assert invalid("show", obj)
    from tests.test_dicom_source import resting_tree

    root, run, _ = resting_tree(tmp_path, None)
    _, series = run_cli("show", root / "sourcedata/sub-01/rest", "--format", "json")
    valid("show", json.loads(series))
    _, with_source = run_cli("show", run, "--format", "json")
    obj = json.loads(with_source)
    assert obj["source"]["series"]["layout"] == "mosaic"
    valid("show", obj)
    obj["source"]["undocumented"] = 1
    assert invalid("show", obj)


def test_correct_plan_journal_provenance_and_sidecar_validate(repaired: dict[str, Path]) -> None:
    valid("fix-plan", json.loads(repaired["plan"].read_text()))
    journal = json.loads(repaired["journal"].read_text())
    valid("fix-journal", journal)
    assert all("sha256_after" in e for e in journal["entries"])  # the plan's spelling
    valid("correct", json.loads(repaired["correct"].read_text()))
    provenance = json.loads((repaired["out"] / "slicetime-provenance.json").read_text())
    valid("provenance", provenance)
    assert provenance["Runs"]
    for output in provenance["Runs"]:
        sidecar = repaired["out"] / output.replace(".nii.gz", ".json")
        record = json.loads(sidecar.read_text())["SliceTimeAlignment"]
        valid("provenance", record, "#/$defs/alignment_strict")
        record["Undocumented"] = 1
        assert invalid("provenance", record, "#/$defs/alignment_strict")


def test_verify_json_validates(study: Path) -> None:
    code, text = run_cli("verify", study / PLAIN_RUN, "--format", "json")
    assert code in (0, 1)
    report = json.loads(text)
    valid("verify", report)
    report["runs"][0]["undocumented"] = 1
    assert invalid("verify", report)


def test_a_journal_or_plan_read_back_is_checked_by_its_shipped_schema(
        repaired: dict[str, Path], tmp_path: Path) -> None:
    # the journal and the plan are read back through fix-journal.schema.json and
    # fix-plan.schema.json (JSON Schema 2020-12, validated with jsonschema): a key the
    # schema does not know, or one it requires and the file lacks, refuses the file whole,
    # in one line naming the file and the place; no release ever wrote other key names
    work = tmp_path / "again"
    shutil.copytree(repaired["root"].parent / "ds", work / "ds")
    shutil.copytree(repaired["journal"].parent, work / "backups")
    journal = work / "backups" / "journal.json"
    content = json.loads(journal.read_text())
    content["roots"] = [str(work / "ds")]
    for entry in content["entries"]:
        entry["root"] = str(work / "ds")
    assert not invalid("fix-journal", content)
    entry = content["entries"][0]
    entry["before_sha256"] = entry.pop("sha256_before")
    assert invalid("fix-journal", content)
    journal.write_text(json.dumps(content))
    changed = work / "ds" / entry["file"]
    before = changed.read_bytes()
    result = CliRunner().invoke(cli, ["fix", "--undo", str(journal)])
    code, out = result.exit_code, result.output
    assert code == 2
    assert out.count("\n") <= 1 and str(journal) in out
    assert "entries[0]" in out and "nothing was restored" in out
    assert changed.read_bytes() == before
    plan = json.loads(repaired["plan"].read_text())
    del plan["changes"][0]["sha256_before"]
    saved = tmp_path / "plan.json"
    saved.write_text(json.dumps(plan))
    result = CliRunner().invoke(cli, ["fix", "--apply", "--plan", str(saved)])
    code, out = result.exit_code, result.output
    assert code == 2
    assert "changes[0] lacks 'sha256_before'" in out and "nothing was written" in out


def test_correct_and_verify_documents_are_built_by_the_interface_layer() -> None:
    # report_json.correct_object / verify_object: the documents correct --format json and
    # verify --format json print, built from pipeline results (every status, a blocking
    # finding, float noise, an unreadable file) and valid against the shipped schemas
    from slicetime.codes import make_finding
    from slicetime.interfaces.report_json import correct_object, verify_object
    from slicetime.pipelines.correct import CorrectResult, RunOutcome
    from slicetime.pipelines.verify import VerifyOutcome

    blocking = make_finding("correct/implausible-timing", "a.nii.gz: TR 2000 s",
                            file="a.nii.gz", field="RepetitionTime")
    result = CorrectResult("out", [
        RunOutcome("a.nii.gz", "/ds", "refused", reason="a.nii.gz: TR 2000 s",
                   blocking=[blocking]),
        RunOutcome("b.nii.gz", "/ds", "corrected", output="b_desc-x_bold.nii.gz",
                   reference=0.1 + 0.2, seconds=1.23456, warnings=["clipped"]),
        RunOutcome("c.nii.gz", "/ds", "up-to-date", output="c_desc-x_bold.nii.gz"),
        RunOutcome("d.nii.gz", "/ds", "failed", reason="d.nii.gz: cannot write"),
    ])
    document = correct_object(result)
    valid("correct", document)
    assert document["summary"] == {"corrected": 1, "up-to-date": 1, "refused": 1, "failed": 1}
    runs = {r["path"]: r for r in document["runs"]}
    assert runs["b.nii.gz"]["reference_time"] == 0.3  # no float noise in the output
    assert runs["b.nii.gz"]["seconds"] == 1.235
    assert runs["a.nii.gz"]["blocking_findings"][0]["severity"] == "error"
    runs["a.nii.gz"]["undocumented"] = 1
    assert invalid("correct", document)

    verdict = make_finding("verify/undecidable", "e.nii.gz: fewer than 30 volumes",
                           file="e.nii.gz", field="SliceTiming")
    report = verify_object([VerifyOutcome("e.nii.gz", None, verdict)],
                           [{"file": "f.nii.gz", "code": "file/not-nifti", "message": "m"}])
    valid("verify", report)
    assert report["summary"] == {"supported": 0, "consistent": 0, "contradicted": 0,
                                 "undecidable": 1}
    assert report["runs"][0]["verdict"] == "undecidable"
    assert set(report["runs"][0]) == {"path", "verdict", "finding"}  # no units of its own
