"""Paths given on the command line: every command resolves them the same way
(``readers.dataset.given_run``), and a sidecar that is a folder is reported."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from click.testing import CliRunner

from slicetime.interfaces.cli import cli
from slicetime.readers.dataset import given_run
from slicetime.readers.errors import ReadError
from tests.helpers_bids import write_description, write_run

RUN = "sub-01/func/sub-01_task-x_bold.nii.gz"
# BIDS "Task imaging data": SliceTiming in seconds, each time below RepetitionTime
SIDECAR = {"RepetitionTime": 2.0, "SliceTiming": [0.0, 0.5, 1.0]}


def invoke(*args: str) -> tuple[int, str, str]:
    result = CliRunner().invoke(cli, list(args))
    return result.exit_code, result.stdout, result.stderr


@pytest.fixture()
def run(tmp_path: Path) -> Path:
    write_description(tmp_path)
    return write_run(tmp_path, RUN, shape=(4, 4, 3, 5), tr=2.0, sidecar=SIDECAR)


def test_a_runs_own_sidecar_stands_for_its_image(run: Path) -> None:
    # BIDS "inheritance principle": a data file's own sidecar shares its stem
    assert given_run(run.with_name("sub-01_task-x_bold.json")) == run
    assert given_run(run) == run
    assert given_run(run.parent) == run.parent


def test_audit_of_a_sidecar_audits_its_run(run: Path) -> None:
    code, out, err = invoke("audit", str(run.with_name("sub-01_task-x_bold.json")),
                            "--format", "json")
    assert code == 0, err
    report = json.loads(out)
    assert [r["path"] for r in report["runs"]] == ["sub-01/func/sub-01_task-x_bold.nii.gz"]
    assert "not-nifti" not in out and "bad-run-name" not in out


def test_verify_of_a_sidecar_verifies_its_run(run: Path) -> None:
    code, out, err = invoke("verify", str(run.with_name("sub-01_task-x_bold.json")),
                            "--format", "json")
    assert code == 0, err  # 5 volumes: undecidable, a note
    assert "not-nifti" not in out + err and "bad-run-name" not in out + err
    report = json.loads(out)
    assert [r["path"] for r in report["runs"]] == ["sub-01/func/sub-01_task-x_bold.nii.gz"]


@pytest.mark.parametrize("command", ["audit", "verify", "show"])
@pytest.mark.parametrize("name", ["sub-01_task-x_bold.bval", "sub-01_task-x_bold.bvec",
                                  "sub-01_task-x_events.tsv"])
def test_a_file_that_accompanies_runs_is_not_a_run(run: Path, command: str, name: str) -> None:
    # BIDS: .bval/.bvec (diffusion) and _events.tsv (task events) accompany runs
    companion = run.with_name(name)
    companion.write_text("0\n")
    code, out, err = invoke(command, str(companion))
    assert code == 2
    lines = err.strip().splitlines()
    assert len(lines) == 1 and "not a run" in lines[0] and str(companion) in lines[0]
    assert "bad-run-name" not in out + err and "not-nifti" not in out + err


def test_audit_with_a_bval_among_paths_is_a_usage_error(run: Path) -> None:
    bval = run.with_name("sub-01_dwi.bval")
    bval.write_text("0 1000\n")
    code, out, err = invoke("audit", str(run), str(bval))
    assert code == 2 and out == ""
    assert str(bval) in err and "not a run" in err


def test_a_sidecar_without_its_image_is_not_a_run(tmp_path: Path) -> None:
    write_description(tmp_path)
    lone = tmp_path / "task-x_bold.json"
    lone.write_text(json.dumps(SIDECAR))
    with pytest.raises(ReadError) as caught:
        given_run(lone)
    assert caught.value.code == "file/not-a-run"
    code, _, err = invoke("audit", str(lone))
    assert code == 2 and "not a run" in err and str(lone) in err


def test_a_sidecar_that_is_a_folder_is_reported(tmp_path: Path) -> None:
    write_description(tmp_path)
    write_run(tmp_path, "sub-01/func/sub-01_task-d_bold.nii.gz", shape=(4, 4, 3, 5), tr=2.0,
              sidecar=SIDECAR)
    (tmp_path / "task-d_bold.json").mkdir()  # an inherited sidecar's name, as a folder
    code, out, _ = invoke("audit", str(tmp_path), "--format", "json")
    findings = [f for r in json.loads(out)["runs"] for f in r["findings"]]
    found = [f for f in findings if f.get("file") == "task-d_bold.json"]
    assert len(found) == 1 and found[0]["code"] == "file/unreadable"
    assert "is a directory, not a JSON file" in found[0]["message"]
    assert code == 1


@pytest.mark.parametrize("command", ["audit", "verify", "show", "fix"])
def test_a_file_that_is_no_nifti_image_given_by_name_is_not_a_run(
        run: Path, command: str) -> None:
    # NIfTI-1/2 images are .nii or .nii.gz (BIDS: the data file extensions of func
    # runs); the walk takes nothing else for a run, so a file named otherwise and given
    # by name is a usage mistake: one line naming it, exit 2 (README, exit status)
    notes = run.with_name("notes.txt")
    notes.write_text("scanner log\n")
    code, out, err = invoke(command, str(notes))
    assert code == 2
    lines = err.strip().splitlines()
    assert len(lines) == 1 and "not a run" in lines[0] and str(notes) in lines[0]
    assert "not-nifti" not in out + err


def _bids_time_series() -> list[tuple[str, str]]:
    """(suffix, NIfTI extension) of every func and perf image the BIDS schema defines
    (bidsschematools: rules.files.raw.func / .perf), but the ones that are no time
    series to correct, as the schema's own descriptions say: sbref ("single-band
    reference"), m0scan ("a calibration image") and noRF ("noise scans ... acquired by
    disabling the radio frequency excitation")."""
    from bidsschematools import schema

    bids = schema.load_schema()
    pairs = set()
    for datatype in ("func", "perf"):
        for rule in bids.rules.files.raw[datatype].values():
            for suffix in rule.suffixes:
                if suffix in ("sbref", "m0scan", "noRF"):
                    continue
                pairs |= {(suffix, ext) for ext in rule.extensions if ext.startswith(".nii")}
    return sorted(pairs)


