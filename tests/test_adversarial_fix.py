"""fix and undo under hostile and unlucky use: each case is built on disk, and every byte
outside the intended change is compared before and after (the whole tree, backups included).

Expected values: BIDS says SliceTiming is in seconds, so a millisecond list divided by
1000 is the repair (BIDS objects.metadata.SliceTiming); SHA-256 digests come from
hashlib (FIPS 180-4); everything else is the byte-identity of files we did not mean to
change.
"""

from __future__ import annotations

import hashlib
import json
import os
import signal
import subprocess
import sys
from pathlib import Path
from typing import Any

import pytest
from click.testing import CliRunner

from slicetime.interfaces.cli import cli
from slicetime.pipelines import transaction
from slicetime.schemes.generate import Protocol, slice_timing
from tests.helpers_bids import (
    symlink,
    tree_hashes,
    write_description,
    write_run,
    write_sidecar,
)

TR = 2.0
SHAPE = (4, 4, 10, 5)
RUN = "sub-01/func/sub-01_task-hum_bold.nii.gz"
OWN = "sub-01/func/sub-01_task-hum_bold.json"


def seconds() -> list[float]:
    return list(slice_timing(Protocol(n_slices=10, order="interleaved", repetition_time=TR)))


def millis() -> list[float]:
    return [t * 1000 for t in seconds()]


def fix(*args: object) -> Any:
    return CliRunner().invoke(cli, ["fix", *(str(a) for a in args)], catch_exceptions=False)




def journal_in(output: str) -> Path:
    line = next(x for x in output.splitlines() if x.startswith("backups and journal: "))
    return Path(line.split(": ", 1)[1].split("  (undo")[0])


def ms_dataset(root: Path, subjects: tuple[str, ...] = ("01", "02"), scale: float = 1000.0,
               name: str = "slicetime test dataset") -> Path:
    """A dataset whose runs each carry their own SliceTiming in milliseconds."""
    write_description(root, name)
    for sub in subjects:
        write_run(root, f"sub-{sub}/func/sub-{sub}_task-hum_bold.nii.gz", shape=SHAPE, tr=TR,
                  sidecar={"TaskName": "hum", "RepetitionTime": TR,
                           "SliceTiming": [t * scale / 1000 for t in millis()]})
    return root


def applied(tmp_path: Path) -> tuple[Path, Path, dict[str, str]]:
    """A dataset fixed with --apply: (root, journal, tree before the fix)."""
    ds = ms_dataset(tmp_path / "ds")
    before = tree_hashes(ds)
    result = fix(ds, "--apply", "--backup-dir", tmp_path / "backups")
    assert result.exit_code == 0, result.output
    return ds, journal_in(result.output), before


def killed_apply(ds: Path, backups: Path, *, at: int) -> None:
    """``fix --apply`` in its own process, killed (SIGKILL) while writing the ``at``-th
    file of the dataset, after that file's temporary copy exists."""
    script = f"""
import os, signal
from pathlib import Path
from slicetime.pipelines import fix, transaction
from slicetime.readers.atomic import temp_path
real = transaction._atomic_write
count = [0]
def killing(path, data, like, tag=None):
    if path.name.startswith("sub-"):
        count[0] += 1
        if count[0] == {at}:
            temp_path(path, tag).write_bytes(data[:10])
            os.kill(os.getpid(), signal.SIGKILL)
    real(path, data, like, tag)
transaction._atomic_write = killing
plan = fix.plan_fix([Path({str(ds)!r})])
fix.apply_plan(plan, backup_dir=Path({str(backups)!r}))
"""
    proc = subprocess.run([sys.executable, "-c", script], cwd=Path(__file__).parents[1],
                          capture_output=True, timeout=120)
    assert proc.returncode == -signal.SIGKILL, proc.stderr.decode()


def edit_journal(journal: Path, change: Any) -> None:
    content = json.loads(journal.read_text())
    change(content)
    journal.write_text(json.dumps(content))


# ------------------------------------------------------------------ 1. backups per root


