"""The correct command: outputs, geometry, refusals, safety, resumption."""

from __future__ import annotations

import gzip
import hashlib
import json
import os
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import nibabel as nib
import numpy as np
import pytest
from click.testing import CliRunner

from slicetime.interfaces.cli import cli
from slicetime.pipelines import correct as correct_module
from slicetime.pipelines.audit import audit_paths
from slicetime.pipelines.memory import plan_budget
from slicetime.readers.atomic import TEMP_PREFIX, TEMP_SUFFIX
from slicetime.schemes.generate import Protocol, slice_timing
from tests.helpers_bids import write_description, write_run, write_sidecar

TR = 2.0
SHAPE = (5, 4, 8, 60)
AXES = "ijk"


def wave(times: np.ndarray, seed: int = 0) -> np.ndarray:
    """A smooth band-limited signal (three sinusoids well below Nyquist) per voxel."""
    rng = np.random.default_rng(seed)
    freqs = np.array([0.011, 0.037, 0.071])
    phases = rng.uniform(0, 2 * np.pi, 3)
    pairs = zip(freqs, phases, strict=True)
    return 1000 + sum(20 * np.sin(2 * np.pi * f * times + p) for f, p in pairs)


def build_run(
    root: Path,
    rel: str,
    sidecar_times: Sequence[float],
    *,
    axis: str = "k",
    direction: str = "+",
    shape: tuple[int, int, int, int] = SHAPE,
    onsets: np.ndarray | None = None,
    extra: dict[str, Any] | None = None,
    dtype: Any = np.float32,
    **kwargs: Any,
) -> tuple[Path, np.ndarray]:
    """A run whose slices sample ``wave`` at their own times; returns (path, array times)."""
    n = shape[AXES.index(axis)]
    assert len(sidecar_times) == n
    array_times = np.asarray(sidecar_times if direction == "+" else sidecar_times[::-1])
    volumes = onsets if onsets is not None else np.arange(shape[3]) * TR
    data = np.empty(shape, dtype=np.float64)
    for z in range(n):
        index = [slice(None)] * 4
        index[AXES.index(axis)] = z  # type: ignore[call-overload]
        data[tuple(index)] = wave(volumes + array_times[z])
    sidecar: dict[str, Any] = {"SliceTiming": list(sidecar_times), "TaskName": "hum"}
    if onsets is None:
        sidecar["RepetitionTime"] = TR
    sidecar["SliceEncodingDirection"] = axis + ("-" if direction == "-" else "")
    sidecar.update(extra or {})
    # the header's dim_info names the same slice axis (a disagreement puts the timing in
    # doubt and correct would refuse the run: tested in test_correct_gate.py)
    kwargs.setdefault("dim_info", (None, None, AXES.index(axis)))
    path = write_run(root, rel, data=data.astype(dtype), dtype=dtype, tr=TR, sidecar=sidecar,
                     **kwargs)
    return path, array_times


def run_cli(*args: str) -> Any:
    return CliRunner().invoke(cli, [str(a) for a in args], catch_exceptions=False)


def output_of(out: Path, rel: str, desc: str = "timealigned") -> Path:
    return out / rel.replace("_bold", f"_desc-{desc}_bold")


def tree_state(root: Path) -> dict[str, tuple[str, int]]:
    state = {}
    for path in sorted(root.rglob("*")):
        if path.is_file():
            state[str(path.relative_to(root))] = (
                hashlib.sha256(path.read_bytes()).hexdigest(),
                path.stat().st_mtime_ns,
            )
    return state


def interleaved(n: int, tr: float = TR, **kw: Any) -> list[float]:
    return list(slice_timing(Protocol(n_slices=n, order="interleaved", repetition_time=tr, **kw)))


REL = "sub-01/func/sub-01_task-hum_bold.nii.gz"


@pytest.fixture
def dataset(tmp_path: Path) -> Path:
    root = tmp_path / "ds"
    write_description(root)
    return root


def interior_error(out_path: Path, truth: np.ndarray) -> float:
    data = np.asarray(nib.load(out_path).dataobj, dtype=np.float64)
    keep = slice(6, data.shape[3] - 6)
    return float(np.max(np.abs(data[..., keep] - truth[..., keep])))


def truth_at(shape: tuple[int, ...], reference: float, onsets: np.ndarray | None = None):
    volumes = onsets if onsets is not None else np.arange(shape[3]) * TR
    return np.broadcast_to(wave(volumes + reference), shape)


# ------------------------------------------------------------------ the main job


