"""`correct` under hostile and unlucky use: nothing in the inputs changes, outputs are
exactly what is expected, nothing stale or half written looks valid.

Each test builds its case on disk, snapshots the bytes of every input file, runs
the command and checks the inputs byte for byte afterwards. One test per item of
the "never lose a byte" list, named after what it protects.
"""

from __future__ import annotations

import hashlib
import json
import os
import signal
import subprocess
import sys
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import nibabel as nib
import numpy as np
import pytest
from click.testing import CliRunner

from slicetime.escapes import json_safe
from slicetime.interfaces.cli import cli
from slicetime.pipelines import correct as correct_module
from slicetime.pipelines.correct import CorrectOptions
from slicetime.pipelines.correct_batch import CorrectInterrupted, correct_paths
from slicetime.pipelines.executor import ProcessExecutor
from slicetime.readers.atomic import TEMP_PREFIX
from slicetime.readers.entities import sidecar_name
from tests.helpers_bids import patch_header, tree_hashes, write_description
from tests.test_correct import REL, build_run, interleaved, output_of

PARTIAL = TEMP_PREFIX


def snapshot(*roots: Path) -> dict[str, str]:
    """SHA-256 of every file under the roots (the bytes, nothing else)."""
    return tree_hashes(*roots)


def files_under(out: Path) -> list[str]:
    if not out.exists():
        return []
    return sorted(p.relative_to(out).as_posix() for p in out.rglob("*") if p.is_file())


def correct_json(*args: Any) -> tuple[int, dict[str, Any]]:
    result = CliRunner().invoke(cli, ["correct", *[os.fsdecode(a) if isinstance(a, Path)
                                                   else str(a) for a in args],
                                      "--format", "json"], catch_exceptions=False)
    return result.exit_code, json.loads(result.output)


def run_text(*args: Any) -> Any:
    return CliRunner().invoke(cli, [str(a) for a in args], catch_exceptions=False)


def provenance(out: Path) -> dict[str, Any]:
    return json.loads((out / correct_module.PROVENANCE_FILE).read_text(encoding="utf-8"))


def sidecar_of(image: Path) -> Path:
    return image.with_name(sidecar_name(image.name))


def assert_outputs_complete(out: Path) -> None:
    """Every output image has its sidecar and the reverse; nothing partial remains;
    the provenance file has one entry per output, with OutputPath and the sidecar's
    checksum of the image."""
    files = files_under(out)
    assert not [f for f in files if PARTIAL in f], files
    images = [f for f in files if f.endswith((".nii", ".nii.gz"))]
    sidecars = [f for f in files if f.endswith(".json") and "/" in f]
    for image in images:
        assert sidecar_name(image) in sidecars, image
    for sidecar in sidecars:
        stem = sidecar[: -len(".json")]
        assert stem + ".nii.gz" in images or stem + ".nii" in images, sidecar
    if images:
        runs = provenance(out)["Runs"]
        # names that are not UTF-8 are written as \xNN escapes, as the reports write them
        shown = {json_safe(image): image for image in images}
        assert sorted(runs) == sorted(shown)
        for key, entry in runs.items():
            assert entry["OutputPath"] == key
            digest = hashlib.sha256((out / shown[key]).read_bytes()).hexdigest()
            assert entry["Output"]["SHA256"] == digest  # hashlib is the reference


@pytest.fixture
def ds(tmp_path: Path) -> Path:
    root = tmp_path / "ds"
    write_description(root)
    return root


# ------------------------------------------------------------------ item 4


def test_runs_differing_only_in_desc_never_share_an_output(ds: Path, tmp_path: Path) -> None:
    a = "sub-01/func/sub-01_task-hum_desc-first_bold.nii.gz"
    b = "sub-01/func/sub-01_task-hum_desc-second_bold.nii.gz"
    for rel in (a, b, REL.replace("sub-01", "sub-02")):
        build_run(ds, rel, interleaved(8))
    before = snapshot(ds)
    out = tmp_path / "out"
    code, report = correct_json(ds, "--out", out)
    assert code == 1
    by_path = {r["path"]: r for r in report["runs"]}
    for mine, other in ((a, b), (b, a)):
        run = by_path[mine]
        assert run["status"] == "refused"
        assert [f["code"] for f in run["blocking_findings"]] == ["correct/output-clash"]
        assert mine in run["reason"] and other in run["reason"]
    assert by_path[REL.replace("sub-01", "sub-02")]["status"] == "corrected"
    assert not (out / "sub-01").exists()
    # a rerun is stable: the same refusals, the good run is not redone
    code, again = correct_json(ds, "--out", out)
    assert [r["status"] for r in again["runs"]] == ["refused", "refused", "up-to-date"]
    assert snapshot(ds) == before
    assert_outputs_complete(out)
    # the code is documented (explain covers every code a report can hold)
    assert "two inputs would be written" in run_text("explain", "correct/output-clash").output


