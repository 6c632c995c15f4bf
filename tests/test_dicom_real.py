"""The DICOM reader on what scanners really write (issue 27).

Outside references:
- the real DICOM files nibabel ships with its tests (found through the installed
  package, read in place): nibabel's own wrappers (``nibabel.nicom.dicomwrappers``)
  say which of them is a mosaic (``MosaicWrapper``), an enhanced multi-frame file
  (``MultiframeWrapper``) or a single slice, and its private-header reader
  (``nibabel.nicom.csareader``) gives the mosaic's tile times;
- pydicom's own test files (``pydicom.data.get_testdata_file``, shipped in the
  package, never downloaded) and pydicom's reading of the files built here;
- DICOM PS3.3: SeriesInstanceUID (C.7.3.1 General Series), AcquisitionTime and
  ImagePositionPatient/ImageOrientationPatient (C.7.6.2, C.8.3.1), the
  per-frame functional groups (C.7.6.16); PS3.10 (the file format: preamble,
  ``DICM``, the data set; files may travel compressed or in archives);
- the BIDS specification: ``sourcedata/`` holds the data before conversion, in
  any form (archives included).
"""

from __future__ import annotations

import gzip
import io
import json
import os
import shutil
import tarfile
import warnings
import zipfile
from pathlib import Path
from typing import Any

import nibabel as nib
import numpy as np
import pydicom
import pytest
from click.testing import CliRunner
from pydicom.data import get_testdata_file
from pydicom.uid import generate_uid

from slicetime.interfaces.cli import cli
from slicetime.pipelines.audit import audit_paths
from slicetime.readers import dicom_files
from slicetime.readers.dicom import read_all_series, read_series
from slicetime.readers.errors import ReadError
from tests.test_dicom_source import (
    RESTING,
    classic_affine,
    classic_series,
    codes,
    csa2,
    dataset,
    sidecar,
    write_nifti,
)

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from nibabel.nicom import dicomwrappers
    from nibabel.nicom.csareader import get_csa_header

NIB = Path(nib.__file__).parent
NIB_DICOM = sorted([*(NIB / "nicom" / "tests" / "data").glob("*.dcm*"),
                    *(NIB / "tests" / "data").glob("*.dcm")])

pytestmark = pytest.mark.skipif(not NIB_DICOM, reason="nibabel's DICOM test data absent")


def _dataset_of(path: Path) -> Any:
    """pydicom's reading of a (possibly gzip-compressed) file, for the reference side."""
    raw = gzip.open(path).read() if path.name.endswith(".gz") else path.read_bytes()
    return pydicom.dcmread(io.BytesIO(raw), stop_before_pixels=True)


def _wrapper_kind(ds: Any) -> str:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        wrapper = dicomwrappers.wrapper_from_data(ds)
    if isinstance(wrapper, dicomwrappers.MosaicWrapper):
        return "mosaic"
    if isinstance(wrapper, dicomwrappers.MultiframeWrapper):
        return "enhanced"
    return "classic"


# ids by position: some of nibabel's file names name their makers, which this project never does
@pytest.mark.parametrize("path", NIB_DICOM, ids=[f"nibabel-{n}" for n in range(len(NIB_DICOM))])
def test_every_dicom_file_nibabel_ships_is_read_as_what_it_holds(path: Path) -> None:
    ds = _dataset_of(path)
    series = read_series(str(path), path.name)
    assert series.layout == _wrapper_kind(ds)  # nibabel's dicomwrappers
    if series.layout == "mosaic":
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            tags = get_csa_header(ds, "image")["tags"]  # nibabel's private-header reader
        assert series.times == pytest.approx([t / 1000 for t in
                                              tags["MosaicRefAcqTimes"]["items"]])
        assert series.n_slices == tags["NumberOfImagesInMosaic"]["items"][0]
    else:
        # single images and a one-volume 3-D acquisition: no per-slice times, no error
        assert series.times is None and series.notes
    shown = CliRunner().invoke(cli, ["show", str(path)])
    assert shown.exit_code == 0, shown.output
    if series.times is None:
        assert len(shown.output.strip().splitlines()) == 1
        assert "holds no per-slice times" in shown.output
    from slicetime.readers.shipped_schemas import document_problem

    as_json = CliRunner().invoke(cli, ["show", str(path), "--format", "json"])
    assert document_problem("show", json.loads(as_json.output)) is None  # the contract


