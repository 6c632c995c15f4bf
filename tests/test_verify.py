"""slicetime verify: scoring, calibration, verdicts on simulated runs, the CLI and audit --verify.

The simulated runs are invented (``slicetime.pipelines.simulate``); the facts the
checks rest on are named beside them.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from helpers_bids import write_description, write_run

from slicetime.engines import verify as ev
from slicetime.engines.interpolate import ENGINES, resample
from slicetime.interfaces.cli import cli
from slicetime.pipelines.simulate import RunSimulation, simulate_run
from slicetime.pipelines.verify import BATCH_VOLUMES, candidates, verify_array
from slicetime.schemes.generate import Protocol, array_times

TR = 2.0


def _run(times: tuple[float, ...], *, seed: int, volumes: int = 300, shared: bool = True,
         physio: float = 10.0, noise: float = 25.0, inplane: int = 16) -> np.ndarray:
    sim = RunSimulation((inplane, inplane, len(times), volumes), TR, times,
                        amplitude=5.0 if shared else 0.0, drift=5.0 if shared else 0.0,
                        physio=physio, noise=noise, seed=seed)
    return simulate_run(sim)[0]


def _interleaved(n: int, start: int = 0, multiband: int = 1) -> tuple[float, ...]:
    return array_times(Protocol(n, "interleaved", True, 2, start, multiband,
                                repetition_time=TR))


def _sequential(n: int, ascending: bool = True, multiband: int = 1) -> tuple[float, ...]:
    return array_times(Protocol(n, "sequential", ascending, multiband=multiband,
                                repetition_time=TR))


# --------------------------------------------------------------------------- numerics


def test_per_row_shift_matches_the_fourier_engine() -> None:
    # Fourier shift theorem (textbook): a band-limited series is shifted exactly by a
    # phase ramp; our engine's fourier method is the independent implementation here
    import scipy.fft

    rng = np.random.default_rng(0)
    n = 200
    t = np.arange(n)
    rows = []
    for _ in range(3):
        f = rng.uniform(0.02, 0.3, 4)
        rows.append(np.sin(2 * np.pi * f[:, None] * t[None, :] + rng.uniform(0, 6, (4, 1)))
                    .sum(axis=0))
    x = np.asarray(rows)
    x -= x.mean(axis=1, keepdims=True)
    shifts = np.array([0.25, -0.4, 0.7])
    ours = ev.shift_rows(scipy.fft.dct(x, type=2, axis=1), shifts)
    for row, d in enumerate(shifts):
        samples = t * TR
        theirs = resample(ENGINES["fourier"], x[row:row + 1].astype(np.float32), samples,
                          samples + d * TR)[0]
        inner = slice(20, n - 20)
        assert np.max(np.abs(ours[row, inner] - theirs[inner])) < 0.05 * np.std(x[row])


def test_block_bootstrap_of_independent_values_gives_the_textbook_standard_error() -> None:
    # standard error of a mean of n independent values is sd / sqrt(n) (textbook)
    rng = np.random.default_rng(1)
    q = rng.normal(0.0, 1.0, (1, 400))
    reps = ev.block_bootstrap(q, block=1, n_boot=2000, seed=2)
    assert reps.shape == (2000, 1)
    assert np.std(reps) == pytest.approx(1 / np.sqrt(400), rel=0.1)


def test_pure_noise_scores_near_zero_for_every_schedule() -> None:
    # independent channels stay independent after any shift (common practice, no source)
    rng = np.random.default_rng(3)
    courses = rng.normal(0, 1, (40, 300))
    prepared = ev.prepare(courses, TR, np.repeat(np.arange(10), 4))
    for times in (_interleaved(10), _sequential(10), (0.0,) * 10):
        assert abs(ev.contributions(prepared, np.asarray(times)).mean()) < 0.01


def test_candidates_cover_orders_and_multiband_without_duplicates() -> None:
    claim = _interleaved(36)
    listed = candidates(claim, TR)
    names = [c.name for c in listed]
    assert listed[0].kind == "claimed" and listed[0].times == claim
    assert "no offsets (all slices at once)" in names
    assert "descending" in names and "interleaved ascending from 1" in names
    assert "multiband ×3, interleaved ascending from 0" in names
    assert not any("×5" in n for n in names)  # 5 does not divide 36
    keys = {tuple(round(t - min(c.times), 3) for t in c.times) for c in listed}
    assert len(keys) == len(names)
    # the claim itself is not listed again under its scheme name
    assert "interleaved ascending from 0" not in names


def test_spectral_scores_agree_with_the_time_domain_scores() -> None:
    # Parseval's theorem (textbook): the power of the aligned sum is the same in time
    # and frequency, up to the edges (periodic against mirrored extension)
    truth = _interleaved(12)
    data = _run(truth, seed=4, volumes=200)
    from slicetime.pipelines.verify import array_courses

    courses, slice_of = array_courses(data)
    prepared = ev.prepare(courses, TR, slice_of)
    schedules = [truth, _sequential(12), (0.0,) * 12]
    spectra, power = ev.slice_spectra(prepared, 12)
    spectral = ev.spectral_scores(spectra, power, np.asarray(schedules), TR, 200)
    timed = ev.score_matrix(prepared, schedules, trim=0).mean(axis=1)
    assert np.allclose(spectral, timed, atol=0.02)
    assert np.argmax(spectral) == 0 and np.argmax(timed) == 0
    maxima, mean, sd = ev.shuffle_maxima(spectra, power, truth, TR, 200, per_set=5, sets=20)
    assert maxima.shape == (20,) and mean < spectral[0] and sd > 0


# --------------------------------------------------------------------------- verdicts


@pytest.mark.parametrize("seed", [11, 12, 13])
def test_true_claims_are_supported_on_simulated_runs(seed: int) -> None:
    # the acquisition model of the simulator: each slice samples the signal at its own
    # time (common practice, no source); the claim is the true schedule
    truths = [_interleaved(24), _sequential(24, ascending=False), _interleaved(24, 1, 3)]
    truth = truths[seed % 3]
    decision = verify_array(_run(truth, seed=seed), truth, TR, seed=seed)
    assert decision.verdict != "contradicted"
    assert decision.verdict == "supported"


def test_wrong_claims_are_contradicted_in_most_runs() -> None:
    # wrong claims that converters and hand edits produce (common practice, no source):
    # the slice axis flipped, sequential for interleaved, the direction reversed,
    # a missing multiband factor
    cases = [
        (_sequential(24), _sequential(24)[::-1]),
        (_interleaved(24), _sequential(24)),
        (_interleaved(24, 1), _interleaved(24, 0)),
        (_interleaved(24, 0, 3), _interleaved(24, 0, 1)),
    ]
    verdicts = []
    for seed, (truth, claim) in enumerate(cases, start=20):
        decision = verify_array(_run(truth, seed=seed), claim, TR, seed=seed)
        verdicts.append(decision.verdict)
        assert decision.verdict != "supported"
        if decision.verdict == "contradicted":
            assert decision.effect is not None and decision.effect >= ev.MIN_EFFECT
            assert decision.z_rival is not None and decision.z_rival >= ev.Z_CONTRADICT
    assert verdicts.count("contradicted") >= 3


@pytest.mark.parametrize("seed", [31, 32, 33])
def test_runs_without_shared_signal_are_undecidable(seed: int) -> None:
    # no shared signal means no timing evidence (common practice, no source): pure noise,
    # and voxel-wise fluctuations with a random phase in every voxel
    truth = _interleaved(24)
    noise = _run(truth, seed=seed, shared=False, physio=0.0)
    assert verify_array(noise, _sequential(24), TR, seed=seed).verdict == "undecidable"
    voxelwise = _run(truth, seed=seed, shared=False, physio=30.0)
    assert verify_array(voxelwise, truth, TR, seed=seed).verdict == "undecidable"


def test_a_short_noisy_run_is_not_a_confident_verdict() -> None:
    truth = _interleaved(24)
    data = _run(truth, seed=41, volumes=40, noise=200.0)
    assert verify_array(data, _sequential(24), TR, seed=41).verdict == "undecidable"


# --------------------------------------------------------------------------- files and CLI


def _write(root: Path, rel: str, truth: tuple[float, ...], claim: tuple[float, ...], *,
           seed: int = 5, volumes: int = 300) -> Path:
    data = _run(truth, seed=seed, volumes=volumes)
    return write_run(root, rel, data=np.round(data).astype(np.int16), dtype=np.int16, tr=TR,
                     sidecar={"RepetitionTime": TR, "SliceTiming": list(claim),
                              "TaskName": "x"})


def _cli(*args: str) -> tuple[int, str, str]:
    result = CliRunner().invoke(cli, list(args), catch_exceptions=False)
    return result.exit_code, result.stdout, result.stderr


@pytest.fixture()
def dataset(tmp_path: Path) -> Path:
    root = tmp_path / "ds"
    write_description(root)
    truth = _interleaved(24)
    _write(root, "sub-01/func/sub-01_task-x_bold.nii.gz", truth, truth)
    _write(root, "sub-02/func/sub-02_task-x_bold.nii.gz", truth, _sequential(24), seed=6)
    return root


def test_cli_verdicts_exit_codes_and_json(dataset: Path) -> None:
    good = dataset / "sub-01/func/sub-01_task-x_bold.nii.gz"
    bad = dataset / "sub-02/func/sub-02_task-x_bold.nii.gz"
    code, out, err = _cli("verify", str(good))
    assert code == 0 and out.startswith("supported"), (out, err)
    code, out, _ = _cli("verify", str(good), str(bad), "--format", "json")
    assert code == 1
    report = json.loads(out)
    assert [r["verdict"] for r in report["runs"]] == ["supported", "contradicted"]
    finding = report["runs"][1]["finding"]
    assert finding["code"] == "verify/contradicted" and finding["severity"] == "warning"
    assert set(finding) == {"code", "severity", "message", "file", "field", "grounds", "evidence",
                            "hint"}
    assert finding["evidence"]["rival"] == "interleaved ascending from 0"
    assert report["summary"] == {"supported": 1, "contradicted": 1, "undecidable": 0}


def test_cli_truncated_and_missing_files_are_one_line_errors(dataset: Path) -> None:
    good = dataset / "sub-01/func/sub-01_task-x_bold.nii.gz"
    cut = dataset / "sub-03/func/sub-03_task-x_bold.nii"
    data = _run(_interleaved(24), seed=7, volumes=60)
    write_run(dataset, "sub-03/func/sub-03_task-x_bold.nii", data=data.astype(np.int16),
              dtype=np.int16, tr=TR, sidecar={"RepetitionTime": TR,
                                              "SliceTiming": list(_interleaved(24))})
    cut.write_bytes(cut.read_bytes()[: cut.stat().st_size // 2])
    code, out, err = _cli("verify", str(cut), str(good))
    assert code == 2
    lines = err.strip().splitlines()
    assert len(lines) == 1 and "sub-03_task-x_bold.nii" in lines[0]
    assert "Traceback" not in err
    assert "supported" in out  # the readable file is still verified
    code, _, err = _cli("verify", str(dataset / "nope.nii.gz"))
    assert code == 2 and len(err.strip().splitlines()) == 1 and "nope.nii.gz" in err


def test_cli_without_schedule_is_undecidable(tmp_path: Path) -> None:
    data = _run(_interleaved(12), seed=8, volumes=60)
    path = write_run(tmp_path, "run_bold.nii", data=data.astype(np.int16), dtype=np.int16,
                     tr=TR, sidecar={"RepetitionTime": TR})
    code, out, _ = _cli("verify", str(path), "--format", "json")
    assert code == 0
    run = json.loads(out)["runs"][0]
    assert run["verdict"] == "undecidable" and "schedule" in run["finding"]["evidence"]["reason"]


def test_audit_verify_adds_one_finding_per_run_and_keeps_the_report_valid(dataset: Path
                                                                          ) -> None:
    import jsonschema

    from slicetime.interfaces.report_json import report_schema

    code, out, _ = _cli("audit", str(dataset), "--format", "json", "--jobs", "1")
    plain = json.loads(out)
    assert not any(f["code"].startswith("verify/") for r in plain["runs"] for f in r["findings"])
    code, out, _ = _cli("audit", str(dataset), "--format", "json", "--verify", "--jobs", "1",
                        "--fail-on", "warning")
    report = json.loads(out)
    jsonschema.validate(report, report_schema())
    codes = {r["path"]: [f["code"] for f in r["findings"] if f["code"].startswith("verify/")]
             for r in report["runs"]}
    assert codes == {"sub-01/func/sub-01_task-x_bold.nii.gz": ["verify/supported"],
                     "sub-02/func/sub-02_task-x_bold.nii.gz": ["verify/contradicted"]}
    assert code == 1  # the contradiction is a warning


def test_reading_is_streamed_in_batches_without_loading_the_image(dataset: Path,
                                                                 monkeypatch: pytest.MonkeyPatch
                                                                 ) -> None:
    # memory bound: only batches of volumes are read, never the whole array
    import nibabel

    from slicetime.readers import volumes

    sizes: list[int] = []
    original = volumes.VolumeReader.read

    def spy(self: volumes.VolumeReader, count: int) -> np.ndarray:
        out = original(self, count)
        sizes.append(out.shape[0])
        return out

    def refuse(*args: object, **kwargs: object) -> None:
        raise AssertionError("the whole image was loaded")

    monkeypatch.setattr(volumes.VolumeReader, "read", spy)
    monkeypatch.setattr(nibabel.Nifti1Image, "get_fdata", refuse)
    monkeypatch.setattr(nibabel, "load", refuse)
    code, _, _ = _cli("verify", str(dataset / "sub-01/func/sub-01_task-x_bold.nii.gz"))
    assert code == 0
    assert max(sizes) <= BATCH_VOLUMES and sum(sizes) == 300
