"""The command line: contracts (exit codes, JSON report) and clean failures."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import jsonschema
import pytest
from click.testing import CliRunner

from slicetime.interfaces.cli import cli
from slicetime.interfaces.report_json import report_schema
from slicetime.rules import RULES
from slicetime.rules.registry import RENAMED
from slicetime.schemes.generate import Protocol, slice_timing
from slicetime.schemes.infer import infer_scheme
from tests.helpers_bids import write_description, write_run, write_sidecar

RUN = "sub-01/func/sub-01_task-tap_bold.nii.gz"


def run_cli(*args: str) -> tuple[int, str, str]:
    result = CliRunner().invoke(cli, list(args), catch_exceptions=False)
    return result.exit_code, result.stdout, result.stderr


@pytest.fixture()
def dataset(tmp_path: Path) -> Path:
    root = tmp_path / "ds"
    write_description(root)
    st = slice_timing(Protocol(n_slices=10, order="interleaved", repetition_time=2.0))
    write_sidecar(root, "task-tap_bold.json", {"RepetitionTime": 2.0, "SliceTiming": st})
    write_run(root, RUN, shape=(4, 4, 10, 5), tr=2.0)
    write_run(root, "sub-02/func/sub-02_task-tap_bold.nii.gz", shape=(4, 4, 10, 5), tr=2.0,
              sidecar={"SliceTiming": [t * 1000 for t in st]})
    return root


def test_former_spellings_still_work_with_a_notice(dataset: Path) -> None:
    # show --json (0.1) is show --format json: the same document, a notice on stderr,
    # and hidden from the help
    code, new, err_new = run_cli("show", str(dataset / RUN), "--format", "json")
    old_code, old, err_old = run_cli("show", str(dataset / RUN), "--json")
    assert old_code == code and json.loads(old) == json.loads(new)
    assert err_new == "" and "--format json" in err_old and "next release" in err_old
    assert "--json" not in run_cli("show", "--help")[1]


def test_show_json_is_the_contract_run_object(dataset: Path) -> None:
    code, out, _ = run_cli("show", str(dataset / RUN), "--format", "json")
    assert code == 0
    obj = json.loads(out)
    jsonschema.validate(obj, report_schema()["$defs"]["run"] | {"$defs": report_schema()["$defs"]})
    assert obj["path"] == RUN
    assert obj["shape"] == [4, 4, 10, 5]
    assert obj["sources"]["SliceTiming"] == "task-tap_bold.json"
    # common practice (no source): odd-then-even interleaving of 10 slices over 2 s puts
    # array-neighbouring slices about half a TR (1 s) apart
    times = obj["slice_times"]
    assert times[1] - times[0] == pytest.approx(1.0)
    assert obj["scheme"]["label"] == "interleaved ascending from 0"
    assert obj["scheme"]["groups"][:3] == [[0], [2], [4]]


def test_show_text_names_sources_and_scheme(dataset: Path) -> None:
    code, out, _ = run_cli("show", str(dataset / RUN))
    assert code == 0
    assert "interleaved ascending from 0" in out
    assert "task-tap_bold.json" in out


def test_audit_json_validates_and_exit_code_follows_fail_on(dataset: Path) -> None:
    code, out, _ = run_cli("audit", str(dataset), "--format", "json")
    assert code == 1  # sub-02 has SliceTiming in milliseconds (an error)
    report = json.loads(out)
    jsonschema.validate(report, report_schema())
    assert report["summary"]["runs"] == 2
    by_path = {r["path"]: r for r in report["runs"]}
    bad = by_path["sub-02/func/sub-02_task-tap_bold.nii.gz"]
    assert "timing/units-ms" in {f["code"] for f in bad["findings"]}
    assert [f for f in by_path[RUN]["findings"] if f["severity"] == "error"] == []
    assert run_cli("audit", str(dataset), "--fail-on", "never")[0] == 0


def test_audit_writes_output_file(dataset: Path, tmp_path: Path) -> None:
    target = tmp_path / "report.json"
    run_cli("audit", str(dataset), "--format", "json", "--output", str(target))
    jsonschema.validate(json.loads(target.read_text()), report_schema())


def test_missing_path_is_one_line_and_exit_2(tmp_path: Path) -> None:
    code, _out, err = run_cli("show", str(tmp_path / "nope.nii.gz"))
    assert code == 2
    assert err.count("\n") == 1 and "nope.nii.gz" in err and "Traceback" not in err
    code, _, err = run_cli("audit", str(tmp_path / "absent"))
    assert code == 2 and "absent" in err


def test_garbage_file_is_a_finding_not_a_crash(tmp_path: Path) -> None:
    root = tmp_path / "ds"
    write_description(root)
    bad = root / "sub-01/func/sub-01_task-tap_bold.nii.gz"
    bad.parent.mkdir(parents=True)
    bad.write_bytes(os.urandom(2000))
    code, out, _ = run_cli("show", str(bad), "--format", "json")
    assert code == 1  # a file show cannot read at all: the finding, and exit 1 (issue 15)
    assert "file/not-nifti" in {f["code"] for f in json.loads(out)["findings"]}


def test_timing_output_round_trips_through_inference() -> None:
    code, out, err = run_cli("timing", "--slices", "40", "--tr", "2", "--order", "interleaved")
    assert code == 0
    fields = json.loads(out)
    # common practice (no source): 40 slices in a 2 s TR puts one slice every 50 ms
    assert sorted(fields["SliceTiming"])[1] == pytest.approx(0.05)
    assert infer_scheme(fields["SliceTiming"]).label == "interleaved ascending from 0"
    assert "interleaved ascending from 0" in err
    code, out, _ = run_cli("timing", "--slices", "12", "--tr", "1.5", "--multiband", "4",
                           "--axis", "k-")
    fields = json.loads(out)
    assert fields["MultibandAccelerationFactor"] == 4
    assert fields["SliceEncodingDirection"] == "k-"


def test_timing_bad_protocol_is_a_usage_error() -> None:
    code, _, err = run_cli("timing", "--slices", "10", "--tr", "2", "--multiband", "3")
    assert code == 2 and "multiband" in err and "Traceback" not in err
    code, _, err = run_cli("timing", "--slices", "10")
    assert code == 2 and "--tr" in err


def test_timing_never_suggests_an_impossible_tr() -> None:
    # BIDS: RepetitionTime in seconds; the model's plausible TR is 0.05 to 100 s
    # (model.MIN/MAX_REPETITION_TIME, common practice (no source)): a value that is no
    # TR read as milliseconds either, or not finite, gets no "did you mean"
    for value in ("inf", "1e12"):
        code, out, err = run_cli("timing", "--slices", "10", "--tr", value)
        lines = err.strip().splitlines()
        assert code == 2 and out == "" and len(lines) == 1, err
        assert "did you mean" not in err and lines[0].startswith("slicetime: timing: --tr")
    code, _, err = run_cli("timing", "--slices", "10", "--tr", "2000")
    assert code == 2 and "did you mean --tr 2?" in err  # 2000 ms = 2 s


def test_explain_covers_every_code() -> None:
    code, out, _ = run_cli("explain", "--list")
    assert code == 0
    listed = {line.split()[0] for line in out.splitlines()}
    assert listed == set(RULES)
    code, out, _ = run_cli("explain", "timing/units-ms")
    assert code == 0 and "1000" in out
    assert run_cli("explain", "no/such-code")[0] == 2


def test_module_entry_point_runs() -> None:
    proc = subprocess.run([sys.executable, "-m", "slicetime", "--version"],
                          capture_output=True, text=True, check=False)
    assert proc.returncode == 0 and "slicetime" in proc.stdout


def test_every_code_the_package_can_emit_is_documented() -> None:
    import re

    package = Path(__file__).resolve().parents[1] / "slicetime"
    # every area the registry knows (no hand-kept list: a new area is covered as soon as
    # one of its codes is registered), and any quoted area/short-name in the package
    areas = "|".join(sorted({code.split("/")[0] for code in RULES}))
    pattern = re.compile(rf"""["']((?:{areas})/[a-z0-9-]+)["']""")
    emitted = set()
    for source in package.rglob("*.py"):
        emitted.update(pattern.findall(source.read_text("utf-8")))
    # a former code (rules.RENAMED) is named only to map it to the code it became
    undocumented = emitted - set(RULES) - set(RENAMED)
    assert not undocumented, sorted(undocumented)
    assert set(RENAMED.values()) <= set(RULES)


def test_a_former_code_keeps_working_in_policies_and_explain(tmp_path: Path) -> None:
    from tests.helpers_bids import write_run

    # header/tr-mismatch became header/tr-disagrees: a lab policy written for the former
    # name still changes the severity of the finding, and explain names the new code
    ds = tmp_path / "ds"
    write_run(ds, "sub-01/func/sub-01_task-x_bold.nii.gz", tr=3.0,
              sidecar={"RepetitionTime": 2.0, "SliceTiming": [0.0, 0.5, 1.0]})
    (ds / "slicetime-policy.toml").write_text(
        'version = 1\n[levels]\n"header/tr-mismatch" = "note"\n')
    result = CliRunner().invoke(cli, ["audit", str(ds), "--format", "json"])
    findings = json.loads(result.stdout)["runs"][0]["findings"]
    found = [f for f in findings if f["code"] == "header/tr-disagrees"]
    assert found and found[0]["severity"] == "note"
    (ds / "slicetime-policy.toml").write_text(
        'version = 1\n[[waive]]\nfindings = ["header/tr-mismatch"]\nreason = "scanner quirk"\n')
    result = CliRunner().invoke(cli, ["audit", str(ds), "--format", "json"])
    report = json.loads(result.stdout)
    assert not [f for f in report["runs"][0]["findings"] if f["code"] == "header/tr-disagrees"]
    assert report["summary"]["ignored"] == 1
    shown = CliRunner().invoke(cli, ["explain", "header/tr-mismatch"])
    assert shown.exit_code == 0 and "header/tr-disagrees" in shown.stdout


def test_policy_is_discovered_applied_and_counted(dataset: Path) -> None:
    (dataset / "slicetime-policy.toml").write_text(
        'version = 1\n'
        '[[protocols]]\nmatch = { task = "tap" }\nrepetition_time = 2.5\n'
        '[[waive]]\nruns = ["sub-02/**"]\nfindings = ["timing/*"]\n'
        'reason = "sub-02 is re-exported next week"\n')
    code, out, _ = run_cli("audit", str(dataset), "--format", "json")
    report = json.loads(out)
    jsonschema.validate(report, report_schema())
    by_path = {r["path"]: {f["code"] for f in r["findings"]} for r in report["runs"]}
    assert "policy/tr-mismatch" in by_path[RUN]
    assert "timing/units-ms" not in by_path["sub-02/func/sub-02_task-tap_bold.nii.gz"]
    assert report["summary"]["ignored"] >= 1
    assert code == 1  # the policy mismatch is an error


def test_bad_policy_given_explicitly_is_exit_2(dataset: Path, tmp_path: Path) -> None:
    bad = tmp_path / "p.toml"
    bad.write_text("version = 1\n[[protocols]]\nmatch = {}\nrepetition_time = -1\n")
    code, _, err = run_cli("audit", str(dataset), "--policy", str(bad))
    assert code == 2 and "repetition_time" in err and "Traceback" not in err


def test_shell_completion_completes_codes_for_explain() -> None:
    # click's completion protocol (bash_complete: one "type,value" line per candidate)
    from slicetime.rules import RULES

    result = CliRunner().invoke(cli, [], prog_name="slicetime", env={
        "_SLICETIME_COMPLETE": "bash_complete", "COMP_WORDS": "slicetime explain timing/u",
        "COMP_CWORD": "2"})
    offered = [line.split(",", 1)[1] for line in result.output.splitlines() if line]
    assert offered == sorted(c for c in RULES if c.startswith("timing/u"))
    assert "timing/units-ms" in offered


def test_show_on_an_events_table_says_it_is_not_a_run(tmp_path: Path) -> None:
    # BIDS "Task events": *_events.tsv accompanies a run and is not one

    write_description(tmp_path)
    run = write_run(tmp_path, "sub-01/func/sub-01_task-x_bold.nii.gz", shape=(4, 4, 3, 5),
                    tr=2.0, sidecar={"RepetitionTime": 2.0, "SliceTiming": [0, 0.5, 1.0]})
    events = run.with_name("sub-01_task-x_events.tsv")
    events.write_text("onset\tduration\n1\t2\n")
    result = CliRunner().invoke(cli, ["show", str(events)])
    assert result.exit_code == 2
    assert "not a run" in result.output and "enam" not in result.output  # no "Rename"
    assert str(run) in result.output  # the run it belongs to
