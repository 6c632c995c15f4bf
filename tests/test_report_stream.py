"""Reports written as a stream (``audit`` command): the same contract as the report
built in memory, every format, hostile names, and the text report's summary.

References:

- The previous report is built with the in-memory path that existed before the
  stream (``audit_paths`` then ``report_json.audit_object``); the streamed report
  must parse (``json``, the standard library's parser) to the same object.
- Report and line schemas are checked with jsonschema (Draft 2020-12).
- JUnit XML is read back with ``xml.etree.ElementTree``; TSV with the standard
  library's ``csv`` reader in its tab dialect (``delimiter="\\t"``).
"""

from __future__ import annotations

import csv
import io
import json
import os
import xml.etree.ElementTree as ET
from pathlib import Path

import jsonschema
import pytest
from click.testing import CliRunner

from slicetime.interfaces.cli import cli
from slicetime.interfaces.report_json import audit_object, dumps, lines_validator, report_schema
from slicetime.interfaces.report_stream import TSV_COLUMNS
from slicetime.interfaces.safe_text import xml_safe
from slicetime.pipelines.audit import audit_paths, audit_stream, dataset_phase
from slicetime.rules import check_dataset
from slicetime.schemes.generate import Protocol, slice_timing
from tests.helpers_bids import write_description, write_run, write_sidecar

SHAPE = (4, 4, 10, 5)
TR = 2.0
HOSTILE = "sub-09/func/sub-09_task-tap\x1b[2J\x07<q>\tx\ny_bold.nii.gz"


def _times(**kw: object) -> list[float]:
    return slice_timing(Protocol(n_slices=10, repetition_time=TR, **kw))  # type: ignore[arg-type]