@pytest.mark.parametrize(
    ("axis", "direction"), [("k", "+"), ("k", "-"), ("j", "+"), ("i", "-"), ("j", "-")]
)
def test_every_slice_lands_on_the_reference(
    dataset: Path, tmp_path: Path, axis: str, direction: str
) -> None:
    # BIDS: SliceTiming runs along SliceEncodingDirection; with a negative direction
    # the list starts at the highest array index. Each slice must be moved by its
    # own time, so a direction error would leave large residuals.
    shape = {"i": (8, 4, 5, 60), "j": (5, 8, 4, 60), "k": (5, 4, 8, 60)}[axis]
    path, _ = build_run(dataset, REL, interleaved(8), axis=axis, direction=direction,
                        shape=shape)
    out = tmp_path / "out"
    result = run_cli("correct", dataset, "--out", out, "--reference", "1.0")
    assert result.exit_code == 0, result.output
    truth = truth_at(shape, 1.0)
    before = float(np.max(np.abs(nib.load(path).get_fdata()[..., 6:-6] - truth[..., 6:-6])))
    after = interior_error(output_of(out, REL), truth)
    # Fourier shift theorem (textbook): band-limited input is recovered
    assert after < 0.01 * before
    assert after < 0.2  # on a signal of amplitude 60 around 1000


def test_multiband_run(dataset: Path, tmp_path: Path) -> None:
    # Common practice (no source): under multiband factor m, each time repeats m times.
    times = interleaved(8, multiband=2)
    assert len(set(times)) == 4
    build_run(dataset, REL, times, extra={"MultibandAccelerationFactor": 2})
    out = tmp_path / "out"
    assert run_cli("correct", dataset, "--out", out, "--reference", "first").exit_code == 0
    assert interior_error(output_of(out, REL), truth_at(SHAPE, 0.0)) < 0.2


def test_sparse_run_with_delay_time(dataset: Path, tmp_path: Path) -> None:
    # BIDS: DelayTime is the silent gap at the end of each TR; the slices are spread
    # over TR - DelayTime, and the reference must lie inside that window.
    times = [round(i * 0.1, 4) for i in range(8)]
    build_run(dataset, REL, times, extra={"DelayTime": 1.2})
    out = tmp_path / "out"
    refused = run_cli("correct", dataset, "--out", out, "--reference", "1.5")
    assert refused.exit_code == 1
    assert "outside this run's acquisition window (0 to 0.8 s)" in refused.output
    assert run_cli("correct", dataset, "--out", out, "--reference", "0.4").exit_code == 0
    assert interior_error(output_of(out, REL), truth_at(SHAPE, 0.4)) < 0.2


def test_volume_timing_needs_a_polynomial_method(dataset: Path, tmp_path: Path) -> None:
    onsets = np.cumsum(np.r_[0.0, np.full(59, TR)])
    onsets[30:] += 0.7  # one longer pause: uneven volume times
    build_run(dataset, REL, interleaved(8, tr=1.6), onsets=onsets,
              extra={"VolumeTiming": [float(t) for t in onsets], "AcquisitionDuration": 1.6})
    out = tmp_path / "out"
    fourier = run_cli("correct", dataset, "--out", out)
    assert fourier.exit_code == 1
    assert "the fourier method needs evenly spaced volumes" in fourier.output
    assert not output_of(out, REL).exists()
    cubic = run_cli("correct", dataset, "--out", out, "--method", "cubic", "--reference", "0.8")
    assert cubic.exit_code == 0, cubic.output
    # scipy CubicSpline is exact to a few 1e-3 here for these slow waves
    assert interior_error(output_of(out, REL), truth_at(SHAPE, 0.8, onsets)) < 0.5


# -------------------------------------------------------------- output contract


def test_output_image_keeps_geometry_and_drops_slice_claims(dataset: Path, tmp_path: Path):
    # nibabel as the reference reader: affine, zooms, units and dim_info survive.
    path, _ = build_run(dataset, REL, interleaved(8), dtype=np.int16, slice_code=1,
                        slice_duration=0.25, scl_slope=0.5, scl_inter=10.0)
    before = nib.load(path)
    affine = np.array([[2.0, 0, 0, -10], [0, 2.5, 0, 20], [0, 0, 3.0, -5], [0, 0, 0, 1]])
    before = nib.Nifti1Image(np.asanyarray(before.dataobj), affine, before.header)
    before.header.set_qform(affine, 1)
    before.header.set_sform(affine, 4)
    nib.save(before, path)
    before = nib.load(path)
    out = tmp_path / "out"
    # slice_code 1 (sequential) contradicts the interleaved SliceTiming: a doubt to accept
    assert run_cli("correct", dataset, "--out", out, "--force",
                   "--accept", "header/slice-code-mismatch").exit_code == 0
    after = nib.load(output_of(out, REL))
    np.testing.assert_allclose(after.affine, before.affine)
    assert after.header.get_zooms() == before.header.get_zooms()
    assert after.header.get_xyzt_units() == before.header.get_xyzt_units()
    assert after.header.get_dim_info() == before.header.get_dim_info()
    assert int(after.header["qform_code"]) == 1 and int(after.header["sform_code"]) == 4
    assert after.shape == before.shape
    assert after.get_data_dtype() == np.float32
    assert int(after.header["slice_code"]) == 0 and float(after.header["slice_duration"]) == 0
    # scaling was applied on the way in (nibabel: value = raw * slope + inter)
    raw_mean = float(np.asarray(before.dataobj, dtype=np.float64).mean())
    assert float(after.get_fdata().mean()) == pytest.approx(raw_mean, rel=1e-3)


