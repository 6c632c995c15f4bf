"""The source cross-check: slice times from the DICOM series under sourcedata/.

Outside references:
- nibabel's own test data (read in place from the installed package, never copied):
  ``nibabel/tests/data/0.dcm``, a 48-tile mosaic, TR 6600 ms, acquired in sequential
  descending order, and ``nibabel/nicom/tests/data/csa_slice_norm.dcm``, a 32-tile
  resting mosaic, TR 2070 ms, acquired interleaved starting from tile 1 (the second
  tile) in 65 ms steps. nibabel's DICOM wrappers (``nibabel.nicom.dicomwrappers``) give
  the tiles' affine independently of our reader (nibabel honours the sign of the
  private header's slice normal, see its ``test_use_csa_sign``).
- DICOM PS3.3: ImagePositionPatient/ImageOrientationPatient (C.7.6.2, LPS patient
  frame), RepetitionTime in ms (C.8.3.1), Trigger Time (0018,1060), AcquisitionTime
  TM, the enhanced multi-frame functional groups (C.7.6.16: FrameContentSequence,
  PlanePositionSequence).
- the 2.5 ms quantisation of scanner slice times: common practice (no source).
"""

from __future__ import annotations

import collections
import datetime as dt
import json
import os
import struct
import warnings
from pathlib import Path
from typing import Any

import nibabel as nib
import numpy as np
import pydicom
import pytest
from click.testing import CliRunner
from pydicom.dataset import Dataset, FileMetaDataset
from pydicom.uid import ExplicitVRLittleEndian, generate_uid
from pydicom.valuerep import TM

from slicetime.interfaces.cli import cli
from slicetime.pipelines.audit import audit_paths
from slicetime.pipelines.fix import apply_plan, plan_fix
from slicetime.readers.dicom import read_series
from slicetime.readers.source import SourceOptions
from slicetime.rules.registry import RULES
from slicetime.schemes.infer import infer_scheme
from tests.helpers_bids import write_description

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from nibabel.nicom import dicomwrappers
    from nibabel.nicom.csareader import get_csa_header

NIB = Path(nib.__file__).parent
MOSAIC48 = NIB / "tests" / "data" / "0.dcm"
RESTING = NIB / "nicom" / "tests" / "data" / "csa_slice_norm.dcm"
DPCS_TO_TAL = np.diag([-1.0, -1.0, 1.0, 1.0])  # LPS -> RAS (nibabel.nicom.dicomreaders)

pytestmark = pytest.mark.skipif(not RESTING.exists(), reason="nibabel's DICOM test data absent")


# --------------------------------------------------------------------------- helpers


def nib_affine(ds: Any) -> tuple[np.ndarray, tuple[int, ...]]:
    """RAS affine and shape of a mosaic, as nibabel's wrappers compute them."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        wrapper = dicomwrappers.wrapper_from_data(ds)
        return DPCS_TO_TAL @ wrapper.affine, tuple(int(d) for d in wrapper.image_shape)


def nib_times(ds: Any) -> list[float]:
    """MosaicRefAcqTimes in seconds through nibabel's own CSA reader."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return [t / 1000 for t in get_csa_header(ds, "image")["tags"]["MosaicRefAcqTimes"]
                ["items"]]


def write_nifti(path: Path, affine: np.ndarray, shape: tuple[int, ...], volumes: int,
                tr: float) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    image = nib.Nifti1Image(np.zeros((*shape[:3], volumes), np.int16), affine)
    image.header.set_xyzt_units("mm", "sec")
    image.header["pixdim"][4] = tr
    nib.save(image, path)


def flip_slices(affine: np.ndarray, n: int) -> np.ndarray:
    """The same voxels with the slice axis reversed (array k' = n-1-k)."""
    out = affine.copy()
    out[:, 3] = affine[:, 3] + (n - 1) * affine[:, 2]
    out[:, 2] = -affine[:, 2]
    return out


