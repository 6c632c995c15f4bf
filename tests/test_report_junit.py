"""The JUnit XML report: structure, counts, failure types and hostile names.

Expected structure comes from the JUnit XML format as CI systems read it (the
widely used junit-10.xsd conventions, from memory): ``testsuites`` >
``testsuite`` (name, tests, failures, errors, skipped) > ``testcase``
(classname, name) > ``failure`` (type, message, text) / ``system-out``. Every
document is parsed back with Python's xml.etree, an independent XML parser.
"""

from __future__ import annotations

import json
import os
import xml.etree.ElementTree as ET
from pathlib import Path

import pytest

from slicetime.interfaces.report_junit import junit_xml, xml_safe
from slicetime.model import Finding, Severity
from slicetime.pipelines.audit import AuditResult, audit_paths
from slicetime.schemes.generate import Protocol, slice_timing
from tests.helpers_bids import write_description, write_run, write_sidecar

SHAPE = (4, 4, 10, 5)
CLEAN = "sub-01/func/sub-01_task-tap_bold.nii.gz"
MS = "sub-02/func/sub-02_task-tap_bold.nii.gz"
# markup characters, both quotes and non-ASCII letters in one run name (not a BIDS name,
# so it is a run because its own sidecar has SliceTiming)
ODD = "sub-03/func/a&b <c> \"d\" 'e' café ünï_bold.nii.gz"


def _times() -> list[float]:
    return slice_timing(Protocol(n_slices=10, order="interleaved", repetition_time=2.0))


@pytest.fixture()
def dataset(tmp_path: Path) -> Path:
    root = tmp_path / "ds"
    write_description(root)
    st = _times()
    write_sidecar(root, "task-tap_bold.json", {"RepetitionTime": 2.0, "SliceTiming": st})
    write_run(root, CLEAN, shape=SHAPE, tr=2.0)
    write_run(root, MS, shape=SHAPE, tr=2.0, sidecar={"SliceTiming": [t * 1000 for t in st]})
    write_run(root, ODD, shape=SHAPE, tr=2.0, sidecar={"SliceTiming": st, "RepetitionTime": 2.0})
    return root


def parse(text: str) -> ET.Element:
    # Python's xml.etree as the parser; the bytes must be valid UTF-8 (XML 1.0 default encoding)
    return ET.fromstring(text.encode("utf-8"))


def cases(doc: ET.Element) -> dict[str, ET.Element]:
    return {c.get("name", ""): c for c in doc.iter("testcase")}


def failure_types(case: ET.Element) -> set[str]:
    return {f.get("type", "") for f in case.findall("failure")}


def test_structure_counts_and_names(dataset: Path) -> None:
    result = audit_paths([dataset])
    text = junit_xml(result, fail_on="error", root_given="ds")
    # XML 1.0: a document may start with the XML declaration (common practice for JUnit files)
    assert text.startswith('<?xml version="1.0" encoding="UTF-8"?>')
    doc = parse(text)
    # junit-10.xsd conventions (from memory): a testsuites root holding testsuite elements
    assert doc.tag == "testsuites"
    suites = doc.findall("testsuite")
    assert [s.get("name") for s in suites] == ["slicetime audit"]
    suite = suites[0]
    by_name = cases(doc)
    # one test case per run plus the dataset case (our layout, documented in the module)
    assert set(by_name) == {CLEAN, MS, ODD, "dataset"}
    assert suite.get("tests") == doc.get("tests") == "4"
    assert suite.get("errors") == "0" and suite.get("skipped") == "0"
    # junit-10.xsd conventions (from memory): failures counts failed test cases
    failed = [c for c in suite.iter("testcase") if c.find("failure") is not None]
    assert suite.get("failures") == doc.get("failures") == str(len(failed)) == "1"
    # classname is the folder relative to the dataset root (our layout)
    assert by_name[CLEAN].get("classname") == "sub-01/func"
    assert by_name[MS].get("classname") == "sub-02/func"
    assert by_name["dataset"].get("classname") == "."
    props = {p.get("name"): p.get("value") for p in suite.iter("property")}
    assert props["root"] == str(dataset) and props["path_given"] == "ds"
    assert props["fail_on"] == "error"


