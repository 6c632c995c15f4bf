"""The audit as a JUnit XML report, for CI systems that display test results.

Layout (our own mapping of an audit onto the JUnit XML vocabulary):

* one ``<testsuites>`` element holding the totals;
* one ``<testsuite>`` per dataset root. With a single root it is named
  ``slicetime audit``; with several, ``slicetime audit: ROOT``. Its
  ``<properties>`` give the root, the path as given, the ``--fail-on`` level
  and the slicetime version;
* one ``<testcase>`` per run: ``classname`` is the run's folder relative to its
  dataset root (``.`` for the root itself) and ``name`` the run's path; it holds
  the run's own findings;
* one ``<testcase>`` per finding of a file that several runs share (an inherited
  sidecar), told once instead of in each run's case: ``classname`` is the file's
  folder, ``name`` is ``FILE: CODE``, and its ``<system-out>`` says which runs it
  applies to (``applies to all 6 runs of task-chirp_bold`` or the count and the
  paths);
* one more ``<testcase classname="." name="dataset">`` for the checks over the
  whole dataset. It sits in the single suite, or, with several roots, in a
  last suite named ``slicetime audit: all datasets`` (dataset checks look
  at every run given, whatever its root). It is always present, so a CI page
  shows that those checks ran;
* each finding at or above ``fail_on`` becomes one ``<failure>`` in its
  test case (``type`` = finding code, ``message`` = the one-line message; the
  text gives severity, file, field, the evidence as JSON and the hint);
  findings below the level are listed in the test case's ``<system-out>``.
  ``fail_on="never"`` gives no failures: everything goes to ``<system-out>``.

Counts: ``tests`` is the number of test cases, ``failures`` the number of test
cases with at least one ``<failure>`` (so ``failures <= tests``), ``errors``
and ``skipped`` are always 0: a file that cannot be read is a finding like
any other, never a skipped test. ``failures > 0`` exactly when
``AuditResult.exit_code(fail_on)`` is 1.

Hostile file names: XML 1.0 cannot carry most control characters even as
character references, and UTF-8 cannot carry the lone surrogates by which
Python represents file-name bytes that are not UTF-8. Every string is passed
through :func:`xml_safe`, which writes such characters as visible escapes
(``\\x01``, ``\\xff`` for an undecodable byte, ``\\ud800``), and, in attributes
and one-line fields, also tabs and line breaks (``\\t``, ``\\n``, ``\\r``). The
document is built with :mod:`xml.etree.ElementTree`, so markup characters
are always escaped, and the result always parses and encodes as UTF-8.
"""

from __future__ import annotations

import json
import xml.etree.ElementTree as ET
from collections.abc import Mapping, Sequence
from typing import Any

from slicetime.interfaces.safe_text import xml_safe
from slicetime.model import FailOn, Severity, one_line
from slicetime.pipelines.audit import AuditResult

__all__ = ["DATASET_CASE", "FAIL_LEVELS", "junit_xml", "xml_safe"]

#: accepted values of ``fail_on`` (``model.FailOn``, the one threshold)
FAIL_LEVELS: tuple[str, ...] = FailOn.CHOICES
#: the name of the test case that holds findings about the whole dataset
DATASET_CASE = "dataset"
SUITE_NAME = "slicetime audit"
_MAX_MESSAGE = 1000  # characters kept of a message in the ``message`` attribute


def folder_of(path: str) -> str:
    """The folder part of a report path (``.`` for a file at the root): a test class."""
    folder, sep, _name = path.rpartition("/")
    return folder if sep and folder else "."


def _message(finding: Mapping[str, Any]) -> str:
    text = " ".join(xml_safe(finding["message"], one_line=False).split())
    return text if len(text) <= _MAX_MESSAGE else text[: _MAX_MESSAGE - 1] + "…"


def _evidence(finding: Mapping[str, Any]) -> str:
    return json.dumps(finding.get("evidence") or {}, ensure_ascii=False, sort_keys=True,
                      allow_nan=True, default=str)


def _failure_text(finding: Mapping[str, Any]) -> str:
    lines = [
        f"severity: {finding['severity']}",
        f"file: {xml_safe(finding.get('file') or '-')}",
        f"field: {xml_safe(finding.get('field') or '-')}",
        f"evidence: {xml_safe(_evidence(finding))}",
        f"hint: {xml_safe(finding.get('hint') or '-')}",
    ]
    return "\n".join(lines) + "\n"


def _note_line(finding: Mapping[str, Any]) -> str:
    line = xml_safe(one_line(finding["severity"], finding["code"], finding.get("file"),
                             finding.get("field"), finding["message"]))
    if finding.get("hint"):
        line += f" (hint: {xml_safe(finding['hint'])})"
    return line


def add_testcase(parent: ET.Element, classname: str, name: str,
              findings: Sequence[Mapping[str, Any]], fail_on: FailOn,
              more_out: str | None = None) -> bool:
    """Add one test case (its findings as the report's JSON objects); True when it has a
    failure. ``more_out`` is added to its ``<system-out>`` (the runs a shared finding
    applies to)."""
    case = ET.SubElement(parent, "testcase", classname=xml_safe(classname), name=xml_safe(name))
    failing: list[Mapping[str, Any]] = []
    quiet: list[Mapping[str, Any]] = []
    for finding in findings:
        (failing if fail_on.fails(Severity(finding["severity"])) else quiet).append(finding)
    for finding in failing:
        failure = ET.SubElement(
            case, "failure", type=xml_safe(finding["code"]), message=_message(finding)
        )
        failure.text = _failure_text(finding)
    if quiet or more_out:
        out = ET.SubElement(case, "system-out")
        out.text = "".join(_note_line(f) + "\n" for f in quiet) + (more_out or "")
    return bool(failing)


def junit_xml(result: AuditResult, *, fail_on: str, root_given: str) -> str:
    """The audit as a JUnit XML document (a string starting with the XML declaration).

    ``fail_on`` is ``error``, ``warning`` or ``never`` (as for the exit code);
    ``root_given`` is the path as the user gave it (recorded as a property).
    The CLI writes the same document as a stream (``report_stream.write_junit``).
    """
    import io

    from slicetime.interfaces.report_source import MemorySource
    from slicetime.interfaces.report_stream import write_junit

    FailOn.parse(fail_on)  # a bad value is refused before anything is written
    buffer = io.StringIO()
    write_junit(MemorySource(result, root_given), buffer, fail_on=fail_on)
    return buffer.getvalue()