def expected_by_geometry(affine: np.ndarray, shape: tuple[int, ...], tile_affine: np.ndarray,
                         tile_times: list[float]) -> list[float]:
    """Each run slice's time: the tile whose centre (nibabel's affine) is nearest."""
    centre = (np.array(shape[:3]) - 1) / 2
    tiles = [tile_affine @ np.r_[centre[0], centre[1], t, 1] for t in range(shape[2])]
    out = []
    for k in range(shape[2]):
        point = affine @ np.r_[centre[0], centre[1], k, 1]
        nearest = int(np.argmin([np.linalg.norm(point[:3] - p[:3]) for p in tiles]))
        out.append(tile_times[nearest])
    return out


def csa2(entries: dict[str, tuple[str, list[Any]]]) -> bytes:
    """A vendor private header in the layout nibabel's csareader reads (checked below)."""
    out = bytearray(b"SV10\x04\x03\x02\x01" + struct.pack("<2I", len(entries), 77))
    for name, (vr, values) in entries.items():
        out += struct.pack("<64si4s3i", name.encode(), len(values), vr.encode(), 0,
                           len(values), 77)
        for value in values:
            raw = str(value).encode() + b"\0"
            out += struct.pack("<4i", len(raw), len(raw), 77, len(raw))
            out += raw + b"\0" * ((4 - len(raw) % 4) % 4)
    return bytes(out)


def head_to_foot(tmp: Path, times_ms: list[float]) -> tuple[Path, Any]:
    """nibabel's resting mosaic with the private normal negated (tiles go head to foot)."""
    ds = pydicom.dcmread(RESTING)
    iop = np.array([float(v) for v in ds.ImageOrientationPatient])
    normal = -np.cross(iop[:3], iop[3:])
    tag = next(t for t in ds.keys() if t.group == 0x29 and t.element & 0xFF == 0x10
               and t.element >= 0x1000)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        original = get_csa_header(ds, "image")["tags"]
    entries = {name: (tag["vr"], list(tag["items"])) for name, tag in original.items()}
    entries["SliceNormalVector"] = ("FD", [f"{v:.8f}" for v in normal])
    entries["MosaicRefAcqTimes"] = ("FD", [f"{t:.8f}" for t in times_ms])
    ds[tag].value = csa2(entries)
    path = tmp / "h2f.dcm"
    ds.save_as(path)
    return path, pydicom.dcmread(path)


def classic_series(folder: Path, times_s: list[float], *, z0: float = -20.0, gap: float = 4.0,
                   volumes: int = 2, tr_ms: float = 2000.0, trigger: bool = False,
                   series_number: int = 5) -> None:
    """One file per slice, files named in acquisition order (not position order)."""
    folder.mkdir(parents=True, exist_ok=True)
    n = len(times_s)
    order = sorted(range(n), key=lambda s: times_s[s])
    number = 0
    for volume in range(volumes):
        start = dt.datetime(2024, 1, 1, 10, 0, 0) + dt.timedelta(seconds=volume * tr_ms / 1000)
        for s in order:
            number += 1
            ds = Dataset()
            ds.file_meta = FileMetaDataset()
            ds.file_meta.TransferSyntaxUID = ExplicitVRLittleEndian
            ds.file_meta.MediaStorageSOPClassUID = "1.2.840.10008.5.1.4.1.1.4"
            ds.SOPClassUID = "1.2.840.10008.5.1.4.1.1.4"
            ds.SOPInstanceUID = generate_uid()
            ds.file_meta.MediaStorageSOPInstanceUID = ds.SOPInstanceUID
            ds.SeriesInstanceUID = "1.2.3.4"
            ds.Modality = "MR"
            ds.SeriesNumber = series_number
            ds.InstanceNumber = number
            ds.AcquisitionNumber = volume + 1
            ds.ImageOrientationPatient = [1, 0, 0, 0, 1, 0]
            ds.ImagePositionPatient = [-30.0, -30.0, z0 + s * gap]
            ds.PixelSpacing = [3.0, 3.0]
            ds.SliceThickness = gap
            ds.Rows, ds.Columns = 20, 20
            ds.RepetitionTime = tr_ms
            when = start + dt.timedelta(seconds=times_s[s])
            ds.AcquisitionTime = when.strftime("%H%M%S.%f")
            if trigger:
                ds.AcquisitionTime = start.strftime("%H%M%S.%f")
                ds.TriggerTime = times_s[s] * 1000
            ds.save_as(folder / f"IM{number:05d}", enforce_file_format=True)


