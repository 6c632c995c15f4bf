"""BIDS names and the inheritance principle, checked against pybids and the BIDS specification."""

from __future__ import annotations

import sys
from pathlib import Path
from typing import Any

import bids
import pytest

from slicetime.model import Severity
from slicetime.readers import SidecarIndex, parse_name
from slicetime.readers import inheritance as inheritance_module

sys.path.insert(0, str(Path(__file__).parent))
from helpers_bids import symlink, write_description, write_run, write_sidecar

SMALL = (2, 2, 4, 3)
TIMES = [0.0, 0.5, 1.0, 1.5]

# --- names -----------------------------------------------------------------------------------

# pybids' long entity names for the short keys in file names (BIDS specification entity table)
LONG = {
    "sub": "subject",
    "ses": "session",
    "task": "task",
    "acq": "acquisition",
    "ce": "ceagent",
    "rec": "reconstruction",
    "dir": "direction",
    "run": "run",
    "echo": "echo",
    "part": "part",
}


@pytest.mark.parametrize(
    "relpath",
    [
        "sub-01/ses-2/func/sub-01_ses-2_task-rest_acq-mb_ce-x_rec-y_dir-AP_run-1_echo-2_part-mag_bold.nii.gz",
        "sub-01/func/sub-01_task-nback_run-3_bold.json",
        "sub-01/perf/sub-01_asl.nii",
        "sub-01/dwi/sub-01_acq-b1000_dwi.nii.gz",
    ],
)
def test_parse_name_agrees_with_pybids(relpath: str) -> None:
    parsed = parse_name(Path(relpath).name)
    assert parsed is not None
    ref = bids.layout.parse_file_entities("/" + relpath)  # source: pybids
    assert parsed.suffix == ref["suffix"]
    assert parsed.extension == ref["extension"]
    expected = {k: str(v) for k, v in ref.items() if k not in ("suffix", "extension", "datatype")}
    assert {LONG[k]: v for k, v in parsed.entities.items()} == expected
    assert parsed.name == Path(relpath).name


def test_parse_name_forms() -> None:
    # BIDS specification (file naming): key-value pairs, suffix, extension from the first dot
    top = parse_name("task-rest_bold.json")
    assert top is not None and dict(top.entities) == {"task": "rest"} and top.suffix == "bold"
    bare = parse_name("bold.json")
    assert bare is not None and dict(bare.entities) == {} and bare.extension == ".json"
    ordered = parse_name("sub-01_ses-1_task-a_bold.nii.gz")
    assert ordered is not None and list(ordered.entities) == ["sub", "ses", "task"]
    for bad in [
        "sub-01_sub-02_bold.nii",
        ".sub-01_bold.json",
        "sub_01_bold.nii",
        "sub-01__bold",
        "sub-01_task-a-b_bold.nii",
        "sub-01_bold-x.nii",
        "",
    ]:
        assert parse_name(bad) is None, bad


# --- pybids cross-check on an unambiguous layout ----------------------------------------------


