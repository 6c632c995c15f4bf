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
from slicetime.interfaces.cli import cli
from slicetime.pipelines.simulate import BrainRun, RunSimulation, simulate_brain, simulate_run
from slicetime.pipelines.verify import BATCH_VOLUMES, NO_OFFSETS, candidates, verify_array
from slicetime.schemes.generate import Protocol, array_times
from slicetime.schemes.infer import infer_scheme

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


def _brain(times: tuple[float, ...], tr: float, *, seed: int, volumes: int = 300,
           **kwargs: float | str) -> np.ndarray:
    # BrainRun's task response is the canonical double-gamma response checked against
    # nilearn's "glover" model in tests/test_validation.py; respiration and cardiac rates
    # are the adult resting ranges (common practice, no source)
    sim = BrainRun((20, 20, len(times), volumes), tr, times, seed=seed, **kwargs)
    return simulate_brain(sim)


def test_a_sampled_oscillation_appears_aliased_with_phases_of_its_true_frequency() -> None:
    # sampling theorem (any signal-processing text): a sinusoid at g Hz sampled every TR
    # appears at |g - k/TR| for the nearest integer k; each slice samples it at its own
    # time t_z, so its phase there is 2 pi g t_z, set by the TRUE frequency
    tr, g, n = 2.5, 0.3, 200  # a whole number of cycles: no leakage
    times = np.asarray(_sequential(10)) * tr / TR
    series = np.cos(2 * np.pi * g * (np.arange(n)[None, :] * tr + times[:, None]))
    spectra = np.fft.rfft(series, axis=1)
    peak = int(np.argmax(np.abs(spectra[0])))
    assert peak / (n * tr) == pytest.approx(abs(g - 1 / tr), abs=1 / (n * tr))
    phase = np.angle(spectra[:, peak] * np.conj(spectra[0, peak]))
    # the peak sits at the folded (negative) image of g: phases run as -2 pi g t_z
    expected = np.angle(np.exp(-2j * np.pi * g * (times - times[0])))
    assert np.allclose(np.angle(np.exp(1j * (phase - expected))), 0.0, atol=1e-6)
    # the alias orders offered at that bin include g's own (f - 1/TR = -g)
    freqs = np.arange(1, n // 2 + 1) / (n * tr)
    ks, valid = ev.alias_orders(freqs, tr)
    k = round(float((-g - freqs[peak - 1]) * tr))
    assert k in ks and valid[list(ks).index(k), peak - 1]
    assert not valid[:, :].all()  # some orders exceed the highest modelled frequency


def test_aliased_oscillation_is_aligned_by_the_true_schedule_not_the_reversed_one() -> None:
    # the same physics: with k free, the true schedule aligns every slice exactly at the
    # aliased bin (pairwise coherence 1); the reversed order and no offsets do not
    tr, g, n = 2.5, 0.27, 200  # 0.27 Hz appears at 0.13 Hz, a whole number of cycles
    truth = np.asarray(_interleaved(12)) * tr / TR
    rng = np.random.default_rng(0)
    courses = []
    for z in range(12):
        for _ in range(2):
            courses.append(np.cos(2 * np.pi * g * (np.arange(n) * tr + truth[z]))
                           + 0.05 * rng.normal(size=n))
    prepared = ev.prepare(np.asarray(courses), tr, np.repeat(np.arange(12), 2))
    spectra = ev.region_spectra(prepared, 12, np.tile([0, 1], 12))
    peak = int(np.argmin(np.abs(spectra.freqs - abs(g - 1 / tr))))
    reversed_times = truth.max() - truth
    total = ev.bin_scores(spectra, np.stack([truth, reversed_times, np.zeros(12)])).total
    diagonal = spectra.diagonal[peak]
    coherence = (total[:, peak] - diagonal) / (23 * diagonal)
    assert coherence[0] > 0.99
    assert coherence[1] < 0.8 and coherence[2] < 0.5, coherence


def test_the_sign_invariant_score_is_the_best_real_gain_fit() -> None:
    # linear algebra (textbook): with y = a + ib, Re(y y^H) = a a^T + b b^T, and its top
    # eigenvalue (the power one common component with a free real gain per channel
    # explains) is (|y|^2 + |sum y_c^2|) / 2; checked against numpy's symmetric eigensolver
    rng = np.random.default_rng(8)
    for _ in range(20):
        y = rng.normal(size=9) + 1j * rng.normal(size=9)
        top = np.linalg.eigvalsh(np.real(np.outer(y, y.conj())))[-1]
        assert top == pytest.approx((np.sum(np.abs(y) ** 2) + abs(np.sum(y ** 2))) / 2)


def test_opposite_signs_cancel_the_true_alignment_but_not_the_sign_invariant_one() -> None:
    # an oscillation aliased as in the test above (sampling theorem), but of opposite sign
    # in the lower and upper slices: the true schedule's delay-and-sum cancels it, while
    # the sign-invariant score (a sign is a phase of pi, which squaring removes) still
    # aligns every slice under the true schedule and not under the reversed order
    tr, g, n, nz = 2.5, 0.27, 200, 12
    truth = np.asarray(_sequential(nz)) * tr / TR
    signs = np.where(np.arange(nz) < nz // 2, 1.0, -1.0)
    rng = np.random.default_rng(0)
    courses = [signs[z] * np.cos(2 * np.pi * g * (np.arange(n) * tr + truth[z]))
               + 0.05 * rng.normal(size=n) for z in range(nz) for _ in range(2)]
    prepared = ev.prepare(np.asarray(courses), tr, np.repeat(np.arange(nz), 2))
    spectra = ev.region_spectra(prepared, nz, np.tile([0, 1], nz))
    peak = int(np.argmin(np.abs(spectra.freqs - abs(g - 1 / tr))))
    schedules = np.stack([truth, truth.max() - truth])
    linear = ev.bin_scores(spectra, schedules).total[:, peak]
    diagonal = spectra.diagonal[peak]
    assert (linear[0] - diagonal) / (23 * diagonal) < 0.6  # largely cancelled
    twice = ev.doubled(spectra)
    signed = ev.bin_scores(twice, schedules, 2 * ev.MAX_TRUE_HZ).total[:, peak]
    rows = twice.channels
    coherence = (signed - twice.diagonal[peak]) / ((rows - 1) * twice.diagonal[peak])
    assert coherence[0] > 0.99 and coherence[1] < 0.8, coherence


def test_noise_scores_the_same_for_every_schedule_on_average() -> None:
    # choosing the alias order on one half and counting power on the other keeps noise
    # from favouring any schedule (independent noise: E|sum|^2 = sum of variances,
    # whatever the phases; textbook)
    schedules = np.stack([_interleaved(12), _sequential(12), _interleaved(12, 0, 3),
                          np.zeros(12)])
    rng = np.random.default_rng(3)
    totals = []
    for _ in range(40):
        prepared = ev.prepare(rng.normal(0, 1, (24, 200)), TR, np.repeat(np.arange(12), 2))
        spectra = ev.region_spectra(prepared, 12, np.tile([0, 1], 12))
        totals.append(ev.normalise(ev.weigh(ev.bin_scores(spectra, schedules).total,
                                            spectra).sum(axis=1), spectra))
    mean = np.mean(totals, axis=0)
    sd = np.std(totals, axis=0) / np.sqrt(40)
    assert np.all(np.abs(mean) < 4 * sd + 0.002)


def test_shuffled_orders_score_as_the_same_orders_given_as_candidates() -> None:
    rng = np.random.default_rng(5)
    for claim in (np.asarray(_interleaved(12)), np.asarray(_interleaved(12, 0, 3))):
        prepared = ev.prepare(rng.normal(0, 1, (24, 120)), TR, np.repeat(np.arange(12), 2))
        spectra = ev.region_spectra(prepared, 12, np.tile([0, 1], 12))
        fast = ev.shuffled_totals(spectra, claim, 6, seed=9)
        order = np.argsort(np.random.default_rng(9 + 7919).random((6, 12)), axis=1)
        schedules = np.empty((6, 12))
        for q in range(6):
            schedules[q, order[q]] = np.sort(claim)
        slow = ev.weigh(ev.bin_scores(spectra, schedules).total, spectra).sum(axis=1)
        assert np.allclose(fast, slow, rtol=1e-4)


def test_block_bootstrap_of_independent_values_gives_the_textbook_standard_error() -> None:
    # standard error of a mean of n independent values is sd / sqrt(n) (textbook)
    rng = np.random.default_rng(1)
    q = rng.normal(0.0, 1.0, (1, 400))
    reps = ev.block_bootstrap(q, block=1, n_boot=2000, seed=2)
    assert reps.shape == (2000, 1)
    assert np.std(reps) == pytest.approx(1 / np.sqrt(400), rel=0.1)


def test_a_narrow_band_peak_weighs_no_more_than_its_neighbours() -> None:
    diagonal = np.ones(60)
    diagonal[30] = 1000.0  # a periodic component's peak
    weights = ev.bin_weights(diagonal)
    assert weights[30] * diagonal[30] == pytest.approx(1.0)
    assert weights[10] * diagonal[10] == pytest.approx(1.0)


def test_candidates_cover_orders_and_multiband_without_duplicates() -> None:
    claim = _interleaved(36)
    listed = candidates(claim, TR)
    names = [c.name for c in listed]
    assert listed[0].kind == "claimed" and listed[0].times == claim
    assert NO_OFFSETS in names
    assert "descending" in names and "interleaved ascending from 1" in names
    assert "multiband ×3, interleaved ascending from 0" in names
    assert not any("×5" in n for n in names)  # 5 does not divide 36
    keys = {tuple(round(t - min(c.times), 3) for t in c.times) for c in listed}
    assert len(keys) == len(names)
    # the claim itself is not listed again under its scheme name
    assert "interleaved ascending from 0" not in names


@pytest.mark.parametrize("claim", [_interleaved(24), _sequential(24, False),
                                   _interleaved(24, 1, 3), (0.0, 1.2, 0.4, 1.6, 0.8, 0.2,
                                                            1.4, 0.6, 1.8, 1.0)])
def test_every_alternative_is_named_by_the_label_show_gives_its_times(
        claim: tuple[float, ...]) -> None:
    # the order to adopt is named in the words of `show` (the scheme inferred from the
    # times, schemes.infer); never an operation on the claim ("flipped", "reversed")
    for candidate in candidates(claim, TR)[1:]:
        if candidate.name == NO_OFFSETS:
            assert set(candidate.times) == {0.0}
            continue
        assert candidate.name == infer_scheme(candidate.times).label, candidate
        assert "flipped" not in candidate.name and "reversed" not in candidate.name


# --------------------------------------------------------------------------- verdicts


@pytest.mark.parametrize("seed", [11, 12, 13])
def test_true_claims_are_supported_on_simulated_runs(seed: int) -> None:
    # the acquisition model of the simulator: each slice samples the signal at its own
    # time (common practice, no source); the claim is the true schedule
    truths = [_interleaved(24), _sequential(24, ascending=False), _interleaved(24, 1, 3)]
    truth = truths[seed % 3]
    decision = verify_array(_brain(truth, TR, seed=seed), truth, TR, seed=seed)
    assert decision.verdict == "supported", decision
    # a slow shared signal alone (no physiology) cannot single out the claim from
    # schedules close to it in time: never contradicted, and not "supported" for free
    slow = verify_array(_run(truth, seed=seed), truth, TR, seed=seed)
    assert slow.verdict in ("supported", "consistent")


@pytest.mark.parametrize(("tr", "rate", "seed"), [(2.0, (0.22, 0.32), 51),
                                                  (2.5, (0.22, 0.32), 52),
                                                  (2.5, (0.3, 0.35), 53),
                                                  (2.0, (0.2, 0.26), 54)])
def test_aliased_respiration_never_turns_a_true_claim_into_a_contradiction(
        tr: float, rate: tuple[float, float], seed: int) -> None:
    # at TR 2-2.5 s respiration (0.2-0.35 Hz in adults at rest: common practice, no
    # source) lies above the Nyquist frequency 1/(2 TR) and aliases (sampling theorem);
    # its slice phases then point towards the reversed order unless the true frequency
    # is modelled. Strong respiration and cardiac pulsation, weak neural signal.
    truth = tuple(t * tr / TR for t in (_sequential(24), _interleaved(24))[seed % 2])
    data = _brain(truth, tr, seed=seed, respiration=1.0, respiration_rate=rate,
                  cardiac=0.5, task=0.2, network=0.1)
    decision = verify_array(data, truth, tr, seed=seed)
    assert decision.verdict != "contradicted"
    assert decision.verdict in ("supported", "consistent")
    wrong = verify_array(data, truth[::-1], tr, seed=seed)
    assert wrong.verdict != "supported"


def test_a_wrong_claim_at_a_favourable_setting_is_contradicted_naming_the_truth() -> None:
    # TR 2 s, 300 volumes, high SNR, moderate physiology; claims converters and hand
    # edits produce (common practice, no source): the axis flipped, sequential for
    # interleaved, a missing multiband factor
    truth = _interleaved(24)
    data = _brain(truth, TR, seed=61, noise=1.0, respiration=0.3, cardiac=0.3)
    for claim in (truth[::-1], _sequential(24), _interleaved(24, 0, 3)):
        decision = verify_array(data, claim, TR, seed=61)
        assert decision.verdict == "contradicted", decision
        assert decision.z_regions is not None and min(decision.z_regions) >= ev.Z_REGION
        rival = next(c for c in candidates(claim, TR) if c.name == decision.rival_name)
        assert ev.schedule_distance(rival.times, truth) < 1e-9


@pytest.mark.parametrize(("pattern", "cardiac", "tr", "layout", "seed"), [
    ("halves", "none", 1.5, (24, 2, "descending"), 71),
    ("halves", "none", 2.5, (24, 2, "interleaved"), 72),
    ("halves", "none", 0.8, (24, 3, "ascending"), 73),
    ("alternating", "random", 2.0, (24, 1, "interleaved"), 74),
    ("gradient", "halves", 1.5, (24, 2, "ascending"), 75),
])
def test_physiology_of_varying_sign_never_turns_a_true_claim_into_a_contradiction(
        pattern: str, cardiac: str, tr: float, layout: tuple[int, int, str],
        seed: int) -> None:
    # physiological signal changes vary in sign across the brain (common practice, no
    # source); respiration 0.2-0.35 Hz and heart 0.9-1.3 Hz in adults at rest (common
    # practice, no source) alias at these TRs (sampling theorem). With opposite signs in
    # groups of slices the true schedule cancels them in a delay-and-sum, so a wrong
    # schedule can align the slices better; weak neural signal (task and network 0.1 %)
    n, multiband, order = layout
    if order == "interleaved":
        p = Protocol(n, "interleaved", True, 2, 0, multiband, repetition_time=tr)
    else:
        p = Protocol(n, "sequential", order == "ascending", multiband=multiband,
                     repetition_time=tr)
    truth = array_times(p)
    data = _brain(truth, tr, seed=seed, task=0.1, network=0.1, global_signal=0.0,
                  respiration=1.0, cardiac=0.0 if cardiac == "none" else 0.8,
                  respiration_signs=pattern, cardiac_signs=cardiac)
    decision = verify_array(data, truth, tr, seed=seed)
    assert decision.verdict != "contradicted", decision
    # a wrong claim on such data is never "supported"
    wrong = verify_array(data, truth[::-1], tr, seed=seed)
    assert wrong.verdict != "supported", wrong


def test_a_wrong_claim_is_still_contradicted_when_physiology_changes_sign() -> None:
    # favourable setting (TR 2 s, 300 volumes, high SNR, ordinary neural signal) with a
    # respiration of opposite signs in the lower and upper slices and cardiac pulsation
    # whose sign alternates every 4 slices: both scores must agree, and they do
    truth = _interleaved(24)
    data = _brain(truth, TR, seed=62, noise=1.0, respiration=0.5, cardiac=0.4,
                  respiration_signs="halves", cardiac_signs="alternating")
    for claim in (truth[::-1], _sequential(24)):
        decision = verify_array(data, claim, TR, seed=62)
        assert decision.verdict == "contradicted", decision
        assert decision.z_signs is not None and decision.z_signs >= ev.Z_SIGN
        rival = next(c for c in candidates(claim, TR) if c.name == decision.rival_name)
        assert ev.schedule_distance(rival.times, truth) < 1e-9


def test_wrong_claims_are_contradicted_in_most_runs() -> None:
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
        assert decision.verdict not in ("supported", "consistent")
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
    data = _brain(truth, TR, seed=seed, volumes=volumes)
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
    assert set(finding) == {"code", "severity", "message", "file", "field", "evidence", "hint"}
    assert finding["evidence"]["rival"] == "interleaved ascending from 0"
    assert report["summary"] == {"supported": 1, "consistent": 0, "contradicted": 1,
                                 "undecidable": 0}
    # the order to adopt: its scheme label and its slice times (sidecar order, seconds)
    # so that fix could write them; the truth here is interleaved from 0 (Protocol)
    assert finding["evidence"]["best_order"] == "interleaved ascending from 0"
    times = finding["evidence"]["best_slice_times"]
    assert times == pytest.approx(list(_interleaved(24)), abs=1e-6)
    assert finding["evidence"]["claimed_order"] == "ascending"
    assert "interleaved ascending from 0" in finding["message"]


@pytest.mark.parametrize("width", [80, 120])
def test_cli_screen_fits_the_width_one_line_per_run_and_one_reason_line(
        dataset: Path, width: int, monkeypatch: pytest.MonkeyPatch) -> None:
    # COLUMNS sets the width (README, "Screens"; the POSIX shell variable)
    monkeypatch.setenv("COLUMNS", str(width))
    good = dataset / "sub-01/func/sub-01_task-x_bold.nii.gz"
    bad = dataset / "sub-02/func/sub-02_task-x_bold.nii.gz"
    code, out, _ = _cli("verify", str(good), str(bad), "--jobs", "1")
    lines = out.splitlines()
    assert code == 1
    assert all(len(line) <= width for line in lines), lines
    assert lines[0].startswith("supported") and lines[2].startswith("contradicted")
    assert lines[1].startswith("    ") and lines[3].startswith("    ")
    assert "interleaved ascending from 0" in lines[3] and "evidence" in lines[3]
    assert lines[4] == "2 runs: 1 supported, 1 contradicted"
    # no internal numbers on the screen
    assert not any(word in out for word in ("score", " p ", " z ", "effect"))
    code, _, _ = _cli("verify", str(good), str(bad), "--fail-on", "never")
    assert code == 0


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


def test_milliseconds_are_read_by_the_projects_one_owner_of_units(tmp_path: Path) -> None:
    # BIDS: RepetitionTime and SliceTiming are in seconds (BIDS specification, "Units");
    # the claim is the true order, SliceTiming written in milliseconds: verify reads it as
    # the run's resolved timing says (schemes.resolve; no unit findings of its own)
    root = tmp_path / "ds"
    write_description(root)
    truth = _interleaved(24)
    data = _brain(truth, TR, seed=71)
    for name, tr in (("a", TR), ("b", TR * 1000)):
        write_run(root, f"sub-{name}/func/sub-{name}_task-x_bold.nii.gz",
                  data=np.round(data).astype(np.int16), dtype=np.int16, tr=TR,
                  sidecar={"RepetitionTime": tr, "TaskName": "x",
                           "SliceTiming": [round(t * 1000, 3) for t in truth]})
    code, out, _ = _cli("verify", str(root / "sub-a/func/sub-a_task-x_bold.nii.gz"),
                        str(root / "sub-b/func/sub-b_task-x_bold.nii.gz"), "--format", "json")
    runs = json.loads(out)["runs"]
    assert runs[0]["verdict"] == "supported", runs[0]
    assert set(runs[0]) == {"path", "verdict", "finding"}
    # RepetitionTime in milliseconds too: the run's one resolved timing reads both in
    # seconds (schemes.resolve), so the order is verified as written in seconds
    assert runs[1]["verdict"] == "supported", runs[1]
    assert code == 0


def test_the_consistent_verdict_is_a_documented_code() -> None:
    code, out, _ = _cli("explain", "verify/consistent")
    assert code == 0 and "single it out" in out


def test_cli_an_already_corrected_run_is_undecidable_because_it_is_corrected(
        tmp_path: Path) -> None:
    # BIDS (SliceTimingCorrected): true when the data were slice-time corrected, after
    # which SliceTiming no longer describes them: there is no order to check, and the
    # reason says that rather than "no schedule is known"
    data = _run(_interleaved(12), seed=8, volumes=60)
    path = write_run(tmp_path, "run_desc-timealigned_bold.nii", data=data.astype(np.int16),
                     dtype=np.int16, tr=TR,
                     sidecar={"RepetitionTime": TR, "SliceTimingCorrected": True})
    code, out, _ = _cli("verify", str(path), "--format", "json")
    run = json.loads(out)["runs"][0]
    reason = run["finding"]["evidence"]["reason"]
    assert code == 0 and run["verdict"] == "undecidable"
    assert "already slice-time corrected" in reason and "SliceTimingCorrected" in reason


def test_cli_a_three_d_image_is_not_called_short_of_volumes(tmp_path: Path) -> None:
    # NIfTI-1: dim[0] = 3 is a single volume, not a time series; verify says so as the
    # audit's file/series-shape does, instead of "fewer than 30 volumes"
    path = write_run(tmp_path, "sub-01/func/sub-01_task-x_bold.nii", shape=(8, 8, 12),
                     tr=None, sidecar={"RepetitionTime": TR,
                                       "SliceTiming": list(_interleaved(12))})
    code, out, _ = _cli("verify", str(path), "--format", "json")
    reason = json.loads(out)["runs"][0]["finding"]["evidence"]["reason"]
    assert code == 0 and "not a 4-D time series" in reason and "volumes" not in reason


@pytest.mark.parametrize(("rel", "kind"), [("sub-01/dwi/sub-01_dwi.nii.gz", "a diffusion series"),
                                           ("sub-01/perf/sub-01_asl.nii.gz",
                                            "an arterial spin labelling series")])
def test_cli_a_series_that_is_not_bold_type_is_left_undecided(
        tmp_path: Path, rel: str, kind: str) -> None:
    # a diffusion-weighted series: S = S0 exp(-b D) (Stejskal and Tanner 1965), b
    # alternating 0 and 1000 s/mm2 and D depending on the gradient direction, so every
    # slice changes at the same volume boundaries; such data once read as "already slice-
    # time corrected" (a contradiction); verify must not judge an order from them, as
    # correct refuses to interpolate them (rules.correction)
    rng = np.random.default_rng(5)
    n_slices, n_volumes = 12, 60
    b = np.where(np.arange(n_volumes) % 2 == 0, 0.0, 1000.0)
    diffusivity = 0.0008 * (1 + 0.5 * np.abs(rng.normal(size=n_volumes)))
    tissue = 800 + 200 * rng.random((16, 16, n_slices, 1))
    data = tissue * np.exp(-b * diffusivity)[None, None, None, :]
    data = data + rng.normal(scale=5, size=data.shape)
    write_description(tmp_path)
    path = write_run(tmp_path, rel, data=np.round(data).astype(np.int16), dtype=np.int16,
                     tr=TR, sidecar={"RepetitionTime": TR,
                                      "SliceTiming": list(_interleaved(12))})
    code, out, _ = _cli("verify", str(path), "--format", "json")
    run = json.loads(out)["runs"][0]
    assert run["verdict"] == "undecidable", run
    assert run["finding"]["evidence"]["reason"].startswith(kind)
    assert code == 0


def test_cli_a_tr_no_run_can_have_is_undecidable_for_the_tr_not_the_data(
        tmp_path: Path) -> None:
    # the TR bounds have one owner (model.implausible_repetition: the audit's
    # tr/implausible, correct's gate); a TR of 0.01 s once went on to the data and came
    # back "too little shared signal", not the TR the audit calls impossible
    from slicetime.model import implausible_repetition

    tr = 0.01
    times = [t * tr / TR for t in _interleaved(12)]
    data = _run(tuple(times), seed=9, volumes=60)
    path = write_run(tmp_path, "sub-01/func/sub-01_task-x_bold.nii", data=data.astype(np.int16),
                     dtype=np.int16, tr=tr, sidecar={"RepetitionTime": tr, "SliceTiming": times})
    code, out, _ = _cli("verify", str(path), "--format", "json")
    run = json.loads(out)["runs"][0]
    reason = run["finding"]["evidence"]["reason"]
    problem = implausible_repetition(tr)
    assert problem is not None and run["verdict"] == "undecidable" and problem in reason
    assert "RepetitionTime" in reason and code == 0
