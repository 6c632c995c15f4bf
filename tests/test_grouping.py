"""A finding of a file several runs share is told once, with its runs, in every report
for people (text, TSV, JUnit), and the JSON report keeps it per run and adds the
grouping; every report's counts agree with the JSON report's.

The demo study (``pipelines.demo``) plants a top-level ``task-chirp_bold.json``
without MultibandAccelerationFactor and a participant-level hum sidecar that
overrides the inherited timing; which runs inherit each file is read from the
tree itself (BIDS inheritance principle: a sidecar applies to every run below
its folder whose name carries its entities), never from a number written here.
"""

from __future__ import annotations

import csv
import io
import json
import re
import xml.etree.ElementTree as ET
from collections import Counter
from pathlib import Path

import pytest
from click.testing import CliRunner

from slicetime.interfaces.cli import cli
from slicetime.interfaces.report_json import report_schema
from slicetime.interfaces.report_stream import TSV_COLUMNS
from slicetime.pipelines.demo import build_demo_dataset

SEVERITIES = ("error", "warning", "note")


def run_cli(*args: object, columns: int | None = None) -> str:
    env = {"COLUMNS": str(columns)} if columns else {}
    result = CliRunner(env=env).invoke(cli, [str(a) for a in args], catch_exceptions=False)
    return result.stdout


@pytest.fixture(scope="module")
def study(tmp_path_factory: pytest.TempPathFactory) -> Path:
    root = tmp_path_factory.mktemp("grouping") / "quiet-rooms"
    build_demo_dataset(root)
    return root


@pytest.fixture(scope="module")
def report(study: Path) -> dict:
    return json.loads(run_cli("audit", study, "--format", "json"))


def chirp_runs(study: Path) -> list[str]:
    """The runs that inherit the top-level task-chirp_bold.json: every run of task chirp
    (BIDS inheritance principle: a top-level sidecar applies to every run whose name
    carries its entities and suffix)."""
    return sorted(str(p.relative_to(study)) for p in study.rglob("*_task-chirp_bold.nii.gz"))


def test_json_keeps_findings_per_run_and_adds_the_grouping(study: Path, report: dict) -> None:
    import jsonschema

    jsonschema.validate(report, report_schema())
    shared = report["shared_findings"]
    by_file = {s["finding"]["file"]: s for s in shared
               if s["finding"]["code"] == "scheme/multiband-undeclared"}
    chirp = by_file["task-chirp_bold.json"]
    assert sorted(chirp["runs"]) == chirp_runs(study)
    runs = {r["path"]: r for r in report["runs"]}
    for group in shared:
        assert len(group["runs"]) >= 2
        for path in group["runs"]:  # every run still carries it, verbatim
            assert group["finding"] in runs[path]["findings"]
    # summary: per-run counts as before, each shared finding once in "distinct"
    summary = report["summary"]
    for s in SEVERITIES:
        copies = sum(len(g["runs"]) - 1 for g in shared if g["finding"]["severity"] == s)
        assert summary["distinct"][s] == summary[s] - copies
        assert summary["runs_affected"][s] == sum(
            1 for r in report["runs"] if any(f["severity"] == s for f in r["findings"]))
    assert summary["distinct"]["note"] < summary["note"]
    assert [d["root"] for d in report["datasets"]] == report["roots"]
    assert [d["name"] for d in report["datasets"]] == report["dataset_names"]


def test_jsonl_has_the_same_grouping(study: Path, report: dict) -> None:
    lines = [json.loads(line) for line in run_cli("audit", study, "--format", "jsonl")
             .splitlines()]
    assert [o["shared_finding"] for o in lines if "shared_finding" in o] == \
        report["shared_findings"]
    assert lines[-1]["summary"] == report["summary"]


@pytest.mark.parametrize("width", [80, 120])
def test_text_tells_a_shared_finding_once_and_counts_agree(study: Path, report: dict,
                                                           width: int) -> None:
    text = run_cli("audit", study, "--no-progress", columns=width)
    flat = " ".join(text.split())
    shared = report["shared_findings"]
    for code in {g["finding"]["code"] for g in shared}:
        # told once per shared finding, plus once per run finding of that code not shared
        told = [g for g in shared if g["finding"]["code"] == code]
        alone = sum(1 for r in report["runs"] for f in r["findings"] if f["code"] == code
                    and not any(f == g["finding"] and r["path"] in g["runs"] for g in told))
        assert flat.count(f" {code} ") == len(told) + alone, code
    n_chirp = len(chirp_runs(study))
    assert f"applies to all {n_chirp} runs of task-chirp_bold" in flat
    # the summary line: each finding once, with the runs it touches
    summary = report["summary"]
    last = " ".join(text.strip().split("\n\n")[-1].split())  # the summary, maybe wrapped
    assert last.startswith(f"{summary['runs']} runs audited: ")
    counted = re.findall(r"(?:: |, )(\d+) (error|warning|note)s?", last)
    assert {k: int(v) for v, k in counted} == summary["distinct"]
    touched = re.findall(r"(error|warning|note)s? on (\d+) runs?", last)
    assert {k: int(v) for k, v in touched} == {
        s: summary["runs_affected"][s] for s in SEVERITIES if summary["distinct"][s]}


