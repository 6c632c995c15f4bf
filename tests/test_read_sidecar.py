"""Strict sidecar parsing and timing-field type checks.

References: RFC 8259 (JSON; from memory), Python's json module as the
reference parser for valid text, and the BIDS specification's machine-readable
schema (bidsschematools, ``objects.metadata``) for field types.
"""

from __future__ import annotations

import json
import sys
import time
from importlib import resources
from pathlib import Path
from typing import Any

import jsonschema
import pytest

from slicetime.model import Severity
from slicetime.readers import TIMING_FIELDS, check_types, load_schema, load_sidecar

sys.path.insert(0, str(Path(__file__).parent))
from helpers_bids import symlink, write_json, write_run


def load_text(tmp_path: Path, text: str | bytes, name: str = "sub-01_task-x_bold.json"):
    path = write_json(tmp_path / name, raw=text)
    return load_sidecar(path, display=name)


def codes(findings: list[Any]) -> list[str]:
    return [f.code for f in findings]


def test_valid_sidecar_equals_reference_parser(tmp_path: Path) -> None:
    text = json.dumps(
        {
            "RepetitionTime": 2.0,
            "SliceTiming": [0.0, 0.5, 1.0, 1.5],
            "TaskName": "rest",
            "Nested": {"a": [1, 2, {"b": None}], "c": True},
            "Unicode": "µs – ü",
        }
    )
    data, findings = load_text(tmp_path, text)
    assert findings == []
    assert data == json.loads(text)  # source: Python's json module (RFC 8259 parser)


def test_syntax_error_gives_line_and_column(tmp_path: Path) -> None:
    text = '{\n  "RepetitionTime": 2.0,\n  "SliceTiming": [0, 1,]\n}'
    data, findings = load_text(tmp_path, text)
    assert data is None
    (f,) = findings
    with pytest.raises(json.JSONDecodeError) as ref:
        json.loads(text)
    # source: Python's json module reports the same position (RFC 8259 forbids trailing commas)
    assert (f.code, f.severity) == ("sidecar/bad-json", Severity.ERROR)
    assert f.evidence["line"] == ref.value.lineno and f.evidence["column"] == ref.value.colno
    assert f"line {ref.value.lineno} column {ref.value.colno}" in f.message
    assert "sub-01_task-x_bold.json" in f.message and "\n" not in f.message


@pytest.mark.parametrize(
    "text",
    [
        "",  # empty
        "   \n",
        '{"a": 1} // comment',  # comments are not JSON (RFC 8259)
        "{'a': 1}",  # single quotes
        '{"a": "tab\tinside"}',  # raw control character (RFC 8259: must be escaped)
        '{"a": 01}',  # leading zero
        '{"a": 1} {"b": 2}',  # two documents
        '{"a": ' + "1" * 5000 + "}",  # beyond Python's digit limit: must not crash
    ],
)
def test_not_json(tmp_path: Path, text: str) -> None:
    data, findings = load_text(tmp_path, text)
    assert data is None
    assert codes(findings) == ["sidecar/bad-json"]


@pytest.mark.parametrize("text", ["[1, 2]", '"text"', "3.5", "null", "true"])
def test_top_level_not_object(tmp_path: Path, text: str) -> None:
    data, findings = load_text(tmp_path, text)
    # BIDS specification: a sidecar holds key-value metadata, i.e. a JSON object
    assert data is None
    assert codes(findings) == ["sidecar/not-object"]


@pytest.mark.parametrize("literal", ["NaN", "Infinity", "-Infinity", "1e999", "-2E400"])
def test_non_finite_numbers(tmp_path: Path, literal: str) -> None:
    text = '{\n  "TaskName": "x",\n  "SliceTiming": [0.0, ' + literal + ", 1.0]\n}"
    data, findings = load_text(tmp_path, text)
    # RFC 8259: NaN and Infinity are not JSON numbers; 1e999 is not representable either
    assert data is not None
    assert data["SliceTiming"] == [0.0, None, 1.0]
    (f,) = findings
    assert (f.code, f.severity, f.field) == (
        "sidecar/non-finite-number",
        Severity.ERROR,
        "SliceTiming",
    )
    assert "line 3 column 24" in f.message


