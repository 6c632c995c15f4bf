"""correct's outputs keep the whole truth and pass their own audit.

Every output kind (plain, sparse, VolumeTiming, multiband, multi-echo, reversed axis)
is audited by slicetime with --include-derivatives (no warning, no error) and its
sidecar is checked against the BIDS schema's own rules (bidsschematools,
``rules.checks``, evaluated here on the sidecar). The provenance records the largest
shift and the white-noise variance each slice keeps (tested against closed forms);
leading volumes can be left out (BIDS ``NumberOfVolumesDiscardedByUser``); the
hand-off line gives ``slice_time_ref = StartTime / RepetitionTime`` as a model reads it.
"""

from __future__ import annotations

import json
import re
from collections.abc import Callable
from importlib import resources
from pathlib import Path
from typing import Any

import nibabel as nib
import numpy as np
import pytest
from click.testing import CliRunner

from slicetime.engines.interpolate import ENGINES, noise_variance
from slicetime.interfaces.cli import cli
from slicetime.numbers import ratio
from slicetime.schemes.generate import Protocol, slice_timing
from tests.helpers_bids import write_description
from tests.test_correct import TR, build_run, interleaved, output_of

REL = "sub-01/func/sub-01_task-hum_bold.nii.gz"


def run(*args: Any) -> tuple[int, str, str]:
    result = CliRunner().invoke(cli, [str(a) for a in args], catch_exceptions=False)
    return result.exit_code, result.stdout, result.stderr


def sidecar_of(out: Path, rel: str) -> dict[str, Any]:
    image = output_of(out, rel)
    return json.loads(image.with_name(image.name.replace(".nii.gz", ".json")).read_text())


# --------------------------------------------------------------------------- the BIDS rules


def _schema_checks() -> dict[str, dict[str, Any]]:
    text = resources.files("bidsschematools").joinpath("data/schema.json").read_text("utf-8")
    checks = json.loads(text)["rules"]["checks"]
    return {f"{area}.{name}": check for area, entries in checks.items()
            for name, check in entries.items()}


#: the fields whose rules a corrected output must still satisfy (issue 25)
TIMING_FIELDS = ("VolumeTiming", "SliceTiming", "AcquisitionDuration", "DelayTime",
                 "FrameAcquisitionDuration", "RepetitionTime", "NumberOfVolumesDiscardedByUser")


def _evaluate(node: Any, context: dict[str, Any]) -> Any:
    """A small evaluator of the BIDS schema expression language (the grammar parsed by
    bidsschematools.expressions; semantics from the specification's schema README:
    a missing field is null, type(null) is "null", ``in`` tests object keys)."""
    from bidsschematools import expressions as ex

    if isinstance(node, str):
        if node.startswith('"') or node.startswith("'"):
            return node[1:-1]
        if node == "null":
            return None
        if re.fullmatch(r"-?\d+(\.\d+)?", node):
            return float(node)
        return context.get(node)
    if isinstance(node, (int, float)):
        return node
    if isinstance(node, ex.Array):
        return [_evaluate(e, context) for e in node.elements]
    if isinstance(node, ex.Property):
        owner = _evaluate(node.name, context)
        return owner.get(node.field) if isinstance(owner, dict) else None
    if isinstance(node, ex.Element):
        owner = _evaluate(node.name, context)
        index = int(_evaluate(node.index, context))
        return owner[index] if isinstance(owner, (list, str)) and index < len(owner) else None
    if isinstance(node, ex.RightOp):
        assert node.op == "!"
        return not _evaluate(node.rh, context)
    if isinstance(node, ex.BinOp):
        if node.op == "&&":
            return bool(_evaluate(node.lh, context)) and bool(_evaluate(node.rh, context))
        if node.op == "||":
            return bool(_evaluate(node.lh, context)) or bool(_evaluate(node.rh, context))
        lh, rh = _evaluate(node.lh, context), _evaluate(node.rh, context)
        if node.op == "in":
            return isinstance(rh, (dict, list)) and lh in rh
        if node.op in ("==", "!="):
            return (lh == rh) is (node.op == "==")
        if lh is None or rh is None:
            return None
        ops: dict[str, Callable[[Any, Any], Any]] = {
            "<": lambda a, b: a < b, "<=": lambda a, b: a <= b, ">": lambda a, b: a > b,
            ">=": lambda a, b: a >= b, "+": lambda a, b: a + b, "-": lambda a, b: a - b,
            "*": lambda a, b: a * b, "/": lambda a, b: a / b, "**": lambda a, b: a ** b,
            "%": lambda a, b: a % b}
        return ops[node.op](lh, rh)
    if isinstance(node, ex.Function):
        args = [_evaluate(a, context) for a in node.args]

        def type_name(v: Any) -> str:
            return {type(None): "null", bool: "boolean", str: "string", list: "array",
                    dict: "object"}.get(type(v), "number")

        functions: dict[str, Callable[..., Any]] = {
            "type": type_name,
            "match": lambda s, p: s is not None and re.search(p, s) is not None,
            "intersects": lambda a, b: bool(set(a or []) & set(b or [])),
            "max": lambda a: max(a) if a else None,
            "min": lambda a: min(a) if a else None,
            "length": lambda a: len(a) if a is not None else None,
            "sorted": lambda a: sorted(a) if a is not None else None,
            "allequal": lambda a, b: a is not None and b is not None and list(a) == list(b),
            "index": lambda a, v: a.index(v) if a is not None and v in a else None,
        }
        return functions[node.name](*args)
    raise AssertionError(f"expression node not understood: {node!r}")


