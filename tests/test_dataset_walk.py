"""Dataset roots and run discovery.

What counts as a run follows the BIDS specification's datatypes and suffixes:
``bold``/``cbv`` (func), ``asl`` (perf) and ``dwi`` are time series; ``sbref``
is a single reference volume; ``anat`` and ``fmap`` hold no time series.
"""

from __future__ import annotations

import os
import sys
from pathlib import Path

import pytest

from slicetime.model import Finding
from slicetime.readers import ReadError, find_root, iter_runs

sys.path.insert(0, str(Path(__file__).parent))
from helpers_bids import symlink, write_description, write_json, write_run

SMALL = (2, 2, 3, 2)


def rel(root: Path, runs: list[tuple[Path, Path]]) -> list[tuple[str, str]]:
    return [(r.relative_to(root).as_posix() or ".", f.relative_to(r).as_posix()) for r, f in runs]


def test_find_root(tmp_path: Path) -> None:
    ds = tmp_path / "ds"
    write_description(ds)
    run = write_run(ds, "sub-01/ses-1/func/sub-01_ses-1_task-x_bold.nii.gz", SMALL)
    # BIDS specification: dataset_description.json sits at the dataset root
    assert find_root(run) == ds
    assert find_root(ds / "sub-01") == ds and find_root(ds) == ds
    bare = tmp_path / "bare"
    run2 = write_run(bare, "sub-07/ses-1/func/sub-07_ses-1_task-x_bold.nii", SMALL)
    # without a description: the folder above the topmost sub-* folder (common practice)
    assert find_root(run2) == bare and find_root(bare / "sub-07" / "ses-1") == bare
    loose = write_run(tmp_path / "loose", "scan.nii", SMALL)
    assert find_root(loose) == tmp_path / "loose" and find_root(loose.parent) == loose.parent
    derived = tmp_path / "ds" / "derivatives" / "pipe"
    write_description(derived, DatasetType="derivative")
    out = write_run(derived, "sub-01/func/sub-01_task-x_desc-x_bold.nii.gz", SMALL)
    assert find_root(out) == derived  # a derivative dataset is its own root


@pytest.fixture
def tree(tmp_path: Path) -> Path:
    ds = tmp_path / "ds"
    write_description(ds)
    write_json(ds / "task-x_bold.json", {"RepetitionTime": 2.0})
    write_run(ds, "sub-01/func/sub-01_task-x_run-1_bold.nii.gz", SMALL)
    write_run(ds, "sub-01/func/sub-01_task-x_run-2_bold.nii", SMALL)
    write_run(
        ds, "sub-01/func/sub-01_task-x_sbref.nii.gz", SMALL[:3], sidecar={"SliceTiming": [0, 1, 2]}
    )
    write_run(ds, "sub-01/func/sub-01_task-x_cbv.nii.gz", SMALL)
    (ds / "sub-01/func/sub-01_task-x_events.tsv").write_text("onset\tduration\n")
    write_run(ds, "sub-01/anat/sub-01_T2w.nii.gz", SMALL[:3], sidecar={"SliceTiming": [0, 1]})
    write_run(ds, "sub-01/fmap/sub-01_epi.nii.gz", SMALL, sidecar={"SliceTiming": [0, 1]})
    write_run(ds, "sub-01/perf/sub-01_asl.nii.gz", SMALL)
    write_run(ds, "sub-01/dwi/sub-01_dwi.nii.gz", SMALL)
    write_run(ds, "sub-02/ses-1/func/sub-02_ses-1_task-x_echo-1_bold.nii.gz", SMALL)
    write_run(ds, "sub-02/ses-1/func/sub-02_ses-1_task-x_echo-2_bold.nii.gz", SMALL)
    write_run(ds, "sub-02/extra/sub-02_task-x_custom.nii", SMALL, sidecar={"SliceTiming": [0]})
    write_run(ds, "sub-02/extra/sub-02_task-x_other.nii", SMALL, sidecar={"EchoTime": 0.03})
    write_run(ds, "derivatives/pipe/sub-01/func/sub-01_task-x_desc-y_bold.nii.gz", SMALL)
    write_run(ds, "sourcedata/sub-01/func/sub-01_task-x_bold.nii.gz", SMALL)
    write_run(ds, "code/sub-01_task-x_bold.nii.gz", SMALL)
    write_run(ds, ".hidden/sub-01_task-x_bold.nii.gz", SMALL)
    write_run(ds, "sub-01/func/._sub-01_task-x_run-1_bold.nii.gz", SMALL)
    (ds / "sub-03/func/sub-03_task-x_bold.nii.gz").mkdir(parents=True)  # a folder named as a run
    symlink(ds / "sub-01/func/loop", "..")  # folder link back up: a traversal loop
    symlink(ds / "sub-04/func/sub-04_task-x_bold.nii.gz", "sub-04_task-x_bold.nii.gz")  # self loop
    symlink(ds / "sub-05/func/sub-05_task-x_bold.nii.gz", "../../.git/annex/objects/A/B/K/K")
    return ds