def test_output_sidecar_and_dataset_description(dataset: Path, tmp_path: Path) -> None:
    times = interleaved(8)
    write_sidecar(dataset, "task-hum_bold.json", {"EchoTime": 0.03, "RepetitionTime": TR})
    build_run(dataset, REL, times)
    out = tmp_path / "out"
    assert run_cli("correct", dataset, "--out", out, "--method", "sinc").exit_code == 0
    sidecar = json.loads(output_of(out, REL).with_name(
        "sub-01_task-hum_desc-timealigned_bold.json").read_text())
    # inherited metadata is kept (BIDS inheritance principle)
    assert sidecar["EchoTime"] == 0.03 and sidecar["TaskName"] == "hum"
    # no per-slice offsets any more, so no later step corrects twice
    assert "SliceTiming" not in sidecar
    middle = (min(times) + max(times)) / 2
    assert sidecar["StartTime"] == pytest.approx(middle)
    assert sidecar["SliceTimingCorrected"] is True
    assert sidecar["Sources"] == [f"bids:raw:{REL}"]
    record = sidecar["SliceTimeAlignment"]
    assert record["Settings"]["Method"] == "sinc"
    assert record["Settings"]["Parameters"]["Window"] == "hann"
    assert record["OriginalSliceTiming"] == pytest.approx(times)
    image_hash = hashlib.sha256((dataset / REL).read_bytes()).hexdigest()
    assert record["Inputs"]["Image"]["SHA256"] == image_hash
    assert [s["Path"] for s in record["Inputs"]["Sidecars"]] == [
        "task-hum_bold.json", "sub-01/func/sub-01_task-hum_bold.json"]
    assert record["Output"]["SHA256"] == hashlib.sha256(
        output_of(out, REL).read_bytes()).hexdigest()
    description = json.loads((out / "dataset_description.json").read_text())
    assert description["DatasetType"] == "derivative"
    assert description["GeneratedBy"][0]["Name"] == "slicetime"
    assert "sinc" in description["GeneratedBy"][0]["Description"]
    assert description["DatasetLinks"]["raw"] == dataset.resolve().as_uri()
    provenance = json.loads((out / "slicetime-provenance.json").read_text())
    key = output_of(out, REL).relative_to(out).as_posix()
    assert provenance["Runs"][key]["Inputs"]["Image"]["SHA256"] == image_hash


def test_output_metadata_types_follow_the_standard(dataset: Path, tmp_path: Path) -> None:
    # bidsschematools: the machine-readable BIDS schema defines the field types.
    from bidsschematools import schema as bst

    build_run(dataset, REL, interleaved(8))
    out = tmp_path / "out"
    assert run_cli("correct", dataset, "--out", out).exit_code == 0
    metadata = bst.load_schema()["objects"]["metadata"]
    sidecar = json.loads(output_of(out, REL).with_name(
        "sub-01_task-hum_desc-timealigned_bold.json").read_text())
    assert metadata["StartTime"]["type"] == "number"
    assert isinstance(sidecar["StartTime"], float)
    assert metadata["Sources"]["type"] == "array"
    assert all(s.startswith("bids:") for s in sidecar["Sources"])
    description = json.loads((out / "dataset_description.json").read_text())
    assert description["DatasetType"] in metadata["DatasetType"]["enum"]
    for entry in description["GeneratedBy"]:
        for required in metadata["GeneratedBy"]["items"]["required"]:
            assert required in entry


def test_pybids_reads_the_derivative(dataset: Path, tmp_path: Path) -> None:
    # pybids: an independent BIDS reader must index the output as a derivative
    # dataset and see the reference time through the inheritance principle.
    from bids import BIDSLayout

    build_run(dataset, REL, interleaved(8))
    out = tmp_path / "out"
    assert run_cli("correct", dataset, "--out", out, "--reference", "0.5").exit_code == 0
    layout = BIDSLayout(str(out), validate=False, is_derivative=True)
    files = layout.get(desc="timealigned", suffix="bold", extension=".nii.gz")
    assert len(files) == 1
    assert files[0].get_metadata()["StartTime"] == pytest.approx(0.5)


