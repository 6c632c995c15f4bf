"""The public Python API: one implementation shared with the command line.

Checks: the Fourier shift theorem on band-limited signals (textbook), BIDS
semantics of SliceEncodingDirection (BIDS specification, REFERENCES.md),
nibabel's slice-code implementation, and the README's examples.
"""

from __future__ import annotations

import doctest
import json
import re
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest
from click.testing import CliRunner

import slicetime
import slicetime.api
from slicetime.interfaces.cli import cli
from tests.helpers_bids import write_description

ROOT = Path(__file__).resolve().parent.parent
FREQS = (0.013, 0.041, 0.077)  # Hz, all below the Nyquist frequency 0.25 Hz at TR 2 s


def band_limited(t: np.ndarray) -> np.ndarray:
    return 100 + sum(5 * np.sin(2 * np.pi * f * t + k) for k, f in enumerate(FREQS))


def staggered_run(times: list[float], tr: float, shape: tuple[int, int, int, int]) -> np.ndarray:
    """A run whose slice z samples the signal at volume onset + times[z] (array order)."""
    onsets = np.arange(shape[3]) * tr
    data = np.empty(shape, dtype=np.float32)
    for z, t in enumerate(times):
        data[:, :, z, :] = band_limited(onsets + t)
    return data


def test_public_names_are_stable() -> None:
    assert set(slicetime.__all__) >= {"correct_array", "correct_image", "infer_scheme",
                                      "reference_time", "slice_times", "__version__"}
    for name in slicetime.__all__:
        assert getattr(slicetime, name) is not None
    with pytest.raises(AttributeError):
        _ = slicetime.no_such_function  # type: ignore[attr-defined]


def test_correct_array_recovers_band_limited_signal() -> None:
    # Fourier shift theorem (textbook): a band-limited signal sampled above Nyquist
    # is moved exactly by a phase ramp, so every slice lands on the signal at the
    # reference time up to edge effects
    tr, times = 2.0, [0.0, 1.0, 0.5, 1.5]
    data = staggered_run(times, tr, (3, 2, 4, 120))
    out = slicetime.correct_array(data, times, tr, reference=0.75)
    truth = band_limited(np.arange(120) * tr + 0.75)
    interior = slice(12, -12)
    before = np.abs(data[0, 0, :, interior] - truth[interior]).mean()
    after = np.abs(out[0, 0, :, interior] - truth[interior]).mean()
    assert after < 0.01 * before


def test_negative_direction_lists_slices_from_the_top() -> None:
    # BIDS: with a negative SliceEncodingDirection the SliceTiming list runs from the
    # highest slice index down to slice 0
    tr, listed = 2.0, [0.0, 0.5, 1.0, 1.5]
    data = staggered_run(listed[::-1], tr, (2, 2, 4, 40))
    minus = slicetime.correct_array(data, listed, tr, slice_encoding_direction="k-")
    plus = slicetime.correct_array(data, listed[::-1], tr, slice_encoding_direction="k")
    np.testing.assert_array_equal(minus, plus)


def test_other_slice_axes() -> None:
    tr, times = 1.5, [0.0, 0.5, 1.0]
    data = staggered_run(times, tr, (2, 3, 3, 30))
    along_k = slicetime.correct_array(data, times, tr, method="cubic")
    moved = np.moveaxis(data, 2, 0)  # the slice axis is now i
    along_i = slicetime.correct_array(moved, times, tr, method="cubic",
                                      slice_encoding_direction="i")
    np.testing.assert_allclose(np.moveaxis(along_i, 0, 2), along_k, rtol=0, atol=1e-5)


