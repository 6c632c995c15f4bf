"""`fix --apply` and `--undo` in the second "never lose a byte" round (issue 26, items
2 and 4): all or nothing under SIGINT, SIGTERM and kill -9; undo of a moved or
copied dataset, restoring what it can; owners, modes and the read-only bit kept.

Each test builds its case on disk and compares every byte outside the intended
change before and after (tests/helpers_bids.tree_hashes). The repair itself is
BIDS': SliceTiming is in seconds, so a millisecond list is divided by 1000.
"""

from __future__ import annotations

import errno
import json
import os
import shutil
import signal
import stat
from pathlib import Path
from typing import Any

import pytest
from click.testing import CliRunner

from slicetime.interfaces.cli import cli
from slicetime.pipelines import transaction
from tests.helpers_bids import symlink, tree_hashes
from tests.test_adversarial_fix import OWN, fix, journal_in, killed_apply, ms_dataset

REPO = Path(__file__).resolve().parents[1]
SUBJECTS = tuple(f"{i:02d}" for i in range(1, 7))


def leftovers(ds: Path) -> list[str]:
    """Temporary and lock files in the dataset (none may stay once it has recovered)."""
    return sorted(p.name for p in ds.rglob(".slicetime-*"))


def status_of(journal: Path) -> str:
    return str(json.loads(journal.read_text())["status"])


def fix_stderr(*args: object) -> Any:
    return CliRunner().invoke(cli, ["fix", *map(str, args)])  # .stderr apart from .stdout


# ------------------------------------------------------------------ signals


@pytest.mark.parametrize("sig", [signal.SIGINT, signal.SIGTERM])
def test_a_signal_during_apply_puts_back_every_file_written(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, sig: signal.Signals
) -> None:
    ds = ms_dataset(tmp_path / "ds", subjects=SUBJECTS)
    before = tree_hashes(ds)
    real = transaction._atomic_write
    count = [0]

    def signalled(path: Path, data: bytes, like: Any, tag: str | None = None) -> None:
        real(path, data, like, tag)
        if path.name.startswith("sub-"):
            count[0] += 1
            if count[0] == 3:  # the signal arrives after the third file is in place
                os.kill(os.getpid(), sig)

    monkeypatch.setattr(transaction, "_atomic_write", signalled)
    backups = tmp_path / "backups"
    result = fix_stderr(ds, "--apply", "--backup-dir", backups)
    # a shell reports a process ended by signal N as 128 + N (common practice, no source)
    assert result.exit_code == 128 + sig
    assert str(backups / "journal.json") in result.stderr
    assert "nothing is changed" in result.stderr and "3 files written were put back" in \
        result.stderr
    assert tree_hashes(ds) == before and leftovers(ds) == []
    assert status_of(backups / "journal.json") == "rolled back"
    assert signal.getsignal(signal.SIGINT) is signal.default_int_handler  # handlers restored


def test_after_kill_9_the_next_fix_finishes_the_rollback(tmp_path: Path) -> None:
    ds = ms_dataset(tmp_path / "ds", subjects=SUBJECTS)
    before = tree_hashes(ds)
    backups = tmp_path / "backups"
    killed_apply(ds, backups, at=3)
    assert tree_hashes(ds) != before and leftovers(ds)  # two files, a temp, the lock
    result = fix_stderr(ds)  # a dry run: it finishes the rollback first
    assert result.exit_code == 1
    assert "the 2 files it had written were put back" in result.stderr
    assert str(backups / "journal.json") in result.stderr
    assert tree_hashes(ds) == before and leftovers(ds) == []
    assert status_of(backups / "journal.json") == "rolled back"
    applied = fix(ds, "--apply", "--backup-dir", tmp_path / "again")  # and then applies
    assert applied.exit_code == 0, applied.output
    assert applied.output.count("written   ") == len(SUBJECTS) and leftovers(ds) == []


def test_after_kill_9_undo_finishes_the_rollback(tmp_path: Path) -> None:
    ds = ms_dataset(tmp_path / "ds", subjects=SUBJECTS)
    before = tree_hashes(ds)
    backups = tmp_path / "backups"
    killed_apply(ds, backups, at=3)
    result = fix("--undo", backups / "journal.json")
    assert result.exit_code == 0, result.output
    assert result.output.count("restored  ") == 2
    assert result.output.count("never written") == len(SUBJECTS) - 2
    assert tree_hashes(ds) == before and leftovers(ds) == []


def test_a_retry_after_a_full_disk_may_use_the_same_backup_folder(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    ds = ms_dataset(tmp_path / "ds", subjects=SUBJECTS)
    before = tree_hashes(ds)
    real = transaction._atomic_write
    count = [0]

    def full(path: Path, data: bytes, like: Any, tag: str | None = None) -> None:
        if path.name.startswith("sub-"):
            count[0] += 1
            if count[0] == 2:
                raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(path))
        real(path, data, like, tag)

    monkeypatch.setattr(transaction, "_atomic_write", full)
    backups = tmp_path / "backups"
    failed = fix(ds, "--apply", "--backup-dir", backups)
    assert failed.exit_code == 2 and "No space left on device" in failed.output
    assert "nothing is changed" in failed.output
    assert tree_hashes(ds) == before and leftovers(ds) == []
    monkeypatch.undo()
    again = fix(ds, "--apply", "--backup-dir", backups)
    assert again.exit_code == 0, again.output
    assert "writable" not in again.output and journal_in(again.output) == backups / "journal.json"


# ------------------------------------------------------------------ undo elsewhere


