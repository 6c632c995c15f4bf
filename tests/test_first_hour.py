"""What a new user trips over in the first hour (issue 15): show agrees with audit, one
root cause is reported once, nothing found is not success, misnamed runs are reported,
corrected runs, policy protocols over the majority, typos, timing mistakes, completion."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import nibabel as nib
import pytest
from click.testing import CliRunner

from slicetime.interfaces.cli import cli
from slicetime.model import Finding, Severity
from slicetime.pipelines.audit import audit_paths
from slicetime.rules import RULES, fold_consequences
from slicetime.schemes.generate import Protocol, slice_timing
from tests.helpers_bids import write_description, write_run, write_sidecar

SHAPE = (4, 4, 30, 5)
TR = 2.0


def run_cli(*args: str, **kw: object) -> tuple[int, str, str]:
    result = CliRunner().invoke(cli, list(args), catch_exceptions=False, **kw)  # type: ignore[arg-type]
    return result.exit_code, result.stdout, result.stderr


def nifti_interleaved(n: int, tr: float) -> list[float]:
    """NIfTI-1 slice_code 3 (alternating increasing: 0, 2, 4, ..., then 1, 3, ...) with
    slices spread evenly over the TR, as nibabel computes it (reference library)."""
    header = nib.Nifti1Header()
    header.set_data_shape((4, 4, n, 5))
    header.set_dim_info(slice=2)
    header["slice_code"] = 3
    header["slice_start"], header["slice_end"] = 0, n - 1
    header.set_slice_duration(tr / n)
    return [float(t) for t in header.get_slice_times()]


INTERLEAVED = nifti_interleaved(30, TR)


def lab(tmp_path: Path) -> Path:
    """A study with everything that makes findings depend on more than the run: a policy
    (protocol with another TR for one participant, an ignore entry), a majority with an
    outlier scheme, an override in milliseconds, multi-echo runs that disagree, a
    misnamed run and an unreadable file."""
    root = tmp_path / "ds"
    write_description(root)
    write_sidecar(root, "task-tap_bold.json", {"RepetitionTime": TR, "SliceTiming": INTERLEAVED})
    for i in range(1, 7):
        write_run(root, f"sub-0{i}/func/sub-0{i}_task-tap_bold.nii.gz", SHAPE, tr=TR)
    # sub-02: descending order (an outlier of the majority)
    write_sidecar(root, "sub-02/sub-02_task-tap_bold.json",
                  {"SliceTiming": slice_timing(Protocol(30, ascending=False, repetition_time=TR))})
    # sub-03: SliceTiming in milliseconds, overriding the inherited list
    write_sidecar(root, "sub-03/func/sub-03_task-tap_bold.json",
                  {"SliceTiming": [t * 1000 for t in INTERLEAVED]})
    # sub-04: another TR, which the lab's policy states for this participant
    write_sidecar(root, "sub-04/func/sub-04_task-tap_bold.json", {"RepetitionTime": 2.5})
    # multi-echo, second echo with another list
    for echo in (1, 2):
        write_run(root, f"sub-05/func/sub-05_task-echo_echo-{echo}_bold.nii.gz", SHAPE, tr=TR,
                  sidecar={"RepetitionTime": TR,
                           "SliceTiming": INTERLEAVED if echo == 1 else INTERLEAVED[::-1]})
    write_run(root, "sub-06/func/sub-06_task-rest-eyes_bold.nii.gz", SHAPE, tr=TR)
    bad = root / "sub-06/func/sub-06_task-broken_bold.nii.gz"
    bad.write_bytes(b"not an image at all" * 40)
    (root / "slicetime-policy.toml").write_text(
        'version = 1\n'
        '[[protocols]]\nmatch = { task = "tap" }\nslices = 30\n'
        '[[protocols]]\nmatch = { task = "tap", sub = "04" }\nrepetition_time = 2.5\nslices = 30\n'
        '[[waive]]\nruns = ["sub-06/**"]\nfindings = ["file/bad-run-name"]\n'
        'reason = "renamed next week"\n',
        encoding="utf-8",
    )
    return root


# ---------------------------------------------------------------- 1: show agrees with audit


def test_show_lists_exactly_the_audit_findings_of_every_run(tmp_path: Path) -> None:
    root = lab(tmp_path)
    code, out, _ = run_cli("audit", str(root), "--format", "json")
    report = json.loads(out)
    assert code == 1
    runs = report["runs"]
    assert len(runs) == 10
    differing = 0
    for run in runs:
        shown_code, shown, _ = run_cli("show", str(root / run["path"]), "--format", "json")
        obj = json.loads(shown)
        assert obj["findings"] == run["findings"], run["path"]
        errors = any(f["severity"] == "error" for f in run["findings"])
        assert shown_code == (1 if errors else 0), run["path"]
        differing += bool(run["findings"])
    assert differing >= 4  # the check compared real findings, not empty lists
    # the dataset-wide ones are among them
    by_path = {r["path"]: {f["code"] for f in r["findings"]} for r in runs}
    assert "dataset/outlier-scheme" in by_path["sub-02/func/sub-02_task-tap_bold.nii.gz"]
    assert "dataset/echo-mismatch" in by_path["sub-05/func/sub-05_task-echo_echo-2_bold.nii.gz"]


def test_show_fail_on_and_unreadable_file(tmp_path: Path) -> None:
    root = lab(tmp_path)
    outlier = str(root / "sub-02/func/sub-02_task-tap_bold.nii.gz")  # a warning only
    assert run_cli("show", outlier)[0] == 0
    assert run_cli("show", outlier, "--fail-on", "warning")[0] == 1
    code, out, _ = run_cli("show", str(root / "sub-06/func/sub-06_task-broken_bold.nii.gz"))
    assert code == 1 and "file/not-nifti" in out


def test_show_accepts_the_runs_sidecar_and_refuses_a_folder(tmp_path: Path) -> None:
    root = lab(tmp_path)
    image = root / "sub-03/func/sub-03_task-tap_bold.nii.gz"
    by_image = run_cli("show", str(image), "--format", "json")
    by_sidecar = run_cli("show", str(image.with_name("sub-03_task-tap_bold.json")),
                         "--format", "json")
    assert by_sidecar == by_image
    code, _, err = run_cli("show", str(root / "sub-01/func"))
    assert code == 2 and err.count("\n") == 1 and "func: a folder" in err
    assert "slicetime audit" in err
    code, _, err = run_cli("show", str(root / "task-tap_bold.json"))
    assert code == 2 and err.count("\n") == 1 and "task-tap_bold.json" in err


# ---------------------------------------------------------------- 2: one root cause


def test_milliseconds_give_one_finding_and_the_scheme_in_seconds(tmp_path: Path) -> None:
    root = lab(tmp_path)
    code, out, _ = run_cli("show", str(root / "sub-03/func/sub-03_task-tap_bold.nii.gz"),
                           "--format", "json")
    obj = json.loads(out)
    assert [f["code"] for f in obj["findings"]] == ["timing/units-ms"]
    folded = {f["code"] for f in obj["findings"][0]["evidence"]["folded"]}
    assert "inherit/timing-override" in folded
    # NIfTI-1 slice_code 3 is alternating increasing from slice 0 (nifti1.h via nibabel)
    assert obj["scheme"]["label"] == "interleaved ascending from 0"
    assert obj["scheme"]["evidence"]["assumed_unit"] == "ms"
    # common practice (no source): N slices spread evenly over a TR are TR/N apart
    assert obj["scheme"]["spacing"] == pytest.approx(TR / 30, abs=1e-3)
    code, text, _ = run_cli("show", str(root / "sub-03/func/sub-03_task-tap_bold.nii.gz"))
    assert code == 1
    flat = " ".join(text.split())
    assert "one excitation every 66.67 ms" in flat  # 2000 ms / 30, 2 decimals
    assert "SliceTiming read as milliseconds" in flat
    axis = text.split("acquisition order")[1].split("findings")[0]
    assert "2 s" in axis and "1933" not in axis and "2000" not in axis


def test_milliseconds_of_a_shared_sidecar_do_not_cascade(tmp_path: Path) -> None:
    root = tmp_path / "ds"
    write_description(root)
    write_sidecar(root, "task-tap_bold.json", {"RepetitionTime": TR, "SliceTiming": INTERLEAVED})
    for i in range(1, 5):
        write_run(root, f"sub-0{i}/func/sub-0{i}_task-tap_bold.nii.gz", SHAPE, tr=TR)
    # rounded to whole milliseconds: in seconds these gaps are even within 1 ms
    write_sidecar(root, "sub-04/sub-04_task-tap_bold.json",
                  {"SliceTiming": [round(t * 1000) for t in INTERLEAVED]})
    result = audit_paths([root])
    codes = {r.record.path: [f.code for f in r.findings] for r in result.runs}
    assert codes["sub-04/func/sub-04_task-tap_bold.nii.gz"] == ["timing/units-ms"]
    assert all(not c for p, c in codes.items() if not p.startswith("sub-04"))


def test_folding_is_declared_by_rules_and_keyed_on_the_field() -> None:
    assert "dataset/outlier-tr" in RULES["tr/units-ms"].subsumes
    assert "timing/uneven" in RULES["timing/units-ms"].subsumes
    root = Finding("tr/units-ms", Severity.ERROR, "TR 2000", "a.json", "RepetitionTime")
    follows = Finding("dataset/outlier-tr", Severity.WARNING, "TR 2000 s differs", "a.json",
                      "RepetitionTime")
    other_field = Finding("dataset/outlier-tr", Severity.WARNING, "x", "a.json", "SliceTiming")
    unrelated = Finding("dataset/outlier-slices", Severity.WARNING, "40 slices", "a.json",
                        "RepetitionTime")
    folded = fold_consequences([follows, root, other_field, unrelated])
    assert [f.code for f in folded] == ["tr/units-ms", "dataset/outlier-tr",
                                        "dataset/outlier-slices"]
    assert folded[0].evidence["folded"] == [
        {"code": "dataset/outlier-tr", "severity": "warning", "message": "TR 2000 s differs"}]
    assert fold_consequences([follows, unrelated]) == [follows, unrelated]  # no root: as is


def test_tr_in_milliseconds_folds_the_majority_finding(tmp_path: Path) -> None:
    root = tmp_path / "ds"
    write_description(root)
    for i in range(1, 5):
        write_run(root, f"sub-0{i}/func/sub-0{i}_task-tap_bold.nii.gz", SHAPE, tr=TR,
                  sidecar={"RepetitionTime": 2000 if i == 4 else TR,
                           "SliceTiming": INTERLEAVED})
    result = audit_paths([root])
    odd = next(r for r in result.runs if r.record.path.startswith("sub-04"))
    codes = [f.code for f in odd.findings]
    assert codes.count("tr/units-ms") == 1 and "dataset/outlier-tr" not in codes
    assert "header/tr-disagrees" not in codes  # pixdim[4] is 2 s: the same root cause


# ---------------------------------------------------------------- 4: corrected runs


def test_corrected_outputs_audit_clean_and_a_still_timed_one_is_reported(tmp_path: Path) -> None:
    root = tmp_path / "ds"
    write_description(root)
    # correct refuses runs shorter than MIN_VOLUMES (6) volumes
    write_run(root, "sub-01/func/sub-01_task-tap_bold.nii.gz", (*SHAPE[:3], 6), tr=TR,
              sidecar={"RepetitionTime": TR, "SliceTiming": INTERLEAVED})
    out = root / "derivatives" / "aligned"
    code, _, err = run_cli("correct", str(root), "--out", str(out))
    assert code == 0, err
    code, report, _ = run_cli("audit", str(root), "--include-derivatives", "--format", "json")
    runs = {r["path"]: {f["code"] for f in r["findings"]} for r in json.loads(report)["runs"]}
    corrected = [p for p in runs if "desc-" in p]
    assert corrected and all(not runs[p] for p in corrected), runs
    sidecar = next(out.rglob("*_bold.json"))
    data = json.loads(sidecar.read_text())
    assert data["SliceTimingCorrected"] is True and "SliceTiming" not in data
    data["SliceTiming"] = INTERLEAVED
    sidecar.write_text(json.dumps(data))
    code, report, _ = run_cli("audit", str(out), "--format", "json")
    assert code == 1
    codes = {f["code"] for r in json.loads(report)["runs"] for f in r["findings"]}
    assert "timing/corrected-still-timed" in codes and "timing/missing" not in codes


# ---------------------------------------------------------------- 6: policy over majority


def test_a_protocol_stating_the_tr_replaces_the_majority(tmp_path: Path) -> None:
    root = lab(tmp_path)
    result = audit_paths([root])
    codes = {r.record.path: {f.code for f in r.findings} for r in result.runs}
    sub04 = codes["sub-04/func/sub-04_task-tap_bold.nii.gz"]
    assert "dataset/outlier-tr" not in sub04 and "policy/tr-mismatch" not in sub04
    assert result.judged_by_policy == 6  # the six tap runs: the protocol states slices
    # without the participant's entry the majority judges it again
    policy = root / "slicetime-policy.toml"
    policy.write_text('version = 1\n', encoding="utf-8")
    again = audit_paths([root])
    sub04 = next(r for r in again.runs if r.record.path.startswith("sub-04/func"))
    assert "dataset/outlier-tr" in {f.code for f in sub04.findings}


def test_text_summary_names_the_policy_and_what_it_ignored(tmp_path: Path) -> None:
    root = lab(tmp_path)
    _, out, _ = run_cli("audit", str(root))
    line = next(x for x in out.splitlines() if x.startswith("policy "))
    assert "slicetime-policy.toml" in line and "1 finding ignored" in line


# ---------------------------------------------------------------- 7: nothing found


def test_a_path_without_runs_is_exit_2_naming_it(tmp_path: Path) -> None:
    root = lab(tmp_path)
    anat = root / "sub-01" / "anat"
    write_run(root, "sub-01/anat/sub-01_T1w.nii.gz", (4, 4, 4))
    for args in (["audit", str(anat)], ["audit", str(root), str(anat)],
                 ["correct", str(anat), "--out", str(tmp_path / "o")],
                 ["fix", str(anat)]):
        code, _, err = run_cli(*args)
        assert code == 2, args
        assert err.count("\n") == 1 and f"{anat}: no functional runs found" in err, err
    named_like_a_run = tmp_path / "sub-09_task-x_bold.nii.gz"
    named_like_a_run.mkdir()
    code, _, err = run_cli("correct", str(named_like_a_run), "--out", str(tmp_path / "o"))
    assert code == 2 and "sub-09_task-x_bold.nii.gz" in err and err.count("\n") == 1
    code, _, err = run_cli("verify", str(anat))
    assert code == 2 and "a folder" in err and err.count("\n") == 1


# ---------------------------------------------------------------- 8: misnamed runs


@pytest.mark.parametrize("name", [
    "sub-01_task-rest-eyes_bold.nii.gz",
    "sub-01_task-rest_acq-1.5mm_bold.nii.gz",
    "sub-01_task-rest_bold (copy).nii.gz",
    "sub-01_task-rest_bold.nii.gz.bak.nii",
    "sub-01_task rest_bold.nii",
])
def test_a_misnamed_run_is_reported_not_dropped(tmp_path: Path, name: str) -> None:
    root = tmp_path / "ds"
    write_description(root)
    write_run(root, "sub-01/func/sub-01_task-rest_bold.nii.gz", SHAPE, tr=TR,
              sidecar={"RepetitionTime": TR, "SliceTiming": INTERLEAVED})
    write_run(root, f"sub-01/func/{name}", SHAPE, tr=TR)
    write_run(root, "sub-01/func/sub-01_task-rest_sbref.nii.gz", SHAPE[:3])  # valid, not a run
    write_run(root, "sub-01/anat/sub-01_T1w (1).nii.gz", SHAPE[:3])  # not functional
    result = audit_paths([root])
    paths = {r.record.path: [f for f in r.findings] for r in result.runs}
    assert set(paths) == {"sub-01/func/sub-01_task-rest_bold.nii.gz", f"sub-01/func/{name}"}
    named = [f for f in paths[f"sub-01/func/{name}"] if f.code == "file/bad-run-name"]
    assert len(named) == 1 and name in named[0].message
    assert not paths["sub-01/func/sub-01_task-rest_bold.nii.gz"]


def test_a_misnamed_run_outside_func_is_found_by_its_suffix(tmp_path: Path) -> None:
    root = tmp_path / "ds"
    write_description(root)
    write_run(root, "sub-01/sub-01_task-x_bold-old.nii.gz", SHAPE, tr=TR)
    result = audit_paths([root])
    assert [f.code for r in result.runs for f in r.findings] == ["file/bad-run-name"]


# ---------------------------------------------------------------- 11: failures vs findings


def test_progress_counts_runs_that_could_not_be_processed(tmp_path: Path) -> None:
    root = lab(tmp_path)
    seen: list[tuple[int, int, int]] = []
    result = audit_paths([root], progress=lambda d, t, f: seen.append((d, t, f)))
    with_errors = sum(any(f.severity is Severity.ERROR for f in r.findings) for r in result.runs)
    assert with_errors >= 2  # findings alone would have counted these
    assert seen[-1] == (10, 10, 1)  # only the file that is not an image failed


# ---------------------------------------------------------------- 13: optional parts, exits


def test_html_without_matplotlib_is_exit_2_saying_what_to_install(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    root = lab(tmp_path)
    monkeypatch.setitem(sys.modules, "matplotlib", None)  # import raises ImportError
    code, _, err = run_cli("audit", str(root), "--html", str(tmp_path / "r.html"))
    assert code == 2 and "pip install matplotlib" in err and err.count("\n") == 1
    assert not (tmp_path / "r.html").exists()


def test_help_documents_every_exit_status() -> None:
    code, out, _ = run_cli("--help")
    assert code == 0
    for status in ("0 ", "1 ", "2 ", "3 ", "130"):
        assert f"\n    {status}" in out, status
    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text("utf-8")
    section = readme.split("## Exit status", 1)[1].split("\n## ", 1)[0]
    for status in ("| 0 |", "| 1 |", "| 2 |", "| 3 |", "| 130 |"):
        assert status in section


# ---------------------------------------------------------------- 14: typos


def test_explain_suggests_the_code_meant() -> None:
    code, _, err = run_cli("explain", "timing/units_ms")
    assert code == 2 and "did you mean timing/units-ms?" in err
    code, _, err = run_cli("explain", "dataset/outlier_TR")
    assert code == 2 and "dataset/outlier-tr" in err
    code, _, err = run_cli("explain", "zzz/qqq")
    assert code == 2 and "did you mean" not in err


# ---------------------------------------------------------------- 17: completion


@pytest.mark.parametrize("shell,marker", [("bash", "complete "), ("zsh", "compdef"),
                                          ("fish", "complete ")])
def test_shell_completion_script_is_produced(shell: str, marker: str) -> None:
    env = dict(os.environ, _SLICETIME_COMPLETE=f"{shell}_source")
    proc = subprocess.run([sys.executable, "-m", "slicetime"], env=env, capture_output=True,
                          text=True, check=False)
    assert proc.returncode == 0 and marker in proc.stdout and "_SLICETIME_COMPLETE" in proc.stdout
    # and the script's callback answers: the subcommands after "slicetime "
    env = dict(os.environ, _SLICETIME_COMPLETE="bash_complete", COMP_WORDS="slicetime sh",
               COMP_CWORD="1")
    proc = subprocess.run([sys.executable, "-m", "slicetime"], env=env, capture_output=True,
                          text=True, check=False)
    assert "show" in proc.stdout


# ---------------------------------------------------------------- 18: timing


def test_timing_refuses_milliseconds_and_names_the_options() -> None:
    code, _, err = run_cli("timing", "--slices", "40", "--tr", "2000")
    assert code == 2 and "--tr 2000" in err and "milliseconds" in err and "--tr 2?" in err
    code, _, err = run_cli("timing", "--slices", "10", "--tr", "2", "--multiband", "3")
    assert code == 2 and "--multiband" in err and "--slices" in err and "n_slices" not in err
    code, _, err = run_cli("timing", "--slices", "10", "--tr", "2", "--delay-time", "3")
    assert code == 2 and "--delay-time" in err and "active_time" not in err
    code, _, err = run_cli("timing", "--slices", "10", "--tr", "2", "--order", "interleaved",
                           "--first", "5")
    assert code == 2 and "--first" in err and "start" not in err
    _, help_text, _ = run_cli("timing", "--help")
    assert "0 to STEP-1" in " ".join(help_text.split())


def test_timing_delay_time_sets_the_silent_part_and_the_old_option_names_it() -> None:
    # BIDS DelayTime: "the time between the end of the acquisition of one volume and the
    # start of the next" (bids-specification, func metadata): the slices use TR - DelayTime
    code, out, _ = run_cli("timing", "--slices", "4", "--tr", "3", "--delay-time", "1",
                           "--compact")
    fields = json.loads(out)
    assert code == 0 and fields["DelayTime"] == 1 and fields["RepetitionTime"] == 3
    # common practice (no source): N slices evenly over the active 2 s are 0.5 s apart
    assert fields["SliceTiming"] == [0.0, 0.5, 1.0, 1.5]
    _, help_text, _ = run_cli("timing", "--help")
    assert "--delay-time" in help_text


def test_timing_compact_is_one_line_of_the_same_fields() -> None:
    args = ["timing", "--slices", "30", "--tr", "2", "--order", "interleaved"]
    code, out, _ = run_cli(*args, "--compact")
    assert code == 0 and out.count("\n") == 1
    assert json.loads(out) == json.loads(run_cli(*args)[1])
    # NIfTI-1 slice_code 3 over the TR (nibabel): the same times
    assert json.loads(out)["SliceTiming"] == pytest.approx(INTERLEAVED, abs=1e-4)