def broken_bids_rules(sidecar: dict[str, Any], image: Path) -> list[str]:
    """The BIDS schema checks about the timing fields that the output breaks."""
    from bidsschematools.expressions import parse

    header = nib.load(image).header
    nifti = {"dim": [float(d) for d in header["dim"]],
             "pixdim": [float(d) for d in header["pixdim"]],
             "xyzt_units": {"t": header.get_xyzt_units()[1]}}
    context = {"suffix": "bold", "extension": ".nii.gz", "modality": "mri",
               "sidecar": sidecar, "nifti_header": nifti}
    broken = []
    for name, check in _schema_checks().items():
        body = json.dumps({k: v for k, v in check.items() if k != "issue"})
        if not any(word in body for word in TIMING_FIELDS):
            continue
        if all(_evaluate(parse(s), context) for s in check.get("selectors", [])):
            if not all(_evaluate(parse(c), context) for c in check.get("checks", [])):
                broken.append(name)
    return broken


def test_the_rule_evaluator_reads_the_standard_as_written() -> None:
    # BIDS rules.checks.func.VolumeTimingMissingFrameAcquisitionDuration: VolumeTiming
    # alone is an error, with FrameAcquisitionDuration it is not
    from bidsschematools.expressions import parse

    check = _schema_checks()["func.VolumeTimingMissingFrameAcquisitionDuration"]
    base = {"suffix": "bold", "extension": ".nii.gz", "modality": "mri"}
    alone = {**base, "sidecar": {"VolumeTiming": [0.0, 2.0]}}
    framed = {**base, "sidecar": {"VolumeTiming": [0.0, 2.0], "FrameAcquisitionDuration": 1.0}}
    assert all(_evaluate(parse(s), alone) for s in check["selectors"])
    assert not all(_evaluate(parse(c), alone) for c in check["checks"])
    assert all(_evaluate(parse(c), framed) for c in check["checks"])


# --------------------------------------------------------------------------- each kind


def _plain(ds: Path) -> list[str]:
    build_run(ds, REL, interleaved(8))
    return [REL]


def _sparse(ds: Path) -> list[str]:
    # a sparse run described only by RepetitionTime and SliceTiming: its 8 slices fill
    # the first second of a 2 s TR
    build_run(ds, REL, [round(0.125 * z, 6) for z in range(8)])
    return [REL]


def _volume_timing(ds: Path) -> list[str]:
    onsets = np.cumsum([0.0] + [2.0, 2.5] * 29 + [2.0])[:60]
    build_run(ds, REL, interleaved(8), onsets=onsets,
              extra={"VolumeTiming": [float(t) for t in onsets]})
    return [REL]