def test_two_roots_with_one_folder_name_keep_separate_backups(tmp_path: Path) -> None:
    a = ms_dataset(tmp_path / "A" / "ds", subjects=("01",))
    b = ms_dataset(tmp_path / "B" / "ds", subjects=("01",), scale=2000.0 / 1.9)
    assert (a / OWN).read_bytes() != (b / OWN).read_bytes()
    before = tree_hashes(tmp_path)
    result = fix(a, b, "--apply", "--backup-dir", tmp_path / "backups")
    assert result.exit_code == 0, result.output
    journal = journal_in(result.output)
    backups = sorted(p for p in (journal.parent / "files").rglob("*.json"))
    assert len(backups) == 2  # one per root, not one overwriting the other
    undone = fix("--undo", journal)
    assert undone.exit_code == 0, undone.output
    after = tree_hashes(tmp_path)
    for rel, digest in before.items():
        assert after[rel] == digest, rel  # A's bytes back in A, B's in B


def test_undo_refuses_a_backup_that_does_not_match_its_hash(tmp_path: Path) -> None:
    _ds, journal, _ = applied(tmp_path)
    backup = next((journal.parent / "files").rglob("*.json"))
    backup.write_text('{"TaskName": "someone else"}')
    damaged = backup.relative_to(journal.parent / "files").as_posix().split("/", 1)[1]
    state = tree_hashes(tmp_path)
    result = fix("--undo", journal)
    assert result.exit_code == 1
    refused = [x for x in result.output.splitlines() if x.startswith("refused ")]
    assert len(refused) == 1 and damaged in refused[0] and "does not match the SHA-256" in \
        refused[0]
    after = tree_hashes(tmp_path)
    assert after[f"ds/{damaged}"] == state[f"ds/{damaged}"]  # not restored from a bad backup
    assert result.output.count("restored  ") == 1  # the other file is


# ------------------------------------------------------------------ 2. confinement


def _free_victim(tmp_path: Path) -> Path:
    victim = tmp_path / "home" / "notes.json"
    victim.parent.mkdir(parents=True)
    victim.write_text('{"precious": true}\n')
    return victim


@pytest.mark.parametrize("attack", ["root-outside", "dotdot-file", "absolute-file",
                                    "backup-outside", "backup-through-link",
                                    "folder-through-link", "missing-key"])
def test_an_edited_journal_cannot_write_outside_its_datasets(tmp_path: Path, attack: str) -> None:
    ds, journal, _ = applied(tmp_path)
    victim = _free_victim(tmp_path)
    victim_sha = hashlib.sha256(victim.read_bytes()).hexdigest()

    def change(content: dict[str, Any]) -> None:
        first = content["entries"][0]
        if attack == "root-outside":
            content["roots"].append(str(victim.parent))
            first.update(root=str(victim.parent), file=victim.name, sha256_after=victim_sha)
        elif attack == "dotdot-file":
            first.update(file="../home/notes.json", sha256_after=victim_sha)
        elif attack == "absolute-file":
            first.update(file=str(victim), sha256_after=victim_sha)
        elif attack == "backup-outside":
            first["backup"] = "files/../../home/notes.json"
        elif attack == "backup-through-link":
            os.symlink(victim.parent, journal.parent / "files" / "escape")
            first["backup"] = "files/escape/notes.json"
        elif attack == "folder-through-link":
            os.symlink(victim.parent, ds / "sub-01" / "escape")
            first.update(file="sub-01/escape/notes.json", sha256_after=victim_sha)
        else:
            del first["sha256_after"]

    edit_journal(journal, change)
    state = tree_hashes(tmp_path)
    result = fix("--undo", journal)
    assert hashlib.sha256(victim.read_bytes()).hexdigest() == victim_sha
    if attack in ("root-outside", "missing-key"):  # the journal itself is unusable
        assert result.exit_code == 2, result.output
        assert "nothing was restored" in result.output
        assert len(result.output.strip().splitlines()) == 1  # one line, no traceback
        assert tree_hashes(tmp_path) == state
        return
    # one entry out of bounds is refused, with its reason; the valid entry is restored
    assert result.exit_code == 1, result.output
    refused = [x for x in result.output.splitlines() if x.startswith("refused ")]
    assert len(refused) == 1 and "not restored" in refused[0], result.output
    assert result.output.count("restored  ") == 1
    changed = {k for k, v in tree_hashes(tmp_path).items() if state.get(k) != v}
    assert changed == {"ds/sub-02/func/sub-02_task-hum_bold.json"} | (
        {"ds/.slicetime-fix.lock"} & set(state))