def test_inputs_are_checked() -> None:
    data = np.zeros((2, 2, 3, 10), dtype=np.float32)
    with pytest.raises(ValueError, match="3 slices"):
        slicetime.correct_array(data, [0.0, 1.0], 2.0)
    with pytest.raises(ValueError, match="acquisition window"):
        slicetime.correct_array(data, [0.0, 1000.0, 2000.0], 2.0)
    with pytest.raises(ValueError, match="repetition_time"):
        slicetime.correct_array(data, [0.0, 0.5, 1.0])
    with pytest.raises(ValueError, match="slice_encoding_direction"):
        slicetime.correct_array(data, [0.0, 0.5, 1.0], 2.0, slice_encoding_direction="z")
    with pytest.raises(ValueError, match="unknown method"):
        slicetime.correct_array(data, [0.0, 0.5, 1.0], 2.0, method="nearest")


def test_command_and_api_give_the_same_output(tmp_path: Path) -> None:
    # one implementation: the correct command's output equals correct_array's
    root = tmp_path / "ds"
    write_description(root)
    func = root / "sub-01" / "func"
    func.mkdir(parents=True)
    tr, times = 2.0, [0.0, 1.0, 0.5, 1.5]
    data = staggered_run(times, tr, (4, 3, 4, 50))
    img = nib.Nifti1Image(data, np.eye(4))
    img.header.set_xyzt_units("mm", "sec")
    img.header["pixdim"][4] = tr
    nib.save(img, func / "sub-01_task-hum_bold.nii.gz")
    (func / "sub-01_task-hum_bold.json").write_text(json.dumps(
        {"RepetitionTime": tr, "SliceTiming": times, "TaskName": "hum"}))
    out = tmp_path / "aligned"
    result = CliRunner().invoke(cli, ["correct", str(root), "--out", str(out), "--jobs", "1"])
    assert result.exit_code == 0, result.output
    written = nib.load(out / "sub-01" / "func" / "sub-01_task-hum_desc-timealigned_bold.nii.gz")
    sidecar = json.loads(
        (out / "sub-01/func/sub-01_task-hum_desc-timealigned_bold.json").read_text())
    expected = slicetime.correct_array(data, times, tr)
    np.testing.assert_array_equal(np.asarray(written.dataobj), expected)
    assert sidecar["StartTime"] == pytest.approx(slicetime.reference_time(times, tr))


def test_correct_image_reads_the_header_slice_code() -> None:
    # nibabel's set_slice_times encodes the times as slice_code/slice_duration; the
    # header-derived times must give what the explicit list gives
    tr, times = 2.0, [0.0, 1.0, 0.5, 1.5]  # alternating increasing (NIfTI slice_code 3)
    data = staggered_run(times, tr, (3, 3, 4, 30))
    img = nib.Nifti1Image(data, np.eye(4))
    img.header.set_dim_info(slice=2)
    img.header.set_xyzt_units("mm", "sec")
    img.header["pixdim"][4] = tr
    img.header.set_slice_times(times)
    assert img.header["slice_code"] == 3  # nibabel: "alternating increasing"
    out = slicetime.correct_image(img)
    np.testing.assert_array_equal(np.asarray(out.dataobj),
                                  slicetime.correct_array(data, times, tr))
    assert out.header["slice_code"] == 0 and out.get_data_dtype() == np.float32
    np.testing.assert_array_equal(out.affine, img.affine)


def test_correct_image_without_timing_says_what_to_give() -> None:
    img = nib.Nifti1Image(np.zeros((2, 2, 3, 5), dtype=np.float32), np.eye(4))
    with pytest.raises(ValueError, match="give slice_timing"):
        slicetime.correct_image(img, repetition_time=2.0)


@pytest.mark.parametrize(("order", "code"), [("sequential", "sequential increasing"),
                                              ("interleaved", "alternating increasing")])
def test_slice_times_agree_with_nibabel(order: str, code: str) -> None:
    # nibabel's independent slice-code implementation recognises the generated list
    times = slicetime.slice_times(10, 2.0, order=order)  # type: ignore[arg-type]
    header = nib.Nifti1Header()
    header.set_data_shape((4, 4, 10, 3))
    header.set_dim_info(slice=2)
    header.set_slice_duration(0.2)
    header.set_slice_times(times)
    assert header.get_value_label("slice_code") == code


