"""Signal preparation for the verify engine: pure numeric, no files.

The channel layout (slices, or parts of slices, inside the brain mask), the
reduction of a batch of volumes to channel sums, and the preparation of the
channel courses (level steps regressed out, high-passed and standardised in the
cosine basis) and the taper every course gets before its Fourier transform: what
:mod:`slicetime.engines.verify` then scores.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

#: the share of the run tapered (half at each end) before the Fourier transform (:func:`taper`)
TAPER_FRACTION = 1.0
#: in-brain voxels: temporal mean above this fraction of the robust maximum
MASK_FRACTION = 0.2
#: a transition is a step when the slices' scaled squared change there exceeds this many
#: times its median over the run and its mean two transitions away (:func:`step_transitions`)
STEP_RATIO = 20.0
#: high-pass cut-off (Hz): slower components carry almost no timing evidence
HIGHPASS_HZ = 0.01


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
    #: the half of the in-plane grid (0 or 1, split along the second in-plane axis)
    region_of: np.ndarray | None = None

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
        region_of=np.tile((np.arange(n_parts) % parts) * 2 // parts, n_slices),
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


def scipy_fft() -> Any:
    """scipy.fft, imported on first use (a large import)."""
    import scipy.fft

    return scipy.fft


@dataclass(frozen=True)
class Prepared:
    """Channel courses in the mirrored-series cosine basis, high-passed and
    standardised (unit variance over time), ready to be shifted."""

    coeffs: np.ndarray  # (channels, volumes), DCT-II coefficients
    repetition_time: float
    slice_of: np.ndarray


def step_transitions(courses: np.ndarray, slice_of: np.ndarray) -> list[int]:
    """Transitions ``v`` (between volumes ``v`` and ``v + 1``) where the slices' courses
    jump abruptly: the sum over slices of their squared change, each scaled by that
    slice's median squared change, exceeds ``STEP_RATIO`` times its median over the run
    and ``STEP_RATIO`` times its mean two transitions before and after (a smooth rise,
    such as a response to a block, changes as much there; a step does not)."""
    n = courses.shape[1]
    if n < 8:
        return []
    slices = np.unique(slice_of)
    means = np.stack([courses[slice_of == z].mean(axis=0) for z in slices])
    d2 = np.diff(means, axis=1) ** 2
    scale = np.median(d2, axis=1, keepdims=True)
    ok = scale[:, 0] > 0
    if not ok.any():
        return []
    jump = (d2[ok] / scale[ok]).sum(axis=0)
    typical = float(np.median(jump))
    padded = np.pad(jump, 2, mode="edge")
    around = (padded[:-4] + padded[4:]) / 2.0
    flagged = (jump > STEP_RATIO * typical) & (jump > STEP_RATIO * around)
    return [int(v) for v in np.flatnonzero(flagged)]


def remove_steps(courses: np.ndarray, slice_of: np.ndarray) -> np.ndarray:
    """Each channel course without its level steps (least squares on step functions at
    every flagged transition and its neighbours, the same for every channel).

    A step is not band-limited: sampled every TR it aliases over the whole spectrum, and
    a step that starts mid-volume reaches the slices acquired before it one volume late,
    whole, not delayed by their acquisition times (sampling theorem). No slice schedule
    can align it, while no offsets nearly does; so the steps are taken out for every
    candidate alike."""
    flagged = step_transitions(courses, slice_of)
    if not flagged:
        return courses
    n = courses.shape[1]
    at = sorted({v + k for v in flagged for k in (-1, 0, 1) if 0 <= v + k < n - 1})
    design = np.stack([np.ones(n)] + [(np.arange(n) > v).astype(float) for v in at], axis=1)
    beta, *_ = np.linalg.lstsq(design, courses.T, rcond=None)
    return courses - (design[:, 1:] @ beta[1:]).T


def prepare(courses: np.ndarray, repetition_time: float, slice_of: np.ndarray, *,
            highpass: float = HIGHPASS_HZ) -> Prepared:
    """High-pass (drop cosine terms below ``highpass`` Hz, which removes the mean and
    slow drifts) and standardise each channel course. Rows that are constant after
    the high-pass keep zero coefficients (they add nothing to any score)."""
    x = remove_steps(np.asarray(courses, dtype=np.float64), np.asarray(slice_of))
    n = x.shape[1]
    coeffs = scipy_fft().dct(x, type=2, axis=1)
    cut = max(1, math.ceil(highpass * 2.0 * n * repetition_time))
    coeffs[:, :cut] = 0.0
    # variance over time of the series a coefficient vector describes (scipy's DCT-II
    # without normalisation: x = idct(c); sum x^2 = (c0^2 / (4n)) + sum_k c_k^2 / (2n))
    power = np.sqrt((coeffs[:, 1:] ** 2).sum(axis=1) / (2.0 * n) / n)
    good = power > 1e-12 * (float(power.max()) if power.size else 0.0)
    coeffs[good] /= power[good, None]
    coeffs[~good] = 0.0
    return Prepared(coeffs, float(repetition_time), np.asarray(slice_of))


def taper(n: int, fraction: float | None = None) -> np.ndarray:
    """The window every channel course is multiplied by before its Fourier transform.

    A delay is a linear phase ramp on the discrete Fourier transform only for a periodic
    course: the ramp shifts the course circularly (the shift theorem of the DFT). A run's
    course is not periodic (a drift, a slow wander that ends elsewhere than it began, a
    block cut mid-block), so its periodic extension jumps at the run's ends, and that
    jump leaks over the whole spectrum (Harris 1978, Proc. IEEE 66:51-83) at the same
    sample in every slice, as if the slices had no offsets. Aligning by a schedule with
    offsets then misaligns the leak, and "no offsets" would win on the shape of the signal
    alone. Tapering both ends to zero removes the jump (the leak decays as the cube of
    the frequency instead of its first power), and every candidate is scored on the same
    tapered spectra. A Tukey (cosine-tapered) window: ``fraction`` of the run (half at
    each end) follows a raised cosine, the middle is flat; ``fraction`` 1 is Hann."""
    share = TAPER_FRACTION if fraction is None else fraction
    w = np.ones(n)
    edge = round(share * n / 2)
    if n < 3 or edge < 1:
        return w
    ramp = 0.5 * (1.0 - np.cos(np.pi * (np.arange(edge) + 0.5) / edge))
    w[:edge] = ramp
    w[n - edge:] = ramp[::-1]
    return w