def test_uncompressed_big_endian_nifti2(dataset: Path, tmp_path: Path) -> None:
    rel = REL.replace(".nii.gz", ".nii")
    build_run(dataset, rel, interleaved(8), version=2, byte_order=">")
    out = tmp_path / "out"
    assert run_cli("correct", dataset, "--out", out, "--reference", "0.9").exit_code == 0
    result = output_of(out, rel)
    assert result.read_bytes()[:2] != b"\x1f\x8b"
    image = nib.load(result)
    assert isinstance(image, nib.Nifti2Image)
    assert image.header.endianness == ">"
    assert interior_error(result, truth_at(SHAPE, 0.9)) < 0.2


def test_keep_dtype_rounds_and_warns_about_clipping(dataset: Path, tmp_path: Path) -> None:
    # int16 stores at most 32767 (numpy iinfo); a signal riding on the ceiling
    # overshoots it after interpolation and must be clipped with a warning.
    times = interleaved(8)
    build_run(dataset, REL, times, dtype=np.int16)
    data = np.asarray(nib.load(dataset / REL).dataobj)
    spiky = data.copy()
    spiky[..., ::2] = 32767
    spiky[..., 1::2] = 0
    image = nib.load(dataset / REL)
    nib.save(nib.Nifti1Image(spiky, image.affine, image.header), dataset / REL)
    out = tmp_path / "out"
    result = run_cli("correct", dataset, "--out", out, "--keep-dtype")
    assert result.exit_code == 0, result.output
    assert "values were clipped to the range of int16" in result.output
    kept = nib.load(output_of(out, REL))
    assert kept.get_data_dtype() == np.int16
    values = np.asarray(kept.dataobj)
    assert values.max() == 32767 and values.min() == -32768


def test_memory_cap_gives_the_same_output(dataset: Path, tmp_path: Path) -> None:
    build_run(dataset, REL, interleaved(16), shape=(32, 32, 16, 120))
    plain, capped = tmp_path / "plain", tmp_path / "capped"
    assert run_cli("correct", dataset, "--out", plain).exit_code == 0
    # the float32 array is 7.5 MiB; with the helper buffers 10 MiB forces the scratch file
    budget = plan_budget(16, 120, 32 * 32, 4, 10 << 20, REL, threads=2, compressed=True)
    assert budget.on_disk
    result = run_cli("correct", dataset, "--out", capped, "--max-memory", "10M")
    assert result.exit_code == 0, result.output
    a = np.asarray(nib.load(output_of(plain, REL)).dataobj)
    b = np.asarray(nib.load(output_of(capped, REL)).dataobj)
    # identical up to float32 rounding (the engine sees differently sized blocks)
    np.testing.assert_allclose(a, b, rtol=1e-6)
    assert not [p for p in capped.rglob("*") if p.name.startswith(".slicetime-")]
    too_small = run_cli("correct", dataset, "--out", tmp_path / "tiny", "--max-memory", "20K")
    assert too_small.exit_code == 1
    assert "--max-memory 20.0 KiB is too small for this run" in too_small.output


# ------------------------------------------------------------------ refusals


def test_runs_with_timing_errors_are_refused_unless_forced(dataset: Path, tmp_path: Path):
    times_ms = [t * 1000 for t in interleaved(8)]  # milliseconds: a timing error
    build_run(dataset, REL, times_ms)
    out = tmp_path / "out"
    refused = run_cli("correct", dataset, "--out", out)
    assert refused.exit_code == 1
    assert "timing/units-ms" in refused.output and "--force" in refused.output
    assert not output_of(out, REL).exists()
    forced = run_cli("correct", dataset, "--out", out, "--force")
    # forcing cannot make times beyond the TR possible (BIDS: SliceTiming values are
    # seconds within the volume and must not exceed RepetitionTime)
    assert forced.exit_code == 1
    # milliseconds are never called seconds, nor seconds outside the window: the refusal
    # says plainly that the values look like milliseconds, names the file and the field
    # the audit's finding names, and gives that finding's own advice (its hint)
    said = " ".join(forced.output.split())
    assert ("SliceTiming in sub-01/func/sub-01_task-hum_bold.json looks like milliseconds: "
            "it runs from 0 to 1750, which divided by 1000 is 0 s to 1.75 s" in said), said
    assert "outside the acquisition window" not in said
    finding = next(f for r in audit_paths([dataset]).runs for f in r.findings
                   if f.code == "timing/units-ms")
    assert finding.file == REL.replace(".nii.gz", ".json") and finding.field == "SliceTiming"
    assert finding.hint and finding.hint in said and "slicetime fix" in finding.hint
    assert not output_of(out, REL).exists()