EXPECTED = [
    "sub-01/dwi/sub-01_dwi.nii.gz",
    "sub-01/func/sub-01_task-x_cbv.nii.gz",
    "sub-01/func/sub-01_task-x_run-1_bold.nii.gz",
    "sub-01/func/sub-01_task-x_run-2_bold.nii",
    "sub-01/perf/sub-01_asl.nii.gz",
    "sub-02/extra/sub-02_task-x_custom.nii",  # its own sidecar has SliceTiming
    "sub-02/ses-1/func/sub-02_ses-1_task-x_echo-1_bold.nii.gz",
    "sub-02/ses-1/func/sub-02_ses-1_task-x_echo-2_bold.nii.gz",
    # named like runs but unreadable: yielded so that reading reports them
    "sub-03/func/sub-03_task-x_bold.nii.gz",
    "sub-04/func/sub-04_task-x_bold.nii.gz",
    "sub-05/func/sub-05_task-x_bold.nii.gz",
]


def test_iter_runs_finds_the_runs_in_order(tree: Path) -> None:
    runs = list(iter_runs([tree]))
    assert rel(tree, runs) == [(".", p) for p in EXPECTED]
    assert all(root == tree and f.is_absolute() for root, f in runs)


def test_iter_runs_from_a_subject_folder_and_duplicates(tree: Path) -> None:
    runs = list(iter_runs([tree / "sub-02", tree, tree / "sub-02"]))
    assert rel(tree, runs) == [(".", p) for p in EXPECTED]  # each run once, sorted
    sub = list(iter_runs([tree / "sub-02"]))
    assert rel(tree, sub) == [(".", p) for p in EXPECTED if p.startswith("sub-02/")]


def test_include_flags(tree: Path) -> None:
    runs = rel(tree, list(iter_runs([tree], include_derivatives=True)))
    assert ("derivatives/pipe", "sub-01/func/sub-01_task-x_desc-y_bold.nii.gz") not in runs
    assert (".", "derivatives/pipe/sub-01/func/sub-01_task-x_desc-y_bold.nii.gz") in runs
    assert len(runs) == len(EXPECTED) + 1
    runs = rel(tree, list(iter_runs([tree], include_sourcedata=True)))
    assert (".", "sourcedata/sub-01/func/sub-01_task-x_bold.nii.gz") in runs
    assert (".", "code/sub-01_task-x_bold.nii.gz") in runs
    runs = rel(tree, list(iter_runs([tree], include_hidden=True)))
    assert (".", ".hidden/sub-01_task-x_bold.nii.gz") in runs
    assert (".", "sub-01/func/._sub-01_task-x_run-1_bold.nii.gz") not in runs  # no BIDS name


def test_derivative_dataset_has_its_own_root(tree: Path) -> None:
    write_description(tree / "derivatives" / "pipe", DatasetType="derivative")
    runs = list(iter_runs([tree], include_derivatives=True))
    assert (
        tree / "derivatives" / "pipe",
        tree / "derivatives/pipe/sub-01/func/sub-01_task-x_desc-y_bold.nii.gz",
    ) in runs


