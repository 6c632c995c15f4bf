"""`correct` in the second "never lose a byte" round (issue 26): one run's failure
is that run's outcome, one writer per ``--out`` at a time, nothing written or
removed through a link.

Each test builds its case on disk, hashes every file outside the intended
change before and after, runs the command and compares.
"""

from __future__ import annotations

import errno
import json
import os
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from click.testing import CliRunner

from slicetime.interfaces.cli import cli
from slicetime.pipelines import correct as correct_module
from slicetime.pipelines import correct_batch as batch_module
from slicetime.pipelines import provenance as provenance_module
from slicetime.pipelines.correct import CorrectOptions
from slicetime.pipelines.correct_batch import correct_paths
from slicetime.readers.atomic import TEMP_PREFIX, folder_lock
from slicetime.readers.entities import sidecar_name
from tests.helpers_bids import tree_hashes, write_description
from tests.test_correct import REL, build_run, interleaved, output_of

NAME_MAX = 255  # POSIX NAME_MAX on Linux file systems (common practice, no source)


def correct_json(*args: Any) -> tuple[int, dict[str, Any], str]:
    result = CliRunner().invoke(cli, ["correct", *[str(a) for a in args], "--format", "json"],
                                catch_exceptions=False)
    try:
        return result.exit_code, json.loads(result.output), result.output
    except ValueError:
        return result.exit_code, {}, result.output


def files_under(out: Path) -> list[str]:
    return sorted(p.relative_to(out).as_posix() for p in out.rglob("*")) if out.exists() else []


def provenance_outputs(out: Path) -> set[str]:
    content = json.loads((out / correct_module.PROVENANCE_FILE).read_text(encoding="utf-8"))
    runs = content["Runs"]
    return set(runs) if isinstance(runs, dict) else {r["OutputPath"] for r in runs}


def images_on_disk(out: Path) -> set[str]:
    return {p.relative_to(out).as_posix() for p in out.rglob("*.nii*")}


@pytest.fixture
def ds(tmp_path: Path) -> Path:
    root = tmp_path / "ds"
    write_description(root)
    for subject in ("01", "02", "03"):
        build_run(root, REL.replace("sub-01", f"sub-{subject}"), interleaved(8))
    return root


# ------------------------------------------------------------------ item 5


def test_a_name_too_long_for_its_output_fails_only_that_run(ds: Path, tmp_path: Path) -> None:
    # a legal 247-byte input name is over NAME_MAX once "_desc-timealigned" is added
    stem = "sub-04_task-"
    long_name = stem + "a" * (247 - len(stem) - len("_bold.nii.gz")) + "_bold.nii.gz"
    assert len(long_name) == 247 and len(long_name) + len("_desc-timealigned") > NAME_MAX
    build_run(ds, f"sub-04/func/{long_name}", interleaved(8))
    before = tree_hashes(ds)
    out = tmp_path / "out"
    code, report, _ = correct_json(ds, "--out", out)
    assert code == 1
    statuses = {r["path"].split("/")[0]: r["status"] for r in report["runs"]}
    assert statuses == {"sub-01": "corrected", "sub-02": "corrected", "sub-03": "corrected",
                        "sub-04": "failed"}
    failed = next(r for r in report["runs"] if r["status"] == "failed")
    assert "File name too long" in failed["reason"]
    assert not (out / "sub-04").exists()  # the folder made for it is gone again
    assert provenance_outputs(out) == images_on_disk(out)
    assert len(images_on_disk(out)) == 3
    assert not [f for f in files_under(out) if TEMP_PREFIX in f]
    assert tree_hashes(ds) == before


class _FullDiskWriter(correct_module.VolumeWriter):
    """The disk fills while sub-02's image is written (ENOSPC from write(2))."""

    def write(self, volumes: Any) -> None:
        if "sub-02" in str(self.path.parent):
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        super().write(volumes)


