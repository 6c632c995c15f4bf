"""The audit's caches keyed on content and identity (the content memo, the report line
filled in per judged content, the facts interned per content, the header decode kept
by its bytes, the sidecar parse kept by its bytes) change no report: runs that share a
content but not their names, links, odd path bytes, several roots at once, worker
processes, the API called again after a file changed, and caches smaller than the
runs they serve.

Each check compares two ways of making the same report (memo on and off, one worker
and two, this process and a fresh one): the reference is the audit's own evaluation of
each run by itself, which the rest of the suite checks against the outside sources."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path
from typing import Any

import pytest
from click.testing import CliRunner

from slicetime.interfaces import report_source
from slicetime.interfaces.cli import cli
from slicetime.pipelines import audit_memo
from slicetime.readers import nifti
from slicetime.schemes.generate import Protocol, slice_timing
from tests.helpers_bids import patch_header, symlink, write_description, write_json, write_run
from tests.test_audit_memo import _memos

TIMES = slice_timing(Protocol(n_slices=10, order="interleaved", repetition_time=2.0,
                              decimals=4))
#: SliceTiming in milliseconds: a content finding that names the file giving the value
MS = [round(t * 1000, 1) for t in TIMES]
SHAPE = (4, 4, 10, 6)

#: folder names a walk meets as they are on disk: a quote, a backslash, control
#: characters, a byte that is no UTF-8 (surrogate-escaped), JSON's own escapes
ODD_FOLDERS = ["func", 'fu"nc', "fu\\nc", "f\x01unc", "f\nunc", "f\u2028unc",
               os.fsdecode(b"f\xffunc"), "fu\\u0000nc"]


def _odd_dataset(root: Path, *, label: str = "") -> None:
    """Runs of few contents at many places: own sidecars byte for byte alike (clean, and
    with millisecond SliceTiming), inherited ones, a link to another run's image and to
    another run's sidecar, headers alike byte for byte in a truncated file and in a
    file whose header is broken, non-BIDS names, the same suffix in and out of a
    datatype folder."""
    write_description(root, name=f"odd names {label}")
    write_json(root / "task-inh_bold.json", {"RepetitionTime": 2.0, "SliceTiming": MS})
    for n, folder in enumerate(ODD_FOLDERS):
        sub = f"sub-{n:02d}"
        write_run(root, f"{sub}/{folder}/{sub}_task-rest_bold.nii.gz", shape=SHAPE,
                  sidecar={"SliceTiming": TIMES, "RepetitionTime": 2.0})
        write_run(root, f"{sub}/{folder}/{sub}_task-ms_bold.nii.gz", shape=SHAPE,
                  sidecar={"SliceTiming": MS, "RepetitionTime": 2.0})
        write_run(root, f"{sub}/{folder}/{sub}_task-inh_bold.nii.gz", shape=SHAPE)
        # differs from task-rest only in the TR the line shows
        write_run(root, f"{sub}/{folder}/{sub}_task-tr_bold.nii.gz", shape=SHAPE,
                  sidecar={"SliceTiming": TIMES, "RepetitionTime": 2.5 if n % 2 else 2.0})
        # own sidecars alike, headers not: the header's TR disagrees in every other run
        write_run(root, f"{sub}/{folder}/{sub}_task-hdr_bold.nii.gz", shape=SHAPE,
                  tr=3.0 if n % 2 else 2.0,
                  sidecar={"SliceTiming": TIMES, "RepetitionTime": 2.0})
        write_run(root, f"{sub}/{folder}/{sub}_task-rest_bold (copy).nii.gz", shape=SHAPE,
                  sidecar={"SliceTiming": TIMES, "RepetitionTime": 2.0})
    # the same content outside a datatype folder
    write_run(root, "sub-00/sub-00_task-rest_bold.nii.gz", shape=SHAPE,
              sidecar={"SliceTiming": TIMES, "RepetitionTime": 2.0})
    # links: an image to another run's image, a sidecar to another run's sidecar
    symlink(root / "sub-01/func/sub-01_task-link_bold.nii.gz",
            "../../sub-00/func/sub-00_task-rest_bold.nii.gz")
    symlink(root / "sub-01/func/sub-01_task-link_bold.json",
            "../../sub-00/func/sub-00_task-ms_bold.json")
    # a subject folder that is a link to another, a sidecar that links out of the dataset
    symlink(root / "sub-50", "sub-00")
    outside = write_json(root.parent / f"outside{label}.json",
                         {"SliceTiming": MS, "RepetitionTime": 2.0})
    write_run(root, "sub-01/func/sub-01_task-out_bold.nii.gz", shape=SHAPE)
    symlink(root / "sub-01/func/sub-01_task-out_bold.json", outside)
    # headers alike byte for byte: one file truncated, two with the same broken header
    for sub in ("sub-02", "sub-03"):
        image = write_run(root, f"{sub}/func/{sub}_task-cut_bold.nii", shape=SHAPE,
                          sidecar={"SliceTiming": TIMES, "RepetitionTime": 2.0})
        if sub == "sub-03":
            image.write_bytes(image.read_bytes()[:-100])
        broken = write_run(root, f"{sub}/func/{sub}_task-bad_bold.nii", shape=SHAPE,
                           sidecar={"SliceTiming": TIMES, "RepetitionTime": 2.0})
        patch_header(broken, dim=[9, 4, 4, 10, 6, 1, 1, 1])


def _audit(*args: Any, memo: bool = True, monkeypatch: pytest.MonkeyPatch | None = None,
           fmt: str = "json") -> str:
    if monkeypatch is not None:
        monkeypatch.setattr(audit_memo, "ENABLED", memo)
    result = CliRunner().invoke(cli, ["audit", *[str(a) for a in args], "--format", fmt,
                                      "--no-progress", "--fail-on", "never"])
    assert result.exit_code == 0, result.output
    return result.output


def _run_paths(report: str) -> list[str]:
    return [run["path"] for run in json.loads(report)["runs"]]


@pytest.mark.parametrize("fmt", ["json", "text", "tsv", "jsonl", "junit"])
def test_odd_names_links_and_alike_contents_report_as_without_the_memo(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch, fmt: str) -> None:
    root = tmp_path / "odd"
    _odd_dataset(root)
    extra = ["--all"] if fmt == "text" else []  # text: every run, not only those found
    warm = _audit(root, "--jobs", "1", *extra, memo=True, monkeypatch=monkeypatch, fmt=fmt)
    cold = _audit(root, "--jobs", "1", *extra, memo=False, monkeypatch=monkeypatch, fmt=fmt)
    assert warm == cold
    if fmt == "json":
        report = json.loads(warm)
        paths = _run_paths(warm)
        assert len(paths) == len(set(paths)) == len(ODD_FOLDERS) * 6 + 7
        # each millisecond finding names the file that gave the value (BIDS, "The
        # Inheritance Principle": the value is the deepest sidecar's), one per run
        named = {run["path"]: {f["file"] for f in run["findings"]
                               if f["code"] == "timing/units-ms"}
                 for run in report["runs"]}
        # NIfTI-1 (nifti1.h): pixdim[4] is the TR; nibabel wrote 3.0 s against the
        # sidecar's 2.0 in every other task-hdr run, and a header TR that disagrees with
        # the sidecar's is a finding of that run alone
        header_tr = [run for run in report["runs"] if "_task-hdr_" in run["path"]]
        flagged = [any(f["code"] == "header/tr-disagrees" for f in run["findings"])
                   for run in header_tr]
        assert flagged == [n % 2 == 1 for n in range(len(ODD_FOLDERS))], flagged
        # NIfTI-1 (nifti1.h): dim[0] is 1 to 7, and the file holds vox_offset plus the
        # data; the header is alike byte for byte in both runs, the finding is each file's
        read_problems = {run["path"]: {(f["code"], f["file"]) for f in run["findings"]
                                       if f["code"].startswith("file/")}
                         for run in report["runs"] if "_task-bad_" in run["path"]
                         or "_task-cut_" in run["path"]}
        assert read_problems == {
            "sub-02/func/sub-02_task-bad_bold.nii":
                {("file/bad-dimensions", "sub-02/func/sub-02_task-bad_bold.nii")},
            "sub-03/func/sub-03_task-bad_bold.nii":
                {("file/bad-dimensions", "sub-03/func/sub-03_task-bad_bold.nii")},
            "sub-02/func/sub-02_task-cut_bold.nii": set(),
            "sub-03/func/sub-03_task-cut_bold.nii":
                {("file/truncated", "sub-03/func/sub-03_task-cut_bold.nii")},
        }
        for path, files in named.items():
            if "_task-ms_" in path:
                assert files == {path.replace(".nii.gz", ".json")}, path
            elif "_task-inh_" in path:
                assert files == {"task-inh_bold.json"}, path


def test_one_worker_and_two_give_the_same_report(tmp_path: Path) -> None:
    # more runs than one chunk of work (executor.map_chunks: 64), so both workers run;
    # a worker fills lines and facts in from its own judged contents (never pickled)
    root = tmp_path / "odd"
    _odd_dataset(root)
    for n in range(40):
        write_run(root, f"sub-x{n:02d}/func/sub-x{n:02d}_task-rest_bold.nii.gz", shape=SHAPE,
                  sidecar={"SliceTiming": MS if n % 3 else TIMES, "RepetitionTime": 2.0})
    one = _audit(root, "--jobs", "1")
    two = _audit(root, "--jobs", "2")
    assert len(_run_paths(one)) > 64
    assert one == two
    assert _audit(root, "--jobs", "1", "--format", "tsv") == \
        _audit(root, "--jobs", "2", "--format", "tsv")


def test_two_roots_at_once_report_as_without_the_memo(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # the same relative names and own sidecars byte for byte alike in both roots (one
    # sidecar parse for both: SidecarStore.parsed), but the second root's headers say
    # another shape and its inherited sidecar another TR
    first, second = tmp_path / "a", tmp_path / "b"
    _odd_dataset(first, label="a")
    _odd_dataset(second, label="b")
    write_json(second / "task-inh_bold.json", {"RepetitionTime": 3.0, "SliceTiming": MS})
    write_run(second, "sub-00/func/sub-00_task-rest_bold.nii.gz", shape=(4, 4, 10, 7),
              tr=3.0, sidecar={"SliceTiming": TIMES, "RepetitionTime": 2.0})
    warm = _audit(first, second, "--jobs", "1", memo=True, monkeypatch=monkeypatch)
    cold = _audit(first, second, "--jobs", "1", memo=False, monkeypatch=monkeypatch)
    assert warm == cold
    runs = json.loads(warm)["runs"]
    shapes = {run["shape"][3] for run in runs
              if run["path"].endswith("sub-00/func/sub-00_task-rest_bold.nii.gz")}
    assert shapes == {6, 7}  # nibabel wrote 6 volumes in the first root, 7 in the second


def _fresh(*args: Any) -> str:
    """The report a new process makes (no cache of this one)."""
    done = subprocess.run([sys.executable, "-m", "slicetime", "audit", *map(str, args),
                           "--format", "json", "--no-progress", "--fail-on", "never",
                           "--jobs", "1"], capture_output=True, check=False)
    assert done.returncode == 0, done.stderr
    return done.stdout.decode()


def test_the_api_called_again_after_files_changed_reports_what_is_there_now(
        tmp_path: Path) -> None:
    root = tmp_path / "odd"
    _odd_dataset(root)
    before = _audit(root, "--jobs", "1")
    # the same sizes: a cache keyed by path, size or time would not see the change
    sidecar = root / "sub-00/func/sub-00_task-rest_bold.json"
    text = sidecar.read_text(encoding="utf-8")
    assert '"RepetitionTime": 2.0' in text
    sidecar.write_text(text.replace('"RepetitionTime": 2.0', '"RepetitionTime": 3.0'),
                       encoding="utf-8")
    image = root / "sub-02/func/sub-02_task-cut_bold.nii"
    size = image.stat().st_size
    patch_header(image, pixdim=[1, 2, 2, 2, 3.0, 1, 1, 1])  # NIfTI-1: pixdim[4] the TR
    assert image.stat().st_size == size
    inherited = root / "task-inh_bold.json"
    inherited.write_text(inherited.read_text(encoding="utf-8").replace("2.0", "4.0"),
                         encoding="utf-8")
    again = _audit(root, "--jobs", "1")
    assert again != before
    assert again == _fresh(root)


@pytest.mark.parametrize("small", ["memo", "fragments"])
def test_caches_smaller_than_the_study_change_nothing(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch, small: str) -> None:
    # bounded caches full and emptied (or no longer learning) many times in one audit:
    # the memo's tables and the facts interned per content ("memo"), or the header
    # decodes and the report lines per content ("fragments", with the memo as it is);
    # each stays within its bound (memory on 100,000 runs) and the report is the one
    # made without the memo and with every header decoded afresh
    root = tmp_path / "odd"
    _odd_dataset(root)
    for n in range(12):  # clean contents that differ (shape and TR), each at two places
        for sub in ("p", "q"):
            write_run(root, f"sub-{sub}{n:02d}/func/sub-{sub}{n:02d}_task-rest_bold.nii.gz",
                      shape=(4, 4, 10, 6 + n), tr=2.0 + n / 10,
                      sidecar={"SliceTiming": TIMES, "RepetitionTime": 2.0 + n / 10})
    monkeypatch.setattr(nifti, "_decoded", nifti._decode_fields)
    cold = _audit(root, "--jobs", "1", memo=False, monkeypatch=monkeypatch)
    monkeypatch.undo()
    if small == "memo":
        from slicetime.pipelines import audit_facts

        monkeypatch.setattr(audit_memo, "MEMO_KEPT", 5)
        monkeypatch.setattr(audit_memo, "_TRIAL", 2)
        monkeypatch.setattr(audit_facts, "CONTENTS_KEPT", 2)
        monkeypatch.setattr(audit_facts, "IDENTITIES_KEPT", 2)
    else:
        monkeypatch.setattr(nifti, "_DECODED_KEPT", 3)
        monkeypatch.setattr(report_source, "_FRAGMENTS_MAX", 3)
    nifti._DECODED.clear()
    report_source._templates.clear()
    memos = _memos(monkeypatch)  # every memo the audit makes
    warm = _audit(root, "--jobs", "1", memo=True, monkeypatch=monkeypatch)
    assert warm == cold
    assert memos and sum(m.reused for m in memos) > 0
    if small == "memo":
        assert all(len(m._timings) <= 5 and len(m._checks) <= 5 for m in memos)
    else:
        assert len(nifti._DECODED) <= 3
        assert len(report_source._templates) <= 3


def test_a_second_dataset_in_the_same_process_reports_as_in_a_fresh_one(
        tmp_path: Path) -> None:
    # the second dataset has the first one's names and own sidecars byte for byte (the
    # sidecar parse and the header decode kept by their bytes), but its headers say
    # another TR (NIfTI-1, nifti1.h: pixdim[4]) and its shared sidecar another one
    first, second = tmp_path / "a", tmp_path / "b"
    _odd_dataset(first, label="a")
    _odd_dataset(second, label="b")
    write_json(second / "task-inh_bold.json", {"RepetitionTime": 3.0, "SliceTiming": MS})
    for folder in ("func", 'fu"nc'):
        write_run(second, f"sub-00/{folder}/sub-00_task-rest_bold.nii.gz", shape=SHAPE, tr=3.0,
                  sidecar={"SliceTiming": TIMES, "RepetitionTime": 2.0})
    _audit(first, "--jobs", "1")
    here = _audit(second, "--jobs", "1")
    assert here == _fresh(second)
    flagged = [run["path"] for run in json.loads(here)["runs"]
               if any(f["code"] == "header/tr-disagrees" for f in run["findings"])]
    assert "sub-00/func/sub-00_task-rest_bold.nii.gz" in flagged


def test_the_html_report_is_the_one_made_without_the_memo(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    root = tmp_path / "odd"
    _odd_dataset(root)
    pages = []
    for memo in (True, False):
        page = tmp_path / f"report-{memo}.html"
        _audit(root, "--jobs", "1", "--html", page, "-q", memo=memo, monkeypatch=monkeypatch,
               fmt="text")
        pages.append(page.read_text(encoding="utf-8"))
    assert pages[0] == pages[1]
    assert "sub-03_task-ms_bold.json" in pages[0]  # a run's own file named in the page