def test_duplicate_keys_keep_the_last(tmp_path: Path) -> None:
    text = '{"TaskName": "a", "Manufacturer": "x", "TaskName": "a", "Manufacturer": "y"}'
    data, findings = load_text(tmp_path, text)
    assert data == json.loads(text)  # source: Python's json module keeps the last value
    by_field = {f.field: f for f in findings}
    assert set(by_field) == {"TaskName", "Manufacturer"}
    assert all(f.code == "sidecar/duplicate-key" for f in findings)
    assert by_field["TaskName"].severity is Severity.WARNING  # same value twice
    assert by_field["Manufacturer"].severity is Severity.WARNING  # not a timing field
    assert "last" in by_field["Manufacturer"].message


def test_duplicate_timing_field_that_differs_is_an_error(tmp_path: Path) -> None:
    text = '{"RepetitionTime": 2.0, "SliceTiming": [0, 1], "RepetitionTime": 1.5}'
    data, findings = load_text(tmp_path, text)
    assert data is not None and data["RepetitionTime"] == json.loads(text)["RepetitionTime"]
    (f,) = findings
    assert (f.code, f.severity, f.field) == (
        "sidecar/duplicate-key",
        Severity.ERROR,
        "RepetitionTime",
    )
    assert "1.5" in f.message and "2.0" in f.message


def test_nested_duplicate_is_a_warning(tmp_path: Path) -> None:
    text = '{"Extra": {"RepetitionTime": 1, "RepetitionTime": 2}}'
    data, findings = load_text(tmp_path, text)
    assert data == json.loads(text)
    (f,) = findings
    assert (f.code, f.severity) == ("sidecar/duplicate-key", Severity.WARNING)


def test_utf8_bom_is_a_note(tmp_path: Path) -> None:
    data, findings = load_text(tmp_path, b"\xef\xbb\xbf" + b'{"TaskName": "rest"}')
    # RFC 8259 section 8.1: no byte-order mark; parsers may ignore one
    assert data == {"TaskName": "rest"}
    (f,) = findings
    assert (f.code, f.severity) == ("sidecar/bad-encoding", Severity.NOTE)


@pytest.mark.parametrize("encoding", ["utf-16", "utf-32"])
def test_utf16_and_utf32_are_refused(tmp_path: Path, encoding: str) -> None:
    data, findings = load_text(tmp_path, '{"TaskName": "rest"}'.encode(encoding))
    # RFC 8259 section 8.1 and the BIDS specification: JSON files are UTF-8
    assert data is None
    assert [(f.code, f.severity) for f in findings] == [("sidecar/bad-encoding", Severity.ERROR)]


def test_latin1_is_refused_with_position(tmp_path: Path) -> None:
    data, findings = load_text(tmp_path, '{\n"Institution": "Müller"}'.encode("latin-1"))
    assert data is None
    (f,) = findings
    assert (f.code, f.severity) == ("sidecar/bad-encoding", Severity.ERROR)
    assert "line 2" in f.message


def test_lone_surrogate_is_replaced(tmp_path: Path) -> None:
    data, findings = load_text(tmp_path, '{"TaskName": "a\\ud800b"}')
    assert data == {"TaskName": "a\ufffdb"}
    (f,) = findings
    assert (f.code, f.severity, f.field) == ("sidecar/bad-encoding", Severity.WARNING, "TaskName")


def nest(depth: int) -> str:
    return '{"a": ' * (depth - 1) + "[1]" + "}" * (depth - 1)