def _volume_timing_acquisition_duration(ds: Path) -> list[str]:
    # the input states its frame duration the deprecated way (BIDS schema
    # rules.checks.func.DeprecatedAcquisitionDuration): the output must not copy it
    onsets = np.cumsum([0.0] + [2.0, 2.5] * 29 + [2.0])[:60]
    build_run(ds, REL, interleaved(8), onsets=onsets,
              extra={"VolumeTiming": [float(t) for t in onsets], "AcquisitionDuration": 2.0})
    return [REL]


def _sparse_delay(ds: Path) -> list[str]:
    # a sparse run that states its silent gap (BIDS DelayTime) beside RepetitionTime
    build_run(ds, REL, [round(0.125 * z, 6) for z in range(8)], extra={"DelayTime": 1.0})
    return [REL]


def _multiband(ds: Path) -> list[str]:
    times = list(slice_timing(Protocol(n_slices=8, order="interleaved", multiband=2,
                                       repetition_time=TR)))
    build_run(ds, REL, times, extra={"MultibandAccelerationFactor": 2})
    return [REL]


def _multi_echo(ds: Path) -> list[str]:
    rels = []
    for echo, te in ((1, 0.015), (2, 0.04)):
        rel = REL.replace("_bold", f"_echo-{echo}_bold")
        build_run(ds, rel, interleaved(8), extra={"EchoTime": te})
        rels.append(rel)
    return rels


def _reversed(ds: Path) -> list[str]:
    build_run(ds, REL, interleaved(8), direction="-")
    return [REL]


KINDS = {"plain": (_plain, ()), "sparse": (_sparse, ()),
         "volume-timing": (_volume_timing, ("--method", "cubic")),
         "volume-timing-acquisition-duration": (_volume_timing_acquisition_duration,
                                                ("--method", "cubic")),
         "sparse-delay": (_sparse_delay, ()),
         "multiband": (_multiband, ()), "multi-echo": (_multi_echo, ()),
         "reversed-axis": (_reversed, ())}


@pytest.mark.parametrize("kind", list(KINDS))
def test_each_output_kind_passes_its_own_audit_and_the_bids_rules(tmp_path: Path,
                                                                  kind: str) -> None:
    ds = tmp_path / "ds"
    write_description(ds)
    make, options = KINDS[kind]
    rels = make(ds)
    out = ds / "derivatives" / "aligned"
    code, _, err = run("correct", ds, "--out", out, *options)
    assert code == 0, err
    code, report, _ = run("audit", ds, "--include-derivatives", "--format", "json")
    runs = json.loads(report)["runs"]
    outputs = [r for r in runs if "desc-timealigned" in r["path"]]
    assert len(outputs) == len(rels)
    for output in outputs:
        serious = [f["code"] for f in output["findings"] if f["severity"] != "note"]
        assert serious == [], (output["path"], serious)
    for rel in rels:
        sidecar = sidecar_of(out, rel)
        assert broken_bids_rules(sidecar, output_of(out, rel)) == [], sidecar
        assert "SliceTiming" not in sidecar and sidecar["SliceTimingCorrected"] is True


def test_a_sparse_output_keeps_its_silent_gap(tmp_path: Path) -> None:
    # BIDS DelayTime: REQUIRED for sparse sequences using RepetitionTime without
    # SliceTiming; here the slices take 8 x 0.125 s = 1 s of the 2 s TR
    ds = tmp_path / "ds"
    write_description(ds)
    _sparse(ds)
    out = tmp_path / "out"
    assert run("correct", ds, "--out", out)[0] == 0
    sidecar = sidecar_of(out, REL)
    assert sidecar["DelayTime"] == pytest.approx(TR - 8 * 0.125)
    assert sidecar["StartTime"] <= TR - sidecar["DelayTime"]