def test_tsv_tells_a_shared_finding_once(study: Path, report: dict) -> None:
    rows = list(csv.reader(io.StringIO(run_cli("audit", study, "--format", "tsv")),
                           delimiter="\t", quoting=csv.QUOTE_NONE))
    assert tuple(rows[0]) == TSV_COLUMNS
    table = [dict(zip(TSV_COLUMNS, r, strict=True)) for r in rows[1:]]
    runs = [r for r in table if not r["applies_to"]]
    shared = [r for r in table if r["applies_to"]]
    assert [r["path"] for r in runs] == [r["path"] for r in report["runs"]]
    assert len(shared) == len(report["shared_findings"])
    for row, group in zip(shared, report["shared_findings"], strict=True):
        assert row["path"] == group["finding"]["file"]
        assert int(row["applies_to"]) == len(group["runs"])
    wide = Counter(f["severity"] for f in report["dataset_findings"])
    for s, column in zip(SEVERITIES, ("errors", "warnings", "notes"), strict=True):
        assert sum(int(r[column]) for r in table) == report["summary"]["distinct"][s] - wide[s]
    # one dataset root: its long name is not repeated on every row
    assert all(r["dataset"] == "" for r in table)


def test_junit_has_one_test_case_per_shared_finding(study: Path, report: dict) -> None:
    xml = ET.fromstring(run_cli("audit", study, "--format", "junit", "--fail-on", "warning"))
    cases = xml.findall(".//testcase")
    n_runs, n_shared = len(report["runs"]), len(report["shared_findings"])
    assert len(cases) == int(xml.get("tests")) == n_runs + n_shared + 1  # + the dataset case
    chirp = [c for c in cases if c.get("name") == "task-chirp_bold.json: "
             "scheme/multiband-undeclared"]
    assert len(chirp) == 1
    assert "applies to all" in (chirp[0].findtext("system-out") or "")
    # the runs' own cases no longer repeat it
    for case in cases:
        if case.get("name", "").endswith("_task-chirp_bold.nii.gz"):
            assert "multiband-undeclared" not in ET.tostring(case, encoding="unicode")
    # a failure per failing case: the shared warning fails once, not once per run
    failing = [c for c in cases if c.find("failure") is not None]
    assert int(xml.get("failures")) == len(failing)
    warnings = [g for g in report["shared_findings"] if g["finding"]["severity"] == "warning"]
    for group in warnings:
        name = f"{group['finding']['file']}: {group['finding']['code']}"
        (case,) = [c for c in cases if c.get("name") == name]
        assert case.find("failure") is not None


def test_runs_whose_names_are_not_bids_names_are_one_plainly_named_group(
        tmp_path: Path) -> None:
    # BIDS file naming: sub-<label>[_<key>-<label>]..._<suffix>.nii[.gz]; a name without
    # a suffix, or none of that form, names no protocol. The runs the audit reports as
    # file/bad-run-name are exactly the ones the reports group apart, under a heading
    # that says so (never "(no suffix)" nor the odd name taken for a suffix)
    from slicetime.pipelines.audit import audit_paths
    from tests.helpers_bids import write_description, write_run

    root = tmp_path / "ds"
    write_description(root)
    good = ["sub-01/func/sub-01_task-x_bold.nii.gz", "sub-02/func/sub-02_task-x_bold.nii.gz"]
    odd = ["sub-01/func/sub-01_task-x.nii.gz", "sub-01/func/scan01.nii.gz",
           "sub-02/func/sub-02_task-x_bold copy.nii.gz"]
    for rel in good + odd:
        write_run(root, rel, sidecar={"RepetitionTime": 2.0, "SliceTiming": [0.0, 0.5, 1.0]})
    named = {r.record.path for r in audit_paths([root]).runs
             if any(f.code == "file/bad-run-name" for f in r.findings)}
    assert named == set(odd)
    text = run_cli("audit", root, columns=200)
    rows = [line for line in text.splitlines() if line.startswith("func: ")]
    assert [r.split()[1:3] for r in rows if "task-x_bold" in r] == [["task-x_bold", "2"]]
    apart = [r for r in rows if "file names that are not valid BIDS names" in r]
    assert len(apart) == 1 and apart[0].split("names")[-1].split()[0] == str(len(odd))
    assert "(no suffix)" not in text and "func: scan01" not in text
    page = tmp_path / "audit.html"
    run_cli("audit", root, "--html", page)
    html = page.read_text(encoding="utf-8")
    assert "func: file names that are not valid BIDS names" in html
    assert "(no suffix)" not in html
