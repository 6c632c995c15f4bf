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

Scores are computed from the spectrum (Parseval), so thousands of schedules
cost little. Two calibrations:

* timing evidence: ``N_SETS`` sets of as many orders as there are candidates,
  each made by shuffling the claimed times across slices; the best candidate
  must beat the best order of every set (a permutation p of ``1/(N_SETS+1)``
  that accounts for picking the best of many candidates);
* differences: the score is also a mean of per-volume contributions (time
  domain), so a moving-block bootstrap over volumes gives paired replicates of
  every candidate's score and a z for any difference.

:func:`decide` turns them into a verdict: ``undecidable`` without timing
evidence (pure noise, voxel-wise fluctuations, a shared signal too slow for
the delays to matter); ``contradicted`` when a materially different
alternative beats the claim with ``z >= Z_CONTRADICT`` and a relative effect
of at least ``MIN_EFFECT``; ``supported`` when the claim itself beats the best
of every shuffled set and no alternative leads it with ``z >= Z_TIE`` and
effect ``>= TIE_EFFECT``; ``undecidable`` otherwise.

No files here: the pipeline streams volumes and feeds :func:`channel_sums`.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np

Verdict = Literal["supported", "contradicted", "undecidable"]

#: in-brain voxels: temporal mean above this fraction of the robust maximum
MASK_FRACTION = 0.2
#: high-pass cut-off (Hz): slower components carry almost no timing evidence
HIGHPASS_HZ = 0.01
#: volumes dropped at each end of the aligned courses (edge effects of the shift)
TRIM_VOLUMES = 2
#: bootstrap replicates and the block length (seconds of data, at least MIN_BLOCK volumes)
N_BOOTSTRAP = 400
BLOCK_SECONDS = 40.0
MIN_BLOCK = 5
#: decision thresholds (bootstrap z scores and relative effects); see :func:`decide`
Z_CONTRADICT = 3.0
MIN_EFFECT = 0.1
Z_TIE = 1.0
TIE_EFFECT = 0.05
#: alternatives closer than this to the claim (RMS seconds, after the best common
#: offset, as a fraction of the acquisition window) count as the same schedule
EQUIVALENT_FRACTION = 0.02
#: sets of shuffled orders for the null of the best score
N_SETS = 100
#: fewest volumes for any verdict
MIN_VOLUMES = 30


# --------------------------------------------------------------------------- reduction


@dataclass(frozen=True)
class ChannelLayout:
    """Which voxels of each slice feed which channel.

    ``weights`` has shape ``(n_slices, n_inplane, n_parts)``: the mean over a
    part's in-brain voxels is ``plane @ weights[z]``. ``slice_of`` gives the
    slice of every channel (``n_slices * n_parts`` channels, slice-major);
    ``voxels`` the in-brain voxel count of each channel.
    """

    weights: np.ndarray
    slice_of: np.ndarray
    voxels: np.ndarray

    @property
    def n_channels(self) -> int:
        return int(self.slice_of.size)