def test_failures_carry_code_message_and_details(dataset: Path) -> None:
    result = audit_paths([dataset])
    doc = parse(junit_xml(result, fail_on="error", root_given=str(dataset)))
    by_name = cases(doc)
    # the timing/units-ms rule (BIDS: SliceTiming is in seconds) is an error on the ms run
    assert "timing/units-ms" in failure_types(by_name[MS])
    assert failure_types(by_name[CLEAN]) == set() and failure_types(by_name[ODD]) == set()
    failure = next(f for f in by_name[MS].findall("failure") if f.get("type") == "timing/units-ms")
    finding = next(f for run in result.runs for f in run.findings if f.code == "timing/units-ms")
    # junit-10.xsd conventions (from memory): message is an attribute, details are the text
    assert failure.get("message") == finding.message and "\n" not in finding.message
    body = failure.text or ""
    lines = dict(line.split(": ", 1) for line in body.strip().splitlines())
    assert lines["file"] == finding.file and lines["field"] == "SliceTiming"
    assert lines["severity"] == "error"
    # the evidence line is JSON (RFC 8259) equal to the report's evidence
    assert json.loads(lines["evidence"]) == finding.to_json()["evidence"]
    assert lines["hint"] == finding.hint


def test_levels_follow_fail_on_like_the_exit_code(dataset: Path) -> None:
    result = audit_paths([dataset])
    for level in ("error", "warning", "never"):
        doc = parse(junit_xml(result, fail_on=level, root_given="ds"))
        n_fail = sum(len(c.findall("failure")) for c in doc.iter("testcase"))
        n_out = sum(
            len((c.findtext("system-out") or "").splitlines()) for c in doc.iter("testcase")
        )
        # every finding appears once, as a failure or as a line of system-out (our layout)
        assert n_fail + n_out == sum(1 for _ in result.all_findings())
        # common practice (no source): a CI job fails exactly when the tool's exit code says so
        assert (int(doc.get("failures", "0")) > 0) == (result.exit_code(level) == 1)
    never = parse(junit_xml(result, fail_on="never", root_given="ds"))
    assert list(never.iter("failure")) == []
    assert "timing/units-ms" in (cases(never)[MS].findtext("system-out") or "")


def test_hostile_names_are_escaped_and_the_document_always_parses(dataset: Path) -> None:
    st = _times()
    func = dataset / "sub-04" / "func"
    write_run(
        dataset,
        "sub-04/func/ctl\x01\x1b[31m\x7f tab\there_bold.nii.gz",
        shape=SHAPE,
        tr=2.0,
        sidecar={"SliceTiming": st, "RepetitionTime": 2.0},
    )
    raw_name = b"raw\xff\xfename_bold"
    try:  # a name that is not UTF-8 (allowed by Linux file systems, refused by some others)
        for ext in (b".nii.gz", b".json"):
            src = func / ("ctl\x01\x1b[31m\x7f tab\there_bold" + ext.decode())
            os.link(src, os.fsencode(func) + b"/" + raw_name + ext)
        undecodable = True
    except OSError:
        undecodable = False
    result = audit_paths([dataset])
    result.dataset_findings.append(  # no dataset rules exist yet: one made by hand
        Finding(
            "dataset/outlier-scheme",
            Severity.WARNING,
            "one run\x00differs <&>",
            evidence={"runs": [ODD]},
            hint='check "it"',
        )
    )
    text = junit_xml(result, fail_on="warning", root_given="ds\x07")
    text.encode("utf-8")  # strict UTF-8: no lone surrogates left
    doc = parse(text)  # Python's xml.etree: well-formed despite the names
    by_name = cases(doc)
    # markup characters and non-ASCII letters survive exactly (XML escaping, not removal)
    assert ODD in by_name and by_name[ODD].get("classname") == "sub-03/func"
    # XML 1.0 Char production (from memory): C0 controls other than tab/newline/CR are not
    # allowed at all, so they are written as visible escapes (our convention)
    assert "sub-04/func/ctl\\x01\\x1b[31m\\x7f tab\\there_bold.nii.gz" in by_name
    if undecodable:
        # Python's surrogateescape (PEP 383) maps undecodable bytes to U+DC80..U+DCFF
        assert "sub-04/func/raw\\xff\\xfename_bold.nii.gz" in by_name
    dataset_case = by_name["dataset"]
    failure = dataset_case.find("failure")
    assert failure is not None and failure.get("type") == "dataset/outlier-scheme"
    assert failure.get("message") == "one run\\x00differs <&>"
    assert 'hint: check "it"' in (failure.text or "")
    props = {p.get("name"): p.get("value") for p in doc.iter("property")}
    assert props["path_given"] == "ds\\x07"


