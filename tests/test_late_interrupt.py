"""Ctrl-C in the last instant of ``correct`` and ``fix --apply`` (after the work, while
records are written or the summary is printed): the outcome is told honestly, either
finished (the whole summary, the usual exit status, one line saying the Ctrl-C came
after the work) or interrupted (one line saying what was and was not done, exit 130).

Each case runs the command in its own process, which sends itself SIGINT at a named
point (``SLICETIME_TEST_SIGINT_AT``, the private hook of ``slicetime.pipelines.signals``).
Exit 130 for an interrupted command: 128 + SIGINT's number 2, as a shell reports a
process ended by a signal (common practice (no source); the project's exit-status
contract).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from slicetime.schemes.generate import Protocol, slice_timing
from tests.helpers_bids import write_description, write_run

TR = 2.0
RUN = "sub-01/func/sub-01_task-hum_bold.nii.gz"
OWN = "sub-01/func/sub-01_task-hum_bold.json"


def seconds() -> list[float]:
    return [float(t) for t in slice_timing(Protocol(n_slices=6, order="interleaved",
                                                    repetition_time=TR))]


def run(point: str, *args: str) -> subprocess.CompletedProcess[str]:
    env = {**os.environ, "SLICETIME_TEST_SIGINT_AT": point, "COLUMNS": "200"}
    env.pop("SLICETIME_ASCII", None)
    return subprocess.run([sys.executable, "-m", "slicetime", *args], env=env,
                          capture_output=True, text=True, timeout=300)


@pytest.fixture()
def dataset(tmp_path: Path) -> Path:
    root = tmp_path / "ds"
    write_description(root)
    data = np.random.default_rng(0).normal(100, 5, size=(4, 4, 6, 8)).astype(np.float32)
    write_run(root, RUN, data=data, dtype=np.float32, tr=TR,
              sidecar={"TaskName": "hum", "RepetitionTime": TR, "SliceTiming": seconds()})
    return root


@pytest.mark.parametrize("point", ["correct:records", "correct:closing", "correct:summary"])
def test_a_ctrl_c_after_the_batch_is_done_reports_it_finished(
        dataset: Path, tmp_path: Path, point: str) -> None:
    out = tmp_path / "aligned"
    done = run(point, "correct", str(dataset), "--out", str(out), "--jobs", "1",
               "--no-progress")
    assert done.returncode == 0, done.stderr
    assert "1 run: 1 corrected; outputs in" in done.stdout  # the whole summary
    assert "slice_time_ref" in done.stdout
    assert "interrupted" not in done.stderr
    assert done.stderr.count("Ctrl-C came after the batch was done") == 1
    # the records are whole: the provenance names the run, the description is JSON
    provenance = json.loads((out / "slicetime-provenance.json").read_text())
    assert list(provenance["Runs"]) == ["sub-01/func/sub-01_task-hum_desc-timealigned_bold.nii.gz"]
    assert json.loads((out / "dataset_description.json").read_text())["DatasetType"] == \
        "derivative"  # BIDS: a derivative dataset says so in its description
    assert any(out.rglob("*_desc-timealigned_bold.nii.gz"))


def apply_stopped_at(point: str, dataset: Path, backups: Path
                     ) -> subprocess.CompletedProcess[str]:
    """``fix --apply`` of a sidecar whose SliceTiming is in milliseconds (BIDS: seconds),
    with SIGINT at ``point``; it must end with exit 130 and one "interrupted" line."""
    (dataset / OWN).write_text(json.dumps(
        {"TaskName": "hum", "RepetitionTime": TR,
         "SliceTiming": [t * 1000 for t in seconds()]}), encoding="utf-8")
    stopped = run(point, "fix", str(dataset), "--apply", "--backup-dir", str(backups))
    assert stopped.returncode == 130, stopped.stderr
    assert len([x for x in stopped.stderr.splitlines() if "interrupted" in x]) == 1
    return stopped


def test_a_ctrl_c_while_the_fixed_files_are_listed_stops_before_the_reaudit(
        dataset: Path, tmp_path: Path) -> None:
    stopped = apply_stopped_at("fix:summary", dataset, tmp_path / "backups")
    assert f"written   {OWN}" in stopped.stdout and "undo with:" in stopped.stdout
    assert "re-audit:" not in stopped.stdout
    lines = [x for x in stopped.stderr.splitlines() if "interrupted" in x]
    assert "before the re-audit; the 1 file above was written (undo with: slicetime fix " \
        "--undo" in lines[0]
    # what it says is so: the file holds seconds (BIDS: SliceTiming in seconds), the
    # journal says applied
    fixed = json.loads((dataset / OWN).read_text())["SliceTiming"]
    assert fixed == pytest.approx(seconds())
    journal = tmp_path / "backups" / "journal.json"
    assert json.loads(journal.read_text())["status"] == "applied"


def test_a_ctrl_c_during_the_reaudit_says_the_files_were_written(
        dataset: Path, tmp_path: Path) -> None:
    stopped = apply_stopped_at("fix:reaudit", dataset, tmp_path / "backups")
    lines = [x for x in stopped.stderr.splitlines() if "interrupted" in x]
    assert len(lines) == 1 and "during the re-audit (not finished)" in lines[0]
    assert "the 1 file above was written" in lines[0]
    assert json.loads((dataset / OWN).read_text())["SliceTiming"] == pytest.approx(seconds())


@pytest.mark.parametrize("point", ["fix:written", "fix:release"])
def test_a_ctrl_c_after_the_last_write_or_while_the_locks_are_released_is_told(
        dataset: Path, tmp_path: Path, point: str) -> None:
    # after the apply's last file (its journal finished, its locks released) the files
    # are written: the same honest line as before the re-audit, never a bare
    # "interrupted"
    stopped = apply_stopped_at(point, dataset, tmp_path / "backups")
    assert f"written   {OWN}" in stopped.stdout and "undo with:" in stopped.stdout
    lines = [x for x in stopped.stderr.splitlines() if "interrupted" in x]
    assert "before the re-audit; the 1 file above was written (undo with: slicetime fix " \
        "--undo" in lines[0]
    assert "re-audit:" not in stopped.stdout
    # what it says is so: the file holds seconds (BIDS), the journal says applied, and
    # no lock file is left in the dataset
    assert json.loads((dataset / OWN).read_text())["SliceTiming"] == pytest.approx(seconds())
    journal = tmp_path / "backups" / "journal.json"
    assert json.loads(journal.read_text())["status"] == "applied"
    assert not [p for p in dataset.iterdir() if p.name.endswith(".lock")]


def test_a_ctrl_c_during_corrects_audit_says_so_in_one_line(
        dataset: Path, tmp_path: Path) -> None:
    out = tmp_path / "aligned"
    stopped = run("correct:audit", "correct", str(dataset), "--out", str(out), "--jobs", "1",
                  "--no-progress")
    assert stopped.returncode == 130, stopped.stderr
    lines = [x for x in stopped.stderr.splitlines() if x.strip()]
    assert lines == ["slicetime: interrupted while the runs were audited, before any run "
                     "was corrected; nothing written (rerun the same command)"]
    assert not out.exists()  # what it says is so


def test_a_ctrl_c_during_verify_says_what_was_done(dataset: Path) -> None:
    # as the audit says it: how many runs were done, and that no report was written
    stopped = run("verify:run", "verify", str(dataset / RUN), "--jobs", "1")
    assert stopped.returncode == 130, stopped.stderr
    assert stopped.stderr.strip().splitlines() == [
        "slicetime: interrupted; 0 of 1 runs verified, no report written"]
    assert stopped.stdout == ""


@pytest.mark.parametrize("apply", [True, False])
def test_a_ctrl_c_while_fix_audits_for_its_plan_says_nothing_was_written(
        dataset: Path, tmp_path: Path, apply: bool) -> None:
    own = dataset / OWN
    own.write_text(json.dumps({"TaskName": "hum", "RepetitionTime": TR,
                               "SliceTiming": [t * 1000 for t in seconds()]}),
                   encoding="utf-8")
    before = own.read_bytes()
    args = ["--apply", "--backup-dir", str(tmp_path / "backups")] if apply else []
    stopped = run("fix:plan", "fix", str(dataset), *args)
    assert stopped.returncode == 130, stopped.stderr
    assert stopped.stderr.strip().splitlines() == [
        "slicetime: interrupted while the runs were audited for the plan; nothing was written"]
    assert own.read_bytes() == before and not (tmp_path / "backups").exists()


def test_a_ctrl_c_between_two_runs_names_the_one_left_in_the_singular(
        dataset: Path, tmp_path: Path) -> None:
    second = "sub-02/func/sub-02_task-hum_bold.nii.gz"
    data = np.random.default_rng(1).normal(100, 5, size=(4, 4, 6, 8)).astype(np.float32)
    write_run(dataset, second, data=data, dtype=np.float32, tr=TR,
              sidecar={"TaskName": "hum", "RepetitionTime": TR, "SliceTiming": seconds()})
    out = tmp_path / "aligned"
    stopped = run(f"correct:run:{second}", "correct", str(dataset), "--out", str(out),
                  "--jobs", "1", "--no-progress")
    assert stopped.returncode == 130, stopped.stderr
    assert "1 run not finished (rerun the same command to finish it)" in stopped.stderr
    assert len(list(out.rglob("*_desc-timealigned_bold.nii.gz"))) == 1  # what it says


def one_line(stopped: subprocess.CompletedProcess[str]) -> str:
    """The interrupted command's one stderr line (exit 130: 128 + SIGINT's 2)."""
    assert stopped.returncode == 130, stopped.stderr
    lines = [x for x in stopped.stderr.splitlines() if x.strip()]
    assert len(lines) == 1 and lines[0] != "slicetime: interrupted", stopped.stderr
    return lines[0]


def test_a_ctrl_c_during_pin_says_no_policy_was_written(dataset: Path, tmp_path: Path) -> None:
    stopped = run("pin:audit", "pin", str(dataset))
    assert one_line(stopped) == ("slicetime: interrupted while the runs were audited; "
                                 "no policy written")
    assert stopped.stdout == ""
    policy = tmp_path / "policy.toml"
    stopped = run("pin:write", "pin", str(dataset), "--output", str(policy))
    assert one_line(stopped) == (f"slicetime: interrupted while the policy was written; "
                                 f"{policy} removed, no policy written")
    assert not policy.exists()  # what it says is so


@pytest.mark.parametrize(("point", "told"), [
    ("show:audit", "while the run's dataset was audited, before anything was shown"),
    ("show:print", "while the run was shown (what is on screen may be cut short)")])
def test_a_ctrl_c_during_show_says_how_far_it_got(dataset: Path, point: str,
                                                   told: str) -> None:
    before = sorted(p.name for p in dataset.rglob("*"))
    stopped = run(point, "show", str(dataset / RUN))
    assert one_line(stopped) == f"slicetime: interrupted {told}; show writes no file"
    assert sorted(p.name for p in dataset.rglob("*")) == before
    if point == "show:audit":
        assert stopped.stdout == ""


def test_a_ctrl_c_during_the_demo_names_the_step_and_the_folder(tmp_path: Path) -> None:
    out = tmp_path / "tour"
    stopped = run("demo:3", "demo", "--out", str(out))
    assert one_line(stopped) == (
        f"slicetime: interrupted during the demo (3. slicetime verify); {out} holds only "
        f"part of the demo's files (rerun slicetime demo --out {out} to rebuild it)")
    assert (out / "audit.json").is_file() and not (out / "quiet-rooms-fixed").exists()
    # the folder is the demo's to rebuild: after the work, only the summary was left
    stopped = run("demo:where everything is", "demo", "--out", str(out))
    assert one_line(stopped) == ("slicetime: interrupted while the demo's last summary "
                                 f"was printed; every file of the demo is written in {out}")
    assert (out / "quiet-rooms-fixed").is_dir() and (out / "fix-backups").is_dir()


# ------------------------------------------- every command tells where a Ctrl-C stopped it


def test_no_command_module_is_left_to_the_bare_interrupted_line() -> None:
    # the last resort (friendly) says it does not know what was written; every command
    # either tells its stages itself or is interruptible as a whole
    import slicetime.interfaces.commands as package

    folder = Path(package.__file__).parent
    for module in sorted(folder.glob("*.py")):
        if module.name in ("__init__.py", "shared.py"):
            continue
        text = module.read_text(encoding="utf-8")
        told = ("interruptible(" in text or "on_interrupt(" in text
                or "interrupted(" in text or "Interrupted" in text)
        assert told, module.name


@pytest.mark.parametrize(("point", "args", "told"), [
    ("timing:start", ["timing", "--slices", "4", "--tr", "2"],
     "while the times were worked out or printed; timing writes no file"),
    ("explain:start", ["explain", "timing/units-ms"],
     "while the documentation was printed; explain writes no file"),
    ("verify:start", ["verify", "{ds}/" + RUN],
     "while the runs were read or the report printed; verify writes no file"),
    ("audit:runs", ["audit", "{ds}"], "while the runs were audited; no report written"),
    ("fix:inputs", ["fix", "{ds}"], "before the plan was made; nothing was written"),
    ("fix:show", ["fix", "{ds}"], "while the plan was checked or shown"),
])
def test_a_ctrl_c_in_a_command_that_writes_nothing_says_so(
        dataset: Path, point: str, args: list[str], told: str) -> None:
    before = {p: p.stat().st_mtime_ns for p in dataset.rglob("*")}
    stopped = run(point, *(a.replace("{ds}", str(dataset)) for a in args))
    assert one_line(stopped).startswith(f"slicetime: interrupted {told}"), stopped.stderr
    assert {p: p.stat().st_mtime_ns for p in dataset.rglob("*")} == before


def test_a_ctrl_c_while_audit_writes_its_reports_names_what_was_written(
        dataset: Path, tmp_path: Path) -> None:
    page, report = tmp_path / "audit.html", tmp_path / "audit.json"
    args = ["audit", str(dataset), "--html", str(page), "--output", str(report),
            "--format", "json"]
    stopped = run("audit:output", *args)
    assert one_line(stopped) == (f"slicetime: interrupted while the report was written; "
                                 f"{report} not written; {page} written")
    assert page.is_file() and not report.exists()  # what it says is so
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".slicetime-")]
    page.unlink()
    stopped = run("audit:html", *args)
    assert one_line(stopped) == (f"slicetime: interrupted while the HTML report was "
                                 f"written; {page} not written")
    assert not page.exists() and not report.exists()


def test_a_ctrl_c_while_fix_saves_its_plan_leaves_no_plan(
        dataset: Path, tmp_path: Path) -> None:
    (dataset / OWN).write_text(json.dumps(
        {"TaskName": "hum", "RepetitionTime": TR,
         "SliceTiming": [t * 1000 for t in seconds()]}), encoding="utf-8")
    plan = tmp_path / "plan.json"
    stopped = run("fix:save", "fix", str(dataset), "--plan", str(plan))
    assert one_line(stopped) == (f"slicetime: interrupted while the plan was saved; {plan} "
                                 "not written, nothing in the dataset changed")
    assert not plan.exists()


def test_a_ctrl_c_during_undo_stops_between_files_and_the_rerun_finishes(
        dataset: Path, tmp_path: Path) -> None:
    # two files repaired (SliceTiming in milliseconds, BIDS wants seconds), then undone:
    # a Ctrl-C after the first file restored stops there and says so; the same undo run
    # again restores the other, and every byte is back
    second = "sub-02/func/sub-02_task-hum_bold.nii.gz"
    write_run(dataset, second, shape=(4, 4, 6, 8), tr=TR, sidecar={"TaskName": "hum"})
    for own in (OWN, second.replace(".nii.gz", ".json")):
        (dataset / own).write_text(json.dumps(
            {"TaskName": "hum", "RepetitionTime": TR,
             "SliceTiming": [t * 1000 for t in seconds()]}), encoding="utf-8")
    before = {p: p.read_bytes() for p in dataset.rglob("*.json")}
    backups = tmp_path / "backups"
    applied = run("none", "fix", str(dataset), "--apply", "--backup-dir", str(backups))
    assert applied.returncode == 0, applied.stderr
    journal = backups / "journal.json"
    stopped = run("undo:file", "fix", "--undo", str(journal))
    assert one_line(stopped) == ("slicetime: interrupted after 1 file was restored (listed "
                                 "above); 1 file not restored yet: run the same undo again")
    assert stopped.stdout.count("restored  ") == 1
    restored = stopped.stdout.split("restored  ", 1)[1].strip()
    assert (dataset / restored).read_bytes() == before[dataset / restored]
    assert json.loads(journal.read_text())["status"] == "applied"  # not undone yet
    again = run("none", "fix", "--undo", str(journal))
    assert again.returncode == 0, again.stderr
    assert {p: p.read_bytes() for p in dataset.rglob("*.json")} == before


def test_a_ctrl_c_while_correct_prepares_its_folder_says_what_may_be_written(
        dataset: Path, tmp_path: Path) -> None:
    # a --out the batch made, stopped before its description was written: nothing is
    # written and the folder is gone (the line once said the description may have been)
    out = tmp_path / "aligned"
    args = ["correct", str(dataset), "--out", str(out), "--jobs", "1", "--no-progress"]
    stopped = run("correct:describe", *args)
    assert one_line(stopped) == (
        "slicetime: interrupted while the output folder was prepared, before any run was "
        "corrected; nothing written (rerun the same command)")
    assert not out.exists()
    # a reused --out that holds a description: it may have been rewritten
    assert run("none", *args).returncode == 0
    stopped = run("correct:describe", *args)
    assert one_line(stopped) == (
        "slicetime: interrupted while the output folder was prepared, before any run was "
        f"corrected; no output written, {out / 'dataset_description.json'} (naming the "
        "inputs) may have been (rerun the same command)")


@pytest.mark.parametrize("args", [
    ["audit", "{ds}"], ["correct", "{ds}", "--out", "{tmp}/aligned"], ["fix", "{ds}"],
    ["pin", "{ds}", "--output", "{tmp}/policy.toml"], ["show", "{ds}/" + RUN],
    ["demo", "--out", "{tmp}/demo"],
])
def test_a_ctrl_c_as_a_command_starts_says_nothing_was_written(
        dataset: Path, tmp_path: Path, args: list[str]) -> None:
    # a Ctrl-C while a command loads its modules and reads its options, before its first
    # stage told itself: nothing is written yet, and the line says so (it said "what was
    # written, if anything, is not known", friendly's last resort)
    before = {p: p.stat().st_mtime_ns for p in dataset.rglob("*")}
    given = [a.replace("{ds}", str(dataset)).replace("{tmp}", str(tmp_path)) for a in args]
    stopped = run(f"{args[0]}:start", *given)
    assert one_line(stopped) == "slicetime: interrupted before anything was done; nothing written"
    assert {p: p.stat().st_mtime_ns for p in dataset.rglob("*")} == before
    assert [p.name for p in tmp_path.iterdir()] == [dataset.name]


def test_a_ctrl_c_while_the_command_line_loads_is_one_line_not_a_traceback() -> None:
    # the console entry point guards the import of click and the command modules: a
    # KeyboardInterrupt raised as click loads (what a Ctrl-C in the first hundredths of
    # a second does) ends with the line every command gives before its first stage,
    # exit 130 (128 + SIGINT, common practice (no source))
    program = (
        "import sys\n"
        "class Interrupt:\n"
        "    def find_spec(self, name, path=None, target=None):\n"
        "        if name == 'click':\n"
        "            raise KeyboardInterrupt\n"
        "sys.meta_path.insert(0, Interrupt())\n"
        "from slicetime.interfaces.entry import main\n"
        "main()\n"
    )
    done = subprocess.run([sys.executable, "-c", program, "audit", "."], capture_output=True,
                          text=True, timeout=60)
    assert done.returncode == 130
    assert done.stderr == "slicetime: interrupted before anything was done; nothing written\n"
