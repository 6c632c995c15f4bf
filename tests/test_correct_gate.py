"""correct acts only on timing it can trust and only on data it may interpolate.

The trust gate: a finding whose rule is registered with ``timing_in_doubt`` (another
source contradicts the slice times) refuses the run at warning level or above, even
with --force, until the user accepts that doubt by code and run (``--accept``, the lab
policy's ``[[accept]]``); the acceptance is recorded in the outcome, the output sidecar
and the provenance file. Only BOLD-type series are interpolated; runs shorter than
``MIN_VOLUMES`` are refused.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import nibabel as nib
import numpy as np
import pytest
from click.testing import CliRunner

from slicetime.codes import RULES, make_finding
from slicetime.interfaces.cli import cli
from slicetime.model import Severity
from slicetime.policy.model import AcceptEntry
from slicetime.rules.correction import (
    MIN_VOLUMES,
    interpolation_refusal,
    judge_trust,
    parse_accept,
    timing_doubts,
)
from tests.factories import record
from tests.helpers_bids import write_description, write_run
from tests.test_correct import build_run, interleaved, output_of

REL = "sub-01/func/sub-01_task-hum_bold.nii.gz"
SEQUENTIAL = [round(0.25 * z, 6) for z in range(8)]


def correct_json(*args: Any) -> tuple[int, dict[str, Any], str]:
    result = CliRunner().invoke(cli, ["correct", *(str(a) for a in args), "--format", "json"],
                                catch_exceptions=False)
    return result.exit_code, json.loads(result.stdout) if result.exit_code in (0, 1) else {}, \
        result.stderr


@pytest.fixture()
def ds(tmp_path: Path) -> Path:
    root = tmp_path / "ds"
    write_description(root)
    return root


# --------------------------------------------------------------------------- pure


def test_the_doubting_codes_are_those_that_contradict_the_slice_times() -> None:
    doubting = {code for code, rule in RULES.items() if rule.timing_in_doubt}
    # the contradictions issue 25 names: header vs sidecar on the order and axis, the
    # dataset's consensus and the lab protocol on order and direction, the source series,
    # and the image data (verify)
    assert {"header/slice-code-mismatch", "axis/dim-info-mismatch", "dataset/outlier-scheme",
            "policy/scheme-mismatch", "policy/direction-mismatch", "source/reversed",
            "source/times-differ", "verify/contradicted"} <= doubting
    # a unit error or a missing field is an error --force may judge, not a contradiction
    assert not doubting & {"timing/units-ms", "tr/missing", "timing/missing", "file/truncated"}


def test_a_doubt_counts_from_warning_level_and_is_accepted_by_code_and_path() -> None:
    contradicted = make_finding("verify/contradicted", "the data fit another order")
    undecidable = make_finding("verify/undecidable", "cannot tell")
    assert timing_doubts([contradicted, undecidable]) == [contradicted]
    # a lab that turns the warning into a note no longer doubts the run
    assert timing_doubts([contradicted.with_severity(Severity.NOTE)]) == []
    entry = AcceptEntry(index=0, codes=("verify/contradicted",), reason="checked",
                        paths=("sub-01/**",))
    assert judge_trust("sub-01/func/a_bold.nii.gz", [contradicted], [entry]).standing == ()
    verdict = judge_trust("sub-02/func/a_bold.nii.gz", [contradicted], [entry])
    assert verdict.standing == (contradicted,) and verdict.accepted == ()


def test_accept_names_one_doubting_code_exactly() -> None:
    entry = parse_accept("header/slice-code-mismatch:sub-0[12]/**")
    assert entry.covers("sub-02/func/x_bold.nii.gz", "header/slice-code-mismatch")
    assert not entry.covers("sub-03/func/x_bold.nii.gz", "header/slice-code-mismatch")
    for bad, why in (("timing/uneven", "does not put the timing in doubt"),
                     ("header/*", "is not a finding code"),
                     ("nope/none", "is not a finding code"),
                     ("source/reversed:/abs/**", "relative to the dataset root")):
        with pytest.raises(ValueError, match=why):
            parse_accept(bad)


@pytest.mark.parametrize(("path", "suffix", "datatype", "allowed"), [
    ("sub-01/func/sub-01_task-a_bold.nii.gz", "bold", "func", True),
    ("sub-01/func/sub-01_task-a_echo-2_bold.nii.gz", "bold", "func", True),
    ("sub-01/func/sub-01_task-a_cbv.nii.gz", "cbv", "func", True),
    ("sub-01/func/sub-01_task-a_part-phase_bold.nii.gz", "bold", "func", True),
    ("sub-01/dwi/sub-01_dwi.nii.gz", "dwi", "dwi", False),
    ("sub-01/perf/sub-01_asl.nii.gz", "asl", "perf", False),
    ("sub-01/perf/sub-01_m0scan.nii.gz", "m0scan", "perf", False),
    ("sub-01/func/sub-01_task-a_sbref.nii.gz", "sbref", "func", False),
    ("sub-01/dwi/sub-01_acq-1.5mm_dwi.nii.gz", "", "dwi", False),  # not a valid BIDS name
])
def test_only_bold_type_series_are_interpolated(path: str, suffix: str, datatype: str,
                                                allowed: bool) -> None:
    # BIDS specification, "Magnetic Resonance Imaging": func suffixes bold, cbv, phase
    # are time series of one contrast; dwi volumes differ in b-value (the .bval file),
    # asl volumes alternate label and control (aslcontext.tsv), m0scan and sbref are
    # single reference images
    run = record({}, name=path)
    assert (run.suffix, run.datatype) == (suffix, datatype)
    assert (interpolation_refusal(run) is None) is allowed


# --------------------------------------------------------------------------- the gate


def test_a_run_reversed_against_its_header_is_refused_until_the_doubt_is_accepted(
        ds: Path, tmp_path: Path) -> None:
    # NIfTI-1 (nifti1.h; nibabel's slice_order_codes): slice_code 2 is "sequential
    # decreasing", the reverse of the ascending SliceTiming the sidecar gives
    assert nib.nifti1.slice_order_codes.label[2] == "sequential decreasing"
    build_run(ds, REL, SEQUENTIAL, slice_code=2, slice_duration=0.25)
    out = tmp_path / "out"
    code, doc, _ = correct_json(ds, "--out", out)
    assert code == 1
    run = doc["runs"][0]
    codes = [f["code"] for f in run["blocking_findings"]]
    assert run["status"] == "refused"
    assert codes[0] == "header/slice-code-mismatch" and "correct/timing-in-doubt" in codes
    assert "--accept header/slice-code-mismatch:" + REL in run["reason"]
    assert not out.exists()
    # --force is for errors: it does not lift a doubt
    code, doc, _ = correct_json(ds, "--out", out, "--force")
    assert code == 1 and doc["runs"][0]["status"] == "refused"
    # an acceptance for other runs does not cover this one
    code, doc, _ = correct_json(ds, "--out", out, "--accept",
                                "header/slice-code-mismatch:sub-02/**")
    assert code == 1 and doc["runs"][0]["status"] == "refused"
    given = "header/slice-code-mismatch:sub-01/**"
    code, doc, _ = correct_json(ds, "--out", out, "--accept", given)
    assert code == 0, doc
    accepted = doc["runs"][0]["accepted_doubts"]
    assert [a["code"] for a in accepted] == ["header/slice-code-mismatch"]
    assert accepted[0]["accepted_by"] == f"--accept {given}"
    sidecar = json.loads(output_of(out, REL).with_name(
        "sub-01_task-hum_desc-timealigned_bold.json").read_text())
    recorded = sidecar["SliceTimeAlignment"]["AcceptedDoubts"]
    assert recorded[0]["Code"] == "header/slice-code-mismatch"
    assert recorded[0]["AcceptedBy"] == f"--accept {given}"
    provenance = json.loads((out / "slicetime-provenance.json").read_text())
    entry = next(iter(provenance["Runs"].values()))
    assert entry["AcceptedDoubts"] == recorded


def test_a_direction_flipped_against_its_task_is_refused_until_the_lab_accepts_it(
        ds: Path, tmp_path: Path) -> None:
    # BIDS: SliceEncodingDirection k- means SliceTiming runs from the highest k index;
    # one run of a task flipping it against the others puts its order in doubt
    for sub in ("01", "02", "03"):
        rel = REL.replace("01", sub)
        build_run(ds, rel, interleaved(8), direction="-" if sub == "03" else "+")
    out = tmp_path / "out"
    code, doc, _ = correct_json(ds, "--out", out)
    status = {r["path"]: r["status"] for r in doc["runs"]}
    flipped = REL.replace("01", "03")
    assert code == 1 and status[flipped] == "refused"
    assert [s for p, s in status.items() if p != flipped] == ["corrected", "corrected"]
    refused = next(r for r in doc["runs"] if r["path"] == flipped)
    assert "dataset/outlier-scheme" in {f["code"] for f in refused["blocking_findings"]}
    (ds / "slicetime-policy.toml").write_text(
        'version = 1\n[[accept]]\nfindings = ["dataset/outlier-scheme"]\nruns = ["sub-03/**"]\n'
        'reason = "sub-03 was scanned head first supine on the other coil"\n')
    code, doc, _ = correct_json(ds, "--out", out)
    assert code == 0, doc
    refused = next(r for r in doc["runs"] if r["path"] == flipped)
    assert refused["accepted_doubts"][0]["accepted_by"] == "slicetime-policy.toml accept[0]"
    sidecar = json.loads(output_of(out, flipped).with_name(
        "sub-03_task-hum_desc-timealigned_bold.json").read_text())
    assert sidecar["SliceTimeAlignment"]["AcceptedDoubts"][0]["Reason"].startswith("sub-03")


def test_a_policy_may_accept_only_doubting_codes(ds: Path, tmp_path: Path) -> None:
    build_run(ds, REL, interleaved(8))
    policy = tmp_path / "policy.toml"
    policy.write_text('version = 1\n[[accept]]\nfindings = ["timing/uneven"]\nreason = "x"\n')
    code, _, err = correct_json(ds, "--out", tmp_path / "out", "--policy", policy)
    assert code == 2 and "accept[0].findings[0]" in err and "doubt" in err
    policy.write_text('version = 1\n[[accept]]\nfindings = ["source/reversed"]\n')
    code, _, err = correct_json(ds, "--out", tmp_path / "out", "--policy", policy)
    assert code == 2 and "accept[0].reason: missing" in err and "recorded" in err
    code, _, err = correct_json(ds, "--out", tmp_path / "out", "--accept", "tr/missing")
    assert code == 2 and "--accept" in err and "Traceback" not in err


def test_correct_verify_refuses_a_claim_the_images_contradict(ds: Path, tmp_path: Path) -> None:
    # the contradicted case of tests/test_verify.py (acquired interleaved, claimed
    # sequential; seed 6 is contradicted there)
    from tests.test_verify import _interleaved, _sequential, _write

    _write(ds, "sub-01/func/sub-01_task-x_bold.nii.gz", _interleaved(24), _sequential(24),
           seed=6)
    out = tmp_path / "out"
    code, doc, _ = correct_json(ds, "--out", out, "--verify")
    assert code == 1
    codes = {f["code"] for f in doc["runs"][0]["blocking_findings"]}
    assert {"verify/contradicted", "correct/timing-in-doubt"} <= codes


# --------------------------------------------------------------------------- what may be resampled


def test_a_diffusion_series_is_refused_saying_why(ds: Path, tmp_path: Path) -> None:
    # BIDS dwi: each volume has its own b-value and gradient direction (.bval/.bvec)
    write_run(ds, "sub-01/dwi/sub-01_dwi.nii.gz", (4, 4, 3, 8), tr=3.0,
              sidecar={"RepetitionTime": 3.0, "SliceTiming": [0.0, 1.0, 2.0]})
    write_run(ds, "sub-01/perf/sub-01_asl.nii.gz", (4, 4, 3, 8), tr=3.0,
              sidecar={"RepetitionTime": 3.0, "SliceTiming": [0.0, 1.0, 2.0]})
    code, doc, _ = correct_json(ds, "--out", tmp_path / "out")
    assert code == 1
    reasons = {r["path"]: r["reason"] for r in doc["runs"]}
    assert "b-value" in reasons["sub-01/dwi/sub-01_dwi.nii.gz"]
    assert "label and control" in reasons["sub-01/perf/sub-01_asl.nii.gz"]
    for run in doc["runs"]:
        assert run["status"] == "refused"
        assert run["blocking_findings"][-1]["code"] == "correct/not-interpolable"


def test_a_run_shorter_than_the_minimum_is_refused_naming_its_volumes(
        ds: Path, tmp_path: Path) -> None:
    short = MIN_VOLUMES - 1
    build_run(ds, REL, interleaved(8), shape=(5, 4, 8, short))
    build_run(ds, REL.replace("01", "02"), interleaved(8), shape=(5, 4, 8, MIN_VOLUMES))
    code, doc, _ = correct_json(ds, "--out", tmp_path / "out")
    by_path = {r["path"]: r for r in doc["runs"]}
    assert code == 1
    assert by_path[REL]["status"] == "refused"
    assert f"has {short} volumes" in by_path[REL]["reason"]
    assert by_path[REL]["blocking_findings"][-1]["code"] == "correct/too-few-volumes"
    assert by_path[REL.replace("01", "02")]["status"] == "corrected"
    # the output keeps the input's volumes (nibabel)
    image = nib.load(output_of(tmp_path / "out", REL.replace("01", "02")))
    assert image.shape[3] == MIN_VOLUMES
    assert np.isfinite(np.asarray(image.dataobj)).all()


def test_a_doubt_the_policy_ignores_still_needs_accepting(ds: Path, tmp_path: Path) -> None:
    # an [[ignore]] hides a finding from the reports; it does not make the timing true
    build_run(ds, REL, SEQUENTIAL, slice_code=2, slice_duration=0.25)
    (ds / "slicetime-policy.toml").write_text(
        'version = 1\n[[waive]]\nfindings = ["header/*"]\n'
        'reason = "headers are converter guesses"\n')
    code, doc, _ = correct_json(ds, "--out", tmp_path / "out")
    assert code == 1
    assert doc["runs"][0]["blocking_findings"][0]["code"] == "header/slice-code-mismatch"
    code, doc, _ = correct_json(ds, "--out", tmp_path / "out", "--accept",
                                "header/slice-code-mismatch")
    assert code == 0 and doc["runs"][0]["accepted_doubts"][0]["accepted_by"] == (
        "--accept header/slice-code-mismatch")


def test_an_output_is_redone_when_the_acceptance_changes(ds: Path, tmp_path: Path) -> None:
    build_run(ds, REL, SEQUENTIAL, slice_code=2, slice_duration=0.25)
    out = tmp_path / "out"
    code, doc, _ = correct_json(ds, "--out", out, "--accept", "header/slice-code-mismatch")
    assert code == 0 and doc["runs"][0]["status"] == "corrected"
    code, doc, _ = correct_json(ds, "--out", out, "--accept", "header/slice-code-mismatch")
    assert doc["runs"][0]["status"] == "up-to-date"
    # accepted now by another entry: the output's record would no longer be true
    code, doc, _ = correct_json(ds, "--out", out, "--accept",
                                "header/slice-code-mismatch:sub-01/**")
    assert code == 0 and doc["runs"][0]["status"] == "corrected"
    sidecar = json.loads(output_of(out, REL).with_name(
        "sub-01_task-hum_desc-timealigned_bold.json").read_text())
    assert sidecar["SliceTimeAlignment"]["AcceptedDoubts"][0]["AcceptedBy"].endswith(
        "sub-01/**")


def test_fix_takes_no_side_in_a_doubt_and_correct_still_refuses(ds: Path,
                                                                tmp_path: Path) -> None:
    # NIfTI-1 (nibabel's slice_order_codes): slice_code 2 is "sequential decreasing",
    # against the ascending SliceTiming of the sidecar; nibabel reads the header's times
    assert nib.nifti1.slice_order_codes.label[2] == "sequential decreasing"
    path, _ = build_run(ds, REL, SEQUENTIAL, slice_code=2, slice_duration=0.25)
    assert list(nib.load(path).header.get_slice_times()) == pytest.approx(SEQUENTIAL[::-1])
    sidecar = path.with_name(path.name.replace(".nii.gz", ".json"))
    before = sidecar.read_bytes()
    fixed = CliRunner().invoke(cli, ["fix", str(ds), "--apply", "--backup-dir",
                                     str(tmp_path / "backups")], catch_exceptions=False)
    assert fixed.exit_code == 1, fixed.output  # not planned is not success (issue 23)
    assert ("header/slice-code-mismatch not planned: the timing is in doubt "
            "(header/slice-code-mismatch): a person must decide which source is right"
            in fixed.output)
    assert sidecar.read_bytes() == before
    code, doc, _ = correct_json(ds, "--out", tmp_path / "out")
    assert code == 1 and doc["runs"][0]["status"] == "refused"
    assert "correct/timing-in-doubt" in [f["code"] for f in doc["runs"][0]["blocking_findings"]]


def test_a_doubt_the_source_series_raises_is_settled_from_it() -> None:
    # the source series is the scanner's own record: its doubts are the ones fix may
    # settle (by rebuilding from it); the header's or the protocol's are not
    from slicetime.rules.correction import undecided_doubt

    header = make_finding("header/slice-code-mismatch", "the header says another order")
    source = make_finding("source/reversed", "the source's times in reverse")
    assert undecided_doubt([source]) is None
    assert undecided_doubt([source, header]) == header
    assert undecided_doubt([header.with_severity(Severity.NOTE)]) is None


def test_two_echoes_that_disagree_are_both_refused(ds: Path, tmp_path: Path) -> None:
    # common practice (no source): the echoes of one run share its excitations, so
    # their slice times are one list; echo-1 ascending and echo-2 descending (the
    # reverse) leave no majority: neither echo's timing can be trusted
    for echo, times in ((1, SEQUENTIAL), (2, SEQUENTIAL[::-1])):
        build_run(ds, REL.replace("_bold", f"_echo-{echo}_bold"), times,
                  extra={"EchoTime": 0.015 * echo})
    code, doc, _ = correct_json(ds, "--out", tmp_path / "out")
    assert code == 1
    assert [r["status"] for r in doc["runs"]] == ["refused", "refused"]
    for run in doc["runs"]:
        assert "dataset/echo-mismatch" in [f["code"] for f in run["blocking_findings"]]


@pytest.mark.parametrize("force", [(), ("--force",)])
def test_an_image_that_is_not_one_time_series_is_refused_even_with_force(
        ds: Path, tmp_path: Path, force: tuple[str, ...]) -> None:
    # NIfTI-1 (dim[0]): a 3-D image is one volume, and a 5-D image whose dim[5] is above
    # 1 stacks several series (echoes, components) past the fourth axis; neither is one
    # series to interpolate along time, so no option makes them correctable
    single = "sub-01/func/sub-01_task-one_bold.nii.gz"
    stacked = "sub-01/func/sub-01_task-two_bold.nii.gz"
    side = {"RepetitionTime": 2.0, "SliceTiming": [0.0, 1.0, 0.5], "TaskName": "x"}
    write_run(ds, single, shape=(4, 4, 3), sidecar=side)
    write_run(ds, stacked, shape=(4, 4, 3, 8, 2), sidecar=side)
    code, doc, _ = correct_json(ds, "--out", tmp_path / "out", *force)
    by_path = {r["path"]: r for r in doc["runs"]}
    assert code == 1
    assert by_path[single]["status"] == "refused"
    assert "single volume" in by_path[single]["reason"]
    assert "even with --force" in by_path[single]["reason"]
    assert by_path[single]["blocking_findings"][-1]["code"] == "correct/too-few-volumes"
    assert by_path[stacked]["status"] == "refused"
    assert "[4, 4, 3, 8, 2]" in by_path[stacked]["reason"]
    assert by_path[stacked]["blocking_findings"][-1]["code"] == "correct/not-interpolable"
    assert not (tmp_path / "out" / "sub-01").exists()


def test_one_volume_is_said_in_the_singular() -> None:
    from slicetime.rules.correction import too_few_volumes

    assert (too_few_volumes(1) or "").startswith("the run has 1 volume;")
    assert (too_few_volumes(2) or "").startswith("the run has 2 volumes;")
    assert too_few_volumes(MIN_VOLUMES) is None
