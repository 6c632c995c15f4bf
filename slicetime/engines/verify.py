"""Evidence in the data for a slice schedule: pure numeric scoring and calibration.

A signal shared by the slices of a run (global fluctuations, task responses)
reaches every slice delayed by that slice's acquisition time. Aligning each
slice's time course to one reference time with a candidate schedule (the
Fourier shift theorem: a delay is a linear phase ramp) makes the courses most
alike when the candidate is the true schedule. The score of a candidate is
the mean correlation over all pairs of aligned, standardised channel courses
(a channel is one slice, or one part of a slice); it equals the power of their
delay-and-sum average, up to a constant, so it is the natural statistic for a
common signal with unknown shape seen with independent noise in each channel.

The shift theorem holds for the discrete Fourier transform only as a CIRCULAR
shift: a finite course that ends elsewhere than it began (a drift, a slow wander, a
block design cut mid-block) jumps at the run's ends in its periodic extension, and
that jump leaks over the spectrum undelayed, as if the slices had no offsets. Every
course is therefore tapered at both ends (:func:`taper`) before its transform, and
level steps, which no schedule can align once sampled, are regressed out of every
channel alike (:func:`remove_steps`); every candidate faces the same spectra.

Scores are computed from the spectrum (Parseval), so thousands of schedules
cost little. Two calibrations:

* timing evidence: ``N_SETS`` sets of as many orders as there are candidates,
  each made by shuffling the claimed times across slices; the best candidate
  must beat the best order of every set (a permutation p of ``1/(N_SETS+1)``
  that accounts for picking the best of many candidates);
* differences: the score is a mean of per-bin contributions, so a moving-block
  bootstrap over frequency bins gives paired replicates of every candidate's
  score and a z for any difference.

A second, sign-invariant score (:func:`doubled`, :func:`sign_scores`) lets every
channel carry its own real gain (a sign) for a shared component: physiology of
opposite signs in different slices cancels in the delay-and-sum under the true
schedule, and could make a wrong schedule score higher; it cannot under this score.
:func:`gather_both` scores every candidate under both scores, each with its own
shuffled null; :func:`decide` runs with each as the primary score and :func:`combine`
makes one verdict of the two (see there).

:func:`decide` turns them into a verdict: ``undecidable`` without timing
evidence (pure noise, voxel-wise fluctuations, a shared signal too slow for
the delays to matter); ``contradicted`` when a materially different
alternative beats the claim with ``z >= Z_CONTRADICT`` and a relative effect
of at least ``MIN_EFFECT``, in both halves of the image, and with
``z >= Z_SIGN`` under the sign-invariant score when the ordinary score is the
primary one; ``supported`` when the claim
itself beats the best of every shuffled set and the best alternatives with
``z <= -Z_SUPPORT`` and none of them leads it with ``z >= Z_SIGN`` under the
sign-invariant score; ``consistent`` when it beats shuffled orders and an
alternative fits about as well; ``undecidable`` otherwise.

No files here: the pipeline streams volumes and feeds :func:`channel_sums`.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np

from slicetime.engines.verify_signal import (
    ChannelLayout,
    Prepared,
    channel_sums,
    make_layout,
    prepare,
    remove_steps,
    scipy_fft,
    step_transitions,
    taper,
)

Verdict = Literal["supported", "consistent", "contradicted", "undecidable"]

#: the highest true frequency (Hz) a component is assumed to have: respiration (about
#: 0.2-0.35 Hz in adults at rest) and its harmonics, the heart (about 0.9-1.3 Hz) with margin
MAX_TRUE_HZ = 1.6
#: bootstrap replicates and the block length over frequency bins (Hz, at least MIN_BLOCK bins)
N_BOOTSTRAP = 400
BLOCK_HZ = 0.01
MIN_BLOCK = 3
#: alternatives (the best-scoring) against which the claim is tested
RIVALS = 3
#: running-median width (bins) of the local spectral level in :func:`bin_weights`
PEAK_WIDTH = 9
#: decision thresholds (bootstrap z scores and relative effects); see :func:`decide`
Z_CONTRADICT = 3.0
MIN_EFFECT = 0.1
Z_REGION = 1.5
Z_SUPPORT = 2.0
Z_SUPPORT_REGION = 0.0
Z_TIE = 1.0
#: the sign-invariant score (:func:`doubled`) must agree: a rival must beat the claim there
#: with at least this z for a contradiction; beating it there with this z bars "supported"
Z_SIGN = 2.0
TIE_EFFECT = 0.05
#: alternatives closer than this to the claim (RMS seconds, after the best common
#: offset, as a fraction of the acquisition window) count as the same schedule
EQUIVALENT_FRACTION = 0.02
#: sets of shuffled orders for the null of the best score
N_SETS = 50
#: fewest volumes for any verdict
MIN_VOLUMES = 30


def block_bootstrap(q: np.ndarray, block: int, n_boot: int = N_BOOTSTRAP,
                    seed: int = 0) -> np.ndarray:
    """Circular moving-block bootstrap of the mean over the last axis: ``(n_boot, rows)``.

    The same resampled blocks serve every row, so differences between rows are paired."""
    k, n = q.shape
    block = max(1, min(block, n))
    n_blocks = math.ceil(n / block)
    rng = np.random.default_rng(seed)
    starts = rng.integers(0, n, size=(n_boot, n_blocks))
    extended = np.concatenate([q, q[:, :block]], axis=1)
    cum = np.concatenate([np.zeros((k, 1)), np.cumsum(extended, axis=1)], axis=1)
    sums = cum[:, starts + block] - cum[:, starts]  # (k, n_boot, n_blocks)
    return (sums.sum(axis=2) / (n_blocks * block)).T


# --------------------------------------------------------------------------- spectra


@dataclass(frozen=True)
class Spectra:
    """The slice spectra of two spatial regions (each the sum over a slice's channels in
    that region of their discrete Fourier transforms), from 0 Hz to the Nyquist frequency
    (the DC bin dropped), with the one-sided weights of Parseval's theorem."""

    region_a: np.ndarray  # (n_slices, bins) complex
    region_b: np.ndarray
    freqs: np.ndarray  # (bins,) Hz
    diagonal: np.ndarray  # (bins,) sum over channels of their power at each bin
    weights: np.ndarray  # (bins,) see :func:`bin_weights`
    channels: int
    repetition_time: float