def test_undo_restores_a_copied_dataset_and_leaves_the_original(tmp_path: Path) -> None:
    ds = ms_dataset(tmp_path / "study")
    before = tree_hashes(ds)
    result = fix(ds, "--apply", "--backup-dir", tmp_path / "backups")
    journal = journal_in(result.output)
    copy = tmp_path / "study-copy"
    shutil.copytree(ds, copy, symlinks=True)  # as cp -a would
    fixed = tree_hashes(ds)
    undone = fix("--undo", journal, copy)
    assert undone.exit_code == 0, undone.output
    assert tree_hashes(copy) == before  # the copy is back as it was
    assert tree_hashes(ds) == fixed  # the original is untouched


def test_undo_finds_a_moved_dataset_when_told_where_it_is(tmp_path: Path) -> None:
    ds = ms_dataset(tmp_path / "study")
    before = tree_hashes(ds)
    journal = journal_in(fix(ds, "--apply", "--backup-dir", tmp_path / "backups").output)
    moved = tmp_path / "archive" / "study"
    moved.parent.mkdir()
    os.rename(ds, moved)
    lost = fix("--undo", journal)
    assert lost.exit_code == 2
    assert "is not there any more" in lost.output and "NEW-PLACE" in lost.output
    undone = fix("--undo", journal, moved)
    assert undone.exit_code == 0, undone.output
    assert tree_hashes(moved) == before


def test_undo_refuses_another_dataset_given_as_the_place(tmp_path: Path) -> None:
    ds = ms_dataset(tmp_path / "study")
    journal = journal_in(fix(ds, "--apply", "--backup-dir", tmp_path / "backups").output)
    other = ms_dataset(tmp_path / "other", name="another study")
    state = tree_hashes(tmp_path)
    refused = fix("--undo", journal, other)
    assert refused.exit_code == 2 and "not the dataset this journal was made for" in \
        refused.output
    assert tree_hashes(tmp_path) == state


def test_undo_restores_what_it_can_and_names_a_link_it_cannot_remake(tmp_path: Path) -> None:
    ds = ms_dataset(tmp_path / "ds")
    # a sidecar kept in a store folder of the dataset, linked in by its absolute path (a
    # link out of the dataset is never read nor replaced: tests/test_file_links.py); an
    # absolute target would leave a copied or moved dataset, so undo does not remake it
    kept = ds / "store" / "sidecar.json"
    kept.parent.mkdir()
    shutil.move(ds / OWN, kept)
    symlink(ds / OWN, kept)
    before = tree_hashes(ds)
    result = fix(ds, "--apply", "--replace-links", "--backup-dir", tmp_path / "backups")
    assert result.exit_code == 0, result.output
    undone = fix("--undo", journal_in(result.output))
    assert undone.exit_code == 1
    refused = [x for x in undone.output.splitlines() if x.startswith("refused ")]
    assert len(refused) == 1 and OWN in refused[0] and "out of the dataset" in refused[0]
    assert undone.output.count("restored  ") == 1  # the other subject's file
    after = tree_hashes(ds)
    assert {k for k in before if after.get(k) != before[k]} == {OWN}


# ------------------------------------------------------------------ owners and modes


@pytest.mark.skipif(os.geteuid() != 0, reason="giving a file to another user needs root")
def test_owner_and_mode_are_kept_and_backups_are_no_more_readable(tmp_path: Path) -> None:
    ds = ms_dataset(tmp_path / "ds")
    own = ds / OWN
    os.chown(own, 1234, 1234)
    os.chmod(own, 0o640)
    backups = tmp_path / "backups"
    result = fix(ds, "--apply", "--backup-dir", backups)
    assert result.exit_code == 0, result.output
    st = own.stat()
    assert (st.st_uid, st.st_gid, stat.S_IMODE(st.st_mode)) == (1234, 1234, 0o640)
    backup = next(p for p in (backups / "files").rglob("*.json") if "sub-01" in p.name)
    saved = backup.stat()
    assert saved.st_uid == 1234 and not stat.S_IMODE(saved.st_mode) & ~0o640
    os.chown(own, 0, 0)  # someone else rewrote the owner since; undo gives it back
    os.chmod(own, 0o644)
    journal = journal_in(result.output)
    content = json.loads(journal.read_text())
    assert content["entries"][0]["uid"] == 1234
    # the file's bytes are still the fix's, so undo restores it with its recorded owner
    undone = fix("--undo", journal)
    assert undone.exit_code == 0, undone.output
    st = own.stat()
    assert (st.st_uid, st.st_gid, stat.S_IMODE(st.st_mode)) == (1234, 1234, 0o640)


def test_a_read_only_sidecar_is_refused_unless_asked_and_stays_read_only(
    tmp_path: Path,
) -> None:
    ds = ms_dataset(tmp_path / "ds")
    own = ds / OWN
    own.chmod(0o444)
    state = tree_hashes(tmp_path)
    refused = fix(ds, "--apply", "--backup-dir", tmp_path / "backups")
    assert refused.exit_code == 1
    assert f"{OWN}: is read-only" in refused.output and "--rewrite-read-only" in refused.output
    assert tree_hashes(tmp_path) == state  # all or nothing: the other file is not written
    done = fix(ds, "--apply", "--rewrite-read-only", "--backup-dir", tmp_path / "backups")
    assert done.exit_code == 0, done.output
    assert stat.S_IMODE(own.stat().st_mode) == 0o444
    assert json.loads(own.read_text())["SliceTiming"][1] == 1.0  # 1000 ms -> 1 s
