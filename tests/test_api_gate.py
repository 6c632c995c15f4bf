"""The Python API applies the ``correct`` command's gate (a follow-up of issue 25):
``correct_image`` on an image read from its dataset refuses a run whose timing stands
in doubt (``TimingInDoubt``, naming the doubts and the ``accept=[...]`` that accepts
them, the API's ``--accept``), a series that may not be interpolated and a run that
is too short (``CorrectionRefused``), from the same owners as the command
(``rules.correction``); ``correct_array`` checks what a bare array can show.

Checks against: the NIfTI-1 slice codes (nifti1.h, through nibabel's
``slice_order_codes``), the BIDS suffixes (the BIDS specification's func, dwi and perf
datatypes) and the command's own refusals for the same run (one implementation).
"""

from __future__ import annotations

import json
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest

import slicetime
from slicetime.rules.correction import MIN_VOLUMES
from tests.helpers_bids import write_description, write_run
from tests.test_correct import TR, build_run, interleaved, run_cli
from tests.test_correct_gate import REL, SEQUENTIAL


@pytest.fixture()
def ds(tmp_path: Path) -> Path:
    root = tmp_path / "ds"
    write_description(root)
    return root


def _reversed_run(ds: Path) -> Path:
    # NIfTI-1 (nifti1.h): slice_code 2 is "sequential decreasing", the reverse of the
    # ascending SliceTiming of the sidecar
    assert nib.nifti1.slice_order_codes.label[2] == "sequential decreasing"
    path, _ = build_run(ds, REL, SEQUENTIAL, slice_code=2, slice_duration=0.25)
    return path


def test_correct_image_refuses_a_doubted_run_as_the_command_does(ds: Path,
                                                                 tmp_path: Path) -> None:
    path = _reversed_run(ds)
    with pytest.raises(slicetime.TimingInDoubt) as caught:
        slicetime.correct_image(nib.load(path))
    refused = caught.value
    assert isinstance(refused, ValueError)  # bad input to the API, as before
    assert refused.code == "correct/timing-in-doubt"
    assert refused.codes == ["header/slice-code-mismatch"]
    spec = f"header/slice-code-mismatch:{REL}"
    assert f"accept={[spec]!r}" in str(refused)
    # the same judgement and words as the command's refusal of the same run
    done = run_cli("correct", str(ds), "--out", str(tmp_path / "out"), "--format", "json")
    reason = json.loads(done.stdout)["runs"][0]["reason"]
    assert str(refused) == reason.replace(f"--accept {spec}", f"accept={[spec]!r}")
    # explicit times do not lift the doubt (the file is what is in doubt)
    with pytest.raises(slicetime.TimingInDoubt):
        slicetime.correct_image(nib.load(path), SEQUENTIAL, TR)
    # an acceptance of other runs does not cover this one; its own does
    with pytest.raises(slicetime.TimingInDoubt):
        slicetime.correct_image(nib.load(path), accept=["header/slice-code-mismatch:sub-02/**"])
    out = slicetime.correct_image(nib.load(path), SEQUENTIAL, TR,
                                  accept=["header/slice-code-mismatch"])
    expected = slicetime.correct_array(np.asarray(nib.load(path).dataobj, dtype=np.float32),
                                       SEQUENTIAL, TR)
    np.testing.assert_array_equal(np.asarray(out.dataobj), expected)
    with pytest.raises(ValueError, match="does not put the timing in doubt"):
        slicetime.correct_image(nib.load(path), accept=["timing/uneven"])


def test_the_lab_policy_accepts_for_the_api_too(ds: Path) -> None:
    path = _reversed_run(ds)
    (ds / "slicetime-policy.toml").write_text(
        'version = 1\n[[accept]]\nfindings = ["header/slice-code-mismatch"]\n'
        'runs = ["sub-01/**"]\nreason = "the console protocol confirms the sidecar"\n')
    out = slicetime.correct_image(nib.load(path), SEQUENTIAL, TR)
    assert out.shape == nib.load(path).shape
    # a broken own policy stops the API as it stops the command
    (ds / "slicetime-policy.toml").write_text("[accept\n")
    with pytest.raises(slicetime.CorrectionRefused) as caught:
        slicetime.correct_image(nib.load(path), SEQUENTIAL, TR)
    assert caught.value.code == "policy/invalid"
    assert "slicetime-policy.toml" in str(caught.value)