def test_a_full_disk_during_one_run_fails_that_run_and_the_batch_goes_on(
    ds: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    before = tree_hashes(ds)
    monkeypatch.setattr(correct_module, "VolumeWriter", _FullDiskWriter)
    out = tmp_path / "out"
    code, report, _ = correct_json(ds, "--out", out)
    assert code == 1
    assert [r["status"] for r in report["runs"]] == ["corrected", "failed", "corrected"]
    assert "No space left on device" in report["runs"][1]["reason"]
    assert not (out / "sub-02").exists()
    assert provenance_outputs(out) == images_on_disk(out)
    assert not [f for f in files_under(out) if TEMP_PREFIX in f]
    assert tree_hashes(ds) == before


def test_a_provenance_file_that_cannot_be_written_is_reported_with_exit_1(
    ds: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    def full(out: Path, outcomes: Any) -> None:
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    before = tree_hashes(ds)
    monkeypatch.setattr(batch_module, "write_provenance", full)
    out = tmp_path / "out"
    code, report, _ = correct_json(ds, "--out", out)
    assert code == 1
    assert [r["status"] for r in report["runs"]] == ["corrected"] * 3
    assert [f["code"] for f in report["batch_findings"]] == ["correct/record-unwritten"]
    text = CliRunner().invoke(cli, ["correct", str(ds), "--out", str(out)])
    assert text.exit_code == 1 and "could not be brought up to date" in text.output
    monkeypatch.undo()
    code, report, _ = correct_json(ds, "--out", out)  # the rerun writes the record
    assert code == 0 and provenance_outputs(out) == images_on_disk(out)
    assert tree_hashes(ds) == before


def test_an_unwritable_output_folder_fails_only_its_run(ds: Path, tmp_path: Path) -> None:
    out = tmp_path / "out"
    out.mkdir()
    (out / "sub-02").write_text("a file where the run's folder would go\n")
    before = tree_hashes(ds)
    code, report, _ = correct_json(ds, "--out", out)
    assert code == 1
    assert [r["status"] for r in report["runs"]] == ["corrected", "failed", "corrected"]
    assert "is not a folder" in report["runs"][1]["reason"]
    assert (out / "sub-02").read_text() == "a file where the run's folder would go\n"
    assert provenance_outputs(out) == images_on_disk(out)
    assert tree_hashes(ds) == before


# ------------------------------------------------------------------ item 6


def test_a_second_batch_into_a_locked_out_is_refused_and_writes_nothing(
    ds: Path, tmp_path: Path
) -> None:
    out = tmp_path / "out"
    code, _, _ = correct_json(ds, "--out", out)
    assert code == 0
    before_out, before_ds = tree_hashes(out), tree_hashes(ds)
    other = tmp_path / "other"
    write_description(other, name="another study")
    build_run(other, REL, interleaved(8))
    with folder_lock(out):  # as another process's batch would hold it
        result = CliRunner().invoke(cli, ["correct", str(other), "--out", str(out),
                                          "--mix-inputs"])
    assert result.exit_code == 2
    assert "another slicetime correct is writing to this folder now" in result.output
    assert len(result.output.strip().splitlines()) == 1
    assert tree_hashes(out) == before_out and tree_hashes(ds) == before_ds
    assert not [f for f in files_under(out) if "lock" in f]


def test_two_mixed_batches_keep_every_dataset_link(ds: Path, tmp_path: Path) -> None:
    other = tmp_path / "other"
    write_description(other, name="another study")
    build_run(other, REL.replace("sub-01", "sub-09"), interleaved(8))
    out = tmp_path / "out"
    assert correct_json(ds, "--out", out, "--mix-inputs")[0] == 0
    assert correct_json(other, "--out", out, "--mix-inputs")[0] == 0
    links = json.loads((out / "dataset_description.json").read_text())["DatasetLinks"]
    # BIDS derivatives: DatasetLinks maps names to the source datasets' URIs
    assert set(links.values()) == {ds.resolve().as_uri(), other.resolve().as_uri()}
    assert provenance_outputs(out) == images_on_disk(out)
    assert len(images_on_disk(out)) == 4


# ------------------------------------------------------------------ item 3 (correct)


def _out_linking_into_an_earlier_output(ds: Path, tmp_path: Path) -> tuple[Path, Path]:
    """(earlier output folder, new --out whose sub-01 is a link into the earlier one)."""
    earlier = tmp_path / "earlier"
    assert correct_json(ds, "--out", earlier)[0] == 0
    out = tmp_path / "out"
    out.mkdir()
    os.symlink(earlier / "sub-01", out / "sub-01")
    return earlier, out


def test_a_link_inside_out_is_never_written_or_removed_through(
    ds: Path, tmp_path: Path
) -> None:
    earlier, out = _out_linking_into_an_earlier_output(ds, tmp_path)
    victim = tmp_path / "elsewhere"
    (victim / "empty").mkdir(parents=True)
    os.symlink(victim, out / "sub-02")
    before = tree_hashes(earlier) | tree_hashes(ds) | {"victim": str(sorted(victim.rglob("*")))}
    code, report, _ = correct_json(ds, "--out", out)
    assert code == 1
    statuses = [r["status"] for r in report["runs"]]
    assert statuses == ["failed", "failed", "corrected"]
    assert "symbolic link" in report["runs"][0]["reason"]
    after = tree_hashes(earlier) | tree_hashes(ds) | {"victim": str(sorted(victim.rglob("*")))}
    assert after == before
    assert (out / "sub-01").is_symlink() and (out / "sub-02").is_symlink()
    assert provenance_outputs(out) == {output_of(out, REL.replace("sub-01", "sub-03"))
                                       .relative_to(out).as_posix()}


def test_a_stale_output_reached_through_a_link_is_not_removed(
    ds: Path, tmp_path: Path
) -> None:
    earlier, out = _out_linking_into_an_earlier_output(ds, tmp_path)
    # the run is now refused (SliceTiming removed), which would withdraw its stale output
    sidecar = ds / sidecar_name(REL)
    content = json.loads(sidecar.read_text())
    del content["SliceTiming"]
    sidecar.write_text(json.dumps(content))
    before = tree_hashes(earlier)
    code, report, _ = correct_json(ds, "--out", out)
    assert code == 1 and report["runs"][0]["status"] == "refused"
    assert report["runs"][0]["removed_output"] is None
    assert tree_hashes(earlier) == before


def test_provenance_reads_no_name_the_system_refuses(tmp_path: Path) -> None:
    # a name over NAME_MAX makes stat(2) fail with ENAMETOOLONG (POSIX), not "missing"
    assert provenance_module.recorded_input(tmp_path / ("x" * 300 + ".json")) is None


def test_correct_paths_refuses_a_locked_out_as_a_usage_error(ds: Path, tmp_path: Path) -> None:
    out = tmp_path / "out"
    out.mkdir()
    with folder_lock(out), pytest.raises(ValueError, match="another slicetime correct"):
        correct_paths([ds], CorrectOptions(out=out))
    assert files_under(out) == []


class _HeldWrites:
    """The output file, whose writes wait until ``release`` is set (the disk is slow)."""

    def __init__(self, raw: Any) -> None:
        import threading

        self.raw = raw
        self.started, self.release = threading.Event(), threading.Event()
        self.written: list[int] = []

    def write(self, data: Any) -> int:
        self.started.set()
        self.release.wait(60)
        count = int(self.raw.write(data))
        self.written.append(count)
        return count

    def __getattr__(self, name: str) -> Any:
        return getattr(self.raw, name)


def test_a_ctrl_c_while_the_writer_waits_for_its_helpers_comes_after_the_batch(
        tmp_path: Path) -> None:
    # Python's signal module: a handler runs in the main thread between bytecodes, so an
    # unguarded KeyboardInterrupt can be raised inside the thread pool's own locking (a
    # condition entered from Python code) and leave its lock held: 'correct' once hung
    # there for ever after a Ctrl-C while writing. The writer holds a Ctrl-C until its
    # helpers' batch is done, then raises it, and abort ends every helper thread.
    import signal
    import sys
    import threading

    from slicetime.readers.volumes import VolumeWriter

    writer = VolumeWriter(tmp_path / "out.nii", b"\0" * 352, compress=False)
    held = _HeldWrites(writer._raw)
    writer._raw = held  # type: ignore[assignment]
    main = threading.main_thread().ident
    assert main is not None

    def in_settle() -> bool:
        frame = sys._current_frames().get(main)
        while frame is not None:
            name = frame.f_code.co_name
            if name in ("_settle", "settle") and frame.f_code.co_filename.endswith("volumes.py"):
                return True
            frame = frame.f_back
        return False

    def press_ctrl_c() -> None:
        held.started.wait(60)
        for _ in range(6000):  # until the main thread waits for the batch
            if in_settle():
                break
            threading.Event().wait(0.01)
        signal.pthread_kill(main, signal.SIGINT)
        for _ in range(200):  # an unguarded wait is interrupted at once
            if not in_settle():
                break
            threading.Event().wait(0.01)
        held.release.set()

    writer.write(np.arange(1000, dtype=np.float32))
    presser = threading.Thread(target=press_ctrl_c)
    presser.start()
    written_when_interrupted: list[int] | None = None
    try:
        writer.settle()
    except KeyboardInterrupt:
        written_when_interrupted = list(held.written)
    presser.join()
    writer.abort()
    assert written_when_interrupted == [4000]  # raised, and after the batch was written
    assert not [t for t in threading.enumerate() if t.name.startswith("slicetime-write")]