def test_nii_and_nii_gz_twins_never_share_a_sidecar(ds: Path, tmp_path: Path) -> None:
    build_run(ds, REL, interleaved(8))
    build_run(ds, REL.replace(".nii.gz", ".nii"), interleaved(8))
    before = snapshot(ds)
    out = tmp_path / "out"
    code, report = correct_json(ds, "--out", out)
    assert code == 1
    assert [r["status"] for r in report["runs"]] == ["refused", "refused"]
    assert all("correct/output-clash" in json.dumps(r["blocking_findings"])
               for r in report["runs"])
    assert files_under(out) == []
    assert snapshot(ds) == before


# ------------------------------------------------------------------ item 5


def test_out_is_checked_against_roots_that_contribute_no_run(tmp_path: Path) -> None:
    ds1, ds2 = tmp_path / "ds1", tmp_path / "ds2"
    write_description(ds1)
    write_description(ds2)
    build_run(ds1, REL, interleaved(8))
    (ds2 / "sub-01").mkdir()  # a dataset with no runs at all
    before = snapshot(ds1, ds2)
    for out in (ds2 / "sub-01", ds2, ds2 / "aligned"):
        result = run_text("correct", ds1, ds2, "--out", out)
        assert result.exit_code == 2, (out, result.output)
        # refused for --out, or (first) because ds2 holds no run at all: either way one
        # line, exit 2, and nothing written
        assert ("--out" in result.output or "no functional runs" in result.output)
        assert len(result.output.strip().splitlines()) == 1
    # also a given path that is not a dataset root: the outputs would land among inputs
    holder = tmp_path / "studies"
    write_description(holder / "ds3")
    build_run(holder / "ds3", REL, interleaved(8))
    before_holder = snapshot(holder)
    result = run_text("correct", holder, "--out", holder / "corrected")
    assert result.exit_code == 2 and "is inside the input" in result.output
    assert snapshot(ds1, ds2) == before and snapshot(holder) == before_holder
    assert not (ds2 / "aligned").exists() and not (holder / "corrected").exists()


# ------------------------------------------------------------------ item 6


def test_an_out_folder_of_another_dataset_is_refused_and_provenance_stays_true(
    tmp_path: Path,
) -> None:
    ds1, ds2 = tmp_path / "ds1", tmp_path / "ds2"
    for root in (ds1, ds2):
        write_description(root)
    build_run(ds1, REL, interleaved(8))
    build_run(ds2, REL, interleaved(8), shape=(5, 4, 8, 30))  # same path, other data
    rel2 = REL.replace("sub-01", "sub-02")
    build_run(ds2, rel2, interleaved(8))
    out = tmp_path / "out"
    assert correct_json(ds1, "--out", out)[0] == 0
    kept = snapshot(out)
    before = snapshot(ds1, ds2)
    refused = run_text("correct", ds2, "--out", out)
    assert refused.exit_code == 2 and "--mix-inputs" in refused.output
    assert len(refused.output.strip().splitlines()) == 1
    assert snapshot(out) == kept
    # asked for: ds2's new run is added, its clashing run is refused, ds1's output kept
    code, report = correct_json(ds2, "--out", out, "--mix-inputs")
    assert code == 1
    statuses = {r["path"]: r["status"] for r in report["runs"]}
    assert statuses == {REL: "refused", rel2: "corrected"}
    first = output_of(out, REL)
    key = os.fsdecode(first.relative_to(out))
    assert hashlib.sha256(first.read_bytes()).hexdigest() == kept[key]
    links = json.loads((out / "dataset_description.json").read_text())["DatasetLinks"]
    for rel, root in ((REL, ds1), (rel2, ds2)):
        side = json.loads(sidecar_of(output_of(out, rel)).read_text())
        (source,) = side["Sources"]
        name = source.split(":")[1]
        # BIDS URI bids:<name>:<path> resolves through DatasetLinks to the true input
        assert links[name] == root.resolve().as_uri()
        assert source == f"bids:{name}:{rel}"
        assert side["SliceTimeAlignment"]["Inputs"]["Dataset"] == root.resolve().as_uri()
        entry = provenance(out)["Runs"][output_of(out, rel).relative_to(out).as_posix()]
        assert entry["Sources"] == side["Sources"]
    assert snapshot(ds1, ds2) == before
    assert_outputs_complete(out)