def classic_affine(z0: float = -20.0, gap: float = 4.0) -> np.ndarray:
    # DICOM pixel (r, c) at IPP + c*3*row + r*3*col; NIfTI i = column, j = row (LPS -> RAS)
    return DPCS_TO_TAL @ np.array([[3.0, 0, 0, -30.0], [0, 3.0, 0, -30.0], [0, 0, gap, z0],
                                   [0, 0, 0, 1]])


def dataset(tmp: Path) -> Path:
    root = tmp / "ds"
    write_description(root)
    return root


def sidecar(path: Path, **fields: Any) -> None:
    path.with_name(path.name.replace(".nii.gz", ".json")).write_text(json.dumps(fields))


def codes(result: Any) -> list[str]:
    return sorted(f.code for run in result.runs for f in run.findings
                  if f.code.startswith("source/"))


# --------------------------------------------------------------------------- nibabel's mosaics


def test_descending_mosaic_reads_its_documented_schedule() -> None:
    series = read_series(str(MOSAIC48), "0.dcm")
    ds = pydicom.dcmread(MOSAIC48, stop_before_pixels=True)
    assert series.layout == "mosaic" and series.n_slices == 48
    assert series.repetition_time == pytest.approx(6.6)  # nibabel's test data: TR 6600 ms
    assert series.times == pytest.approx(nib_times(ds))  # nibabel's CSA reader
    _, times = series.by_position()
    label = infer_scheme(times).label  # nibabel's test data: sequential descending
    assert label == "descending"


def test_resting_mosaic_is_interleaved_from_tile_1_in_65_ms_steps() -> None:
    series = read_series(str(RESTING), "rest.dcm")
    assert series.n_slices == 32 and series.repetition_time == pytest.approx(2.07)
    scheme = infer_scheme(series.by_position()[1])
    assert scheme.label == "interleaved ascending from 1"  # first excitation is tile 2
    assert scheme.spacing == pytest.approx(0.065, abs=0.0025)  # 65 ms steps, 2.5 ms quantum


def test_tile_positions_agree_with_nibabels_affine() -> None:
    ds = pydicom.dcmread(RESTING)
    affine, shape = nib_affine(ds)
    series = read_series(str(RESTING), "rest.dcm")
    normal = np.array(series.normal)
    centre = (np.array(shape) - 1) / 2
    for t in range(shape[2]):
        ras = affine @ np.r_[centre[0], centre[1], t, 1]
        lps = ras[:3] * [-1, -1, 1]
        assert float(lps @ normal) == pytest.approx(series.positions[t], abs=1e-3)


def test_private_header_writer_round_trips_through_nibabel(tmp_path: Path) -> None:
    _, ds = head_to_foot(tmp_path, [float(t) for t in range(0, 32 * 60, 60)])
    tags = get_csa_header(ds, "image")["tags"]
    assert tags["NumberOfImagesInMosaic"]["items"] == [32]
    assert tags["MosaicRefAcqTimes"]["items"][:3] == [0.0, 60.0, 120.0]


# --------------------------------------------------------------------------- end to end