@pytest.mark.parametrize(("rel", "why"), [
    # BIDS dwi: each volume has its own b-value and gradient direction
    ("sub-01/dwi/sub-01_dwi.nii.gz", "b-value"),
    # BIDS perf: asl volumes alternate label and control (aslcontext.tsv)
    ("sub-01/perf/sub-01_asl.nii.gz", "label and control"),
    ("sub-01/perf/sub-01_m0scan.nii.gz", "M0 calibration"),
    ("sub-01/func/sub-01_task-hum_sbref.nii.gz", "single-band reference"),
])
def test_correct_image_refuses_series_that_may_not_be_interpolated(ds: Path, rel: str,
                                                                   why: str) -> None:
    path = write_run(ds, rel, (4, 4, 3, 8), tr=3.0,
                     sidecar={"RepetitionTime": 3.0, "SliceTiming": [0.0, 1.0, 2.0]})
    with pytest.raises(slicetime.CorrectionRefused, match=why) as caught:
        slicetime.correct_image(nib.load(path), [0.0, 1.0, 2.0], 3.0)
    assert caught.value.code == "correct/not-interpolable"


def test_correct_array_checks_the_volumes_and_a_named_suffix() -> None:
    data = np.zeros((2, 2, 3, MIN_VOLUMES - 1), dtype=np.float32)
    with pytest.raises(slicetime.CorrectionRefused, match=f"has {MIN_VOLUMES - 1} volumes") \
            as caught:
        slicetime.correct_array(data, [0.0, 0.5, 1.0], 1.5)
    assert caught.value.code == "correct/too-few-volumes"
    data = np.zeros((2, 2, 3, MIN_VOLUMES), dtype=np.float32)
    for suffix in ("dwi", "asl", "m0scan", "sbref", "T1w"):
        with pytest.raises(slicetime.CorrectionRefused) as caught:
            slicetime.correct_array(data, [0.0, 0.5, 1.0], 1.5, suffix=suffix)
        assert caught.value.code == "correct/not-interpolable"
    for suffix in ("bold", "cbv", "phase", None):  # BIDS func time series; not named
        assert slicetime.correct_array(data, [0.0, 0.5, 1.0], 1.5, suffix=suffix).shape \
            == data.shape


def test_a_short_run_read_from_its_file_is_refused(ds: Path) -> None:
    path, _ = build_run(ds, REL, interleaved(8), shape=(5, 4, 8, MIN_VOLUMES - 1))
    with pytest.raises(slicetime.CorrectionRefused) as caught:
        slicetime.correct_image(nib.load(path), interleaved(8), TR)
    assert caught.value.code == "correct/too-few-volumes"
    assert str(caught.value).startswith(REL)


def test_an_image_made_in_memory_is_checked_as_an_array(ds: Path) -> None:
    path = _reversed_run(ds)
    loaded = nib.load(path)
    # the same data and header, no file behind it: nothing to audit, so no doubt is known
    made = nib.Nifti1Image(np.asarray(loaded.dataobj), loaded.affine, loaded.header)
    assert made.get_filename() is None
    assert slicetime.correct_image(made, SEQUENTIAL, TR).shape == loaded.shape


def test_a_short_five_d_run_is_refused_by_the_gate_as_by_the_command(ds: Path,
                                                                      tmp_path: Path) -> None:
    # NIfTI-1: dim[0] 5 with dim[5] 1 stores exactly the bytes of the 4-D image (the
    # data laid out dimension by dimension); nibabel reads its shape as written
    data = np.random.default_rng(0).normal(1000, 20, (5, 4, 8, MIN_VOLUMES - 1, 1))
    path = write_run(ds, REL, data=data.astype(np.float32), dtype=np.float32, tr=TR,
                     sidecar={"TaskName": "hum", "RepetitionTime": TR,
                              "SliceTiming": interleaved(8)})
    image = nib.load(path)
    assert image.shape == (5, 4, 8, MIN_VOLUMES - 1, 1)
    assert int(image.header["dim"][0]) == 5
    from slicetime.pipelines.correct_gate import check_file

    with pytest.raises(slicetime.CorrectionRefused, match=f"has {MIN_VOLUMES - 1} volumes") \
            as caught:
        check_file(path)
    assert caught.value.code == "correct/too-few-volumes"
    # the command refuses the same run for the same reason
    done = run_cli("correct", str(ds), "--out", str(tmp_path / "out"), "--format", "json")
    assert f"has {MIN_VOLUMES - 1} volumes" in json.loads(done.stdout)["runs"][0]["reason"]


def test_a_stacked_five_d_image_read_from_its_file_is_refused(ds: Path) -> None:
    # NIfTI-1: dim[5] above 1 stacks series past the time axis; not one time series
    path = write_run(ds, REL, shape=(5, 4, 8, MIN_VOLUMES, 2),
                     sidecar={"RepetitionTime": TR, "SliceTiming": interleaved(8)})
    with pytest.raises(slicetime.CorrectionRefused, match=r"\[5, 4, 8, 6, 2\]") as caught:
        slicetime.correct_image(nib.load(path), interleaved(8), TR)
    assert caught.value.code == "correct/not-interpolable"