def test_depth_limit(tmp_path: Path) -> None:
    data, findings = load_text(tmp_path, nest(64))
    assert data is not None and findings == []
    data, findings = load_text(tmp_path, nest(65))
    assert data is None and codes(findings) == ["sidecar/too-deep"]


def test_absurd_depth_is_bounded(tmp_path: Path) -> None:
    start = time.perf_counter()
    data, findings = load_text(tmp_path, "[" * 200_000 + "]" * 200_000)
    assert time.perf_counter() - start < 2.0
    assert data is None and codes(findings) in (["sidecar/too-deep"], ["sidecar/not-object"])


def test_too_large(tmp_path: Path) -> None:
    path = tmp_path / "big.json"
    with open(path, "wb") as fh:
        fh.truncate(16 * 1024 * 1024 + 1)  # sparse: nothing is written
    data, findings = load_sidecar(path, "big.json")
    assert data is None and codes(findings) == ["sidecar/too-large"]


def test_file_problems_are_findings(tmp_path: Path) -> None:
    data, findings = load_sidecar(tmp_path / "missing.json", "missing.json")
    assert data is None and codes(findings) == ["file/missing"]
    (tmp_path / "folder.json").mkdir()
    assert codes(load_sidecar(tmp_path / "folder.json")[1]) == ["file/unreadable"]
    annexed = symlink(tmp_path / "a.json", ".git/annex/objects/Ab/Cd/KEY/KEY.json")
    assert codes(load_sidecar(annexed)[1]) == ["file/no-content"]
    loop = symlink(tmp_path / "loop.json", "loop.json")
    assert codes(load_sidecar(loop)[1]) == ["file/link-loop"]
    assert all(f.severity is Severity.ERROR for f in load_sidecar(loop)[1])


# --- type checks against the schema --------------------------------------------------------


def test_valid_fields_pass() -> None:
    data = {
        "SliceTiming": [0, 0.5, 1, 1.5],
        "RepetitionTime": 2,
        "VolumeTiming": [0.0, 2.0],
        "SliceEncodingDirection": "k-",
        "MultibandAccelerationFactor": 4,
        "DelayTime": 0.5,
        "AcquisitionDuration": 1.5,
        "StartTime": 0.0,
        "EchoTime": [0.01, 0.02],
        "TaskName": "rest",
        "Unknown": {"anything": [None]},
    }
    assert check_types(data, "x.json") == []


@pytest.mark.parametrize(
    ("field", "value"),
    [
        ("SliceTiming", "0, 1"),  # BIDS: array of numbers
        ("SliceTiming", [0, "1"]),
        ("SliceTiming", [0, -0.5]),  # BIDS: items minimum 0
        ("SliceTiming", [0, True]),  # JSON booleans are not numbers (RFC 8259)
        ("RepetitionTime", 0),  # BIDS: exclusiveMinimum 0
        ("RepetitionTime", "2"),
        ("VolumeTiming", []),  # BIDS: minItems 1
        ("SliceEncodingDirection", "z"),  # BIDS: enum i, i-, j, j-, k, k-
        ("SliceEncodingDirection", "K"),
        ("MultibandAccelerationFactor", "4"),
        ("AcquisitionDuration", 0),
        ("EchoTime", -0.01),
        ("TaskName", 5),
    ],
)
def test_wrong_types_are_reported_once(field: str, value: Any) -> None:
    data = {"TaskName": "x", field: value}
    findings = check_types(data, "sub-01_bold.json")
    (f,) = findings
    assert (f.code, f.severity, f.field, f.file) == (
        "sidecar/wrong-type",
        Severity.ERROR,
        field,
        "sub-01_bold.json",
    )
    assert field in f.message and "sub-01_bold.json" in f.message and "\n" not in f.message


def test_sources_attribute_findings() -> None:
    findings = check_types(
        {"RepetitionTime": -1, "SliceTiming": "x"},
        "fallback.json",
        sources={"RepetitionTime": "task-rest_bold.json"},
    )
    assert {f.field: f.file for f in findings} == {
        "RepetitionTime": "task-rest_bold.json",
        "SliceTiming": "fallback.json",
    }