# ------------------------------------------------------------------ item 8


def test_a_refused_rerun_removes_its_stale_output_and_says_so(ds: Path, tmp_path: Path):
    build_run(ds, REL, interleaved(8))
    keep = REL.replace("sub-01", "sub-02")
    build_run(ds, keep, interleaved(8))
    out = tmp_path / "out"
    assert correct_json(ds, "--out", out)[0] == 0
    sidecar = ds / REL.replace(".nii.gz", ".json")
    content = json.loads(sidecar.read_text())
    content["SliceTiming"] = [t * 1000 for t in content["SliceTiming"]]  # now wrong
    sidecar.write_text(json.dumps(content))
    before = snapshot(ds)
    code, report = correct_json(ds, "--out", out)
    assert code == 1
    run = report["runs"][0]
    stale = output_of(out, REL).relative_to(out).as_posix()
    assert run["status"] == "refused" and run["removed_output"] == stale
    assert f"its earlier output {stale} was removed" in run["reason"]
    assert not output_of(out, REL).exists() and not sidecar_of(output_of(out, REL)).exists()
    record = provenance(out)
    assert stale not in record["Runs"] and stale in record["Removed"]
    assert report["runs"][1]["status"] == "up-to-date"
    assert snapshot(ds) == before
    assert_outputs_complete(out)


# ------------------------------------------------------------------ item 10


def test_a_name_that_is_not_utf8_never_leaves_an_image_alone(ds: Path, tmp_path: Path):
    odd = os.fsdecode(b"sub-01/func/take\xe9/sub-01_task-hum_bold.nii.gz")
    build_run(ds, odd, interleaved(8))
    build_run(ds, REL.replace("sub-01", "sub-02"), interleaved(8))
    before = snapshot(ds)
    out = tmp_path / "out"
    result = run_text("correct", ds, "--out", out)
    assert "Traceback" not in result.output and "internal error" not in result.output
    assert "take\\xe9" in result.output  # escaped as the audit escapes it
    code, report = correct_json(ds, "--out", out)
    assert code == 0
    assert [r["status"] for r in report["runs"]] == ["up-to-date", "up-to-date"]
    side = json.loads(sidecar_of(out / odd.replace("_bold", "_desc-timealigned_bold"))
                      .read_text(encoding="utf-8"))
    assert side["Sources"] == ["bids:raw:sub-01/func/take\\xe9/sub-01_task-hum_bold.nii.gz"]
    assert snapshot(ds) == before
    assert_outputs_complete(out)