def unambiguous_layout(root: Path) -> list[Path]:
    write_description(root)
    write_sidecar(
        root,
        "task-rest_bold.json",
        {
            "TaskName": "rest",
            "RepetitionTime": 2.0,
            "SliceTiming": TIMES,
            "MultibandAccelerationFactor": 1,
        },
    )
    write_sidecar(root, "task-nback_bold.json", {"TaskName": "nback", "RepetitionTime": 1.0})
    write_sidecar(root, "sub-01/sub-01_task-rest_bold.json", {"RepetitionTime": 2.5})
    write_sidecar(
        root, "sub-01/ses-1/sub-01_ses-1_task-rest_bold.json", {"SliceEncodingDirection": "k-"}
    )
    write_sidecar(
        root,
        "sub-02/sub-02_task-rest_acq-mb_bold.json",
        {"MultibandAccelerationFactor": 2, "SliceTiming": [0.0, 1.0, 0.0, 1.0]},
    )
    runs = [
        write_run(
            root,
            "sub-01/ses-1/func/sub-01_ses-1_task-rest_run-1_bold.nii.gz",
            SMALL,
            sidecar={"DelayTime": 0.1},
        ),
        write_run(root, "sub-01/ses-1/func/sub-01_ses-1_task-rest_run-2_bold.nii.gz", SMALL),
        write_run(root, "sub-01/ses-2/func/sub-01_ses-2_task-rest_bold.nii.gz", SMALL),
        write_run(root, "sub-02/func/sub-02_task-rest_acq-mb_bold.nii.gz", SMALL),
        write_run(root, "sub-02/func/sub-02_task-rest_bold.nii.gz", SMALL),
        write_run(
            root,
            "sub-03/func/sub-03_task-rest_echo-1_bold.nii.gz",
            SMALL,
            sidecar={"EchoTime": 0.015},
        ),
        write_run(
            root,
            "sub-03/func/sub-03_task-rest_echo-2_bold.nii.gz",
            SMALL,
            sidecar={"EchoTime": 0.035},
        ),
        write_run(
            root,
            "sub-03/func/sub-03_task-rest_part-mag_bold.nii.gz",
            SMALL,
            sidecar={"EchoTime": 0.03},
        ),
        write_run(
            root,
            "sub-03/func/sub-03_task-rest_part-phase_bold.nii.gz",
            SMALL,
            sidecar={"EchoTime": 0.03, "Units": "rad"},
        ),
        write_run(
            root,
            "sub-03/func/sub-03_task-nback_bold.nii.gz",
            SMALL,
            sidecar={"SliceTiming": [0.0, 0.25, 0.5, 0.75]},
        ),
    ]
    write_run(
        root, "sub-01/anat/sub-01_T1w.nii.gz", (2, 2, 2), tr=None, sidecar={"RepetitionTime": 2.3}
    )
    return runs


@pytest.fixture(scope="module")
def layout_a(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, list[Path], Any]:
    root = tmp_path_factory.mktemp("layout_a")
    runs = unambiguous_layout(root)
    return root, runs, bids.BIDSLayout(root, validate=False)


def test_metadata_equals_pybids(layout_a: tuple[Path, list[Path], Any]) -> None:
    root, runs, layout = layout_a
    index = SidecarIndex(root)
    for run in runs:
        ours = index.resolve(run, root)
        assert ours.findings == (), run
        assert ours.metadata == layout.get_metadata(str(run)), run  # source: pybids get_metadata


def test_sources_and_chain_follow_the_principle(layout_a: tuple[Path, list[Path], Any]) -> None:
    root, runs, _ = layout_a
    res = SidecarIndex(root).resolve(runs[0], root)
    # BIDS specification, inheritance principle: top-down, the deepest file wins
    assert res.chain == (
        "task-rest_bold.json",
        "sub-01/sub-01_task-rest_bold.json",
        "sub-01/ses-1/sub-01_ses-1_task-rest_bold.json",
        "sub-01/ses-1/func/sub-01_ses-1_task-rest_run-1_bold.json",
    )
    assert res.sources == {
        "TaskName": "task-rest_bold.json",
        "SliceTiming": "task-rest_bold.json",
        "MultibandAccelerationFactor": "task-rest_bold.json",
        "RepetitionTime": "sub-01/sub-01_task-rest_bold.json",
        "SliceEncodingDirection": "sub-01/ses-1/sub-01_ses-1_task-rest_bold.json",
        "DelayTime": "sub-01/ses-1/func/sub-01_ses-1_task-rest_run-1_bold.json",
    }
    assert res.name is not None and res.name.entities["run"] == "1"


def test_pybids_on_a_second_layout(tmp_path: Path) -> None:
    # nested objects are replaced whole, deeper level wins; anat suffix has its own chain
    root = tmp_path / "ds"
    write_description(root)
    write_sidecar(root, "bold.json", {"RepetitionTime": 3.0, "Extra": {"a": 1, "b": 2}})
    write_sidecar(root, "sub-01/func/sub-01_bold.json", {"Extra": {"a": 5}})
    runs = [
        write_run(root, "sub-01/func/sub-01_task-a_bold.nii.gz", SMALL),
        write_run(
            root,
            "sub-01/func/sub-01_task-b_run-01_bold.nii",
            SMALL,
            sidecar={"RepetitionTime": 1.25},
        ),
        write_run(root, "sub-02/func/sub-02_task-a_bold.nii.gz", SMALL),
    ]
    layout = bids.BIDSLayout(root, validate=False)
    index = SidecarIndex(root)
    for run in runs:
        assert index.resolve(run).metadata == layout.get_metadata(str(run))  # source: pybids


# --- ambiguity -------------------------------------------------------------------------------