def test_a_file_is_yielded_as_given(tree: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    odd = write_run(tree, "sub-01/anat/some scan.nii", SMALL)
    assert list(iter_runs([odd])) == [(tree, odd)]
    monkeypatch.chdir(tree)
    assert list(iter_runs([Path("sub-01/anat/some scan.nii")])) == [(tree, odd)]


def test_missing_paths_raise(tree: Path) -> None:
    with pytest.raises(ReadError) as err:
        list(iter_runs([tree / "nope"]))
    assert err.value.code == "file/missing"
    # an annexed run whose content is absent is yielded: it is audited from its sidecars
    annexed = tree / "sub-05/func/sub-05_task-x_bold.nii.gz"
    assert list(iter_runs([annexed])) == [(tree, annexed)]


def test_unlistable_folder_is_reported(tree: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    real_scandir = os.scandir
    locked = str(tree / "sub-02")

    def refusing(path: os.PathLike[str] | str) -> object:
        if os.fspath(path) == locked:
            raise PermissionError(13, "Permission denied", locked)
        return real_scandir(path)

    monkeypatch.setattr(os, "scandir", refusing)
    seen: list[Finding] = []
    runs = rel(tree, list(iter_runs([tree], on_error=seen.append)))
    assert runs and all(not p.startswith("sub-02/") for _, p in runs)
    assert [f.code for f in seen] == ["file/unreadable"]
    assert "Permission denied" in seen[0].message


def test_folder_links(tree: Path, tmp_path: Path) -> None:
    storage = tmp_path / "storage" / "sub-06"
    write_run(storage, "func/sub-06_task-x_bold.nii.gz", SMALL)
    symlink(tree / "sub-06", storage)  # a subject kept elsewhere: reported, not followed
    symlink(tree / "sub-01/func/alias", "../../sub-02")  # an alias inside the tree: not followed
    seen: list[Finding] = []
    runs = rel(tree, list(iter_runs([tree], on_error=seen.append)))
    assert runs == [(".", p) for p in EXPECTED]
    assert [(f.code, f.file) for f in seen] == [("file/link-leaves-dataset",
                                                 str(tree / "sub-06"))]
    # given as a path of its own, the linked subject is walked, under its name in the tree
    runs = rel(tree, list(iter_runs([tree, tree / "sub-06"])))
    assert runs == [(".", p) for p in [*EXPECTED, "sub-06/func/sub-06_task-x_bold.nii.gz"]]


def test_an_sbref_is_not_a_run_found_or_given(tmp_path: Path) -> None:
    # BIDS specification ("Magnetic Resonance Imaging", task imaging data): sbref is the
    # single-band reference image of a run, one volume, not a time series
    from click.testing import CliRunner

    from slicetime.interfaces.cli import cli

    ds = tmp_path / "ds"
    write_description(ds)
    times = [0.25 * z for z in range(8)]
    write_run(ds, "sub-01/func/sub-01_task-x_bold.nii.gz", (4, 4, 8, 10), tr=2.0,
              sidecar={"TaskName": "x", "RepetitionTime": 2.0, "SliceTiming": times})
    sbref = write_run(ds, "sub-01/func/sub-01_task-x_sbref.nii.gz", (4, 4, 8, 1), tr=2.0,
                      sidecar={"TaskName": "x", "SliceTiming": times})
    assert rel(ds, list(iter_runs([ds]))) == [(".", "sub-01/func/sub-01_task-x_bold.nii.gz")]
    assert list(iter_runs([sbref])) == []  # given by name: the same judgement
    runner = CliRunner()
    for command in ("audit", "show"):
        result = runner.invoke(cli, [command, str(sbref)])
        assert result.exit_code == 2, (command, result.output)
        lines = result.stderr.strip().splitlines()
        assert len(lines) == 1 and "not a time series" in lines[0], (command, lines)
    result = runner.invoke(cli, ["correct", str(sbref), "--out", str(tmp_path / "out")])
    assert result.exit_code == 2 and "not a time series" in result.stderr
    # a name meant as a run but not valid BIDS is still audited (file/bad-run-name)
    write_run(ds, "sub-01/func/sub-01_task-x_sbref (copy).nii.gz", (4, 4, 8, 1), tr=2.0)
    assert "sub-01/func/sub-01_task-x_sbref (copy).nii.gz" in [
        r for _, r in rel(ds, list(iter_runs([ds])))]


def test_a_run_word_in_a_name_is_a_suffix_of_the_one_table() -> None:
    # the words that make a misnamed NIfTI "meant as a run" are exactly the suffixes of
    # the one table (time series, never-runs, companions), and each is a suffix the BIDS
    # schema defines (bidsschematools); every other schema suffix is no such word
    from bidsschematools import schema as bst

    from slicetime.readers import dataset
    from slicetime.readers.entities import (
        COMPANION_SUFFIXES,
        NOT_RUN_SUFFIXES,
        TIME_SERIES_SUFFIXES,
        looks_like_run,
    )

    assert dataset.TIME_SERIES_SUFFIXES is TIME_SERIES_SUFFIXES  # one table, re-exported
    table = TIME_SERIES_SUFFIXES | set(NOT_RUN_SUFFIXES) | COMPANION_SUFFIXES
    schema_suffixes = {v["value"] for v in bst.load_schema().objects.suffixes.values()}
    assert table <= schema_suffixes
    for suffix in sorted(schema_suffixes):
        name = f"sub-01_task-rest-{suffix} (copy).nii.gz"  # not a valid BIDS name
        assert looks_like_run(name, "anat") == (suffix in table), suffix