@pytest.mark.parametrize("attack", ["root-outside", "dotdot-file", "image-file"])
def test_an_edited_plan_cannot_write_outside_its_datasets(tmp_path: Path, attack: str) -> None:
    ds = ms_dataset(tmp_path / "ds")
    plan = tmp_path / "plan.json"
    assert fix(ds, "--plan", plan).exit_code == 1
    victim = _free_victim(tmp_path)
    content = json.loads(plan.read_text())
    first = content["changes"][0]
    if attack == "root-outside":
        first.update(root=str(victim.parent), file=victim.name,
                     sha256_before=hashlib.sha256(victim.read_bytes()).hexdigest())
    elif attack == "dotdot-file":
        first.update(file="../home/notes.json")
    else:
        first.update(file=RUN)
    plan.write_text(json.dumps(content))
    state = tree_hashes(tmp_path)
    result = fix("--apply", "--plan", plan)
    assert result.exit_code == 2, result.output
    assert tree_hashes(tmp_path) == state


# ------------------------------------------------------------------ 3. all or nothing


def test_a_move_refused_for_one_file_writes_no_file(tmp_path: Path) -> None:
    ds = tmp_path / "ds"
    write_description(ds)
    write_sidecar(ds, "task-hum_bold.json", {"TaskName": "hum", "SliceTiming": seconds()})
    for sub in ("01", "02", "03"):
        write_run(ds, f"sub-{sub}/func/sub-{sub}_task-hum_bold.nii.gz", shape=SHAPE, tr=TR,
                  sidecar={"RepetitionTime": TR})
    # sub-02's own sidecar is an annexed link: spreading must not touch any file
    store = ds / ".git" / "annex" / "objects" / "Xy" / "KEY" / "KEY"
    store.parent.mkdir(parents=True)
    own = ds / "sub-02/func/sub-02_task-hum_bold.json"
    store.write_bytes(own.read_bytes())
    own.unlink()
    symlink(own, os.path.relpath(store, own.parent))
    before = tree_hashes(tmp_path)
    dry = fix(ds, "--spread", "SliceTiming")
    assert dry.exit_code == 1
    assert "--apply would refuse it" in dry.output and "annexed" in dry.output
    result = fix(ds, "--apply", "--spread", "SliceTiming")
    assert result.exit_code == 1
    assert "nothing was written" in result.output
    assert tree_hashes(tmp_path) == before  # the shared file still gives every run its timing