def test_a_volume_timing_output_states_its_frame_duration(tmp_path: Path) -> None:
    # BIDS rules.checks.func.VolumeTimingMissingFrameAcquisitionDuration: VolumeTiming
    # needs SliceTiming or FrameAcquisitionDuration (AcquisitionDuration is deprecated
    # there: func.DeprecatedAcquisitionDuration)
    ds = tmp_path / "ds"
    write_description(ds)
    _volume_timing(ds)
    out = tmp_path / "out"
    code, text, _ = run("correct", ds, "--out", out, "--method", "cubic")
    assert code == 0
    # without RepetitionTime there is no single slice_time_ref: the frame times are said
    assert "frame times = VolumeTiming + StartTime (1 output without RepetitionTime)" in text
    sidecar = sidecar_of(out, REL)
    # 8 interleaved slices 0.25 s apart occupy 2.0 s
    assert sidecar["FrameAcquisitionDuration"] == pytest.approx(2.0)
    assert "AcquisitionDuration" not in sidecar


def test_a_deprecated_acquisition_duration_becomes_a_frame_duration(tmp_path: Path) -> None:
    # BIDS schema rules.checks.func.DeprecatedAcquisitionDuration: beside VolumeTiming the
    # frame's duration is FrameAcquisitionDuration; the input's value is kept, renamed
    ds = tmp_path / "ds"
    write_description(ds)
    _volume_timing_acquisition_duration(ds)
    out = tmp_path / "out"
    assert run("correct", ds, "--out", out, "--method", "cubic")[0] == 0
    sidecar = sidecar_of(out, REL)
    assert "AcquisitionDuration" not in sidecar
    assert sidecar["FrameAcquisitionDuration"] == 2.0
    check = _schema_checks()["func.DeprecatedAcquisitionDuration"]
    from bidsschematools.expressions import parse

    context = {"suffix": "bold", "extension": ".nii.gz", "modality": "mri", "sidecar": sidecar}
    # the schema's check holds on the output (its selectors may not even apply any more)
    assert not all(_evaluate(parse(s), context) for s in check["selectors"]) or all(
        _evaluate(parse(c), context) for c in check["checks"])


# --------------------------------------------------------------------------- provenance


@pytest.mark.parametrize("a", [0.1, 0.25, 0.5, 0.8])
def test_linear_interpolation_keeps_the_variance_of_a_weighted_sum(a: float) -> None:
    # textbook: for independent samples of unit variance, Var((1-a) x0 + a x1)
    # = (1-a)^2 + a^2 (Bienaymé's formula)
    assert noise_variance(ENGINES["linear"], a) == pytest.approx((1 - a) ** 2 + a ** 2,
                                                                  abs=1e-6)


def test_the_white_noise_figures_at_half_a_sample() -> None:
    # cubic: the cardinal cubic spline, eta(x) = sum_k sqrt(3) z^|k| beta3(x - k) with
    # z = sqrt(3) - 2 (Unser, "Splines: a perfect fit for signal and image processing",
    # IEEE Signal Processing Magazine 1999); its squared values at half-integers sum to
    # the variance a not-a-knot spline leaves in the middle of a long series
    z = np.sqrt(3.0) - 2.0

    def beta3(x: np.ndarray) -> np.ndarray:
        x = np.abs(x)
        return np.where(x < 1, 2 / 3 - x ** 2 + x ** 3 / 2,
                        np.where(x < 2, (2 - x) ** 3 / 6, 0.0))

    k = np.arange(-60, 61)
    half = np.arange(-40, 41) + 0.5
    eta = (np.sqrt(3.0) * z ** np.abs(k)[None, :] * beta3(half[:, None] - k[None, :])).sum(1)
    assert noise_variance(ENGINES["cubic"], 0.5) == pytest.approx(float((eta ** 2).sum()),
                                                                   abs=1e-3)
    # fourier: a pure phase shift keeps every frequency's power (Parseval); the mirror
    # extension and the removed line cost a little at 256 samples
    assert noise_variance(ENGINES["fourier"], 0.5) == pytest.approx(1.0, abs=0.01)
    # sinc: the 16 Hann-windowed sinc taps of the definition, normalised to sum 1
    offsets = np.arange(-7, 9) - 0.5
    taps = np.sinc(offsets) * 0.5 * (1 + np.cos(np.pi * offsets / 8))
    taps /= taps.sum()
    assert noise_variance(ENGINES["sinc"], 0.5) == pytest.approx(float((taps ** 2).sum()),
                                                                  abs=1e-3)