def test_the_time_series_table_holds_every_bids_func_and_perf_series() -> None:
    from slicetime.readers.dataset import TIME_SERIES_SUFFIXES

    found = {suffix for suffix, _ in _bids_time_series()}
    assert {"bold", "cbv", "phase", "asl"} <= found  # the schema is read as expected
    assert found <= TIME_SERIES_SUFFIXES


@pytest.mark.parametrize(("suffix", "extension"), _bids_time_series())
def test_an_events_table_names_the_run_beside_it_whatever_its_suffix(
        tmp_path: Path, suffix: str, extension: str) -> None:
    write_description(tmp_path)
    image = write_run(tmp_path, f"sub-01/func/sub-01_task-x_{suffix}{extension}",
                      shape=(4, 4, 3, 5), tr=2.0, sidecar=SIDECAR)
    events = image.with_name("sub-01_task-x_events.tsv")
    events.write_text("onset\tduration\n1\t1\n")
    with pytest.raises(ReadError) as caught:
        given_run(events)
    assert caught.value.message.endswith(f"; the run it belongs to: {image}")


def test_the_audits_check_of_given_paths_resolves_each_path_once(
        run: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # a sidecar given stands for its run, a folder for itself: the check that every
    # given path holds runs asks given_run once per path (it asked up to four times)
    from slicetime.pipelines import audit as auditing

    asked: list[Path] = []
    real = auditing.given_run

    def counting(path: Path) -> Path:
        asked.append(path)
        return real(path)

    monkeypatch.setattr(auditing, "given_run", counting)
    sidecar = run.with_name("sub-01_task-x_bold.json")
    result = auditing.audit_paths([sidecar, run.parent])
    assert [r.record.path for r in result.runs] == [RUN]
    assert sorted(map(str, asked)) == sorted([str(sidecar), str(run.parent)])