def test_a_failed_write_puts_back_the_files_written_before_it(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    ds = ms_dataset(tmp_path / "ds", subjects=("01", "02", "03"))
    before = tree_hashes(ds)
    real = transaction._atomic_write
    calls = {"n": 0}

    def failing(path: Path, data: bytes, mode: int | None, temp: str | None = None) -> None:
        if path.name.startswith("sub-"):
            calls["n"] += 1
            if calls["n"] == 3:
                raise OSError(28, "No space left on device")
        real(path, data, mode, temp)

    monkeypatch.setattr(transaction, "_atomic_write", failing)
    result = fix(ds, "--apply", "--backup-dir", tmp_path / "backups")
    assert result.exit_code == 2
    assert "nothing is changed" in result.output and "No space left" in result.output
    assert tree_hashes(ds) == before


# ------------------------------------------------------------------ 7. trusted evidence


def test_seconds_are_not_divided_by_an_untrusted_header_tr(tmp_path: Path) -> None:
    # no RepetitionTime in the sidecar; the header's TR says 2 ms: the audit may call the
    # seconds "milliseconds", but the header is not evidence enough to divide them
    ds = tmp_path / "ds"
    write_description(ds)
    write_run(ds, RUN, shape=SHAPE, tr=0.002, time_unit="sec",
              sidecar={"TaskName": "hum", "SliceTiming": seconds()})
    before = tree_hashes(ds)
    result = fix(ds, "--apply")
    assert "written" not in result.output
    assert tree_hashes(ds) == before


def test_seconds_are_not_divided_by_a_few_ms_acquisition_window(tmp_path: Path) -> None:
    ds = tmp_path / "ds"
    write_description(ds)
    write_run(ds, RUN, shape=SHAPE, tr=TR,
              sidecar={"TaskName": "hum", "RepetitionTime": TR,
                       "FrameAcquisitionDuration": 0.003, "SliceTiming": seconds()})
    before = tree_hashes(ds)
    result = fix(ds, "--apply")
    assert "written" not in result.output
    assert tree_hashes(ds) == before


def test_milliseconds_under_a_trusted_tr_are_still_divided(tmp_path: Path) -> None:
    ds = ms_dataset(tmp_path / "ds", subjects=("01",))
    assert fix(ds, "--apply").exit_code == 0
    # BIDS: seconds; the list divided by 1000
    assert json.loads((ds / OWN).read_text())["SliceTiming"] == pytest.approx(seconds(),
                                                                               abs=1e-6)


# ------------------------------------------------------------------ 9. non-finite numbers


def test_nan_and_huge_numbers_elsewhere_keep_their_bytes(tmp_path: Path) -> None:
    ds = tmp_path / "ds"
    write_description(ds)
    value = "[" + ", ".join(f"{t:g}" for t in millis()) + "]"
    text = ('{\n  "TaskName": "hum",\n  "Odd": NaN,\n  "Far": 1e400,\n  "Neg": -Infinity,\n'
            f'  "RepetitionTime": 2.000,\n  "SliceTiming": {value}\n}}\n')
    write_run(ds, RUN, shape=SHAPE, tr=TR)
    (ds / OWN).write_text(text)
    dry = fix(ds)
    assert dry.exit_code in (0, 1) and "internal error" not in dry.output
    result = fix(ds, "--apply")
    assert "internal error" not in result.output
    assert result.exit_code == 0, result.output
    after = (ds / OWN).read_text()
    head = text[: text.index(value)]  # NaN, 1e400 and -Infinity: the same bytes
    assert after.startswith(head) and after.endswith("\n}\n")
    new = json.loads(after[len(head): -3])
    assert new == pytest.approx(seconds(), abs=1e-6)


# ------------------------------------------------------------------ 11. undo robustness


def test_undo_with_a_missing_backup_is_one_line_and_writes_nothing(tmp_path: Path) -> None:
    _ds, journal, _ = applied(tmp_path)
    missing = next((journal.parent / "files").rglob("*.json"))
    missing.unlink()
    state = tree_hashes(tmp_path)
    result = fix("--undo", journal)
    assert result.exit_code == 1
    refused = [x for x in result.output.splitlines() if x.startswith("refused ")]
    assert len(refused) == 1 and "is missing" in refused[0]
    assert result.output.count("restored  ") == 1  # the file whose backup is there
    changed = {k for k, v in tree_hashes(tmp_path).items() if state.get(k) != v}
    assert len(changed) == 1


@pytest.mark.parametrize("damage", ['{"format": "slicetime-fix-journal"',
                                    '{"format": "slicetime-fix-journal", "entries": 3}',
                                    '{"format": "slicetime-fix-journal", "entries": [{}]}'])
def test_a_malformed_journal_is_one_line_and_writes_nothing(tmp_path: Path,
                                                            damage: str) -> None:
    _ds, journal, _ = applied(tmp_path)
    journal.write_text(damage)
    state = tree_hashes(tmp_path)
    result = fix("--undo", journal)
    assert result.exit_code == 2 and "Traceback" not in result.output
    assert len(result.output.strip().splitlines()) == 1
    assert tree_hashes(tmp_path) == state


def test_a_second_undo_says_already_restored(tmp_path: Path) -> None:
    ds, journal, before = applied(tmp_path)
    assert fix("--undo", journal).exit_code == 0
    assert tree_hashes(ds) == before
    again = fix("--undo", journal)
    assert again.exit_code == 0, again.output
    assert "already restored" in again.output and "changed since" not in again.output
    assert tree_hashes(ds) == before


def test_undo_after_kill_during_apply_restores_and_names_unwritten_files(
    tmp_path: Path,
) -> None:
    ds = ms_dataset(tmp_path / "ds", subjects=("01", "02", "03"))
    before = tree_hashes(ds)
    backups = tmp_path / "backups"
    # a separate process applies the fix and is killed (SIGKILL) while writing the second
    # dataset file, after its temporary file exists
    killed_apply(ds, backups, at=2)
    assert any(p.name.endswith(".tmp") for p in ds.rglob(".*"))  # the crash left a temp
    assert tree_hashes(ds) != before
    result = fix("--undo", backups / "journal.json")
    assert result.exit_code == 0, result.output
    assert result.output.count("restored  ") == 1
    assert result.output.count("never written") == 2
    assert tree_hashes(ds) == before  # temp and stale lock gone, every byte back


# ------------------------------------------------------------------ 14. locking


def test_a_second_apply_on_a_locked_dataset_writes_nothing(tmp_path: Path) -> None:
    ds = ms_dataset(tmp_path / "ds")
    with transaction.dataset_lock([str(ds)]):
        state = tree_hashes(tmp_path)
        result = fix(ds, "--apply")
        assert result.exit_code == 2
        assert "another slicetime fix is writing this dataset" in result.output
        assert tree_hashes(tmp_path) == state
    assert not (ds / transaction.LOCK_NAME).exists()  # released and removed
    assert fix(ds, "--apply").exit_code == 0


def test_an_apply_after_another_refuses_its_stale_plan(tmp_path: Path) -> None:
    # two plans made before either applies: the second finds its files changed and
    # writes nothing, so its backups never hold the first one's fixed bytes
    ds = ms_dataset(tmp_path / "ds")
    first, second = tmp_path / "p1.json", tmp_path / "p2.json"
    assert fix(ds, "--plan", first).exit_code == 1
    assert fix(ds, "--plan", second).exit_code == 1
    done = fix("--apply", "--plan", first, "--backup-dir", tmp_path / "b1")
    assert done.exit_code == 0, done.output
    state = tree_hashes(tmp_path)
    late = fix("--apply", "--plan", second, "--backup-dir", tmp_path / "b2")
    assert late.exit_code == 1 and "changed since the plan was made" in late.output
    assert tree_hashes(tmp_path) == state


def test_a_backup_folder_holding_a_journal_is_not_reused(tmp_path: Path) -> None:
    ds, journal, _ = applied(tmp_path)
    (ds / OWN).write_text(json.dumps({"TaskName": "hum", "RepetitionTime": TR,
                                      "SliceTiming": millis()}))
    state = tree_hashes(tmp_path)
    result = fix(ds, "--apply", "--backup-dir", journal.parent)
    assert result.exit_code == 2 and "already holds the journal" in result.output
    assert tree_hashes(tmp_path) == state


# ------------------------------------------------------------------ 20. escaped names


def test_control_and_bidi_characters_in_paths_are_escaped(tmp_path: Path) -> None:
    ds = ms_dataset(tmp_path / "ds\n\u202eevil", subjects=("01",))
    result = fix(ds, "--apply")
    assert result.exit_code == 0, result.output
    assert "\u202e" not in result.output
    line = next(x for x in result.output.splitlines() if x.startswith("backups and journal"))
    assert "ds\\n\\u202eevil" in line  # the newline did not split the line


# ------------------------------------------------------------------ 21. bytes kept


def test_a_rewrite_changes_only_the_bytes_of_the_edited_value(tmp_path: Path) -> None:
    ds = tmp_path / "ds"
    write_description(ds)
    write_run(ds, RUN, shape=SHAPE, tr=TR)
    value = "[" + ",".join(f"{t:g}" for t in millis()) + "]"
    text = ('{\r\n\t"TaskName": "caf\\u00e9",\r\n\t"RepetitionTime": 2.000,\r\n'
            '\t"EchoTime": 3.0e-2,\r\n\t"Inline": [1, 2,  3],\r\n'
            f'\t"SliceTiming": {value},\r\n\t"Zzz": {{"b": 1, "a": 2}}\r\n}}')
    (ds / OWN).write_bytes(text.encode())
    others = tree_hashes(ds)
    result = fix(ds, "--apply")
    assert result.exit_code == 0, result.output
    after = (ds / OWN).read_bytes().decode()
    head, tail = text.split(value)
    assert after.startswith(head) and after.endswith(tail)
    new = after[len(head): len(after) - len(tail)]
    assert "\n" not in new and "," in new and ", " not in new  # inline, compact as before
    assert json.loads(new) == pytest.approx(seconds(), abs=1e-6)
    others.pop(OWN)
    assert {k: v for k, v in tree_hashes(ds).items() if k != OWN} == others


def test_added_and_removed_members_keep_the_rest_of_the_text(tmp_path: Path) -> None:
    ds = tmp_path / "ds"
    write_description(ds)
    top = '{\n    "TaskName": "hum",\n    "SliceTiming": [' + ", ".join(
        f"{t:g}" for t in seconds()) + "],\n    \"Extra\": 1.50\n}\n"
    write_sidecar(ds, "task-hum_bold.json", raw=top)
    own_text = '{\n    "RepetitionTime": 2.000\n}\n'
    for sub in ("01", "02"):
        write_run(ds, f"sub-{sub}/func/sub-{sub}_task-hum_bold.nii.gz", shape=SHAPE, tr=TR)
        (ds / f"sub-{sub}/func/sub-{sub}_task-hum_bold.json").write_text(own_text)
    assert fix(ds, "--apply", "--spread", "SliceTiming").exit_code == 0
    assert (ds / "task-hum_bold.json").read_text() == (
        '{\n    "TaskName": "hum",\n    "Extra": 1.50\n}\n')
    own = (ds / OWN).read_text()
    assert own.startswith('{\n    "RepetitionTime": 2.000,\n    "SliceTiming": [')
    assert own.endswith("]\n}\n")
    assert json.loads(own)["SliceTiming"] == pytest.approx(seconds(), abs=1e-9)


# ------------------------------------------------------------ issue 17 / issue 15


def test_the_journal_is_written_twice_whatever_the_number_of_files(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    ds = ms_dataset(tmp_path / "ds", subjects=tuple(f"{i:02d}" for i in range(1, 9)))
    writes: list[str] = []
    real = transaction._write_journal

    def counting(path: Path, roots: Any, token: str, entries: Any, status: str,
                 ids: Any = None) -> None:
        writes.append(status)
        real(path, roots, token, entries, status, ids)

    monkeypatch.setattr(transaction, "_write_journal", counting)
    result = fix(ds, "--apply")
    assert result.exit_code == 0, result.output
    assert result.output.count("written   ") == 8
    assert writes == ["prepared", "applied"]  # not once per file


@pytest.mark.parametrize("option", ["--consolidate", "--spread"])
def test_an_unknown_field_to_move_is_a_usage_error(tmp_path: Path, option: str) -> None:
    ds = ms_dataset(tmp_path / "ds")
    state = tree_hashes(tmp_path)
    result = fix(ds, "--apply", option, "SliceTimng")
    assert result.exit_code == 2
    assert "did you mean 'SliceTiming'?" in result.output
    assert len(result.output.strip().splitlines()) == 1
    assert tree_hashes(tmp_path) == state