def test_the_provenance_records_the_largest_shift_and_each_slice_s_noise(tmp_path: Path
                                                                         ) -> None:
    ds = tmp_path / "ds"
    write_description(ds)
    build_run(ds, REL, interleaved(8))
    out = tmp_path / "out"
    assert run("correct", ds, "--out", out, "--method", "linear")[0] == 0
    record = sidecar_of(out, REL)["SliceTimeAlignment"]
    times = np.asarray(record["OriginalSliceTiming"])  # SliceEncodingDirection k: array order
    shifts = record["ReferenceTime"] - times
    assert record["LargestShift"] == pytest.approx(float(np.abs(shifts).max()))
    a = np.mod(shifts / TR, 1.0)  # the fraction of a TR between the two samples used
    assert record["WhiteNoiseVarianceRatio"] == pytest.approx(list((1 - a) ** 2 + a ** 2),
                                                              abs=1e-3)


# --------------------------------------------------------------------------- the run's ends


def test_leading_volumes_left_out_are_counted_as_discarded(tmp_path: Path) -> None:
    ds = tmp_path / "ds"
    write_description(ds)
    build_run(ds, REL, interleaved(8))
    whole, cut = tmp_path / "whole", tmp_path / "cut"
    assert run("correct", ds, "--out", whole)[0] == 0
    code, text, err = run("correct", ds, "--out", cut, "--omit-leading", "4")
    assert code == 0, err
    # BIDS: events.tsv onsets refer to the first volume in the file, now the fifth
    assert "event onsets count from volume 4 now" in text
    # nibabel as the reference reader: the volumes kept are the whole run's from the
    # fifth on (they were interpolated with the first four still in the series)
    full = np.asarray(nib.load(output_of(whole, REL)).dataobj)
    kept = nib.load(output_of(cut, REL))
    assert kept.shape[3] == full.shape[3] - 4
    np.testing.assert_array_equal(np.asarray(kept.dataobj), full[..., 4:])
    # BIDS NumberOfVolumesDiscardedByUser: "dummy scans" discarded before the file
    sidecar = sidecar_of(cut, REL)
    assert sidecar["NumberOfVolumesDiscardedByUser"] == 4
    code, _, err = run("correct", ds, "--out", tmp_path / "none", "--omit-leading", "60")
    assert code == 1


def test_volume_timing_is_cut_to_the_volumes_kept(tmp_path: Path) -> None:
    ds = tmp_path / "ds"
    write_description(ds)
    _volume_timing(ds)
    out = tmp_path / "out"
    code, _, err = run("correct", ds, "--out", out, "--method", "cubic", "--omit-leading", "3")
    assert code == 0, err
    sidecar = sidecar_of(out, REL)
    onsets = np.cumsum([0.0] + [2.0, 2.5] * 29 + [2.0])[:60]
    # BIDS: VolumeTiming has one entry per volume of the file, its first volume first
    assert len(sidecar["VolumeTiming"]) == 57 == nib.load(output_of(out, REL)).shape[3]
    assert sidecar["VolumeTiming"] == pytest.approx(list(onsets[3:] - onsets[3]))


# --------------------------------------------------------------------------- hand-off