def test_ambiguous_but_agreeing_is_a_warning(tmp_path: Path) -> None:
    write_sidecar(tmp_path, "task-rest_bold.json", {"RepetitionTime": 2.0, "Manufacturer": "a"})
    write_sidecar(
        tmp_path, "task-rest_run-1_bold.json", {"RepetitionTime": 2.0, "Manufacturer": "b"}
    )
    run1 = write_run(tmp_path, "sub-01/func/sub-01_task-rest_run-1_bold.nii.gz", SMALL)
    run2 = write_run(tmp_path, "sub-01/func/sub-01_task-rest_run-2_bold.nii.gz", SMALL)
    index = SidecarIndex(tmp_path)
    res = index.resolve(run1, tmp_path)
    # BIDS specification: at most one applicable sidecar per folder level
    (f,) = res.findings
    assert (f.code, f.severity) == ("inherit/ambiguous", Severity.WARNING)
    assert "task-rest_bold.json" in f.message and "task-rest_run-1_bold.json" in f.message
    assert "Manufacturer" in f.message
    # slicetime's documented tie rule (no external source): more entities merge last
    assert res.metadata["Manufacturer"] == "b"
    assert res.levels[0] == ("task-rest_bold.json", "task-rest_run-1_bold.json")
    assert index.resolve(run2, tmp_path).findings == ()  # only one file applies to run 2


def test_ambiguous_and_disagreeing_is_an_error(tmp_path: Path) -> None:
    write_sidecar(tmp_path, "sub-01/func/sub-01_task-rest_bold.json", {"SliceTiming": TIMES})
    run = write_run(
        tmp_path,
        "sub-01/func/sub-01_task-rest_run-1_bold.nii.gz",
        SMALL,
        sidecar={"SliceTiming": TIMES[::-1], "RepetitionTime": 2.0},
    )
    res = SidecarIndex(tmp_path).resolve(run, tmp_path)
    (f,) = res.findings
    assert (f.code, f.severity, f.field) == ("inherit/ambiguous", Severity.ERROR, "SliceTiming")
    assert "sub-01/func/sub-01_task-rest_bold.json" in f.message
    assert "sub-01/func/sub-01_task-rest_run-1_bold.json" in f.message
    assert res.metadata["SliceTiming"] == TIMES[::-1]  # the data file's own sidecar is deepest
    assert res.sources["SliceTiming"] == "sub-01/func/sub-01_task-rest_run-1_bold.json"


def test_other_suffix_and_other_values_do_not_apply(tmp_path: Path) -> None:
    # BIDS specification: same suffix and an entity subset with equal values
    write_sidecar(tmp_path, "task-rest_sbref.json", {"RepetitionTime": 9.0})
    write_sidecar(tmp_path, "task-other_bold.json", {"RepetitionTime": 8.0})
    write_sidecar(tmp_path, "task-rest_echo-2_bold.json", {"EchoTime": 0.03})
    write_sidecar(tmp_path, "task-rest_bold.json.bak", {"RepetitionTime": 7.0})
    run = write_run(tmp_path, "sub-01/func/sub-01_task-rest_echo-1_bold.nii.gz", SMALL)
    res = SidecarIndex(tmp_path).resolve(run, tmp_path)
    assert res.metadata == {} and res.chain == () and res.findings == ()


# --- caching, problems, odd cases ------------------------------------------------------------