def region_spectra(prepared: Prepared, n_slices: int, region_of: np.ndarray) -> Spectra:
    """Slice spectra of the channels in region 0 and in region 1 (``region_of`` per channel)."""
    x = scipy_fft().idct(prepared.coeffs, type=2, axis=1)
    n = x.shape[1]
    x = x * taper(n)[None, :]
    transform = np.fft.rfft(x, axis=1)[:, 1:]
    weights = np.sqrt(_weights(n)[1:])
    regions = np.asarray(region_of) % 2
    out = []
    for r in (0, 1):
        spectra = np.zeros((n_slices, transform.shape[1]), dtype=np.complex128)
        rows = regions == r
        np.add.at(spectra, prepared.slice_of[rows], transform[rows])
        out.append(spectra * weights)
    diagonal = ((np.abs(transform) ** 2) * weights ** 2).sum(axis=0)
    freqs = np.arange(1, n // 2 + 1) / (n * prepared.repetition_time)
    return Spectra(out[0], out[1], freqs, diagonal, bin_weights(diagonal),
                   int(x.shape[0]), prepared.repetition_time)


def doubled(spectra: Spectra) -> Spectra:
    """The phase-doubled spectra behind the sign-invariant score.

    Let every channel carry its own real gain (a sign and a size) for a shared component.
    At one bin, with ``y_c`` the channel spectra aligned by a schedule, the best real-gain
    fit of one common component explains ``(sum |y_c|^2 + |sum y_c^2|) / 2`` of the power
    (the top eigenvalue of ``Re(y y^H)``): a real gain cannot absorb a phase, but a sign
    is a phase of pi, which squaring removes. ``sum y_c^2`` is the same delay-and-sum as
    :func:`bin_scores` computes, applied to the squared spectra at twice the frequency
    (a component at true frequency ``g`` gives ``y_c^2`` the phase ``2 pi (2 g) t_c``), so
    the returned spectra go through the same code with ``max_hz`` doubled. Each row (a
    slice in one half of the image) is one channel; its power is ``|X|^4``. The timing of
    a channel is then known only modulo half a cycle of the component's true frequency."""
    a = spectra.region_a ** 2
    b = spectra.region_b ** 2
    diagonal = (np.abs(a) ** 2).sum(axis=0) + (np.abs(b) ** 2).sum(axis=0)
    rows = int((np.abs(a).sum(axis=1) > 0).sum() + (np.abs(b).sum(axis=1) > 0).sum())
    return Spectra(a, b, 2.0 * spectra.freqs, diagonal, bin_weights(diagonal), max(rows, 2),
                   spectra.repetition_time / 2.0)


def bin_weights(diagonal: np.ndarray, width: int = PEAK_WIDTH) -> np.ndarray:
    """Each bin's weight: one over its channel power, or over the running median of the
    channel power over ``width`` bins when that is larger. A bin then contributes the
    share of its power that a schedule aligns (a coherence), so neither a narrow-band
    periodic peak (respiration, cardiac pulsation, aliased anywhere) nor the strong slow
    bins can carry the verdict alone: the evidence must be spread over the spectrum.
    Bins without power (below the high-pass) get weight 0."""
    from scipy.ndimage import median_filter

    d = np.asarray(diagonal, dtype=np.float64)
    top = float(d.max(initial=0.0))
    level = np.maximum(d, median_filter(d, size=max(1, width), mode="nearest"))
    return np.where(level > 1e-12 * top, 1.0 / np.where(level > 0, level, 1.0), 0.0)


def _weights(n: int) -> np.ndarray:
    w = np.full(n // 2 + 1, 2.0)
    w[0] = 1.0
    if n % 2 == 0:
        w[-1] = 1.0
    return w


def alias_orders(freqs: np.ndarray, repetition_time: float, max_hz: float = MAX_TRUE_HZ
                 ) -> tuple[np.ndarray, np.ndarray]:
    """``(ks, valid)``: the integers ``k`` for which a component seen at ``f`` may truly lie
    at ``f + k / TR`` (sampling theorem: a signal at true frequency ``g`` sampled every TR
    appears at ``|g - k / TR|`` for the nearest integer ``k``), and a ``(k, bins)`` mask of
    those with ``|f + k / TR| <= max_hz``. ``k = 0`` is always valid."""
    fs = 1.0 / repetition_time
    low = math.floor((-max_hz - float(freqs.max(initial=0.0))) / fs)
    high = math.ceil(max_hz / fs)
    ks = np.arange(low, high + 1)
    valid = np.abs(freqs[None, :] + ks[:, None] * fs) <= max_hz + 1e-12
    valid[ks == 0] = True
    return ks, valid


@dataclass(frozen=True)
class BinScores:
    """Per-bin coherent power of candidate schedules ``(q, bins)``: ``total`` (both regions,
    each aligned at the alias order chosen on the other region), and each region's own
    power at the order chosen on the other (independent evidence per region)."""

    total: np.ndarray
    region_a: np.ndarray
    region_b: np.ndarray


def _aligned(y: np.ndarray, times: np.ndarray, freqs: np.ndarray, ks: np.ndarray,
             repetition_time: float) -> np.ndarray:
    """``(q, k, bins)``: sum over slices of ``y[z, b] exp(-2 pi i (f_b + k / TR) t_qz)``
    (the phase of every distinct time computed once)."""
    values, inverse = np.unique(times, return_inverse=True)
    inverse = inverse.reshape(times.shape)
    phi = np.exp(-2j * np.pi * values[:, None] * freqs[None, :])
    psi = np.exp(-2j * np.pi * ks[:, None] * values[None, :] / repetition_time)
    w = y[None, :, :] * phi[inverse]
    return np.matmul(psi[:, inverse].transpose(1, 0, 2), w)


def _pick(ta: np.ndarray, tb: np.ndarray, valid: np.ndarray
          ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """From ``(k, q, bins)`` aligned sums of the two regions: the total, and each
    region's power at the order ``k`` chosen (the strongest) on the other region."""
    pa = ta.real ** 2 + ta.imag ** 2
    pb = tb.real ** 2 + tb.imag ** 2
    invalid = np.broadcast_to(~valid[:, None, :], pa.shape)
    chosen = []
    for p in (pa, pb):
        masked = p.copy()
        masked[invalid] = -1.0
        chosen.append(np.argmax(masked, axis=0)[None])
    ka, kb = chosen

    def at(x: np.ndarray, k: np.ndarray) -> np.ndarray:
        return np.take_along_axis(x, k, axis=0)[0]

    a_at_b = at(pa, kb)
    b_at_a = at(pb, ka)
    cross_a = (at(ta, ka) * at(tb, ka).conj()).real
    cross_b = (at(ta, kb) * at(tb, kb).conj()).real
    return a_at_b + b_at_a + cross_a + cross_b, a_at_b, b_at_a


def bin_scores(spectra: Spectra, schedules: np.ndarray, max_hz: float = MAX_TRUE_HZ
               ) -> BinScores:
    """Score schedules ``(q, n_slices)`` bin by bin.

    A component whose true frequency is ``g`` reaches slice ``z`` with phase
    ``2 pi g t_z``; seen at bin ``f`` it may be any ``g = f + k / TR`` (aliasing), so the
    schedule's alignment is tried at every plausible ``k``. The order ``k`` is chosen on
    one region and the power counted on the other (and across the two), which keeps the
    choice from favouring any schedule on noise: with independent regions the expected
    score of pure noise is the same for every schedule."""
    ks, valid = alias_orders(spectra.freqs, spectra.repetition_time, max_hz)
    q = schedules.shape[0]
    bins = spectra.freqs.size
    total = np.empty((q, bins))
    ra = np.empty((q, bins))
    rb = np.empty((q, bins))
    chunk = max(1, 4_000_000 // max(ks.size * spectra.region_a.size, 1))
    for start in range(0, q, chunk):
        times = np.asarray(schedules[start:start + chunk], dtype=np.float64)
        ta = _aligned(spectra.region_a, times, spectra.freqs, ks, spectra.repetition_time)
        tb = _aligned(spectra.region_b, times, spectra.freqs, ks, spectra.repetition_time)
        part = slice(start, start + chunk)
        total[part], ra[part], rb[part] = _pick(ta.transpose(1, 0, 2), tb.transpose(1, 0, 2),
                                                valid)
    return BinScores(total, ra, rb)


def _group(x: np.ndarray, starts: np.ndarray, n: int) -> np.ndarray:
    """Sums over consecutive rows of ``x`` in groups beginning at ``starts``."""
    if starts.size == n:
        return x
    sizes = np.diff(np.append(starts, n))
    if np.all(sizes == sizes[0]):
        return x.reshape(starts.size, int(sizes[0]), *x.shape[1:]).sum(axis=1)
    total = np.cumsum(x, axis=0)
    ends = total[np.append(starts[1:], n) - 1]
    before = np.concatenate([np.zeros_like(total[:1]), total[starts[1:] - 1]])
    return ends - before


def shuffled_totals(spectra: Spectra, claimed: Sequence[float], count: int, seed: int = 0,
                    max_hz: float = MAX_TRUE_HZ) -> np.ndarray:
    """Weighted :func:`bin_scores` totals of ``count`` orders made by shuffling the claimed
    times across slices (the same numbers as scoring those orders as candidates, faster:
    the phase of every distinct time is computed once and the alias orders of all
    shuffled orders are one matrix product)."""
    times = np.asarray(claimed, dtype=np.float64)
    n = times.size
    ks, valid = alias_orders(spectra.freqs, spectra.repetition_time, max_hz)
    ordered = np.sort(times)
    values, starts = np.unique(ordered, return_index=True)
    # single precision: this is a null distribution, and it halves the cost
    phi = np.exp(-2j * np.pi * values[:, None] * spectra.freqs[None, :]).astype(np.complex64)
    psi = np.exp(-2j * np.pi * ks[:, None] * values[None, :] / spectra.repetition_time
                 ).astype(np.complex64)
    both = np.stack([spectra.region_a, spectra.region_b], axis=1).astype(np.complex64)
    rng = np.random.default_rng(seed + 7919)
    out = np.empty(count)
    bins = spectra.freqs.size
    chunk = max(1, 2_000_000 // max(n * bins, 1))
    for first in range(0, count, chunk):
        q = min(chunk, count - first)
        # slice perm[q, i] takes the i-th smallest claimed time
        perm = np.argsort(rng.random((q, n)), axis=1).T  # (n, q)
        # both regions side by side: (J, q, 2, bins), one matrix product for all orders k
        grouped = _group(both[perm], starts, n)
        grouped *= phi[:, None, None, :]
        t = (psi @ grouped.reshape(values.size, 2 * q * bins)).reshape(ks.size, q, 2, bins)
        total = _pick(t[:, :, 0], t[:, :, 1], valid)[0]
        out[first:first + q] = total @ spectra.weights
    return out


def normalise(weighted: np.ndarray, spectra: Spectra) -> np.ndarray:
    """Weighted coherent power summed over bins (:func:`weigh`) -> the mean pairwise
    coherence of the aligned channels, averaged over the bins (about 0 for noise; 1 when
    every channel holds the same signal at every frequency, delayed as the schedule says)."""
    c = spectra.channels
    diag = float((spectra.weights * spectra.diagonal).sum())
    return (weighted - diag) / max((c - 1) * diag, 1e-300)


def weigh(per_bin: np.ndarray, spectra: Spectra) -> np.ndarray:
    """Per-bin coherent power ``(..., bins)`` times the bin weights."""
    return per_bin * spectra.weights


def shuffle_maxima(spectra: Spectra, claimed: Sequence[float], per_set: int,
                   sets: int = N_SETS, seed: int = 0, max_hz: float = MAX_TRUE_HZ
                   ) -> tuple[np.ndarray, float, float]:
    """The null of "the best of ``per_set`` schedules when timing does not matter":
    ``sets`` sets of ``per_set`` orders made by shuffling the claimed times across
    slices, scored as the candidates are; returns each set's best score, and the mean and
    sd of all shuffled scores (normalised as :func:`normalise`)."""
    scores = normalise(shuffled_totals(spectra, claimed, sets * per_set, seed, max_hz),
                       spectra)
    return (scores.reshape(sets, per_set).max(axis=1), float(scores.mean()),
            float(scores.std(ddof=1)))


# --------------------------------------------------------------------------- verdict


@dataclass(frozen=True)
class Candidate:
    """One schedule to score (seconds per slice, data-array order)."""

    name: str
    times: tuple[float, ...]
    kind: Literal["claimed", "alternative"] = "alternative"


@dataclass(frozen=True)
class Decision:
    """The verdict with its numbers. Scores are mean pairwise correlations of the
    aligned channels (from the spectrum, so every schedule is scored the same way)."""

    verdict: Verdict
    reason: str
    claimed_score: float
    best_name: str
    best_score: float
    #: mean score of shuffled orders, and the median over sets of the best of a set
    null_score: float
    null_best: float
    #: the strongest alternative that is not equivalent to the claim
    rival_name: str | None = None
    rival_score: float | None = None
    #: the rival's slice times (seconds, data-array order)
    rival_times: tuple[float, ...] | None = None
    #: (rival - claimed) / (best - shuffled mean): share of the timing evidence the claim loses
    effect: float | None = None
    #: bootstrap (over blocks of frequency bins) z of rival - claimed, its 95 % interval,
    #: and the share of replicates in which the rival beats the claim
    z_rival: float | None = None
    interval: tuple[float, float] | None = None
    rival_wins: float | None = None
    #: the same z in each of the two spatial regions (each scored independently)
    z_regions: tuple[float, float] | None = None
    #: the z of rival - claimed under the sign-invariant score (each slice and half of the
    #: image free to carry its own sign of a shared component)
    z_signs: float | None = None
    #: permutation p values: the share of shuffled sets whose best beats the best
    #: candidate (timing evidence) and the claim
    p_evidence: float = 1.0
    p_claimed: float = 1.0
    equivalent: tuple[str, ...] = ()
    ranking: tuple[tuple[str, float], ...] = field(default_factory=tuple)

    def to_json(self) -> dict[str, Any]:
        def r(x: float | None) -> float | None:
            return None if x is None else round(float(x), 4)

        return {
            "verdict": self.verdict,
            "reason": self.reason,
            "claimed_score": r(self.claimed_score),
            "best": self.best_name,
            "best_score": r(self.best_score),
            "shuffled_score": r(self.null_score),
            "shuffled_best": r(self.null_best),
            "rival": self.rival_name,
            "rival_score": r(self.rival_score),
            "effect": r(self.effect),
            "z_rival": r(self.z_rival),
            "z_regions": None if self.z_regions is None else [r(v) for v in self.z_regions],
            "z_signs": r(self.z_signs),
            "interval": None if self.interval is None else [r(v) for v in self.interval],
            "rival_wins": r(self.rival_wins),
            "p_evidence": r(self.p_evidence),
            "p_claimed": r(self.p_claimed),
            "equivalent": list(self.equivalent),
            "top": [[name, r(score)] for name, score in self.ranking[:5]],
        }


#: the strength of the evidence in words, by the size of the bootstrap z of the decisive
#: comparison (the claim against the alternative the verdict names)
STRENGTH_WORDS = ((10.0, "very strong"), (6.0, "strong"), (3.0, "clear"), (2.0, "moderate"))
#: alternatives within this RMS distance of the claim (seconds, after the best common
#: offset, as a fraction of the acquisition window) are "too close in time to tell apart"
CLOSE_FRACTION = 0.08


def strength(decision: Decision) -> str:
    """How strong the evidence behind a verdict is, in words (for the screen)."""
    z = abs(decision.z_rival) if decision.z_rival is not None else 0.0
    if decision.verdict == "supported" and decision.z_rival is None:
        return "clear"
    return next((word for bound, word in STRENGTH_WORDS if z >= bound), "weak")


def _z(diff: float, replicates: np.ndarray) -> float:
    sd = float(np.std(replicates, ddof=1)) if replicates.size > 1 else 0.0
    if sd <= 0:
        return 0.0 if diff == 0 else math.copysign(math.inf, diff)
    return diff / sd


def schedule_distance(a: Sequence[float], b: Sequence[float]) -> float:
    """RMS difference of two schedules after removing the best common offset."""
    d = np.asarray(a, dtype=np.float64) - np.asarray(b, dtype=np.float64)
    return float(np.sqrt(np.mean((d - d.mean()) ** 2))) if d.size else 0.0


def bin_block(freqs: np.ndarray) -> int:
    """Bootstrap block length in bins: about ``BLOCK_HZ`` of spectrum, at least
    ``MIN_BLOCK`` bins, at most a fifth of them."""
    if freqs.size < 2:
        return 1
    step = float(freqs[1] - freqs[0])
    wanted = max(MIN_BLOCK, math.ceil(BLOCK_HZ / max(step, 1e-12)))
    return max(1, min(wanted, freqs.size // 5 or 1))


@dataclass(frozen=True)
class Evidence:
    """Everything :func:`decide` needs: per-bin scores of every candidate, the null."""

    spectra: Spectra
    bins: BinScores
    scores: np.ndarray  # (candidates,) normalised
    null_maxima: np.ndarray
    null_mean: float
    #: the second score of every candidate, per bin (the ordinary one when the primary
    #: is sign-invariant, and the other way round)
    signs: BinScores | None = None
    #: bootstrap block length (bins)
    block: int = MIN_BLOCK
    #: ``bins`` and ``scores`` are the sign-invariant score's (``signs`` the ordinary's)
    signs_first: bool = False


def _paired_z(diff_bins: np.ndarray, block: int, seed: int
              ) -> tuple[float, tuple[float, float], float]:
    """z, 95 % interval (of the mean per bin) and win share of a per-bin difference."""
    reps = block_bootstrap(diff_bins[None, :], block, N_BOOTSTRAP, seed)[:, 0]
    centre = float(diff_bins.mean())
    low, high = np.percentile(reps, [2.5, 97.5])
    return _z(centre, reps - reps.mean()), (float(low), float(high)), float(np.mean(reps > 0))


@dataclass(frozen=True)
class Challenge:
    """The claim tested against one alternative (see :class:`Decision` for the fields)."""

    name: str
    score: float
    times: tuple[float, ...]
    effect: float | None
    z: float
    interval: tuple[float, float]
    wins: float
    z_regions: tuple[float, float]
    z_signs: float | None
    #: the primary score is the sign-invariant one (``z_signs`` is then the ordinary one's)
    signs_first: bool = False

    def leads(self) -> bool:
        """The rival beats the claim under the ordinary score, overall and in both halves."""
        return (self.z >= Z_CONTRADICT and self.effect is not None
                and self.effect >= MIN_EFFECT and min(self.z_regions) >= Z_REGION)

    def signs_agree(self) -> bool:
        """The second score agrees: needed when the ordinary score is the primary one (the
        sign-invariant score must confirm its lead); the sign-invariant score's own lead
        needs no confirmation (the ordinary score is the one mixed signs mislead)."""
        if self.signs_first:
            return True
        return self.z_signs is None or self.z_signs >= Z_SIGN

    def beats(self) -> bool:
        """A contradiction: the rival leads under the ordinary score and under the
        sign-invariant one (so physiology of opposite signs in different slices, which the
        true schedule cancels, cannot make the lead)."""
        return self.leads() and self.signs_agree()


@dataclass(frozen=True)
class _Base:
    claimed_score: float
    best_name: str
    best_score: float
    null_score: float
    null_best: float
    p_evidence: float
    p_claimed: float
    equivalent: tuple[str, ...]
    ranking: tuple[tuple[str, float], ...]


def _decision(verdict: Verdict, reason: str, base: _Base, rival: Challenge | None
              ) -> Decision:
    """One :class:`Decision` from the shared numbers and the alternative it names."""
    return Decision(
        verdict, reason, base.claimed_score, base.best_name, base.best_score, base.null_score,
        base.null_best,
        rival_name=None if rival is None else rival.name,
        rival_score=None if rival is None else rival.score,
        rival_times=None if rival is None else rival.times,
        effect=None if rival is None else rival.effect,
        z_rival=None if rival is None else rival.z,
        interval=None if rival is None else rival.interval,
        rival_wins=None if rival is None else rival.wins,
        z_regions=None if rival is None else rival.z_regions,
        z_signs=None if rival is None else rival.z_signs,
        p_evidence=base.p_evidence, p_claimed=base.p_claimed, equivalent=base.equivalent,
        ranking=base.ranking)


def decide(candidates: Sequence[Candidate], evidence: Evidence, window: float, *,
           seed: int = 0) -> Decision:
    """The verdict (see the module docstring)."""
    scores = evidence.scores
    null_maxima = evidence.null_maxima
    claimed = [c.kind for c in candidates].index("claimed")
    best = int(np.argmax(scores))
    sets = null_maxima.size

    def p_value(score: float) -> float:
        return (1 + int(np.sum(null_maxima >= score))) / (sets + 1)

    ranking = tuple(sorted(((c.name, float(scores[i])) for i, c in enumerate(candidates)),
                           key=lambda item: -item[1]))
    ref = candidates[claimed].times
    equivalent = [i for i in range(len(candidates)) if i != claimed
                  and schedule_distance(candidates[i].times, ref) < EQUIVALENT_FRACTION * window]
    others = [i for i in range(len(candidates)) if i != claimed and i not in equivalent]
    base = _Base(
        claimed_score=float(scores[claimed]), best_name=candidates[best].name,
        best_score=float(scores[best]), null_score=evidence.null_mean,
        null_best=float(np.median(null_maxima)) if sets else evidence.null_mean,
        p_evidence=p_value(float(scores[best])), p_claimed=p_value(float(scores[claimed])),
        equivalent=tuple(candidates[i].name for i in equivalent), ranking=ranking,
    )
    rival: Challenge | None = None
    signs_against: list[Challenge] = []
    block = evidence.block
    bins = evidence.bins
    if others:
        spread = float(scores[best]) - evidence.null_mean

        def challenge(i: int) -> Challenge:
            z, interval, wins = _paired_z(bins.total[i] - bins.total[claimed], block, seed)
            z_a = _paired_z(bins.region_a[i] - bins.region_a[claimed], block, seed + 1)[0]
            z_b = _paired_z(bins.region_b[i] - bins.region_b[claimed], block, seed + 2)[0]
            diff = float(scores[i] - scores[claimed])
            z_s = None
            if evidence.signs is not None:
                z_s = _paired_z(evidence.signs.total[i] - evidence.signs.total[claimed],
                                block, seed + 3)[0]
            return Challenge(candidates[i].name, float(scores[i]), candidates[i].times,
                             diff / spread if spread > 0 else None, z, interval, wins,
                             (z_a, z_b), z_s, evidence.signs_first)

        # the claim is tested against the best few alternatives, so that near-ties in
        # score cannot swap the alternative it is judged against: a contradiction names
        # the best-scoring one that beats it clearly; otherwise the most threatening one
        # (highest z) is reported
        tested = [challenge(i) for i in sorted(others, key=lambda i: -scores[i])[:RIVALS]]
        beating = [t for t in tested if t.beats()]
        leading = [t for t in tested if t.leads()]
        rival = (beating or leading or [max(tested, key=lambda t: t.z)])[0]
        signs_against = [] if evidence.signs_first else [
            t for t in tested if t.z_signs is not None and t.z_signs >= Z_SIGN]
    threshold = 1.0 / (sets + 1) + 1e-12
    if base.p_evidence > threshold:
        return _decision("undecidable", "the data hold too little shared signal that "
                         "depends on when each slice was acquired: no order fits better than "
                         "orders made by shuffling the slices", base, rival)
    if rival is not None and rival.effect is not None:
        if rival.beats():
            return _decision("contradicted", f"{rival.name} fits clearly better than the "
                             "claimed order, across the spectrum and in both halves of the "
                             "image", base, rival)
        if rival.leads():
            return _decision("undecidable", f"{rival.name} fits better, but that lead "
                             "could come from breathing or pulse signals of opposite sign in "
                             "different slices", base, rival)
        if rival.z >= Z_CONTRADICT and rival.effect >= MIN_EFFECT:
            return _decision("undecidable", f"{rival.name} fits better in one half of "
                             "the image but not in the other",
                             base, rival)
    if base.p_claimed > threshold:
        return _decision("undecidable", "the evidence is too weak either way", base, rival)
    if signs_against:
        return _decision("undecidable", "no other order clearly fits better, but "
                         f"{signs_against[0].name} does once each slice may carry its own "
                         "sign of the shared signal", base,
                         signs_against[0])
    if rival is None or (rival.z <= -Z_SUPPORT and max(rival.z_regions) < -Z_SUPPORT_REGION):
        return _decision("supported", "the claimed order fits better than every "
                         "materially different order and than shuffled orders", base, rival)
    if rival.z <= Z_TIE or rival.effect is None or rival.effect < TIE_EFFECT:
        return _decision("consistent", f"{rival.name} fits about as well",
                         base, rival)
    return _decision("undecidable", "the evidence is too weak either way", base, rival)


def gather_both(courses: np.ndarray, slice_of: np.ndarray, region_of: np.ndarray,
                repetition_time: float, candidates: Sequence[Candidate], *, seed: int = 0,
                sets: int = N_SETS) -> tuple[Evidence, Evidence]:
    """Score every candidate on channel courses ``(channels, volumes)`` under both scores
    and build each one's null: ``(ordinary first, sign-invariant first)``.

    Shared signals in real runs can reach different slices and halves of the image with
    different signs (networks with maps of both signs, breathing and pulse); the
    delay-and-sum of the ordinary score then favours wrong schedules, while the
    sign-invariant score (:func:`doubled`) ranks the true one first. With one sign
    everywhere the ordinary score has more power. Each is the primary score of one
    evidence and the second opinion of the other."""
    prepared = prepare(courses, repetition_time, slice_of)
    n_slices = len(candidates[0].times)
    spectra = region_spectra(prepared, n_slices, region_of)
    times = np.asarray([c.times for c in candidates], dtype=np.float64)
    ordinary = _weighed_scores(spectra, times, MAX_TRUE_HZ)
    twice = doubled(spectra)
    signs = _weighed_scores(twice, times, 2.0 * MAX_TRUE_HZ)  # sign_scores, one doubling
    claimed = next(c for c in candidates if c.kind == "claimed")
    block = bin_block(spectra.freqs)
    scores = normalise(ordinary.total.sum(axis=1), spectra)
    maxima, mean, _ = shuffle_maxima(spectra, claimed.times, len(candidates), sets, seed)
    first = Evidence(spectra, ordinary, scores, maxima, mean, signs, block)
    scores = normalise(signs.total.sum(axis=1), twice)
    maxima, mean, _ = shuffle_maxima(twice, claimed.times, len(candidates), sets, seed,
                                     2.0 * MAX_TRUE_HZ)
    return first, Evidence(twice, signs, scores, maxima, mean, ordinary, block, True)


def gather(courses: np.ndarray, slice_of: np.ndarray, region_of: np.ndarray,
           repetition_time: float, candidates: Sequence[Candidate], *, seed: int = 0,
           sets: int = N_SETS) -> Evidence:
    """The ordinary-score evidence of :func:`gather_both`."""
    return gather_both(courses, slice_of, region_of, repetition_time, candidates, seed=seed,
                       sets=sets)[0]


def combine(ordinary: Decision, signs: Decision) -> Decision:
    """One verdict from the two scores' decisions: a contradiction by either (each with
    its own safeguards), the sign-invariant one's first; else support by either, unless
    the other names a lead; else the closer of "consistent"; else undecidable."""
    for d in (signs, ordinary):
        if d.verdict == "contradicted":
            return d
    leads = [d for d in (signs, ordinary) if d.z_rival is not None and d.z_rival >= Z_SIGN]
    for d in (signs, ordinary):
        if d.verdict == "supported" and not leads:
            return d
    for d in (signs, ordinary):
        if d.verdict == "consistent" and not leads:
            return d
    if signs.verdict == "undecidable":
        return signs
    return ordinary if ordinary.verdict == "undecidable" else signs


def sign_scores(spectra: Spectra, schedules: np.ndarray, max_hz: float = MAX_TRUE_HZ
                ) -> BinScores:
    """Weighted per-bin sign-invariant scores of schedules ``(q, n_slices)`` (see
    :func:`doubled`)."""
    return _weighed_scores(doubled(spectra), schedules, 2.0 * max_hz)


def _weighed_scores(spectra: Spectra, schedules: np.ndarray, max_hz: float) -> BinScores:
    """:func:`bin_scores` of ``schedules`` with every part weighed (:func:`weigh`)."""
    raw = bin_scores(spectra, schedules, max_hz)
    return BinScores(weigh(raw.total, spectra), weigh(raw.region_a, spectra),
                     weigh(raw.region_b, spectra))


def evaluate(courses: np.ndarray, slice_of: np.ndarray, repetition_time: float,
             candidates: Sequence[Candidate], window: float, *, seed: int = 0,
             sets: int = N_SETS, region_of: np.ndarray | None = None) -> Decision:
    """Score every candidate on channel courses ``(channels, volumes)`` and decide.
    ``region_of`` puts each channel in one of two spatial regions (default: alternate
    channels of each slice)."""
    if region_of is None:
        region_of = np.arange(len(slice_of)) % 2
    first, second = gather_both(courses, slice_of, region_of, repetition_time, candidates,
                                seed=seed, sets=sets)
    return combine(decide(candidates, first, window, seed=seed),
                   decide(candidates, second, window, seed=seed))


__all__ = [
    "BinScores",
    "Candidate",
    "Challenge",
    "ChannelLayout",
    "Decision",
    "Evidence",
    "Prepared",
    "Spectra",
    "Verdict",
    "alias_orders",
    "bin_block",
    "bin_scores",
    "bin_weights",
    "block_bootstrap",
    "channel_sums",
    "combine",
    "decide",
    "doubled",
    "evaluate",
    "gather",
    "gather_both",
    "make_layout",
    "normalise",
    "prepare",
    "region_spectra",
    "remove_steps",
    "schedule_distance",
    "shuffle_maxima",
    "shuffled_totals",
    "sign_scores",
    "step_transitions",
    "strength",
    "taper",
    "weigh",
]