@pytest.mark.filterwarnings("ignore:.*a mask was given:RuntimeWarning")
def test_the_hand_off_gives_what_a_model_reads_from_the_derivative(tmp_path: Path) -> None:
    # nilearn's first_level_from_bids infers slice_time_ref as StartTime / t_r from a
    # derivative dataset (nilearn.interfaces.bids); FirstLevelModel then samples its
    # regressors at (volume + slice_time_ref) * t_r
    from nilearn.interfaces.bids.query import (
        infer_repetition_time_from_dataset,
        infer_slice_timing_start_time_from_dataset,
    )

    ds = tmp_path / "ds"
    write_description(ds)
    build_run(ds, REL, interleaved(8))
    out = ds / "derivatives" / "aligned"
    code, text, _ = run("correct", ds, "--out", out)
    assert code == 0
    filters = [("task", "hum")]
    start = infer_slice_timing_start_time_from_dataset(out, filters)
    t_r = infer_repetition_time_from_dataset(out, filters)
    expected = start / t_r
    lines = [line for line in text.splitlines() if "slice_time_ref" in line]
    assert lines == [f"for the model: slice_time_ref = StartTime / RepetitionTime = "
                     f"{ratio(expected)} (every output)"]
    code, doc, _ = run("correct", ds, "--out", out, "--format", "json")
    document = json.loads(doc)
    assert document["runs"][0]["slice_time_ref"] == pytest.approx(expected)
    assert f"= {ratio(expected)} (every output)" in document["hand_off"]
    assert sidecar_of(out, REL)["SliceTimeAlignment"]["SliceTimeRef"] == pytest.approx(expected)
    # FirstLevelModel given that slice_time_ref samples its design at the times the
    # corrected volumes now stand for: volume v at v * RepetitionTime + StartTime
    import pandas as pd
    from nilearn.glm.first_level import FirstLevelModel

    image = nib.load(output_of(out, REL))
    mask = nib.Nifti1Image(np.ones(image.shape[:3], dtype=np.uint8), image.affine)
    events = pd.DataFrame({"onset": [10.0, 60.0], "duration": [4.0, 4.0],
                           "trial_type": ["tone", "tone"]})
    model = FirstLevelModel(t_r=t_r, slice_time_ref=document["runs"][0]["slice_time_ref"],
                            mask_img=mask, minimize_memory=True).fit(image, events=events)
    sidecar = sidecar_of(out, REL)
    stands_for = np.arange(image.shape[3]) * sidecar["RepetitionTime"] + sidecar["StartTime"]
    np.testing.assert_allclose(model.design_matrices_[0].index.to_numpy(), stands_for,
                               atol=1e-6)


def test_only_a_silent_part_of_the_tr_becomes_a_delay_time() -> None:
    # BIDS DelayTime: "time to delay the acquisition of data for the following volume";
    # absent means zero, so a run whose slices fill the TR states none
    from slicetime.engines.plan import window_fields
    from slicetime.model import SliceSchedule

    filled = SliceSchedule(times=tuple(0.25 * z for z in range(8)), repetition_time=2.0)
    assert window_fields(filled, frozenset()) == {}
    sparse = SliceSchedule(times=tuple(0.125 * z for z in range(8)), repetition_time=2.0)
    assert window_fields(sparse, frozenset()) == {"DelayTime": 1.0}
    # a window the input already states is kept as stated
    assert window_fields(sparse, frozenset({"DelayTime"})) == {}
    timed = SliceSchedule(times=tuple(0.25 * z for z in range(8)),
                          volume_times=(0.0, 2.0, 4.5, 6.5))
    assert window_fields(timed, frozenset()) == {"FrameAcquisitionDuration": 2.0}


def test_an_output_of_a_name_bids_would_refuse_keeps_desc_before_the_suffix() -> None:
    # BIDS derivatives: desc is an entity, and entities come before the suffix
    # (sub-<label>[_...]_desc-<label>_<suffix>); a name whose label BIDS refuses (a
    # space, a byte that is not UTF-8) still gets it there, not after "_bold"
    from slicetime.pipelines.outputs import output_name

    assert output_name("sub-21_task-sp ace_bold.nii", "timealigned") == \
        "sub-21_task-sp ace_desc-timealigned_bold.nii"
    assert output_name("sub-22_task-caf\udce9_bold.nii.gz", "timealigned") == \
        "sub-22_task-caf\udce9_desc-timealigned_bold.nii.gz"
    assert output_name("sub-01_task-x_bold.nii.gz", "timealigned") == \
        "sub-01_task-x_desc-timealigned_bold.nii.gz"  # a valid name, as before