def resting_tree(tmp: Path, slice_timing: list[float] | None, *, series_number: bool = True,
                 volumes: int = 3) -> tuple[Path, Path, list[float]]:
    root = dataset(tmp)
    ds = pydicom.dcmread(RESTING)
    affine, shape = nib_affine(ds)
    run = root / "sub-01" / "func" / "sub-01_task-rest_bold.nii.gz"
    write_nifti(run, affine, shape, volumes, 2.07)
    fields: dict[str, Any] = {"RepetitionTime": 2.07}
    if series_number:
        fields["SeriesNumber"] = 8
    if slice_timing is not None:
        fields["SliceTiming"] = slice_timing
    sidecar(run, **fields)
    folder = root / "sourcedata" / "sub-01" / "rest"
    folder.mkdir(parents=True)
    for i in range(volumes):
        os.symlink(RESTING, folder / f"{i + 1:03d}.dcm")  # linked, never copied
    return root, run, nib_times(ds)


@pytest.mark.parametrize("series_number", [True, False])
def test_audit_finds_wrong_times_fix_rebuilds_them_reaudit_clean(
        tmp_path: Path, series_number: bool) -> None:
    root, run, truth = resting_tree(tmp_path, [i * 0.06 for i in range(32)],
                                    series_number=series_number)
    result = audit_paths([root])
    assert codes(result) == ["source/times-differ"]
    plan = plan_fix([root], source=SourceOptions())
    apply_plan(plan, backup_dir=tmp_path / "backups")
    written = json.loads(run.with_name("sub-01_task-rest_bold.json").read_text())
    # nibabel's affine puts tile t at array slice t: the list is the CSA list itself
    assert written["SliceTiming"] == pytest.approx(truth, abs=1e-6)
    assert codes(audit_paths([root])) == []


def test_missing_slice_timing_is_found_and_rebuilt(tmp_path: Path) -> None:
    root, run, truth = resting_tree(tmp_path, None)
    assert "source/times-absent" in codes(audit_paths([root]))
    result = CliRunner().invoke(cli, ["fix", str(root), "--apply", "--backup-dir",
                                      str(tmp_path / "b")])
    assert result.exit_code == 0, result.output
    written = json.loads(run.with_name("sub-01_task-rest_bold.json").read_text())
    assert written["SliceTiming"] == pytest.approx(truth, abs=1e-6)
    assert codes(audit_paths([root])) == []


def test_times_within_the_quantum_agree(tmp_path: Path) -> None:
    ds = pydicom.dcmread(RESTING)
    rounded = [round(t, 2) for t in nib_times(ds)]  # 10 ms rounding: up to 5 ms off
    root, _, _ = resting_tree(tmp_path, rounded)
    assert codes(audit_paths([root])) == ["source/times-differ"]
    root2, _, _ = resting_tree(tmp_path / "b", [round(t * 1000) / 1000 for t in
                                                    nib_times(ds)])
    assert codes(audit_paths([root2])) == []  # 1 ms rounding stays within the 3 ms tolerance


def test_no_source_flag_and_auto_mode(tmp_path: Path) -> None:
    root, _, _ = resting_tree(tmp_path, [0.0] * 32)
    assert codes(audit_paths([root], source=SourceOptions(mode="off"))) == []
    other = dataset(tmp_path / "plain")
    write_nifti(other / "sub-01/func/sub-01_task-rest_bold.nii.gz", np.eye(4), (4, 4, 3), 3, 2)
    assert codes(audit_paths([other])) == []  # no sourcedata/: nothing said
    assert codes(audit_paths([other], source=SourceOptions(mode="on"))) == ["source/no-match"]