@pytest.fixture(scope="module")
def dataset(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Clean runs, an outlier (a dataset finding added after the stream), a run in
    milliseconds, an unreadable file, a run with a hostile name (controls, markup,
    tab, newline and a byte that is not UTF-8), a policy that ignores one code."""
    root = tmp_path_factory.mktemp("stream") / "ds"
    write_description(root, name="quiet rooms")
    st = _times(order="interleaved")
    write_sidecar(root, "task-tap_bold.json", {"RepetitionTime": TR, "SliceTiming": st})
    for i in range(1, 6):
        write_run(root, f"sub-0{i}/func/sub-0{i}_task-tap_bold.nii.gz", shape=SHAPE, tr=TR)
    write_run(root, "sub-06/func/sub-06_task-tap_bold.nii.gz", shape=SHAPE, tr=TR,
              sidecar={"SliceTiming": _times(order="sequential", ascending=False)})
    write_run(root, "sub-07/func/sub-07_task-tap_bold.nii.gz", shape=SHAPE, tr=TR,
              sidecar={"SliceTiming": [t * 1000 for t in st]})
    broken = root / "sub-08/func/sub-08_task-tap_bold.nii.gz"
    broken.parent.mkdir(parents=True)
    broken.write_bytes(b"not an image" * 40)
    hostile = write_run(root, HOSTILE, shape=SHAPE, tr=TR,
                        sidecar={"RepetitionTime": TR, "SliceTiming": st})
    try:  # a file-name byte that is not UTF-8 as well
        raw = os.fsencode(hostile)
        os.rename(raw, raw.replace(b"_bold.nii.gz", b"\xff_bold.nii.gz"))
        side = os.fsencode(hostile.with_name(hostile.name.replace(".nii.gz", ".json")))
        os.rename(side, side.replace(b"_bold.json", b"\xff_bold.json"))
    except OSError:  # pragma: no cover - file systems that require UTF-8 names
        pass
    (root / "slicetime-policy.toml").write_text(
        'version = 1\n[[waive]]\nruns = ["sub-06/**"]\n'
        'findings = ["inherit/timing-override"]\nreason = "pilot"\n',
        encoding="utf-8")
    return root


def cli_out(*args: str) -> tuple[int, str]:
    result = CliRunner().invoke(cli, list(args), catch_exceptions=False)
    return result.exit_code, result.stdout


def test_streamed_json_equals_the_report_built_in_memory(dataset: Path) -> None:
    code, text = cli_out("audit", str(dataset), "--format", "json")
    streamed = json.loads(text)
    before = json.loads(dumps(audit_object(audit_paths([dataset]), str(dataset))))
    # the same keys in the same order, the same runs in the same order, the same values
    assert list(streamed) == list(before)
    assert streamed == before
    jsonschema.validate(streamed, report_schema())
    # the policy ignored something and the dataset rules added a finding after the stream
    assert streamed["summary"]["ignored"] > 0
    assert any(f["code"] == "dataset/outlier-scheme" for r in streamed["runs"]
               for f in r["findings"])
    assert code == 1 and streamed["root"] == "quiet rooms"


def test_a_run_line_is_the_encoded_run_object_byte_for_byte(dataset: Path) -> None:
    # run_line encodes the shared values (slice times, scheme) once per distinct value;
    # the text must still be exactly that of the whole object, the first time and when
    # the value is remembered (milliseconds, no schedule, a hostile name included)
    from slicetime.interfaces.report_json import run_object
    from slicetime.interfaces.report_source import encode, run_line

    runs = audit_paths([dataset]).runs
    assert any(r.record.schedule is None for r in runs)
    for _ in range(2):
        for run in runs:
            assert run_line(run) == encode(run_object(run))


def test_dataset_findings_that_follow_from_a_unit_are_folded_in_the_stream_too(
    tmp_path: Path,
) -> None:
    # slice times written in milliseconds, in another order than the majority's: the
    # majority finding on SliceTiming follows from the unit and is folded into it after
    # the stream, exactly as in memory
    root = tmp_path / "ds"
    write_description(root)
    write_sidecar(root, "task-tap_bold.json", {"RepetitionTime": TR,
                                               "SliceTiming": _times(order="interleaved")})
    for i in range(1, 5):
        write_run(root, f"sub-0{i}/func/sub-0{i}_task-tap_bold.nii.gz", shape=SHAPE, tr=TR)
    write_run(root, "sub-05/func/sub-05_task-tap_bold.nii.gz", shape=SHAPE, tr=TR,
              sidecar={"SliceTiming": [t * 1000 for t in _times(order="sequential")]})
    _, text = cli_out("audit", str(root), "--format", "json")
    streamed = json.loads(text)
    assert streamed == json.loads(dumps(audit_object(audit_paths([root]), str(root))))
    run = next(r for r in streamed["runs"] if r["path"].startswith("sub-05/"))
    roots = [f for f in run["findings"] if f["code"] == "timing/units-ms"]
    assert len(roots) == 1
    assert "dataset/outlier-scheme" in [f["code"] for f in roots[0]["evidence"]["folded"]]
    assert "dataset/outlier-scheme" not in [f["code"] for f in run["findings"]]
    assert streamed["summary"]["warning"] == sum(
        f["severity"] == "warning" for r in streamed["runs"] for f in r["findings"]) + sum(
        f["severity"] == "warning" for f in streamed["dataset_findings"])


def test_jsonl_round_trips_to_the_json_report(dataset: Path) -> None:
    _, lines = cli_out("audit", str(dataset), "--format", "jsonl")
    _, whole = cli_out("audit", str(dataset), "--format", "json")
    report = json.loads(whole)
    objects = [json.loads(line) for line in lines.splitlines()]
    validator = lines_validator()
    for obj in objects:
        validator.validate(obj)
    assert list(objects[0]) == ["report"] and list(objects[-1]) == ["summary"]
    assert [o["run"] for o in objects if "run" in o] == report["runs"]
    assert [o["dataset_finding"] for o in objects if "dataset_finding" in o] == \
        report["dataset_findings"]
    assert objects[-1]["summary"] == report["summary"]
    head = objects[0]["report"]
    assert {k: head[k] for k in ("tool", "root", "roots", "policies")} == \
        {k: report[k] for k in ("tool", "root", "roots", "policies")}


def test_text_summary_counts_equal_the_json_summary(dataset: Path) -> None:
    _, text = cli_out("audit", str(dataset))
    report = json.loads(cli_out("audit", str(dataset), "--format", "json")[1])
    summary = report["summary"]
    per_severity = {s: sum(1 for r in report["runs"] for f in r["findings"] if f["severity"] == s)
                    for s in ("error", "warning", "note")}
    # the table: one row per run group, its errors/warnings/notes counts the runs' findings
    lines = text.splitlines()
    header = next(i for i, line in enumerate(lines) if line.startswith("run group"))
    rows = [line.split("  ") for line in lines[header + 1 : lines.index("", header)]]
    rows = [[cell.strip() for cell in row if cell.strip()] for row in rows]
    tap = next(row for row in rows if row[0] == "func: task-tap_bold")
    assert int(tap[1]) == sum(1 for r in report["runs"] if "task-tap_bold" in r["path"])
    assert sum(int(row[1]) for row in rows) == summary["runs"] == len(report["runs"])
    for column, severity in zip((3, 4, 5), ("error", "warning", "note"), strict=True):
        assert sum(int(row[column]) for row in rows) == per_severity[severity]
        wide = sum(1 for f in report["dataset_findings"] if f["severity"] == severity)
        assert per_severity[severity] + wide == summary[severity]
    last = lines[-1]
    assert last.startswith(f"{summary['runs']} runs audited: {summary['error']} error")
    assert f"{summary['warning']} warning" in last and f"{summary['note']} note" in last
    assert f"{summary['ignored']} finding" in last


def test_text_default_lists_only_runs_with_findings_and_all_lists_every_run(
    dataset: Path,
) -> None:
    report = json.loads(cli_out("audit", str(dataset), "--format", "json")[1])
    clean = [r["path"] for r in report["runs"] if not r["findings"]]
    flagged = [r["path"] for r in report["runs"] if r["findings"]]
    assert clean and flagged
    _, default = cli_out("audit", str(dataset))
    _, every = cli_out("audit", str(dataset), "--all")
    listed = {line.split("  ")[0] for line in default.splitlines() if line.startswith("sub-")}
    assert listed == {xml_safe(p) for p in flagged}
    listed_all = [line.split("  ")[0] for line in every.splitlines() if line.startswith("sub-")]
    assert listed_all == [xml_safe(r["path"]) for r in report["runs"]]


def test_quiet_prints_one_line_with_the_same_exit_status(dataset: Path) -> None:
    result = CliRunner().invoke(cli, ["audit", str(dataset), "--quiet"])
    full = CliRunner().invoke(cli, ["audit", str(dataset)])
    assert result.exit_code == full.exit_code == 1
    assert result.stdout.count("\n") == 1
    assert result.stdout.strip() == full.stdout.strip().splitlines()[-1]
    assert result.stderr == ""
    never = CliRunner().invoke(cli, ["audit", str(dataset), "-q", "--fail-on", "never"])
    assert never.exit_code == 0 and never.stdout.count("\n") == 1


def test_tsv_has_one_row_per_run_with_the_json_values(dataset: Path) -> None:
    _, text = cli_out("audit", str(dataset), "--format", "tsv")
    report = json.loads(cli_out("audit", str(dataset), "--format", "json")[1])
    rows = list(csv.reader(io.StringIO(text), delimiter="\t", quoting=csv.QUOTE_NONE))
    assert tuple(rows[0]) == TSV_COLUMNS
    assert len(rows) == len(report["runs"]) + 1
    assert all(len(r) == len(TSV_COLUMNS) for r in rows)
    for row, run in zip(rows[1:], report["runs"], strict=True):
        values = dict(zip(TSV_COLUMNS, row, strict=True))
        assert values["path"] == xml_safe(run["path"])
        assert values["dataset"] == ""  # one root: its name is not repeated on every row
        scheme = run["scheme"] or {}
        assert values["scheme"] == (scheme.get("label") or "")
        if run["slice_times"]:
            assert int(values["slices"]) == len(run["slice_times"])
        if run["repetition_time"]:
            assert float(values["repetition_time"]) == run["repetition_time"]
        assert [int(values[k]) for k in ("errors", "warnings", "notes")] == [
            sum(1 for f in run["findings"] if f["severity"] == s)
            for s in ("error", "warning", "note")]
        assert values["codes"] == ",".join(sorted({f["code"] for f in run["findings"]}))


@pytest.mark.parametrize("fmt", ["text", "json", "jsonl", "tsv", "junit", "html"])
def test_hostile_names_are_escaped_in_every_format(
    dataset: Path, fmt: str, tmp_path: Path,
) -> None:
    if fmt == "html":
        out = tmp_path / "r.html"
        CliRunner().invoke(cli, ["audit", str(dataset), "--html", str(out), "-q"],
                           catch_exceptions=False)
        text = out.read_text(encoding="utf-8")
    else:
        text = cli_out("audit", str(dataset), "--format", fmt, "--all")[1]
    text.encode("utf-8")  # no lone surrogate
    raw_controls = "\x00\x01\x07\x1b\x7f" + ("\t\n" if fmt in ("json", "jsonl", "html") else "")
    shown = next(line for line in text.splitlines() if "sub-09" in line)
    assert not set(shown) & set(raw_controls.replace("\n", "")), repr(shown)
    assert not any(c in text for c in "\x07\x1b")
    if fmt == "html":
        assert "<q>" not in text  # markup from the name never reaches the page as markup
    if fmt in ("json", "jsonl"):
        paths = [json.loads(line)["run"]["path"] if fmt == "jsonl" else None
                 for line in text.splitlines() if '"run"' in line and fmt == "jsonl"]
        if fmt == "json":
            paths = [r["path"] for r in json.loads(text)["runs"]]
        hostile = next(p for p in paths if "sub-09" in p)
        # the JSON value keeps the name (controls as JSON escapes), the bad byte visible
        assert "\x1b[2J\x07<q>\tx\ny" in hostile
        if os.path.exists(os.fsencode(dataset / "sub-09/func") + b"/" + os.fsencode(
                HOSTILE.rsplit("/", 1)[1]).replace(b"_bold.nii.gz", b"\xff_bold.nii.gz")):
            assert "\\xff" in hostile
    if fmt == "tsv":
        # one row per run even though the name holds a tab and a newline
        assert sum(1 for line in text.splitlines() if "sub-09" in line) == 1
        assert "\\t" in shown and "\\n" in shown
    if fmt == "junit":
        ET.fromstring(text.encode("utf-8"))


def test_two_roots_are_named_in_text_and_junit(dataset: Path, tmp_path: Path) -> None:
    other = tmp_path / "elsewhere"
    write_description(other, name="second study")
    write_run(other, "sub-01/func/sub-01_task-tap_bold.nii.gz", shape=SHAPE, tr=TR,
              sidecar={"RepetitionTime": TR, "SliceTiming": [t * 1000 for t in _times(
                  order="interleaved")]})
    _, text = cli_out("audit", str(dataset), str(other))
    # two sub-01 runs: each is named with its dataset
    assert "[second study] sub-01/func/sub-01_task-tap_bold.nii.gz" in text
    assert "[quiet rooms] task-tap_bold" in text.replace("func: ", "")
    _, xml = cli_out("audit", str(dataset), str(other), "--format", "junit")
    doc = ET.fromstring(xml.encode("utf-8"))
    classes = {c.get("classname") for c in doc.iter("testcase")}
    assert "second study/sub-01/func" in classes and "quiet rooms/sub-01/func" in classes
    report = json.loads(cli_out("audit", str(dataset), str(other), "--format", "json")[1])
    assert report["root"] == "quiet rooms, second study"


def test_root_is_the_folder_name_without_a_dataset_name(tmp_path: Path) -> None:
    root = tmp_path / "lab-data"
    write_run(root, "sub-01/func/sub-01_task-tap_bold.nii.gz", shape=SHAPE, tr=TR,
              sidecar={"RepetitionTime": TR, "SliceTiming": _times(order="interleaved")})
    cwd = os.getcwd()
    os.chdir(root)
    try:
        report = json.loads(cli_out("audit", ".", "--format", "json")[1])
    finally:
        os.chdir(cwd)
    assert report["root"] == "lab-data"


def test_small_batches_give_the_same_runs_and_dataset_rules_see_the_same_facts(
    dataset: Path,
) -> None:
    seen: list[str] = []
    totals = audit_stream([dataset], lambda r: seen.append(r.record.path), batch=3)
    full = audit_paths([dataset])
    assert seen == [r.record.path for r in full.runs]
    assert totals.counts == full.counts() and totals.ignored == full.ignored_count()
    # the dataset rules give the same findings on the kept facts as on full records
    on_records = check_dataset([r.record for r in full.runs])
    on_facts = check_dataset(totals.facts)  # type: ignore[arg-type]
    assert on_facts == on_records and on_records[0]
    extras = dataset_phase(totals.facts, {}).extras
    assert set(extras) == set(on_records[0])