def make_layout(mean_image: np.ndarray, *, parts: int = 2,
                fraction: float = MASK_FRACTION) -> ChannelLayout:
    """Channels from a temporal mean image of shape ``(n_slices, rows, cols)``.

    In-brain voxels have a finite mean above ``fraction`` of the robust maximum
    (the 98th percentile of finite values; all finite voxels when that is not
    positive). Each slice's in-plane grid is cut into ``parts`` × ``parts``
    rectangles; every rectangle is one channel (empty ones get zero weight).
    """
    n_slices, rows, cols = mean_image.shape
    finite = np.isfinite(mean_image)
    values = mean_image[finite]
    top = float(np.percentile(values, 98)) if values.size else 0.0
    mask = finite & (mean_image > fraction * top) if top > 0 else finite
    part_r = np.minimum(np.arange(rows) * parts // max(rows, 1), parts - 1)
    part_c = np.minimum(np.arange(cols) * parts // max(cols, 1), parts - 1)
    label = (part_r[:, None] * parts + part_c[None, :]).reshape(-1)
    n_parts = parts * parts
    onehot = np.zeros((rows * cols, n_parts), dtype=np.float32)
    onehot[np.arange(rows * cols), label] = 1.0
    flat = mask.reshape(n_slices, rows * cols).astype(np.float32)
    weights = flat[:, :, None] * onehot[None, :, :]
    voxels = weights.sum(axis=1)  # (n_slices, n_parts)
    with np.errstate(divide="ignore", invalid="ignore"):
        weights = np.where(voxels[:, None, :] > 0, weights / voxels[:, None, :], 0.0)
    return ChannelLayout(
        weights=weights.astype(np.float32),
        slice_of=np.repeat(np.arange(n_slices), n_parts),
        voxels=voxels.reshape(-1).astype(np.int64),
    )


def channel_sums(batch: np.ndarray, layout: ChannelLayout) -> np.ndarray:
    """Channel means of a batch ``(volumes, n_slices, rows * cols)``: ``(channels, volumes)``.

    Non-finite voxels count as zero (their channel is flagged later by its
    course, which the caller checks for finiteness)."""
    x = np.asarray(batch, dtype=np.float32)
    if not np.isfinite(x).all():
        x = np.where(np.isfinite(x), x, np.float32(0.0))
    # (slices, volumes, inplane) @ (slices, inplane, parts) -> (slices, volumes, parts)
    out = np.matmul(x.transpose(1, 0, 2), layout.weights)
    return out.transpose(0, 2, 1).reshape(-1, x.shape[0])


# --------------------------------------------------------------------------- alignment


def _fft() -> Any:
    import scipy.fft

    return scipy.fft


@dataclass(frozen=True)
class Prepared:
    """Channel courses in the mirrored-series cosine basis, high-passed and
    standardised (unit variance over time), ready to be shifted."""

    coeffs: np.ndarray  # (channels, volumes), DCT-II coefficients
    repetition_time: float
    slice_of: np.ndarray


def prepare(courses: np.ndarray, repetition_time: float, slice_of: np.ndarray, *,
            highpass: float = HIGHPASS_HZ) -> Prepared:
    """High-pass (drop cosine terms below ``highpass`` Hz, which removes the mean and
    slow drifts) and standardise each channel course. Rows that are constant after
    the high-pass keep zero coefficients (they add nothing to any score)."""
    x = np.asarray(courses, dtype=np.float64)
    n = x.shape[1]
    coeffs = _fft().dct(x, type=2, axis=1)
    cut = max(1, math.ceil(highpass * 2.0 * n * repetition_time))
    coeffs[:, :cut] = 0.0
    # variance over time of the series a coefficient vector describes (scipy's DCT-II
    # without normalisation: x = idct(c); sum x^2 = (c0^2 / (4n)) + sum_k c_k^2 / (2n))
    power = np.sqrt((coeffs[:, 1:] ** 2).sum(axis=1) / (2.0 * n) / n)
    good = power > 1e-12 * (float(power.max()) if power.size else 0.0)
    coeffs[good] /= power[good, None]
    coeffs[~good] = 0.0
    return Prepared(coeffs, float(repetition_time), np.asarray(slice_of))


def shift_rows(coeffs: np.ndarray, shifts: np.ndarray) -> np.ndarray:
    """Each row's series ``x(m + d)`` for its own shift ``d`` (in samples), from its
    DCT-II coefficients: the phase ramp of the Fourier shift theorem applied to the
    mirrored series (the same arithmetic as the ``fourier`` engine, one shift per row)."""
    n = coeffs.shape[1]
    angle = np.pi * np.arange(n)[None, :] * np.asarray(shifts, dtype=np.float64)[:, None] / n
    fft = _fft()
    odd = np.zeros_like(coeffs)
    odd[:, :-1] = coeffs[:, 1:] * np.sin(angle[:, 1:])
    out = fft.idct(coeffs * np.cos(angle), type=2, axis=1)
    out -= fft.idst(odd, type=2, axis=1)
    return out


def contributions(prepared: Prepared, slice_times: np.ndarray, *,
                  trim: int = TRIM_VOLUMES) -> np.ndarray:
    """Per-volume contributions to the score of one schedule (seconds per slice).

    Their mean over volumes is the mean correlation over all pairs of channels
    after aligning every channel to the schedule's mean time."""
    times = np.asarray(slice_times, dtype=np.float64)[prepared.slice_of]
    reference = float(times.mean()) if times.size else 0.0
    aligned = shift_rows(prepared.coeffs, (reference - times) / prepared.repetition_time)
    c = aligned.shape[0]
    total = aligned.sum(axis=0)
    q = (total * total - (aligned * aligned).sum(axis=0)) / max(c * (c - 1), 1)
    if trim and q.size > 2 * trim + 4:
        q = q[trim:-trim]
    return q


def score_matrix(prepared: Prepared, schedules: Sequence[Sequence[float]], *,
                 trim: int = TRIM_VOLUMES) -> np.ndarray:
    """``(candidates, volumes)`` contributions of every schedule."""
    return np.stack([contributions(prepared, np.asarray(s), trim=trim) for s in schedules])


def block_length(n_volumes: int, repetition_time: float) -> int:
    """Bootstrap block length in volumes: about ``BLOCK_SECONDS`` of data, at least
    ``MIN_BLOCK`` volumes, at most a fifth of the run."""
    wanted = max(MIN_BLOCK, math.ceil(BLOCK_SECONDS / max(repetition_time, 1e-6)))
    return max(1, min(wanted, n_volumes // 5 or 1))


def block_bootstrap(q: np.ndarray, block: int, n_boot: int = N_BOOTSTRAP,
                    seed: int = 0) -> np.ndarray:
    """Circular moving-block bootstrap of the mean over volumes: ``(n_boot, candidates)``.

    The same resampled blocks serve every candidate, so differences are paired."""
    k, n = q.shape
    block = max(1, min(block, n))
    n_blocks = math.ceil(n / block)
    rng = np.random.default_rng(seed)
    starts = rng.integers(0, n, size=(n_boot, n_blocks))
    extended = np.concatenate([q, q[:, :block]], axis=1)
    cum = np.concatenate([np.zeros((k, 1)), np.cumsum(extended, axis=1)], axis=1)
    sums = cum[:, starts + block] - cum[:, starts]  # (k, n_boot, n_blocks)
    return (sums.sum(axis=2) / (n_blocks * block)).T


# --------------------------------------------------------------------------- spectral scores


def slice_spectra(prepared: Prepared, n_slices: int) -> tuple[np.ndarray, np.ndarray]:
    """``(spectra, power)``: the sum over each slice's channels of their discrete Fourier
    transforms ``(n_slices, volumes // 2 + 1)`` (zero for slices without channels), and
    every channel's total power (with the one-sided weights of Parseval's theorem)."""
    x = _fft().idct(prepared.coeffs, type=2, axis=1)
    transform = np.fft.rfft(x, axis=1)
    spectra = np.zeros((n_slices, transform.shape[1]), dtype=np.complex128)
    np.add.at(spectra, prepared.slice_of, transform)
    weights = _weights(x.shape[1])
    return spectra * np.sqrt(weights), ((np.abs(transform) ** 2) * weights).sum(axis=1)


def _weights(n: int) -> np.ndarray:
    w = np.full(n // 2 + 1, 2.0)
    w[0] = 1.0
    if n % 2 == 0:
        w[-1] = 1.0
    return w


def _normalise(raw: np.ndarray, power: np.ndarray) -> np.ndarray:
    """Total power of the aligned sum -> mean pairwise correlation (the diagonal removed)."""
    c = power.size
    mean = float(power.mean()) if c else 1.0
    return (raw - float(power.sum())) / max(c * (c - 1) * mean, 1e-300)


def _phases(shifts: np.ndarray, n_bins: int, n: int) -> np.ndarray:
    k = np.arange(n_bins)
    return np.exp(2j * np.pi * shifts[..., None] * k / n)


def spectral_scores(spectra: np.ndarray, power: np.ndarray, schedules: np.ndarray,
                    repetition_time: float, n_volumes: int) -> np.ndarray:
    """Mean pairwise correlation of the aligned channels for each schedule ``(q, n_slices)``
    from the periodic spectrum (Parseval): ``sum_k |sum_z X_zk e^(2 pi i k d_z / n)|^2``
    with ``d_z = -t_z / TR``. Close to the mean of :func:`contributions`."""
    out = np.empty(schedules.shape[0])
    chunk = max(1, 2_000_000 // max(spectra.size, 1))
    for start in range(0, schedules.shape[0], chunk):
        d = -np.asarray(schedules[start:start + chunk], dtype=np.float64) / repetition_time
        total = np.einsum("qzk,zk->qk", _phases(d, spectra.shape[1], n_volumes), spectra)
        out[start:start + chunk] = (total.real ** 2 + total.imag ** 2).sum(axis=1)
    return _normalise(out, power)


def shuffle_maxima(spectra: np.ndarray, power: np.ndarray, claimed: Sequence[float],
                   repetition_time: float, n_volumes: int, per_set: int,
                   sets: int = N_SETS, seed: int = 0) -> tuple[np.ndarray, float, float]:
    """The null of "the best of ``per_set`` schedules when timing does not matter":
    ``sets`` sets of ``per_set`` orders made by shuffling the claimed times across
    slices; returns each set's best score, and the mean and sd of all shuffled scores."""
    times = np.asarray(claimed, dtype=np.float64)
    values, index = np.unique(times, return_inverse=True)
    phases = _phases(-values / repetition_time, spectra.shape[1], n_volumes)
    rng = np.random.default_rng(seed + 7919)
    count_all = sets * per_set
    scores = np.empty(count_all)
    chunk = max(1, 2_000_000 // max(spectra.size, 1))
    for start in range(0, count_all, chunk):
        count = min(chunk, count_all - start)
        orders = rng.permuted(np.broadcast_to(index, (count, index.size)), axis=1)
        total = np.einsum("qzk,zk->qk", phases[orders], spectra)
        scores[start:start + count] = (total.real ** 2 + total.imag ** 2).sum(axis=1)
    scores = _normalise(scores, power)
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
    #: (rival - claimed) / (best - shuffled mean): share of the timing evidence the claim loses
    effect: float | None = None
    #: bootstrap z of rival - claimed (per-volume contributions), its 95 % interval, and
    #: the share of replicates in which the rival beats the claim
    z_rival: float | None = None
    interval: tuple[float, float] | None = None
    rival_wins: float | None = None
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
            "interval": None if self.interval is None else [r(v) for v in self.interval],
            "rival_wins": r(self.rival_wins),
            "p_evidence": r(self.p_evidence),
            "p_claimed": r(self.p_claimed),
            "equivalent": list(self.equivalent),
            "top": [[name, r(score)] for name, score in self.ranking[:5]],
        }


def _z(diff: float, replicates: np.ndarray) -> float:
    sd = float(np.std(replicates, ddof=1)) if replicates.size > 1 else 0.0
    if sd <= 0:
        return 0.0 if diff == 0 else math.copysign(math.inf, diff)
    return diff / sd


def schedule_distance(a: Sequence[float], b: Sequence[float]) -> float:
    """RMS difference of two schedules after removing the best common offset."""
    d = np.asarray(a, dtype=np.float64) - np.asarray(b, dtype=np.float64)
    return float(np.sqrt(np.mean((d - d.mean()) ** 2))) if d.size else 0.0


def decide(candidates: Sequence[Candidate], scores: np.ndarray, replicates: np.ndarray,
           null_maxima: np.ndarray, null_mean: float, window: float) -> Decision:
    """The verdict.

    ``scores``: every candidate's spectral score; ``replicates``: paired bootstrap
    replicates of the per-volume scores ``(n_boot, candidates)``; ``null_maxima``: the
    best score of each set of shuffled orders (as many per set as candidates);
    ``null_mean``: the mean shuffled score; ``window``: the acquisition window (seconds).
    """
    claimed = [c.kind for c in candidates].index("claimed")
    best = int(np.argmax(scores))
    sets = null_maxima.size

    def p_value(score: float) -> float:
        return (1 + int(np.sum(null_maxima >= score))) / (sets + 1)

    p_evidence = p_value(float(scores[best]))
    p_claimed = p_value(float(scores[claimed]))
    ranking = tuple(sorted(((c.name, float(scores[i])) for i, c in enumerate(candidates)),
                           key=lambda item: -item[1]))
    ref = candidates[claimed].times
    equivalent = [i for i in range(len(candidates)) if i != claimed
                  and schedule_distance(candidates[i].times, ref) < EQUIVALENT_FRACTION * window]
    others = [i for i in range(len(candidates)) if i != claimed and i not in equivalent]
    base = dict(
        claimed_score=float(scores[claimed]), best_name=candidates[best].name,
        best_score=float(scores[best]), null_score=null_mean,
        null_best=float(np.median(null_maxima)) if sets else null_mean,
        p_evidence=p_evidence, p_claimed=p_claimed,
        equivalent=tuple(candidates[i].name for i in equivalent), ranking=ranking,
    )
    rival_fields: dict[str, Any] = {}
    if others:
        rival = max(others, key=lambda i: scores[i])
        diff = float(scores[rival] - scores[claimed])
        reps = replicates[:, rival] - replicates[:, claimed]
        spread = float(scores[best]) - null_mean
        centre = float(reps.mean())
        low, high = np.percentile(reps - centre + diff, [2.5, 97.5])
        rival_fields = dict(
            rival_name=candidates[rival].name, rival_score=float(scores[rival]),
            effect=diff / spread if spread > 0 else None, z_rival=_z(centre, reps),
            interval=(float(low), float(high)), rival_wins=float(np.mean(reps > 0)),
        )
    threshold = 1.0 / (sets + 1) + 1e-12
    if p_evidence > threshold:
        return Decision("undecidable", "the data show too little timing evidence: no "
                        "candidate aligns the slices better than the best of every set of "
                        "shuffled slice orders", **base, **rival_fields)
    z_rival = rival_fields.get("z_rival")
    effect = rival_fields.get("effect")
    beaten = False
    if z_rival is not None and effect is not None:
        if z_rival >= Z_CONTRADICT and effect >= MIN_EFFECT:
            return Decision("contradicted", f"{rival_fields['rival_name']} aligns the slices "
                            "clearly better than the claimed schedule", **base, **rival_fields)
        beaten = z_rival >= Z_TIE and effect >= TIE_EFFECT
    if p_claimed <= threshold and not beaten:
        return Decision("supported", "the claimed schedule aligns the slices as well as any "
                        "alternative and better than the best of every set of shuffled "
                        "slice orders", **base, **rival_fields)
    return Decision("undecidable", "the evidence is too weak to support or contradict the "
                    "claimed schedule", **base, **rival_fields)


def evaluate(courses: np.ndarray, slice_of: np.ndarray, repetition_time: float,
             candidates: Sequence[Candidate], window: float, *, seed: int = 0,
             n_boot: int = N_BOOTSTRAP, sets: int = N_SETS) -> Decision:
    """Score every candidate on channel courses ``(channels, volumes)`` and decide."""
    prepared = prepare(courses, repetition_time, slice_of)
    n_slices = len(candidates[0].times)
    q = score_matrix(prepared, [c.times for c in candidates])
    replicates = block_bootstrap(q, block_length(q.shape[1], repetition_time), n_boot, seed)
    spectra, power = slice_spectra(prepared, n_slices)
    n_volumes = courses.shape[1]
    scores = spectral_scores(spectra, power, np.asarray([c.times for c in candidates]),
                             repetition_time, n_volumes)
    claimed = next(c for c in candidates if c.kind == "claimed")
    maxima, mean, _ = shuffle_maxima(spectra, power, claimed.times, repetition_time,
                                     n_volumes, len(candidates), sets, seed)
    return decide(candidates, scores, replicates, maxima, mean, window)


__all__ = [
    "Candidate",
    "ChannelLayout",
    "Decision",
    "Prepared",
    "Verdict",
    "block_bootstrap",
    "block_length",
    "channel_sums",
    "contributions",
    "decide",
    "evaluate",
    "make_layout",
    "prepare",
    "schedule_distance",
    "score_matrix",
    "shift_rows",
    "shuffle_maxima",
    "slice_spectra",
    "spectral_scores",
]