def test_top_level_sidecar_is_parsed_once(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    write_sidecar(tmp_path, "task-rest_bold.json", {"RepetitionTime": 2.0})
    runs = [
        write_run(
            tmp_path,
            f"sub-{i:02d}/func/sub-{i:02d}_task-rest_bold.nii.gz",
            SMALL,
            sidecar={"SliceTiming": TIMES},
        )
        for i in range(1, 13)
    ]
    calls: list[str] = []
    real = inheritance_module.load_sidecar
    real_read = inheritance_module.read_sidecar_bytes

    def counting(path: Any, display: Any = None, **kwargs: Any) -> Any:
        calls.append(str(path))
        return real(path, display, **kwargs)

    def counting_read(path: Any, display: Any, **kwargs: Any) -> Any:
        calls.append(str(path))
        return real_read(path, display, **kwargs)

    monkeypatch.setattr(inheritance_module, "load_sidecar", counting)
    monkeypatch.setattr(inheritance_module, "read_sidecar_bytes", counting_read)
    index = SidecarIndex(tmp_path)
    for run in runs:
        res = index.resolve(run, tmp_path)
        assert res.metadata == {"RepetitionTime": 2.0, "SliceTiming": TIMES}
    assert calls.count(str(tmp_path / "task-rest_bold.json")) == 1
    assert len(calls) == 1 + len(runs)  # every run's own sidecar is read
    # the twelve own sidecars hold the same bytes: parsed once, shared (SidecarStore.parsed)
    assert index.parse_count == 2


def test_metadata_is_a_fresh_dict_of_shared_frozen_values(tmp_path: Path) -> None:
    write_sidecar(tmp_path, "task-rest_bold.json", {"SliceTiming": TIMES})
    run = write_run(tmp_path, "sub-01/func/sub-01_task-rest_bold.nii.gz", SMALL)
    index = SidecarIndex(tmp_path)
    first = index.resolve(run).metadata
    first["RepetitionTime"] = 3.0  # the top level is the run's own dict
    del first["SliceTiming"]
    with pytest.raises(TypeError):
        index.resolve(run).metadata["SliceTiming"].append(99.0)  # shared: refuses changes
    again = index.resolve(run).metadata
    assert again == {"SliceTiming": TIMES}
    assert again["SliceTiming"] is index.resolve(run).metadata["SliceTiming"]


def test_broken_top_level_sidecar_is_attributed(tmp_path: Path) -> None:
    write_sidecar(tmp_path, "task-rest_bold.json", raw='{"RepetitionTime": 2.0,}')
    run = write_run(
        tmp_path, "sub-01/func/sub-01_task-rest_bold.nii.gz", SMALL, sidecar={"SliceTiming": TIMES}
    )
    res = SidecarIndex(tmp_path).resolve(run, tmp_path)
    (f,) = res.findings
    assert (f.code, f.file) == ("sidecar/bad-json", "task-rest_bold.json")
    assert res.metadata == {"SliceTiming": TIMES}
    assert res.chain[0] == "task-rest_bold.json"


def test_wrong_type_is_attributed_to_the_supplier(tmp_path: Path) -> None:
    write_sidecar(tmp_path, "task-rest_bold.json", {"RepetitionTime": "2", "SliceTiming": "x"})
    run = write_run(
        tmp_path, "sub-01/func/sub-01_task-rest_bold.nii.gz", SMALL, sidecar={"RepetitionTime": 2.0}
    )
    res = SidecarIndex(tmp_path).resolve(run, tmp_path)
    # the overridden bad RepetitionTime does not reach this run; the bad SliceTiming does
    assert [(f.code, f.field, f.file) for f in res.findings] == [
        ("sidecar/wrong-type", "SliceTiming", "task-rest_bold.json")
    ]
    assert SidecarIndex(tmp_path, check_field_types=False).resolve(run).findings == ()


def test_annexed_sidecar_without_content(tmp_path: Path) -> None:
    symlink(tmp_path / "task-rest_bold.json", ".git/annex/objects/Aa/Bb/KEY/KEY.json")
    run = write_run(tmp_path, "sub-01/func/sub-01_task-rest_bold.nii.gz", SMALL)
    res = SidecarIndex(tmp_path).resolve(run, tmp_path)
    assert [(f.code, f.file) for f in res.findings] == [("file/no-content", "task-rest_bold.json")]
    assert res.chain == ("task-rest_bold.json",)


def test_unusual_data_name_uses_its_own_sidecar_only(tmp_path: Path) -> None:
    write_sidecar(tmp_path, "bold.json", {"RepetitionTime": 3.0})
    run = write_run(tmp_path, "odd name.nii.gz", SMALL, sidecar={"RepetitionTime": 1.0})
    res = SidecarIndex(tmp_path).resolve(run, tmp_path)
    assert res.metadata == {"RepetitionTime": 1.0} and res.chain == ("odd name.json",)
    assert res.name is None


def test_data_file_outside_root(tmp_path: Path) -> None:
    write_sidecar(tmp_path / "ds", "task-rest_bold.json", {"RepetitionTime": 3.0})
    run = write_run(
        tmp_path / "elsewhere", "sub-01_task-rest_bold.nii", SMALL, sidecar={"EchoTime": 0.03}
    )
    res = SidecarIndex(tmp_path / "ds").resolve(run)
    assert res.metadata == {"EchoTime": 0.03}
    assert res.chain == ((tmp_path / "elsewhere" / "sub-01_task-rest_bold.json").as_posix(),)