def run_with_header_tr(root: Path, header_tr: float) -> None:
    """A good run whose header pixdim[4] says ``header_tr`` (the sidecar says TR)."""
    build_run(root, REL, interleaved(8))
    image = nib.load(root / REL)
    image.header.set_zooms((1.0, 1.0, 1.0, header_tr))
    nib.save(nib.Nifti1Image(np.asarray(image.dataobj), image.affine, image.header), root / REL)


def test_force_overrides_a_header_disagreement(dataset: Path, tmp_path: Path) -> None:
    # the header's pixdim[4] disagrees with RepetitionTime: an audit error that a
    # person may judge harmless (BIDS: RepetitionTime must agree with pixdim[4])
    run_with_header_tr(dataset, 3.0)
    out = tmp_path / "out"
    refused = run_cli("correct", dataset, "--out", out)
    assert refused.exit_code == 1 and "header/tr-disagrees" in refused.output
    forced = run_cli("correct", dataset, "--out", out, "--force")
    assert forced.exit_code == 0, forced.output
    assert "corrected despite audit error header/tr-disagrees" in forced.output
    # the sidecar's TR was used (BIDS: the sidecar wins over the header)
    assert interior_error(output_of(out, REL), truth_at(SHAPE, 0.875)) < 0.2


def test_force_never_invents_missing_timing(dataset: Path, tmp_path: Path) -> None:
    write_run(dataset, REL, shape=SHAPE, tr=TR, sidecar={"RepetitionTime": TR, "TaskName": "x"})
    out = tmp_path / "out"
    result = run_cli("correct", dataset, "--out", out, "--force")
    assert result.exit_code == 1
    assert "no usable slice timing" in result.output
    assert not out.exists()


@pytest.mark.parametrize("shape", [(5, 4, 8), (5, 4, 8, 6, 2)])
def test_only_four_dimensional_images(dataset: Path, tmp_path: Path, shape: tuple[int, ...]):
    write_run(dataset, REL, shape=shape, tr=TR,
              sidecar={"RepetitionTime": TR, "SliceTiming": interleaved(8), "TaskName": "x"})
    result = run_cli("correct", dataset, "--out", tmp_path / "out", "--force")
    assert result.exit_code == 1
    # refused (not failed), even with --force: a 3-D image is one volume, a 5-D one
    # with dim[5] 2 is not one time series (NIfTI-1 dim[0])
    assert "refused" in result.output
    assert ("single volume" if len(shape) == 3 else "not one 4-D time series") in result.output


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (["--reference", "soon"], "--reference: reference 'soon' is not a time in seconds"),
        (["--max-memory", "lots"], "--max-memory: size 'lots' is not a number"),
        (["--desc", "time_aligned"], "--desc 'time_aligned' must be letters and digits"),
    ],
)
def test_bad_options_are_usage_errors(dataset: Path, tmp_path: Path, args: list[str],
                                      message: str) -> None:
    build_run(dataset, REL, interleaved(8))
    result = CliRunner().invoke(cli, ["correct", str(dataset), "--out", str(tmp_path / "o"),
                                      *args])
    assert result.exit_code == 2
    assert message in result.output
    assert "Traceback" not in result.output


def test_output_folder_inside_the_input_is_refused(dataset: Path) -> None:
    build_run(dataset, REL, interleaved(8))
    before = tree_state(dataset)
    for out in (dataset, dataset / "sub-01" / "aligned", dataset / "derivatives"):
        result = run_cli("correct", dataset, "--out", out)
        assert result.exit_code == 2, out
        assert "--out" in result.output
    assert tree_state(dataset) == before
    # under derivatives/ is the BIDS convention and is allowed
    ok = run_cli("correct", dataset, "--out", dataset / "derivatives" / "slicetime")
    assert ok.exit_code == 0, ok.output


def test_the_input_tree_is_never_modified(dataset: Path, tmp_path: Path) -> None:
    build_run(dataset, REL, interleaved(8))
    build_run(dataset, REL.replace("sub-01", "sub-02"), interleaved(8))
    before = tree_state(dataset)
    assert run_cli("correct", dataset, "--out", tmp_path / "out", "--jobs", "2").exit_code == 0
    assert tree_state(dataset) == before


def test_a_foreign_dataset_in_out_is_not_overwritten(dataset: Path, tmp_path: Path) -> None:
    build_run(dataset, REL, interleaved(8))
    out = tmp_path / "out"
    write_description(out, GeneratedBy=[{"Name": "someone else"}])
    result = run_cli("correct", dataset, "--out", out)
    assert result.exit_code == 2
    assert "slicetime did not write" in result.output