def test_slice_times_equal_the_timing_command() -> None:
    result = CliRunner().invoke(
        cli, ["timing", "--slices", "12", "--tr", "1.5", "--order", "interleaved",
              "--multiband", "2", "--first", "auto", "--decimals", "6"])
    assert result.exit_code == 0, result.output
    printed = json.loads(result.stdout[: result.stdout.rindex("}") + 1])
    assert printed["SliceTiming"] == slicetime.slice_times(
        12, 1.5, order="interleaved", multiband=2, first="auto")


def test_infer_scheme_reads_lists_along_the_encoding_direction() -> None:
    # BIDS: a list for k- runs along the encoding direction, from the top slice down,
    # so an ascending protocol along k- acquires array slices from the last to the first
    listed = slicetime.slice_times(9, 2.0, slice_encoding_direction="k-")
    assert listed == slicetime.slice_times(9, 2.0)
    assert slicetime.infer_scheme(listed, slice_encoding_direction="k-").label == "descending"
    assert slicetime.infer_scheme(listed).label == "ascending"


def test_docstring_examples_run() -> None:
    failures, tried = doctest.testmod(slicetime.api, optionflags=doctest.ELLIPSIS)
    assert tried >= 3 and failures == 0


def test_readme_python_examples_run(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    section = text[text.index("## Python API"):]
    section = section[: section.index("\n## ", 4)]
    blocks = re.findall(r"```python\n(.*?)```", section, flags=re.S)
    assert blocks, "the README's Python API section has no examples"
    monkeypatch.chdir(tmp_path)
    for block in blocks:
        exec(compile(block, "README.md", "exec"), {})


def test_audit_and_inspect_give_what_the_commands_report(tmp_path: Path) -> None:
    # one implementation: the API's findings are those of `audit --format json` and
    # `show --format json`, run for run
    from slicetime.pipelines.demo import build_demo_dataset

    root = tmp_path / "study"
    build_demo_dataset(root)
    result = slicetime.audit(root)
    printed = CliRunner().invoke(cli, ["audit", str(root), "--format", "json"])
    report = json.loads(printed.stdout)
    assert [r.record.path for r in result.runs] == [r["path"] for r in report["runs"]]
    assert [[f.code for f in r.findings] for r in result.runs] == \
        [[f["code"] for f in r["findings"]] for r in report["runs"]]
    assert result.counts() == {k: report["summary"][k] for k in ("error", "warning", "note")}
    assert result.exit_code("error") == printed.exit_code
    flagged = next(r for r in result.runs if r.findings)
    one = slicetime.inspect(flagged.record.abs_path)
    shown = json.loads(CliRunner().invoke(
        cli, ["show", flagged.record.abs_path, "--format", "json"]).stdout)
    assert [f.code for f in one.findings] == [f["code"] for f in shown["findings"]]
    assert [f.code for f in one.findings] == [f.code for f in flagged.findings]
    assert one.record.scheme == flagged.record.scheme


def test_audit_of_a_folder_without_runs_is_an_error(tmp_path: Path) -> None:
    from slicetime.pipelines.errors import NoRunsError

    (tmp_path / "empty").mkdir()
    with pytest.raises(NoRunsError):
        slicetime.audit(tmp_path / "empty")


def test_the_package_declares_its_type_hints() -> None:
    # PEP 561: a py.typed marker tells type checkers to use the package's own hints
    from importlib import resources

    assert resources.files("slicetime").joinpath("py.typed").is_file()


def test_the_api_modules_list_only_their_public_names() -> None:
    # PEP 562: a module's __dir__ decides what dir() and completion show; the names a
    # module imports for its annotations are not part of the API
    for module in (slicetime, slicetime.api):
        shown = set(dir(module))
        assert not shown & {"Any", "TYPE_CHECKING", "annotations", "cast", "math", "os"}
        assert set(module.__all__) <= shown
    assert sorted(dir(slicetime.api)) == sorted(slicetime.api.__all__)
