"""The one atomic writer: whole files or nothing, links replaced not followed."""

from __future__ import annotations

import os
from pathlib import Path

import pytest

from slicetime.readers.atomic import atomic_file, write_atomic


def test_a_failed_write_leaves_the_old_file_and_no_temporary(tmp_path: Path) -> None:
    target = tmp_path / "report.json"
    target.write_text("old\n")
    with pytest.raises(RuntimeError), atomic_file(target) as fh:
        fh.write("half a rep")
        raise RuntimeError("disk full")
    assert target.read_text() == "old\n"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["report.json"]


def test_a_link_is_replaced_never_written_through(tmp_path: Path) -> None:
    # POSIX rename(2) replaces the link itself (common practice, no source)
    outside = tmp_path / "annex-object"
    outside.write_text("annexed content\n")
    link = tmp_path / "sidecar.json"
    os.symlink(outside, link)
    write_atomic(link, b"{}\n", mode=0o640)
    assert not link.is_symlink() and link.read_bytes() == b"{}\n"
    assert outside.read_text() == "annexed content\n"
    assert link.stat().st_mode & 0o777 == 0o640


def test_a_named_temporary_is_used_and_an_existing_one_is_never_overwritten(
    tmp_path: Path,
) -> None:
    target, temp = tmp_path / "a.json", tmp_path / ".a.json.slicetime-tmp"
    temp.write_text("someone else's")
    with pytest.raises(FileExistsError):
        write_atomic(target, "new", temp=temp)
    assert not target.exists() and temp.read_text() == "someone else's"