# ---------------------------------------------------------- hostile inputs


def test_truncated_and_corrupt_images_fail_cleanly(dataset: Path, tmp_path: Path) -> None:
    good, _ = build_run(dataset, REL, interleaved(8))
    short_rel = REL.replace("sub-01", "sub-02")
    bad_rel = REL.replace("sub-01", "sub-03")
    for rel in (short_rel, bad_rel):
        build_run(dataset, rel, interleaved(8))
    # cut the data but keep a valid gzip stream with the right trailer claim
    content = gzip.decompress((dataset / short_rel).read_bytes())
    (dataset / short_rel).write_bytes(gzip.compress(content[: len(content) // 2]))
    # damage the deflate stream in the middle of the data
    raw = bytearray((dataset / bad_rel).read_bytes())
    raw[len(raw) // 2 : len(raw) // 2 + 64] = bytes(64)
    (dataset / bad_rel).write_bytes(bytes(raw))
    out = tmp_path / "out"
    result = run_cli("correct", dataset, "--out", out)
    assert result.exit_code == 1
    assert "Traceback" not in result.output
    assert output_of(out, REL).exists()  # one bad file never stops a batch
    for rel in (short_rel, bad_rel):
        assert not output_of(out, rel).exists()
        assert rel in result.output
    leftovers = [p for p in out.rglob("*") if p.name.startswith(".slicetime-")]
    assert leftovers == []
    assert good.exists()
    # nothing at all is left for the failed runs, not even their folders
    assert not (out / "sub-02").exists() and not (out / "sub-03").exists()
    assert "Traceback" not in result.output
    for line in result.output.splitlines():
        if line.startswith("failed"):
            assert any(rel in line for rel in (short_rel, bad_rel))


def test_a_batch_that_writes_nothing_leaves_no_output_folder(dataset: Path, tmp_path: Path):
    write_run(dataset, REL, shape=SHAPE, tr=TR, sidecar={"RepetitionTime": TR, "TaskName": "x"})
    out = tmp_path / "never"
    result = run_cli("correct", dataset, "--out", out)
    assert result.exit_code == 1
    assert not out.exists()


def test_an_interrupted_batch_leaves_nothing_half_written_and_resumes(
    dataset: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    rels = [REL.replace("sub-01", f"sub-0{i}") for i in (1, 2, 3)]
    for rel in rels:
        build_run(dataset, rel, interleaved(8))
    out = tmp_path / "out"
    real = correct_module._engine_pass
    calls = {"n": 0}

    def interrupt_second(*args: Any, **kwargs: Any) -> None:
        calls["n"] += 1
        if calls["n"] == 2:
            raise KeyboardInterrupt
        real(*args, **kwargs)

    monkeypatch.setattr(correct_module, "_engine_pass", interrupt_second)
    # one process, so the patched engine is the one that runs
    result = CliRunner().invoke(cli, ["correct", str(dataset), "--out", str(out), "--jobs", "1"])
    assert result.exit_code == 130
    assert "interrupted; 2 runs not finished" in result.output
    files = sorted(p.relative_to(out).as_posix() for p in out.rglob("*") if p.is_file())
    first = output_of(out, rels[0]).relative_to(out).as_posix()
    assert first in files
    assert not any(f.startswith(("sub-02", "sub-03")) for f in files)
    assert not any(".slicetime-" in f for f in files)

    monkeypatch.setattr(correct_module, "_engine_pass", real)
    resumed = run_cli("correct", dataset, "--out", out, "--format", "json")
    assert resumed.exit_code == 0
    statuses = [r["status"] for r in json.loads(resumed.output)["runs"]]
    assert statuses == ["up-to-date", "corrected", "corrected"]


def test_rerun_redoes_what_changed(dataset: Path, tmp_path: Path) -> None:
    build_run(dataset, REL, interleaved(8))
    out = tmp_path / "out"

    def statuses(*extra: str) -> list[str]:
        result = run_cli("correct", dataset, "--out", out, "--format", "json", *extra)
        return [r["status"] for r in json.loads(result.output)["runs"]]

    assert statuses() == ["corrected"]
    assert statuses() == ["up-to-date"]
    assert statuses("--method", "cubic") == ["corrected"]
    sidecar = dataset / REL.replace(".nii.gz", ".json")
    content = json.loads(sidecar.read_text())
    content["SliceTiming"] = [round(t + 0.01, 4) for t in content["SliceTiming"]]
    sidecar.write_text(json.dumps(content))
    assert statuses("--method", "cubic") == ["corrected"]
    # a damaged output is redone, not trusted
    image = output_of(out, REL)
    image.write_bytes(image.read_bytes()[:-10])
    assert statuses("--method", "cubic") == ["corrected"]
    os.utime(image)
    assert statuses("--method", "cubic") == ["up-to-date"]


def test_input_checksum_is_exact_for_a_large_compressed_run(tmp_path: Path) -> None:
    # hashlib's SHA-256 of the file is the reference; the reader hashes while a
    # helper thread decompresses ahead, which must not reorder or skip bytes.
    from slicetime.readers.nifti import read_header
    from slicetime.readers.volumes import VolumeReader

    rng = np.random.default_rng(4)
    data = rng.integers(-3000, 3000, (48, 48, 20, 90), dtype=np.int16)
    path = write_run(tmp_path, "big_bold.nii.gz", data=data, dtype=np.int16, tr=TR)
    header, _ = read_header(path)
    with VolumeReader(path, header, "big_bold.nii.gz", threads=1) as reader:
        volumes = [batch for _, batch in reader.batches(7)]
        digest = reader.sha256()
    assert digest == hashlib.sha256(path.read_bytes()).hexdigest()
    # the volumes come back in file order: (volume, k, j, i) is the NIfTI layout
    stacked = np.concatenate(volumes)
    assert np.array_equal(stacked, np.transpose(data, (3, 2, 1, 0)))


def test_stale_temporaries_are_removed_but_not_a_running_batchs(tmp_path: Path) -> None:
    # common practice (no source): a pid that no longer runs owns nothing
    out = tmp_path / "out"
    (out / "sub-01").mkdir(parents=True)
    dead = out / "sub-01" / f"{TEMP_PREFIX}999999999-x{TEMP_SUFFIX}"
    mine = out / f"{TEMP_PREFIX}{os.getpid()}-scratch{TEMP_SUFFIX}"
    alive = out / f"{TEMP_PREFIX}1-y{TEMP_SUFFIX}"  # pid 1 always runs
    for path in (dead, mine, alive):
        path.write_bytes(b"partial")
    assert correct_module.remove_stale_temporaries(out) == 2
    assert not dead.exists() and not mine.exists() and alive.exists()


def test_header_extensions_and_reference_slice(dataset: Path, tmp_path: Path) -> None:
    # nibabel as the reference: NIfTI extensions are copied byte for byte
    path, array_times = build_run(dataset, REL, interleaved(8))
    image = nib.load(path)
    image.header.extensions.append(nib.nifti1.Nifti1Extension(6, b"invented comment 1234"))
    nib.save(nib.Nifti1Image(np.asarray(image.dataobj), image.affine, image.header), path)
    out = tmp_path / "out"
    result = run_cli("correct", dataset, "--out", out, "--reference", "slice:3")
    assert result.exit_code == 0, result.output
    after = nib.load(output_of(out, REL))
    assert [e.get_content() for e in after.header.extensions] == [b"invented comment 1234"]
    # slice 3 is the reference, so it is unchanged and every other slice matches it
    before = np.asarray(nib.load(path).dataobj)
    data = np.asarray(after.dataobj)
    np.testing.assert_array_equal(data[:, :, 3, :], before[:, :, 3, :])
    assert interior_error(output_of(out, REL), truth_at(SHAPE, float(array_times[3]))) < 0.2


def test_the_lab_policy_decides_what_blocks(dataset: Path, tmp_path: Path) -> None:
    # a lab that has judged a header disagreement harmless lowers its severity in the
    # policy; the audit gate then lets the run through without --force
    run_with_header_tr(dataset, 3.0)
    policy = tmp_path / "policy.toml"
    policy.write_text('version = 1\n\n[levels]\n"header/tr-disagrees" = "warning"\n')
    out = tmp_path / "out"
    assert run_cli("correct", dataset, "--out", out).exit_code == 1
    result = run_cli("correct", dataset, "--out", out, "--policy", policy)
    assert result.exit_code == 0, result.output
    assert "corrected despite" not in result.output


def test_outputs_written_with_the_former_key_spelling_are_still_up_to_date(
    tmp_path: Path,
) -> None:
    # provenance keys are PascalCase now (like the BIDS fields beside them); an output
    # recorded with the former lower-case Parameters/Reference keys is not redone
    from slicetime.pipelines import provenance

    assert provenance.pascal_keys({"half_width": 8, "kind": "middle"}) == \
        {"HalfWidth": 8, "Kind": "middle"}
    root = tmp_path / "ds"
    write_description(root)
    build_run(root, REL, interleaved(8))
    out = tmp_path / "out"
    assert run_cli("correct", root, "--out", out).exit_code == 0
    sidecar = next(out.rglob("*_desc-timealigned_bold.json"))
    data = json.loads(sidecar.read_text())
    record = data["SliceTimeAlignment"]
    assert record["Tool"] == {"Name": "slicetime", "Version": record["Settings"]["Version"]}
    assert record["SliceEncodingDirection"] == "k"
    settings = record["Settings"]
    settings["Parameters"] = {k[0].lower() + k[1:]: v for k, v in settings["Parameters"].items()}
    settings["Reference"] = {k.lower(): v for k, v in settings["Reference"].items()}
    sidecar.write_text(json.dumps(data, indent=2))
    again = run_cli("correct", root, "--out", out, "--format", "json")
    assert again.exit_code == 0 and json.loads(again.stdout)["runs"][0]["status"] == "up-to-date"


def test_a_trailing_dimension_of_one_is_the_four_d_run(tmp_path: Path) -> None:
    # NIfTI-1: dim[0] = 5 with dim[5] = 1 stores the same bytes as the 4-D image (the
    # data are laid out with the first dimension fastest), and the audit accepts it; so
    # correct must too, with the output nibabel reads equal to the 4-D run's output
    rng = np.random.default_rng(0)
    data = rng.normal(100, 5, size=(4, 4, 6, 12)).astype(np.float32)
    times = [float(t) for t in slice_timing(Protocol(n_slices=6, order="interleaved",
                                                    repetition_time=2.0))]
    outs = []
    for name, array in (("four", data), ("five", data[..., None])):
        root = tmp_path / name
        write_description(root)
        run = root / "sub-01/func/sub-01_task-x_bold.nii"
        run.parent.mkdir(parents=True)
        image = nib.Nifti1Image(array, np.eye(4))
        image.header.set_xyzt_units("mm", "sec")
        image.header["pixdim"][4] = 2.0
        nib.save(image, run)
        (run.parent / "sub-01_task-x_bold.json").write_text(
            json.dumps({"RepetitionTime": 2.0, "SliceTiming": times}))
        out = tmp_path / f"{name}-out"
        result = CliRunner().invoke(cli, ["correct", str(root), "--out", str(out),
                                          "--no-progress"])
        assert result.exit_code == 0, result.output
        outs.append(nib.load(next(out.rglob("*_desc-*_bold.nii"))))
    assert outs[1].shape == (4, 4, 6, 12, 1)  # the header's dimensions kept
    np.testing.assert_array_equal(np.asarray(outs[1].dataobj)[..., 0],
                                  np.asarray(outs[0].dataobj))


def test_a_kernel_without_the_prefault_advice_corrects_the_same(
        dataset: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # madvise(2): EINVAL "advice is invalid" (a kernel before 5.14 knows no
    # MADV_POPULATE_WRITE): the helper's calls fail, every page faults in as it is
    # touched, and the output is the one numpy.empty's buffer gives, as close to the
    # sampled sinusoids at the reference time as ever (the textbook identity that a
    # band-limited signal is recovered by Fourier interpolation)
    import ctypes
    import threading

    from slicetime.readers import scratch

    libc = ctypes.CDLL(None, use_errno=True)
    page = ctypes.c_void_p(ctypes.addressof(ctypes.create_string_buffer(1)) & ~4095)
    assert libc.madvise(page, 4096, -1) == -1 and ctypes.get_errno() == 22  # EINVAL
    shape = (16, 16, 16, 60)
    times = interleaved(16)
    build_run(dataset, REL, times, shape=shape)
    outputs = {}
    helped: list[str] = []
    populate = scratch._populate

    def spied(*args: Any) -> None:
        helped.append(name)
        populate(*args)

    monkeypatch.setattr(scratch, "_populate", spied)
    for name, advice, threshold in (("empty", scratch.MADV_POPULATE_WRITE, 1 << 62),
                                    ("invalid", -1, 1 << 16),
                                    ("advised", scratch.MADV_POPULATE_WRITE, 1 << 16)):
        monkeypatch.setattr(scratch, "MADV_POPULATE_WRITE", advice)
        monkeypatch.setattr(scratch, "PREFAULT_BYTES", threshold)
        out = tmp_path / name
        result = run_cli("correct", dataset, "--out", out, "--reference", "1.0")
        assert result.exit_code == 0, result.output
        outputs[name] = np.asarray(nib.load(output_of(out, REL)).dataobj)
        assert not [t for t in threading.enumerate() if t.name == "slicetime-prefault"]
    assert helped == ["invalid", "advised"]  # the mapping and its helper, not numpy.empty
    assert np.array_equal(outputs["invalid"], outputs["empty"])
    assert np.array_equal(outputs["advised"], outputs["empty"])
    assert interior_error(output_of(tmp_path / "invalid", REL), truth_at(shape, 1.0)) < 0.2