def test_source_map_wins_and_a_bad_map_is_exit_2(tmp_path: Path) -> None:
    root, _, _ = resting_tree(tmp_path, [i * 0.06 for i in range(32)], series_number=False)
    (root / "sourcedata" / "sub-01" / "decoy").mkdir()
    os.symlink(MOSAIC48, root / "sourcedata" / "sub-01" / "decoy" / "1.dcm")
    mapping = tmp_path / "map.tsv"
    mapping.write_text("run\tseries\nsub-01/func/sub-01_task-rest_bold.nii.gz\t"
                       f"{MOSAIC48}\n")
    result = CliRunner().invoke(cli, ["audit", str(root), "--source-map", str(mapping),
                                      "--format", "json"])
    found = {f["code"] for f in json.loads(result.output)["runs"][0]["findings"]}
    assert "source/geometry-differs" in found and "source/tr-differs" in found
    mapping.write_text("only one column\n")
    bad = CliRunner().invoke(cli, ["audit", str(root), "--source-map", str(mapping)])
    assert bad.exit_code == 2 and "map.tsv" in bad.output


def test_two_fitting_series_without_series_number_are_ambiguous(tmp_path: Path) -> None:
    root, _, _ = resting_tree(tmp_path, [0.0] * 32, series_number=False)
    twin = root / "sourcedata" / "sub-01" / "rest2"
    twin.mkdir()
    ds = pydicom.dcmread(RESTING)
    ds.SeriesInstanceUID = generate_uid()  # another series (DICOM PS3.3 C.7.3.1)
    for i in range(3):
        ds.save_as(twin / f"{i + 1:03d}.dcm")
    assert codes(audit_paths([root])) == ["source/ambiguous"]


def test_one_series_in_two_folders_is_one_series(tmp_path: Path) -> None:
    # grouped by SeriesInstanceUID (DICOM PS3.3 C.7.3.1), not by folder: the same three
    # volumes linked into a second folder make one series of six volumes, which no
    # longer fits the three-volume run
    root, _, _ = resting_tree(tmp_path, [0.0] * 32, series_number=False)
    twin = root / "sourcedata" / "sub-01" / "rest2"
    twin.mkdir()
    for i in range(3):
        os.symlink(RESTING, twin / f"{i + 1:03d}.dcm")
    assert codes(audit_paths([root])) == ["source/no-match"]


# --------------------------------------------------------------------------- head to foot


def test_head_to_foot_mosaic_is_reversed_against_the_run(tmp_path: Path) -> None:
    times_ms = [float(v) for v in np.argsort(np.r_[0:32:2, 1:32:2]) * 62.5]  # invented
    path, ds = head_to_foot(tmp_path, times_ms)
    tile_affine, shape = nib_affine(ds)
    # a run written foot to head: array slice k is tile 31-k
    affine = flip_slices(tile_affine, shape[2])
    expected = expected_by_geometry(affine, shape, tile_affine, nib_times(ds))
    assert expected == pytest.approx(nib_times(ds)[::-1])  # geometry check of the premise
    root = dataset(tmp_path)
    run = root / "sub-01/func/sub-01_task-rest_bold.nii.gz"
    write_nifti(run, affine, shape, 1, 2.07)
    sidecar(run, RepetitionTime=2.07, SeriesNumber=8, SliceTiming=nib_times(ds))  # tile order
    (root / "sourcedata/sub-01/s8").mkdir(parents=True)
    os.symlink(path, root / "sourcedata/sub-01/s8/1.dcm")
    assert codes(audit_paths([root])) == ["source/reversed"]
    apply_plan(plan_fix([root]), backup_dir=tmp_path / "bk")
    written = json.loads(run.with_name("sub-01_task-rest_bold.json").read_text())
    assert written["SliceTiming"] == pytest.approx(expected, abs=1e-6)
    assert codes(audit_paths([root])) == []


# --------------------------------------------------------------------------- classic, enhanced