def test_several_roots_give_one_suite_each(dataset: Path, tmp_path: Path) -> None:
    other = tmp_path / "other"
    write_description(other)
    write_run(
        other, CLEAN, shape=SHAPE, tr=2.0, sidecar={"SliceTiming": _times(), "RepetitionTime": 2.0}
    )
    result = audit_paths([dataset, other])
    doc = parse(junit_xml(result, fail_on="error", root_given=f"{dataset} {other}"))
    names = [s.get("name") for s in doc.findall("testsuite")]
    # our layout: one suite per root, then one for the checks over all runs
    assert names == [
        f"slicetime audit: {dataset}",
        f"slicetime audit: {other}",
        "slicetime audit: all datasets",
    ]
    counts = [int(s.get("tests", "0")) for s in doc.findall("testsuite")]
    assert counts == [3, 1, 1] and doc.get("tests") == "5"
    assert [c.get("name") for c in doc.findall("testsuite")[2].iter("testcase")] == ["dataset"]


def test_empty_audit_and_bad_level() -> None:
    doc = parse(junit_xml(AuditResult(roots=["/nowhere"]), fail_on="error", root_given="x"))
    # common practice (no source): an audit of nothing still reports that the checks ran
    assert [c.get("name") for c in doc.iter("testcase")] == ["dataset"]
    assert doc.get("failures") == "0"
    with pytest.raises(ValueError, match="fail_on"):
        junit_xml(AuditResult(roots=[]), fail_on="note", root_given="x")


@pytest.mark.parametrize(
    ("raw", "one_line", "expected"),
    [
        ('plain & <ok> "q" é ✓ 𝄞', True, 'plain & <ok> "q" é ✓ 𝄞'),  # markup left to etree
        ("a\x00b\x1fc\x7f\x85", True, "a\\x00b\\x1fc\\x7f\\x85"),
        ("line\nnext\ttab\r", True, "line\\nnext\\ttab\\r"),
        ("line\nnext\ttab\r", False, "line\nnext\ttab\r"),  # allowed in XML 1.0 text
        ("\udcff\ud800\ufffe", True, "\\xff\\ud800\\ufffe"),
    ],
)
def test_xml_safe(raw: str, one_line: bool, expected: str) -> None:
    # XML 1.0 Char production (from memory): #x9 | #xA | #xD | [#x20-#xD7FF] |
    # [#xE000-#xFFFD] | [#x10000-#x10FFFF]; the escape spelling is our own
    assert xml_safe(raw, one_line=one_line) == expected
    element = ET.Element("x", a=xml_safe(raw))
    element.text = xml_safe(raw, one_line=False)
    back = parse(ET.tostring(element, encoding="unicode"))  # xml.etree writes and reads it
    assert back.get("a") == xml_safe(raw)