def test_a_sidecar_that_cannot_be_written_takes_its_image_with_it(
    ds: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    build_run(ds, REL, interleaved(8))
    build_run(ds, REL.replace("sub-01", "sub-02"), interleaved(8))
    real = correct_module.write_json_atomic

    def refuse_first_sidecar(path: Path, content: Any) -> None:
        if "sub-01_task" in path.name:
            raise OSError(28, "No space left on device")
        real(path, content)

    monkeypatch.setattr(correct_module, "write_json_atomic", refuse_first_sidecar)
    out = tmp_path / "out"
    code, report = correct_json(ds, "--out", out, "--jobs", "1")
    assert code == 1
    assert [r["status"] for r in report["runs"]] == ["failed", "corrected"]
    assert "No space left on device" in report["runs"][0]["reason"]
    assert not (out / "sub-01").exists()  # no image without its sidecar, no folder
    assert_outputs_complete(out)


# ------------------------------------------------------------------ item 15


class _DyingWriter(correct_module.VolumeWriter):
    """Writes one batch of sub-02's image, then its process dies (as under OOM)."""

    def write(self, volumes: np.ndarray) -> None:
        super().write(volumes)
        if "sub-02" in str(self.path.parent):
            self._raw.flush()
            os._exit(9)


def test_a_lost_worker_leaves_no_partial_file(
    ds: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    rels = [REL.replace("sub-01", f"sub-0{i}") for i in (1, 2, 3, 4)]
    for rel in rels:
        build_run(ds, rel, interleaved(8))
    before = snapshot(ds)
    monkeypatch.setattr(correct_module, "VolumeWriter", _DyingWriter)  # inherited by fork
    out = tmp_path / "out"
    result = correct_paths([ds], CorrectOptions(out=out), executor=ProcessExecutor(2))
    statuses = [r.status for r in result.runs]
    assert statuses == ["corrected", "failed", "corrected", "corrected"]
    assert "stopped unexpectedly" in (result.runs[1].reason or "")
    assert not (out / "sub-02").exists()
    assert snapshot(ds) == before
    assert_outputs_complete(out)


def test_provenance_names_every_output_after_a_killed_batch(ds: Path, tmp_path: Path):
    rels = [REL.replace("sub-01", f"sub-0{i}") for i in (1, 2, 3)]
    for rel in rels:
        build_run(ds, rel, interleaved(8))
    out = tmp_path / "out"
    assert correct_json(ds, "--out", out)[0] == 0
    fresh = provenance(out)["Runs"]
    # a batch killed before it wrote the provenance file: outputs without entries
    (out / correct_module.PROVENANCE_FILE).unlink()
    build_run(ds, REL.replace("sub-01", "sub-04"), interleaved(8))
    code, report = correct_json(ds, "--out", out)
    assert code == 0
    assert [r["status"] for r in report["runs"]] == ["up-to-date"] * 3 + ["corrected"]
    resumed = provenance(out)["Runs"]
    for key, entry in fresh.items():
        assert resumed[key] == entry  # every field, OutputPath included
    assert len(resumed) == 4 and all("OutputPath" in e for e in resumed.values())
    assert_outputs_complete(out)


def test_kill_9_then_resume_gives_complete_outputs_and_provenance(
    ds: Path, tmp_path: Path
) -> None:
    rels = [REL.replace("sub-01", f"sub-{i:02d}") for i in range(1, 7)]
    for rel in rels:
        build_run(ds, rel, interleaved(16), shape=(40, 40, 16, 120))
    before = snapshot(ds)
    out = tmp_path / "out"
    command = [sys.executable, "-m", "slicetime", "correct", str(ds), "--out", str(out),
               "--jobs", "1"]
    process = subprocess.Popen(command, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline and process.poll() is None:
        if sidecar_of(output_of(out, rels[0])).exists():
            break
        time.sleep(0.01)
    process.send_signal(signal.SIGKILL)
    process.wait()
    code, report = correct_json(ds, "--out", out)
    assert code == 0
    assert {r["status"] for r in report["runs"]} <= {"corrected", "up-to-date"}
    assert len(report["runs"]) == 6
    assert snapshot(ds) == before
    assert_outputs_complete(out)
    keys = {frozenset(e) for e in provenance(out)["Runs"].values()}
    assert len(keys) == 1  # every entry has the same fields, earlier runs included


# ------------------------------------------------------------------ item 17


@pytest.mark.parametrize(
    ("slope", "inter"),
    [(1e36, 0.0), (2.0, float("inf")), (-1e36, 5.0)],
)
def test_scaling_beyond_float32_is_refused_not_written_as_inf(
    ds: Path, tmp_path: Path, slope: float, inter: float
) -> None:
    path, _ = build_run(ds, REL, interleaved(8), dtype=np.int16)
    patch_header(path, scl_slope=slope, scl_inter=inter)
    if not np.isfinite(inter):
        # nibabel, the reference reader, refuses a valid slope with an invalid intercept
        with pytest.raises(nib.spatialimages.HeaderDataError):
            nib.load(path).header.get_slope_inter()
    before = snapshot(ds)
    out = tmp_path / "out"
    code, report = correct_json(ds, "--out", out, "--force")
    assert code == 1
    (run,) = report["runs"]
    assert run["status"] == "refused"
    assert "correct/scaling-range" in [f["code"] for f in run["blocking_findings"]]
    assert "float32" in run["reason"] or "undefined" in run["reason"]
    assert files_under(out) == []
    assert snapshot(ds) == before


def test_float64_values_beyond_float32_are_refused(ds: Path, tmp_path: Path) -> None:
    path, _ = build_run(ds, REL, interleaved(8), dtype=np.float64)
    image = nib.load(path)
    data = np.asarray(image.dataobj)
    data[1, 1, 1, 3] = 1e300  # finite in float64, inf in float32 (IEEE 754 ranges)
    nib.save(nib.Nifti1Image(data, image.affine, image.header), path)
    out = tmp_path / "out"
    code, report = correct_json(ds, "--out", out)
    assert code == 1 and report["runs"][0]["status"] == "refused"
    assert "beyond the float32 range" in report["runs"][0]["reason"]
    assert f"(about {float32_range_from_numpy()})" in report["runs"][0]["reason"]
    assert files_under(out) == []


def float32_range_from_numpy() -> str:
    """The float32 range in the words of the messages, from numpy's finfo (IEEE 754
    binary32: largest finite value 3.4028235e38)."""
    top = float(np.finfo(np.float32).max)
    exponent = int(np.floor(np.log10(top)))
    return f"±{round(top / 10 ** exponent, 1)} × 10^{exponent}"


def test_a_scaling_beyond_float32_in_a_nifti2_header_names_the_range(
        ds: Path, tmp_path: Path) -> None:
    # NIfTI-2 stores scl_slope as float64: 1e39 is finite there, beyond float32; the
    # refusal writes the range as every message does, never in scientific notation
    path, _ = build_run(ds, REL, interleaved(8), dtype=np.int16, version=2)
    patch_header(path, scl_slope=1e39)
    code, report = correct_json(ds, "--out", tmp_path / "out", "--force")
    reason = report["runs"][0]["reason"]
    assert code == 1 and "lie beyond the float32 range" in reason, reason
    assert f"(about {float32_range_from_numpy()})" in reason and "e+38" not in reason
    # the header's own value too (it once read "scl_slope 1e+39")
    assert "scl_slope 1 × 10^39" in reason and "e+39" not in reason


# ------------------------------------------------------------------ item 18


@pytest.mark.parametrize(
    ("tr", "times_scale", "expect"),
    [
        (2000.0, 1000.0, "RepetitionTime 2000 is above the longest plausible TR"),  # all in ms
        (1e9, 1.0, "RepetitionTime 1,000,000,000 is above the longest plausible TR"),
        (0.002, 0.001, "RepetitionTime 0.002 is below the shortest plausible TR"),
    ],
)
def test_the_plausibility_gate_holds_even_with_force(
    ds: Path, tmp_path: Path, tr: float, times_scale: float, expect: str
) -> None:
    times = [t * times_scale for t in interleaved(8)]  # 0 .. 1.75 s scaled
    build_run(ds, REL, times, extra={"RepetitionTime": tr})
    before = snapshot(ds)
    out = tmp_path / "out"
    for extra in ([], ["--force"]):
        code, report = correct_json(ds, "--out", out, *extra)
        (run,) = report["runs"]
        assert code == 1 and run["status"] == "refused", run
        assert expect in run["reason"]
        assert "correct/implausible-timing" in [f["code"] for f in run["blocking_findings"]]
        assert not run["warnings"]
    assert files_under(out) == []
    assert snapshot(ds) == before


def test_the_audit_reports_the_tr_the_correction_refuses(ds: Path, tmp_path: Path) -> None:
    # one judgement of the bounds (model.implausible_repetition): a TR of 0.002 s, which
    # correct refuses even with --force, is an audit error too (it was reported clean)
    build_run(ds, REL, [t * 0.001 for t in interleaved(8)], extra={"RepetitionTime": 0.002})
    result = run_text("audit", ds, "--format", "json")
    (run,) = json.loads(result.output)["runs"]
    assert result.exit_code == 1
    (found,) = [f for f in run["findings"] if f["code"] == "tr/implausible"]
    assert "below the shortest plausible TR (0.05 s)" in found["message"]
    assert found["severity"] == "error"


def test_plausibility_bounds_are_defined_once() -> None:
    from slicetime.engines import plan

    assert plan.MIN_REPETITION_TIME == 0.05 and plan.MAX_REPETITION_TIME == 100.0
    assert "0.05 to 100 s" in run_text("explain", "correct/implausible-timing").output


# ------------------------------------------------------------------ item 19


def test_a_forced_run_is_reported_once_as_corrected(ds: Path, tmp_path: Path) -> None:
    build_run(ds, REL, interleaved(8))
    image = nib.load(ds / REL)
    image.header.set_zooms((1.0, 1.0, 1.0, 3.0))  # header TR disagrees: an audit error
    nib.save(nib.Nifti1Image(np.asarray(image.dataobj), image.affine, image.header), ds / REL)
    out = tmp_path / "out"
    result = run_text("correct", ds, "--out", out, "--force")
    assert result.exit_code == 0
    lines = result.output.splitlines()
    assert sum(line.startswith("corrected") for line in lines) == 1
    assert not any("refused" in line for line in lines)
    assert sum("corrected despite audit error" in line for line in lines) == 1


def test_a_forced_run_that_is_refused_never_claims_correction(ds: Path, tmp_path: Path):
    times_ms = [t * 1000 for t in interleaved(8)]
    build_run(ds, REL, times_ms)
    result = run_text("correct", ds, "--out", tmp_path / "out", "--force")
    assert result.exit_code == 1
    assert "refused" in result.output and "corrected despite" not in result.output


# ------------------------------------------------------------------ item 20


def test_control_characters_in_names_are_escaped_in_every_format(ds: Path, tmp_path: Path):
    odd = "sub-01/func/a\x1b[2Jb\u202e\n/sub-01_task-hum_bold.nii.gz"
    build_run(ds, odd, interleaved(8))
    out = tmp_path / "out"
    result = run_text("correct", ds, "--out", out)
    assert result.exit_code == 0, result.output
    assert "\x1b" not in result.output and "a\\x1b[2Jb" in result.output
    for line in result.output.splitlines():
        assert "\n" not in line and "\r" not in line
    code, report = correct_json(ds, "--out", out)
    assert code == 0 and report["runs"][0]["path"] == odd  # JSON escapes it itself


# ------------------------------------------------------- issue 15: Ctrl-C


def test_ctrl_c_stops_the_workers_and_reports_exactly_what_is_on_disk(
    ds: Path, tmp_path: Path
) -> None:
    rels = [REL.replace("sub-01", f"sub-{i:02d}") for i in range(1, 7)]
    for rel in rels:
        build_run(ds, rel, interleaved(16), shape=(24, 24, 16, 80))
    before = snapshot(ds)
    out = tmp_path / "out"
    seen = {"n": 0}

    def interrupt_after_first(done: int, total: int, failed: int) -> None:
        seen["n"] += 1
        if seen["n"] == 1:
            raise KeyboardInterrupt  # as Ctrl-C arrives in the parent

    with pytest.raises(CorrectInterrupted) as stop:
        correct_paths([ds], CorrectOptions(out=out), executor=ProcessExecutor(2),
                      progress=interrupt_after_first)
    reported = sorted(r.output for r in stop.value.result.runs if r.ok and r.output)
    on_disk = files_under(out)
    time.sleep(1.0)  # nothing is written after the report
    assert files_under(out) == on_disk
    images = [f for f in on_disk if f.endswith(".nii.gz")]
    assert images == reported
    assert stop.value.not_finished == len(rels) - len(reported)
    assert snapshot(ds) == before
    assert_outputs_complete(out)


def _write_marker_after_a_pause(items: Sequence[str]) -> list[str]:
    time.sleep(1.5)
    for item in items:
        Path(item).write_text("written")
    return list(items)


def test_ctrl_c_ends_running_workers_before_it_returns(tmp_path: Path) -> None:
    from slicetime.pipelines.executor import Interrupted

    items = [str(tmp_path / f"marker{i}") for i in range(4)]
    calls = {"n": 0}

    def progress(done: int, total: int, failed: int) -> None:
        calls["n"] += 1
        raise KeyboardInterrupt

    executor = ProcessExecutor(2)
    with pytest.raises(Interrupted):
        executor.map_chunks(_write_marker_after_a_pause, items, lost=lambda i, w: "",
                            chunk_size=1, progress=progress)
    written = sorted(p.name for p in tmp_path.iterdir())
    time.sleep(2.0)
    assert sorted(p.name for p in tmp_path.iterdir()) == written
    assert len(written) <= 2  # the two that finished together at most; none after