@pytest.mark.parametrize("trigger", [False, True])
def test_classic_series_times_by_position(tmp_path: Path, trigger: bool) -> None:
    invented = [0.0, 1.0, 0.25, 1.25, 0.5, 1.5, 0.75, 1.75]  # structure only
    root = dataset(tmp_path)
    folder = root / "sourcedata/sub-01/ses-a/005"
    classic_series(folder, invented, trigger=trigger)
    run = root / "sub-01/ses-a/func/sub-01_ses-a_task-x_bold.nii.gz"
    write_nifti(run, classic_affine(), (20, 20, 8), 2, 2.0)
    sidecar(run, RepetitionTime=2.0)
    # independent path: each file's time (pydicom's TM/float) at the slice its z falls on
    expected = [0.0] * 8
    affine = classic_affine()
    for file in sorted(folder.iterdir())[:8]:
        ds = pydicom.dcmread(file)
        z = float(ds.ImagePositionPatient[2])
        k = round((z - affine[2, 3]) / affine[2, 2])
        expected[k] = (float(ds.TriggerTime) / 1000 if trigger else
                       (dt.datetime.combine(dt.date.min, TM(ds.AcquisitionTime))
                        - dt.datetime.combine(dt.date.min, dt.time(10))).total_seconds())
    assert codes(audit_paths([root])) == ["source/times-absent"]
    apply_plan(plan_fix([root]), backup_dir=tmp_path / "bk")
    written = json.loads(run.with_name("sub-01_ses-a_task-x_bold.json").read_text())
    assert written["SliceTiming"] == pytest.approx(expected, abs=1e-6)
    series = read_series(str(folder), "005")
    assert len(series.files_read) <= 9  # one volume (and the first file of the next)


def enhanced_file(path: Path, times_s: list[float], volumes: int = 2, gap: float = 3.0) -> None:
    ds = Dataset()
    ds.file_meta = FileMetaDataset()
    ds.file_meta.TransferSyntaxUID = ExplicitVRLittleEndian
    ds.file_meta.MediaStorageSOPClassUID = "1.2.840.10008.5.1.4.1.1.4.1"
    ds.SOPClassUID = "1.2.840.10008.5.1.4.1.1.4.1"
    ds.SOPInstanceUID = generate_uid()
    ds.file_meta.MediaStorageSOPInstanceUID = ds.SOPInstanceUID
    ds.Modality = "MR"
    ds.SeriesNumber = 7
    ds.Rows, ds.Columns = 16, 16
    ds.NumberOfFrames = len(times_s) * volumes
    shared = Dataset()
    orient, measures, timing = Dataset(), Dataset(), Dataset()
    orient.ImageOrientationPatient = [1, 0, 0, 0, 1, 0]
    measures.PixelSpacing = [2.0, 2.0]
    measures.SliceThickness = gap
    timing.RepetitionTime = 1500.0
    shared.PlaneOrientationSequence = [orient]
    shared.PixelMeasuresSequence = [measures]
    shared.MRTimingAndRelatedParametersSequence = [timing]
    ds.SharedFunctionalGroupsSequence = [shared]
    frames = []
    for volume in range(volumes):
        for s, t in enumerate(times_s):
            frame, content, plane = Dataset(), Dataset(), Dataset()
            when = dt.datetime(2024, 1, 1, 9) + dt.timedelta(seconds=volume * 1.5 + t)
            content.FrameAcquisitionDateTime = when.strftime("%Y%m%d%H%M%S.%f")
            content.TemporalPositionIndex = volume + 1
            plane.ImagePositionPatient = [-16.0, -16.0, s * gap]
            frame.FrameContentSequence = [content]
            frame.PlanePositionSequence = [plane]
            frames.append(frame)
    ds.PerFrameFunctionalGroupsSequence = frames
    path.parent.mkdir(parents=True, exist_ok=True)
    ds.save_as(path, enforce_file_format=True)


def multiband_tree(tmp: Path, **fields: Any) -> tuple[Path, Path]:
    """An enhanced multiband series (two slices at each time) and a run matching it,
    whose sidecar holds ``fields`` beside its TR and series number."""
    invented = [0.0, 0.5, 1.0, 0.0, 0.5, 1.0]  # two slices at each time
    root = dataset(tmp)
    enhanced_file(root / "sourcedata/sub-02/mf/mf.dcm", invented)
    run = root / "sub-02/func/sub-02_task-x_bold.nii.gz"
    affine = DPCS_TO_TAL @ np.array([[2.0, 0, 0, -16], [0, 2.0, 0, -16], [0, 0, 3.0, 0],
                                     [0, 0, 0, 1]])
    write_nifti(run, affine, (16, 16, 6), 2, 1.5)
    sidecar(run, RepetitionTime=1.5, SeriesNumber=7, **fields)
    return root, run