def test_enhanced_file_in_gzip_is_read_up_to_its_pixel_data(monkeypatch: Any) -> None:
    path = next(p for p in NIB_DICOM if p.name.endswith(".gz")
                and _wrapper_kind(_dataset_of(p)) == "enhanced")
    ds = _dataset_of(path)
    series = read_series(str(path), path.name)
    # the frames of the first temporal position (PS3.3 C.7.6.16), as pydicom reads them
    frames = [f for f in ds.PerFrameFunctionalGroupsSequence
              if f.FrameContentSequence[0].TemporalPositionIndex == 1]
    assert series.n_slices == len(frames)
    pixel_at = gzip.open(path).read().find(b"\xe0\x7f\x10\x00")  # (7FE0,0010), PS3.5
    assert 0 < pixel_at < dicom_files.MAX_HEADER_BYTES
    # a header longer than the bound is refused with one line, not read on and on
    monkeypatch.setattr(dicom_files, "MAX_HEADER_BYTES", pixel_at // 4)
    with pytest.raises(ReadError, match="too large"):
        read_series(str(path), path.name)


@pytest.mark.parametrize("name", ["MR_small.dcm", "MR_small_bigendian.dcm",
                                  "MR_small_implicit.dcm", "zipMR.gz"])
def test_pydicoms_own_files_plain_and_compressed(tmp_path: Path, name: str) -> None:
    source = get_testdata_file(name, download=False)
    assert source is not None
    path = Path(str(source))
    raw = gzip.open(path).read() if name.endswith(".gz") else path.read_bytes()
    ds = pydicom.dcmread(io.BytesIO(raw), stop_before_pixels=True)
    packed = tmp_path / "image.dcm.gz"
    packed.write_bytes(gzip.compress(raw))
    for candidate in (path, packed):
        series = read_series(str(candidate), candidate.name)
        assert series.layout == "classic" and series.times is None
        assert series.series_number == int(ds.SeriesNumber)  # pydicom
        assert series.rows == ds.Rows and series.columns == ds.Columns
        normal = np.cross([float(v) for v in ds.ImageOrientationPatient[:3]],
                          [float(v) for v in ds.ImageOrientationPatient[3:]])
        assert series.positions[0] == pytest.approx(
            float(np.dot([float(v) for v in ds.ImagePositionPatient], normal)))


def test_a_dicom_object_that_is_no_image_is_named_by_its_sop_class() -> None:
    # pydicom's rtplan.dcm is an RT plan, no image: DICOM PS3.3 C.7.6.3 makes Rows
    # (Image Pixel module) type 1 for every image; the SOP class name and Modality
    # are pydicom's reading of the file, not invented
    source = get_testdata_file("rtplan.dcm", download=False)
    assert source is not None
    ds = pydicom.dcmread(str(source), stop_before_pixels=True)
    assert "Rows" not in ds
    result = CliRunner().invoke(cli, ["show", str(source)])
    lines = result.stderr.strip().splitlines()
    assert result.exit_code == 2 and result.stdout == "" and len(lines) == 1, result.stderr
    assert "not an image series" in lines[0] and "ImagePositionPatient" not in lines[0]
    assert f"SOP class {ds.SOPClassUID.name}" in lines[0]
    assert f"Modality {ds.Modality}" in lines[0]


@pytest.mark.parametrize("meta", [True, False])
def test_a_bare_non_image_data_set_is_told_apart_from_a_file_that_is_no_dicom(
        tmp_path: Path, meta: bool) -> None:
    # pydicom writes rtplan.dcm without the PS3.10 preamble and DICM (enforce_file_format
    # False; with and without its file meta): still DICOM, pydicom reads it forced, and it
    # is no image (no Rows, PS3.3 C.7.6.3), so it gets the line a marked RT plan gets
    source = get_testdata_file("rtplan.dcm", download=False)
    assert source is not None
    ds = pydicom.dcmread(str(source))
    folder = tmp_path / "sourcedata" / "plan"
    folder.mkdir(parents=True)
    bare = folder / "plan.dcm"
    ds.preamble = None
    if meta:
        ds.save_as(bare, enforce_file_format=False)
    else:
        del ds.file_meta
        ds.save_as(bare, implicit_vr=True, little_endian=True, enforce_file_format=False)
    head = bare.read_bytes()[:132]
    assert head[128:132] != b"DICM"  # PS3.10 7.1: no marker
    with pytest.raises(pydicom.errors.InvalidDicomError):
        pydicom.dcmread(bare)  # pydicom itself wants force for it
    read = pydicom.dcmread(bare, force=True)
    result = CliRunner().invoke(cli, ["show", str(bare)])
    line = result.stderr.strip()
    assert result.exit_code == 2 and "not a DICOM file" not in line, line
    assert "not an image series" in line and f"SOP class {read.SOPClassUID.name}" in line
    # bytes that are no DICOM still get the reader's "not a DICOM file"
    junk = folder / "junk.dcm"
    junk.write_bytes(b"no data set here, only text\n" * 20)
    result = CliRunner().invoke(cli, ["show", str(junk)])
    assert result.exit_code == 2 and "not a DICOM file" in result.stderr


def test_a_bare_image_data_set_is_read_as_pydicom_reads_it(tmp_path: Path) -> None:
    # pydicom's MR_small.dcm written without preamble and DICM: read as pydicom reads it
    # forced (rows, columns, position along the normal)
    source = get_testdata_file("MR_small.dcm", download=False)
    assert source is not None
    ds = pydicom.dcmread(str(source))
    ds.preamble = None
    bare = tmp_path / "mr.dcm"
    ds.save_as(bare, enforce_file_format=False)
    read = pydicom.dcmread(bare, force=True, stop_before_pixels=True)
    series = read_series(str(bare), bare.name)
    assert (series.rows, series.columns) == (read.Rows, read.Columns)
    normal = np.cross([float(v) for v in read.ImageOrientationPatient[:3]],
                      [float(v) for v in read.ImageOrientationPatient[3:]])
    assert series.positions[0] == pytest.approx(
        float(np.dot([float(v) for v in read.ImagePositionPatient], normal)))


def test_truncated_files_header_read_or_one_line_exit_2(tmp_path: Path) -> None:
    # pydicom's MR_truncated.dcm is cut inside its pixel data: the header is whole, and a
    # header-only reader reads it as pydicom does (stop_before_pixels)
    path = get_testdata_file("MR_truncated.dcm", download=False)
    assert path is not None
    ds = pydicom.dcmread(str(path), stop_before_pixels=True)
    shown = CliRunner().invoke(cli, ["show", str(path)])
    assert shown.exit_code == 0 and len(shown.output.strip().splitlines()) == 1
    series = read_series(str(path), "mr")
    assert series.rows == ds.Rows and series.positions[0] == pytest.approx(
        float(ds.ImagePositionPatient[2]))  # axial: the normal is +z (PS3.3 C.7.6.2)
    # cut inside the header (PS3.10: preamble, DICM, meta, data set) and compressed:
    # one line, exit 2, never a traceback
    small = get_testdata_file("MR_small.dcm", download=False)
    assert small is not None
    cut = tmp_path / "cut.dcm.gz"
    cut.write_bytes(gzip.compress(Path(str(small)).read_bytes()[:400]))
    broken = CliRunner().invoke(cli, ["show", str(cut)])
    assert broken.exit_code == 2 and "Traceback" not in broken.output
    assert len(broken.output.strip().splitlines()) == 1 and "cut.dcm.gz" in broken.output


# --------------------------------------------------------------------------- built with pydicom


def _localizer(folder: Path, series_number: int = 2) -> None:
    """A 3-plane scout: a private image header whose mosaic keys are there but empty."""
    folder.mkdir(parents=True, exist_ok=True)
    base = pydicom.dcmread(RESTING)
    tag = next(t for t in base.keys() if t.group == 0x29 and t.element & 0xFF == 0x10
               and t.element >= 0x1000)
    uid = generate_uid()
    planes = [[1, 0, 0, 0, 1, 0], [1, 0, 0, 0, 0, -1], [0, 1, 0, 0, 0, -1]]
    for n, iop in enumerate(planes, start=1):
        ds = pydicom.dcmread(RESTING)
        ds[tag].value = csa2({"MosaicRefAcqTimes": ("FD", []),
                              "NumberOfImagesInMosaic": ("US", []),
                              "SliceNormalVector": ("FD", [])})
        ds.ImageType = ["ORIGINAL", "PRIMARY", "M", "NORM"]
        ds.SeriesInstanceUID = uid
        ds.SOPInstanceUID = generate_uid()
        ds.SeriesNumber = series_number
        ds.InstanceNumber = n
        ds.ImageOrientationPatient = iop
        ds.save_as(folder / f"{n}.dcm")


def test_private_keys_without_entries_are_no_mosaic(tmp_path: Path) -> None:
    folder = tmp_path / "scout"
    _localizer(folder)
    ds = pydicom.dcmread(folder / "1.dcm")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert get_csa_header(ds, "image")["tags"]["MosaicRefAcqTimes"]["items"] == []
    series = read_series(str(folder), "scout")
    assert series.layout == "classic" and series.times is None
    assert any("another plane" in note for note in series.notes)
    shown = CliRunner().invoke(cli, ["show", str(folder)])
    assert shown.exit_code == 0, shown.output
    assert len(shown.output.strip().splitlines()) == 1


def _classic_run(root: Path, invented: list[float], number: int = 5, volumes: int = 2) -> Path:
    run = root / "sub-01/func/sub-01_task-x_bold.nii.gz"
    write_nifti(run, classic_affine(), (20, 20, len(invented)), volumes, 2.0)
    sidecar(run, RepetitionTime=2.0, SeriesNumber=number, SliceTiming=[0.0] * len(invented))
    return run


INVENTED = [0.0, 1.0, 0.25, 1.25, 0.5, 1.5, 0.75, 1.75]  # structure only


def _expected_from_pydicom(paths: list[tuple[str, bytes]]) -> list[float]:
    """Times of the first volume by position, read with pydicom (AcquisitionTime TM)."""
    rows = []
    for _, raw in paths:
        ds = pydicom.dcmread(io.BytesIO(raw))
        if int(ds.AcquisitionNumber) == 1:
            tm = ds.AcquisitionTime
            seconds = int(tm[:2]) * 3600 + int(tm[2:4]) * 60 + float(tm[4:])
            rows.append((float(ds.ImagePositionPatient[2]), seconds))
    rows.sort()
    return [t - min(t for _, t in rows) for _, t in rows]


@pytest.mark.parametrize("kind", ["zip", "tar", "tar.gz", "dcm.gz"])
def test_classic_series_in_archives_and_gzip(tmp_path: Path, kind: str) -> None:
    root = dataset(tmp_path)
    loose = tmp_path / "loose"
    classic_series(loose, INVENTED)
    files = sorted(loose.iterdir())
    raw = [(f.name, f.read_bytes()) for f in files]
    target = root / "sourcedata/sub-01"
    target.mkdir(parents=True)
    if kind == "zip":
        with zipfile.ZipFile(target / "export.zip", "w") as archive:
            for name, data in raw:
                archive.writestr(f"s005/{name}", data)
    elif kind.startswith("tar"):
        mode = "w:gz" if kind == "tar.gz" else "w"
        with tarfile.open(target / f"export.{kind}", mode) as archive:
            for name, data in raw:
                info = tarfile.TarInfo(f"s005/{name}")
                info.size = len(data)
                archive.addfile(info, io.BytesIO(data))
    else:
        (target / "s005").mkdir()
        for name, data in raw:
            (target / "s005" / f"{name}.dcm.gz").write_bytes(gzip.compress(data))
    run = _classic_run(root, INVENTED)
    result = audit_paths([root])
    assert codes(result) == ["source/times-differ"]
    finding = next(f for f in result.runs[0].findings if f.code == "source/times-differ")
    expected = _expected_from_pydicom(raw)
    assert [t / 1000 for t in finding.evidence["source_ms"]] == pytest.approx(expected,
                                                                               abs=1e-6)
    if kind != "dcm.gz":
        shown = CliRunner().invoke(cli, ["show", str(next(target.iterdir())), "--format", "json"])
        assert shown.exit_code == 0, shown.output
        assert json.loads(shown.output)["layout"] == "classic"
    del run


def test_a_folder_mixing_two_series_is_said_so(tmp_path: Path) -> None:
    root = dataset(tmp_path)
    folder = root / "sourcedata/sub-01/all"
    classic_series(folder, INVENTED)
    other = tmp_path / "other"
    _localizer(other, series_number=9)
    for f in other.iterdir():
        shutil.copy(f, folder / f"zz{f.name}")
    found = read_all_series(str(folder), "all")
    assert len(found) == 2  # two SeriesInstanceUIDs (PS3.3 C.7.3.1), read with pydicom:
    assert len({pydicom.dcmread(f, stop_before_pixels=True).SeriesInstanceUID
                for f in folder.iterdir()}) == 2
    shown = CliRunner().invoke(cli, ["show", str(folder), "--format", "json"])
    assert shown.exit_code == 0 and len(json.loads(shown.output)) == 2
    from slicetime.readers.shipped_schemas import document_problem

    assert document_problem("show", json.loads(shown.output)) is None  # the shipped contract
    _classic_run(root, INVENTED)
    result = audit_paths([root])
    assert codes(result) == ["source/mixed-folder", "source/times-differ"]
    finding = next(f for f in result.runs[0].findings if f.code == "source/times-differ")
    assert "SeriesNumber 5" in finding.message
    mixed = next(f for f in result.runs[0].findings if f.code == "source/mixed-folder")
    assert "1 other series" in mixed.message
    series = read_all_series(str(folder), "all")[0]
    assert not isinstance(series, ReadError)
    assert any("mixes 2 series" in note for note in series.notes)


def test_shared_series_number_is_settled_by_geometry_and_volumes(tmp_path: Path) -> None:
    root = dataset(tmp_path)
    # two sessions kept side by side, both series number 5: other slab, other length
    classic_series(root / "sourcedata/sub-01/day1/005", INVENTED, volumes=2)
    classic_series(root / "sourcedata/sub-01/day2/005", INVENTED, volumes=3, z0=-60.0)
    for f in (root / "sourcedata/sub-01/day2/005").iterdir():
        ds = pydicom.dcmread(f)
        ds.SeriesInstanceUID = "1.2.3.5"  # another series (PS3.3 C.7.3.1)
        ds.save_as(f)
    _classic_run(root, INVENTED, volumes=2)
    result = audit_paths([root])
    assert codes(result) == ["source/times-differ"]
    finding = next(f for f in result.runs[0].findings if f.code == "source/times-differ")
    assert "day1/005" in finding.message


def test_no_times_is_said_only_for_the_matched_run(tmp_path: Path) -> None:
    root = dataset(tmp_path)
    _localizer(root / "sourcedata/sub-01/scout", series_number=2)
    classic_series(root / "sourcedata/sub-01/005", INVENTED)
    still = root / "sourcedata/sub-01/006"
    classic_series(still, INVENTED, series_number=6)
    for f in still.iterdir():  # one clock reading for every image: no per-slice times
        ds = pydicom.dcmread(f)
        ds.SeriesInstanceUID = "1.2.3.6"
        ds.AcquisitionTime = "100000.000000"
        ds.save_as(f)
    _classic_run(root, INVENTED)  # SeriesNumber 5, times recorded
    other = root / "sub-01/func/sub-01_task-y_bold.nii.gz"
    write_nifti(other, classic_affine(), (20, 20, len(INVENTED)), 2, 2.0)
    sidecar(other, RepetitionTime=2.0, SeriesNumber=6, SliceTiming=INVENTED)
    result = audit_paths([root])
    by_run = {r.record.path: [f for f in r.findings if f.code == "source/no-times"]
              for r in result.runs}
    assert by_run["sub-01/func/sub-01_task-x_bold.nii.gz"] == []
    lines = by_run["sub-01/func/sub-01_task-y_bold.nii.gz"]
    assert len(lines) == 1 and "source holds no slice times" in lines[0].message
    assert "006" in lines[0].message


def test_mosaic_in_a_zip_equals_the_plain_mosaic(tmp_path: Path) -> None:
    archive = tmp_path / "export.zip"
    with zipfile.ZipFile(archive, "w") as out:
        out.write(RESTING, "rest/001.dcm")
    plain = read_series(str(RESTING), "rest")
    packed = read_series(str(archive), "rest")
    assert packed.times == plain.times and packed.positions == plain.positions
    assert packed.files_read[0].endswith("export.zip/rest/001.dcm")
    assert os.path.getsize(archive) > 0


def test_an_archive_that_starts_with_other_files_is_not_read_to_its_end(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # a recording archive under sourcedata/ (BIDS allows any form there): once its first
    # files hold no DICOM, it is left; a DICOM member after them is not looked for
    monkeypatch.setattr(dicom_files, "MAX_LEADING_OTHERS", 3)
    archive = tmp_path / "recording.tar"
    with tarfile.open(archive, "w") as out:
        for n in range(5):
            data = f"sample {n}\n".encode()
            info = tarfile.TarInfo(f"rec/part{n}.bin")
            info.size = len(data)
            out.addfile(info, io.BytesIO(data))
        out.add(RESTING, "rec/zz.dcm")
    groups, problems = dicom_files.catalogue(str(archive), str)
    assert groups == [] and problems == []
    monkeypatch.setattr(dicom_files, "MAX_LEADING_OTHERS", 64)
    groups, _ = dicom_files.catalogue(str(archive), str)
    assert [len(g.objects) for g in groups] == [1]  # the same archive, read on: one mosaic


def test_one_slice_per_file_epi_with_empty_private_keys_keeps_its_source_check(
        tmp_path: Path) -> None:
    # the private image header copied from nibabel's real mosaic (creator included, so
    # nibabel's reader finds it), with its mosaic keys present but empty
    root = dataset(tmp_path)
    folder = root / "sourcedata/sub-01/005"
    classic_series(folder, INVENTED)
    base = pydicom.dcmread(RESTING)
    private = [base[t] for t in base.keys() if t.group == 0x0029]
    header_tag = next(t for t in base.keys() if t.group == 0x29 and t.element & 0xFF == 0x10
                      and t.element >= 0x1000)
    raw = []
    for f in sorted(folder.iterdir()):
        ds = pydicom.dcmread(f)
        for element in private:
            ds.add(element)
        ds[header_tag].value = csa2({"MosaicRefAcqTimes": ("FD", []),
                                     "NumberOfImagesInMosaic": ("US", [])})
        ds.save_as(f)
        raw.append((f.name, f.read_bytes()))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        tags = get_csa_header(pydicom.dcmread(folder / raw[0][0]), "image")["tags"]
    assert tags["MosaicRefAcqTimes"]["items"] == []  # nibabel reads the empty keys
    _classic_run(root, INVENTED)
    result = audit_paths([root])
    assert codes(result) == ["source/times-differ"]  # read as one slice per file
    finding = next(f for f in result.runs[0].findings if f.code == "source/times-differ")
    assert [t / 1000 for t in finding.evidence["source_ms"]] == pytest.approx(
        _expected_from_pydicom(raw), abs=1e-6)


def test_the_catalogue_is_kept_between_chunks_until_the_tree_changes(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    from slicetime.readers import source as source_module

    root = dataset(tmp_path)
    classic_series(root / "sourcedata/sub-01/005", INVENTED)
    calls: list[str] = []
    real = dicom_files.catalogue  # imported by the source index when it reads a folder

    def counting(path: str, *args: Any, **kwargs: Any) -> Any:
        calls.append(path)
        return real(path, *args, **kwargs)

    monkeypatch.setattr(dicom_files, "catalogue", counting)
    first = source_module.SourceIndex(root).groups("01", None)
    again = source_module.SourceIndex(root).groups("01", None)  # the next chunk
    assert len(calls) == 1 and again is first
    classic_series(root / "sourcedata/sub-01/006", INVENTED, series_number=6)
    for f in (root / "sourcedata/sub-01/006").iterdir():  # another series (PS3.3 C.7.3.1)
        ds = pydicom.dcmread(f)
        ds.SeriesInstanceUID = "1.2.3.6"
        ds.save_as(f)
    changed = source_module.SourceIndex(root).groups("01", None)
    assert len(calls) == 2 and len(changed) == 2  # the new files are seen


def test_a_pixel_data_tag_inside_a_header_value_does_not_end_the_header(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # the bytes of the Pixel Data tag (7FE0,0010; PS3.5 little endian) inside a long text
    # value, before the first prefix ends: the header is read on to its real end
    monkeypatch.setattr(dicom_files, "_FIRST_PREFIX", 4096)
    small = get_testdata_file("MR_small.dcm", download=False)
    assert small is not None
    ds = pydicom.dcmread(str(small))
    ds.SpecificCharacterSet = "ISO_IR 100"  # Latin-1 (PS3.3 C.12.1.1.2): one byte a character
    ds.ImageComments = "x" * 1500 + "\xe0\x7f\x10\x00" + "y" * 6000
    plain = tmp_path / "plain.dcm"
    ds.save_as(plain)
    first = plain.read_bytes().find(b"\xe0\x7f\x10\x00")
    assert 0 < first < 4096 < plain.read_bytes().rfind(b"\xe0\x7f\x10\x00")  # the premise
    packed = tmp_path / "packed.dcm.gz"
    packed.write_bytes(gzip.compress(plain.read_bytes()))
    read = read_series(str(packed), "packed")
    assert read.positions == read_series(str(plain), "plain").positions
    assert read.rows == pydicom.dcmread(plain).Rows  # pydicom


def test_a_bad_member_does_not_hide_the_rest_of_its_archive(tmp_path: Path) -> None:
    archive = tmp_path / "export.zip"
    with zipfile.ZipFile(archive, "w") as out:
        out.writestr("rest/000.dcm", b"a note saved with a DICOM name")  # not DICOM
        out.write(RESTING, "rest/001.dcm")
    groups, problems = dicom_files.catalogue(str(archive), str)
    assert [len(g.objects) for g in groups] == [1] and len(problems) == 1
    assert "000.dcm" in problems[0].message