def test_schema_is_valid_draft_2020_12() -> None:
    schema = load_schema()
    assert schema["$schema"] == "https://json-schema.org/draft/2020-12/schema"
    jsonschema.Draft202012Validator.check_schema(schema)  # source: JSON Schema meta-schema
    assert set(schema["properties"]) == TIMING_FIELDS


# keys that carry documentation or units, not validation
NON_VALIDATING = {"name", "display_name", "description", "unit", "format"}


def validation_part(definition: Any) -> Any:
    if isinstance(definition, dict):
        return {k: validation_part(v) for k, v in definition.items() if k not in NON_VALIDATING}
    if isinstance(definition, list):
        return [validation_part(v) for v in definition]
    return definition


def bids_metadata() -> dict[str, Any]:
    text = (resources.files("bidsschematools") / "data" / "schema.json").read_text("utf-8")
    return json.loads(text)["objects"]["metadata"]


@pytest.mark.parametrize("field", sorted(TIMING_FIELDS))
def test_schema_agrees_with_bids(field: str) -> None:
    ours = validation_part(load_schema()["properties"][field])
    # source: BIDS specification, bidsschematools/data/schema.json objects.metadata
    standard = validation_part(bids_metadata()[field])
    assert ours == standard
    if "enum" in standard:
        assert sorted(ours["enum"]) == sorted(standard["enum"])


def test_non_finite_in_overridden_duplicate_is_still_reported(tmp_path: Path) -> None:
    data, findings = load_text(tmp_path, '{"SliceTiming": [0, NaN], "SliceTiming": [0, 1]}')
    assert data == {"SliceTiming": [0, 1]}  # the last copy wins (Python's json module)
    assert sorted(codes(findings)) == ["sidecar/duplicate-key", "sidecar/non-finite-number"]
    assert all(f.severity is Severity.ERROR for f in findings)  # RFC 8259: NaN is not JSON


@pytest.mark.parametrize("value", [0, -2, 1.5, 0.0])
def test_a_multiband_factor_that_counts_no_slices_is_reported(value: float) -> None:
    # source: bidsschematools objects.metadata.MultibandAccelerationFactor: a "number",
    # "the multiband factor" (slices excited together): the BIDS type admits the value...
    standard = bids_metadata()["MultibandAccelerationFactor"]
    assert standard["type"] == "number"
    jsonschema.validate(value, validation_part(standard))
    # ...but a count of slices excited together is a whole number of at least 1
    # (common practice, no source)
    findings = check_types({"MultibandAccelerationFactor": value}, "x_bold.json")
    assert codes(findings) == ["sidecar/wrong-type"]
    assert "must be an integer ≥ 1" in findings[0].message
    assert findings[0].field == "MultibandAccelerationFactor"


@pytest.mark.parametrize("value", [1, 2, 4.0])
def test_a_whole_multiband_factor_is_accepted(value: float) -> None:
    assert check_types({"MultibandAccelerationFactor": value}, "x_bold.json") == []


def test_a_zero_multiband_factor_is_not_a_mismatch_with_the_times(tmp_path: Path) -> None:
    from slicetime.pipelines.audit import audit_paths

    write_json(tmp_path / "dataset_description.json", {"Name": "t", "BIDSVersion": "1.9.0"})
    write_run(tmp_path, "sub-01/func/sub-01_task-x_bold.nii.gz", shape=(4, 4, 4, 5), tr=2.0,
              sidecar={"RepetitionTime": 2.0, "SliceTiming": [0, 0.5, 1.0, 1.5],
                       "MultibandAccelerationFactor": 0})
    (run,) = audit_paths([tmp_path]).runs
    found = [f.code for f in run.findings if f.field == "MultibandAccelerationFactor"]
    assert found == ["sidecar/wrong-type"]