def test_enhanced_multiband_series(tmp_path: Path) -> None:
    root, run = multiband_tree(tmp_path, MultibandAccelerationFactor=3,
                               SliceTiming=[0.0, 0.5, 1.0, 0.0, 0.5, 1.0])
    ds = pydicom.dcmread(root / "sourcedata/sub-02/mf/mf.dcm")
    per_time = collections.Counter(
        f.FrameContentSequence[0].FrameAcquisitionDateTime
        for f in ds.PerFrameFunctionalGroupsSequence[:6])
    assert codes(audit_paths([root])) == ["source/multiband-differs"]
    apply_plan(plan_fix([root]), backup_dir=tmp_path / "bk")
    written = json.loads(run.with_name("sub-02_task-x_bold.json").read_text())
    assert written["MultibandAccelerationFactor"] == max(per_time.values())  # read by pydicom
    assert codes(audit_paths([root])) == []


def test_show_on_a_series_folder_and_on_a_run(tmp_path: Path) -> None:
    root, run, truth = resting_tree(tmp_path, None)
    out = CliRunner().invoke(cli, ["show", str(root / "sourcedata/sub-01/rest"),
                                   "--format", "json"])
    assert out.exit_code == 0, out.output
    data = json.loads(out.output)
    assert data["scheme"]["label"] == "interleaved ascending from 1"
    assert data["layout"] == "mosaic" and data["repetition_time"] == pytest.approx(2.07)
    shown = CliRunner().invoke(cli, ["show", str(run), "--format", "json"])
    assert json.loads(shown.output)["source"]["source_times"] == pytest.approx(truth, abs=1e-6)
    text = CliRunner().invoke(cli, ["show", str(run)])
    assert "source DICOM series" in text.output and "tile 32" in text.output


# --------------------------------------------------------------------------- bad DICOM


def _bad(kind: str, tmp: Path) -> Path:
    target = tmp / "bad.dcm"
    if kind == "truncated":
        target.write_bytes(RESTING.read_bytes()[:600])
    elif kind == "not-dicom":
        target.write_text("this is a note, not an image\n")
    elif kind == "missing-tag":
        ds = pydicom.dcmread(RESTING)
        del ds.ImageOrientationPatient
        ds.save_as(target)
    elif kind == "huge-private":
        ds = pydicom.dcmread(RESTING)
        tag = next(t for t in ds.keys() if t.group == 0x29 and t.element & 0xFF == 0x10
                   and t.element >= 0x1000)
        ds[tag].value = b"\0" * (5 * 1024 * 1024)
        ds.save_as(target)
    elif kind == "garbled-private":
        ds = pydicom.dcmread(RESTING)
        tag = next(t for t in ds.keys() if t.group == 0x29 and t.element & 0xFF == 0x10
                   and t.element >= 0x1000)
        ds[tag].value = b"SV10" + b"\xff" * 64
        ds.save_as(target)
    return target


@pytest.mark.parametrize("kind", ["truncated", "not-dicom", "missing-tag", "huge-private",
                                  "garbled-private"])
def test_bad_dicom_becomes_a_finding(tmp_path: Path, kind: str) -> None:
    root, _, _ = resting_tree(tmp_path, [0.0] * 32)
    bad = _bad(kind, tmp_path)
    mapping = tmp_path / "map.tsv"
    mapping.write_text(f"sub-01/func/sub-01_task-rest_bold.nii.gz\t{bad}\n")
    result = CliRunner().invoke(cli, ["audit", str(root), "--source-map", str(mapping),
                                      "--format", "json"])
    assert result.exit_code in (0, 1), result.output
    findings = json.loads(result.output)["runs"][0]["findings"]
    assert [f["code"] for f in findings if f["code"].startswith("source/")] == \
        ["source/unreadable"]
    shown = CliRunner().invoke(cli, ["show", str(bad)])
    assert shown.exit_code == 2 and "Traceback" not in shown.output


# --------------------------------------------------------------------------- one verdict (issue 23)


def test_missing_times_the_source_records_are_reported_once(tmp_path: Path) -> None:
    # the same absence seen with the source (source/times-absent) and without it
    # (timing/missing) is one finding with one hint; the other is listed as folded
    root, _, _ = resting_tree(tmp_path, None)
    (run,) = audit_paths([root]).runs
    about_times = [f for f in run.findings if f.field == "SliceTiming"]
    assert [f.code for f in about_times] == ["source/times-absent"]
    assert [entry["code"] for entry in about_times[0].evidence["folded"]] == ["timing/missing"]


def test_a_multiband_source_is_rebuilt_in_one_pass(tmp_path: Path) -> None:
    # no SliceTiming and no MultibandAccelerationFactor: the times and the factor come
    # from the source in the same fix --apply, so a second pass has nothing to do
    root, run = multiband_tree(tmp_path, TaskName="x")
    assert codes(audit_paths([root])) == ["source/times-absent"]
    result = CliRunner().invoke(cli, ["fix", str(root), "--apply", "--backup-dir",
                                      str(tmp_path / "b")])
    assert result.exit_code == 0, result.output
    ds = pydicom.dcmread(root / "sourcedata/sub-02/mf/mf.dcm")
    per_time = collections.Counter(  # the group size as pydicom reads the frames
        f.FrameContentSequence[0].FrameAcquisitionDateTime
        for f in ds.PerFrameFunctionalGroupsSequence[:6])
    written = json.loads(run.with_name("sub-02_task-x_bold.json").read_text())
    assert written["MultibandAccelerationFactor"] == max(per_time.values())
    (again,) = audit_paths([root]).runs
    assert not [f.code for f in again.findings if RULES[f.code].fixable]
    second = plan_fix([root])
    assert second.changes == []


# --------------------------------------------------------------------------- malformed values


def _with_bad_uid(tmp: Path) -> tuple[Path, Path]:
    """The resting tree, its series copied with a SeriesInstanceUID that is no UID."""
    root, _, _ = resting_tree(tmp, [0.0] * 32)
    folder = root / "sourcedata" / "sub-01" / "rest"
    for link in sorted(folder.iterdir()):
        ds = pydicom.dcmread(RESTING)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # pydicom warns on setting it, too
            ds.SeriesInstanceUID = "1.2.3.bad_uid"  # DICOM PS3.5 9.1: digits and dots only
        link.unlink()
        ds.save_as(link)
    return root, folder


def test_a_malformed_uid_is_a_note_not_a_library_warning(tmp_path: Path) -> None:
    root, folder = _with_bad_uid(tmp_path)
    # pydicom's own validation rejects the value (it warns on reading it; the reader
    # must not let that reach the user's terminal)
    with pytest.warns(UserWarning, match="Invalid value for VR UI"):
        pydicom.dcmread(next(folder.iterdir())).SeriesInstanceUID  # noqa: B018
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        shown = CliRunner().invoke(cli, ["show", str(folder)])
        audited = CliRunner().invoke(cli, ["audit", str(root), "--source", "--format", "json"])
    assert [str(w.message) for w in caught if issubclass(w.category, UserWarning)] == []
    assert shown.exit_code == 0 and "Invalid value" not in shown.stderr
    notes = [line for line in shown.stdout.splitlines() if "SeriesInstanceUID" in line]
    assert len(notes) == 1 and "001.dcm" in notes[0] and "not a valid UID" in notes[0]
    assert audited.exit_code in (0, 1) and "Invalid value" not in audited.stderr
