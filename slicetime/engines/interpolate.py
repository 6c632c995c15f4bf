"""Temporal interpolation engines: move time series to new sample times.

Every engine works on a 2-D float32 array ``series`` of shape
``(n_series, n_samples)`` (time is the last, contiguous axis) sampled at
``sample_times`` and returns the values at ``target_times`` (both in seconds,
one per sample). In slice-timing correction the targets are the samples
shifted by one constant (the reference time minus the slice's time).

Engines:

``fourier``
    Exact shift of a band-limited signal by a linear phase ramp (the Fourier
    shift theorem). Edges: the per-series mean and linear trend are removed
    (and added back, shifted exactly), then the series is extended by its
    mirror image (``x[0..n-1], x[n-1..0]``) so the implied periodic signal has
    no jump where it wraps around. Needs evenly spaced samples.
``sinc``
    Windowed-sinc interpolation: ``2 * half_width`` taps of ``sinc`` tapered by
    a Hann window reaching zero at ``half_width`` samples, normalised to sum to
    one (a constant stays constant). Same detrending and mirror extension at
    the edges. Needs evenly spaced samples.
``cubic``
    Cubic spline through the samples with not-a-knot end conditions
    (``scipy.interpolate.CubicSpline``), evaluated at the targets; beyond the
    first or last sample the end polynomial is extended. Works on any
    increasing time grid (``VolumeTiming``).
``linear``
    Straight lines between neighbouring samples (``numpy.interp`` semantics:
    before the first and after the last sample the end value is held). Works
    on any increasing time grid.

Precision: data stay float32 (about 7 significant digits) except inside the
cubic engine, which builds its spline in float64 one block of series at a time
and rounds the result back to float32.

Series that are constant over time are copied, not transformed. Series with
some non-finite samples are filled by linear interpolation across the gaps for
the transform and get their non-finite samples back afterwards, so one bad
sample never spreads along a series or into other series; series with no
finite sample are copied unchanged.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

#: series processed together; bounds the temporaries of every engine
BLOCK_ROWS = 4096

SINC_HALF_WIDTH = 8


def _fft() -> Any:
    """scipy.fft, imported on first use (it is a large import; see ``prepare``)."""
    import scipy.fft

    return scipy.fft


class IrregularGridError(ValueError):
    """The engine needs evenly spaced samples and got something else."""


Core = Callable[[np.ndarray, np.ndarray, np.ndarray, int], np.ndarray]


@dataclass(frozen=True)
class Engine:
    """One interpolation method with its fixed parameters."""

    name: str
    needs_regular_grid: bool
    parameters: Mapping[str, Any]
    core: Core = field(repr=False)
    summary: str = ""


@dataclass
class ResampleStats:
    """What the guard around an engine did with unusual series."""

    constant: int = 0
    partial_nonfinite: int = 0
    all_nonfinite: int = 0

    def add(self, other: ResampleStats) -> None:
        self.constant += other.constant
        self.partial_nonfinite += other.partial_nonfinite
        self.all_nonfinite += other.all_nonfinite


def regular_shift(sample_times: np.ndarray, target_times: np.ndarray) -> float:
    """The constant shift, in samples, of targets against evenly spaced samples."""
    n = sample_times.size
    if n < 2:
        raise IrregularGridError("need at least 2 samples")
    steps = np.diff(sample_times)
    dt = float(steps.mean())
    if not dt > 0 or float(np.ptp(steps)) > 1e-6 * dt:
        raise IrregularGridError(
            "samples are not evenly spaced in time (VolumeTiming); "
            "use the cubic or linear method"
        )
    offsets = target_times - sample_times
    if float(np.ptp(offsets)) > 1e-6 * dt:
        raise IrregularGridError("targets are not a constant shift of the samples")
    return float(offsets.mean()) / dt


def _trend(x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per-series least-squares line ``a + b * n`` over sample index n."""
    n = x.shape[1]
    t = np.arange(n, dtype=np.float32) - np.float32((n - 1) / 2.0)
    mean = x.mean(axis=1, keepdims=True, dtype=np.float64).astype(np.float32)
    slope = (x @ t)[:, None] / np.float32(float(np.dot(t, t)) or 1.0)
    return mean, slope.astype(np.float32)


def _with_trend(
    x: np.ndarray, shift: float, transform: Callable[[np.ndarray], np.ndarray]
) -> np.ndarray:
    """Remove the line, transform the residual, add the line back shifted."""
    n = x.shape[1]
    mean, slope = _trend(x)
    t = np.arange(n, dtype=np.float32) - np.float32((n - 1) / 2.0)
    residual = x - mean - slope * t
    out = transform(residual)
    out += mean + slope * (t + np.float32(shift))
    return out


def _fourier_core(
    x: np.ndarray, sample_times: np.ndarray, target_times: np.ndarray, workers: int
) -> np.ndarray:
    """Phase ramp on the mirrored series, computed as cosine and sine transforms.

    The mirrored series ``x[0..n-1], x[n-1..0]`` has a 2n-periodic Fourier series
    whose terms are exactly the DCT-II basis (its Nyquist term is zero), so
    ``x(m + d) = idct(c_k cos(pi k d / n)) - idst(c_k sin(pi k d / n))`` with
    ``c = dct(x)``: the same result as an FFT of the mirrored series, without
    building it and with transforms of length n instead of 2n.
    """
    shift = regular_shift(sample_times, target_times)
    n = x.shape[1]
    angle = np.pi * np.arange(n, dtype=np.float64) * shift / n
    cos_k = np.cos(angle).astype(np.float32)
    sin_k = np.sin(angle[1:]).astype(np.float32)

    def transform(r: np.ndarray) -> np.ndarray:
        fft = _fft()
        coeffs = fft.dct(r, type=2, axis=1, workers=workers)
        odd = np.empty_like(coeffs)
        np.multiply(coeffs[:, 1:], sin_k, out=odd[:, :-1])
        odd[:, -1] = 0.0
        coeffs *= cos_k
        out = fft.idct(coeffs, type=2, axis=1, workers=workers, overwrite_x=True)
        out -= fft.idst(odd, type=2, axis=1, workers=workers, overwrite_x=True)
        return out

    return _with_trend(x, shift, transform)


def sinc_weights(fraction: float, half_width: int) -> np.ndarray:
    """Hann-windowed sinc taps for offsets ``-half_width+1 .. half_width``."""
    offsets = np.arange(-half_width + 1, half_width + 1, dtype=np.float64) - fraction
    window = 0.5 * (1.0 + np.cos(np.pi * offsets / half_width))
    window[np.abs(offsets) >= half_width] = 0.0
    taps = np.sinc(offsets) * window
    return taps / taps.sum()


def _sinc_core(
    x: np.ndarray, sample_times: np.ndarray, target_times: np.ndarray, workers: int
) -> np.ndarray:
    del workers
    shift = regular_shift(sample_times, target_times)
    half = SINC_HALF_WIDTH
    whole = int(np.floor(shift))
    fraction = shift - whole
    taps = sinc_weights(fraction, half).astype(np.float32)
    n = x.shape[1]
    pad = half + abs(whole) + 1

    def transform(r: np.ndarray) -> np.ndarray:
        padded = np.pad(r, ((0, 0), (pad, pad)), mode="symmetric")
        out = np.zeros_like(r)
        for j, weight in zip(range(-half + 1, half + 1), taps, strict=True):
            if weight == 0.0:
                continue
            start = pad + whole + j
            out += weight * padded[:, start : start + n]
        return out

    return _with_trend(x, shift, transform)


def _cubic_core(
    x: np.ndarray, sample_times: np.ndarray, target_times: np.ndarray, workers: int
) -> np.ndarray:
    del workers
    from scipy.interpolate import CubicSpline  # imported here: only this method needs it

    spline = CubicSpline(sample_times, x.astype(np.float64), axis=1, bc_type="not-a-knot")
    return spline(target_times).astype(np.float32)


def _linear_core(
    x: np.ndarray, sample_times: np.ndarray, target_times: np.ndarray, workers: int
) -> np.ndarray:
    del workers
    n = sample_times.size
    right = np.clip(np.searchsorted(sample_times, target_times, side="right"), 1, n - 1)
    left = right - 1
    span = sample_times[right] - sample_times[left]
    weight = np.clip((target_times - sample_times[left]) / span, 0.0, 1.0).astype(np.float32)
    return x[:, left] * (np.float32(1.0) - weight) + x[:, right] * weight


ENGINES: dict[str, Engine] = {
    "fourier": Engine(
        "fourier",
        True,
        {"detrend": "mean and linear", "extension": "mirror", "precision": "float32"},
        _fourier_core,
        "linear phase ramp on the mirrored, detrended series",
    ),
    "sinc": Engine(
        "sinc",
        True,
        {
            "window": "hann",
            "half_width": SINC_HALF_WIDTH,
            "taps": 2 * SINC_HALF_WIDTH,
            "detrend": "mean and linear",
            "extension": "mirror",
        },
        _sinc_core,
        f"Hann-windowed sinc, {2 * SINC_HALF_WIDTH} taps",
    ),
    "cubic": Engine(
        "cubic",
        False,
        {"boundary": "not-a-knot", "beyond_ends": "extend end polynomial"},
        _cubic_core,
        "cubic spline, not-a-knot ends",
    ),
    "linear": Engine(
        "linear",
        False,
        {"beyond_ends": "hold end value"},
        _linear_core,
        "straight lines between neighbouring samples",
    ),
}

DEFAULT_METHOD = "fourier"


def get_engine(name: str) -> Engine:
    try:
        return ENGINES[name]
    except KeyError:
        raise ValueError(
            f"unknown method {name!r}; expected one of {', '.join(ENGINES)}"
        ) from None


def prepare(engine: Engine) -> None:
    """Import the libraries ``engine`` needs. Callers may run this in a thread
    while the image is being read, so the import does not add to the wall time."""
    if engine.name == "fourier":
        _fft()
    elif engine.name == "cubic":
        import scipy.interpolate  # noqa: F401


#: samples in the probe :func:`noise_variance` measures an engine on
NOISE_PROBE_LENGTH = 256


def noise_variance(
    engine: Engine,
    shift: float,
    *,
    sample_times: np.ndarray | None = None,
    target_times: np.ndarray | None = None,
) -> float:
    """The variance of a corrected sample in the middle of a series of unit white noise.

    Every engine is linear: the corrected series is ``H @ x``, so for independent
    samples of variance 1 the variance of output ``m`` is ``sum_j H[m, j]**2``. The
    row of ``H`` is measured by passing the unit impulses through the engine. By
    default the grid is ``NOISE_PROBE_LENGTH`` evenly spaced samples moved by ``shift``
    samples; give ``sample_times`` and ``target_times`` (seconds) for another grid (the
    middle of a run's own grid, for ``VolumeTiming``). Below 1 the method smooths
    (linear interpolation halfway between two samples averages them: 0.5); 1 keeps
    the noise as it is (a pure phase shift).
    """
    if sample_times is None or target_times is None:
        sample_times = np.arange(NOISE_PROBE_LENGTH, dtype=np.float64)
        target_times = sample_times + shift
    n = sample_times.size
    impulses = np.eye(n, dtype=np.float32)
    response = engine.core(impulses, np.asarray(sample_times, dtype=np.float64),
                           np.asarray(target_times, dtype=np.float64), 1)
    row = response[:, n // 2].astype(np.float64)  # response[j, m] = H[m, j]
    return float(np.dot(row, row))


def _fill_gaps(row: np.ndarray, sample_times: np.ndarray) -> np.ndarray:
    good = np.isfinite(row)
    filled = row.copy()
    filled[~good] = np.interp(sample_times[~good], sample_times[good], row[good])
    return filled


def resample(
    engine: Engine,
    series: np.ndarray,
    sample_times: np.ndarray,
    target_times: np.ndarray,
    *,
    workers: int = 1,
    stats: ResampleStats | None = None,
    block_rows: int = BLOCK_ROWS,
    overwrite: bool = False,
) -> np.ndarray:
    """Resample every row of ``series`` (float32, time last) to ``target_times``.

    Constant rows are copied; rows with non-finite samples are handled as the
    module documentation says. At most ``block_rows`` rows are transformed at
    once, which bounds the engine's temporaries. With ``overwrite`` the result
    may be written into ``series`` itself (when it is float32). Raises
    ``IrregularGridError`` when the engine needs evenly spaced samples and the
    grid is not.
    """
    if series.ndim != 2:
        raise ValueError("series must be 2-D (series, samples)")
    sample_times = np.asarray(sample_times, dtype=np.float64)
    target_times = np.asarray(target_times, dtype=np.float64)
    if series.shape[1] != sample_times.size or target_times.size != sample_times.size:
        raise ValueError("one sample time and one target time per sample are needed")
    if engine.needs_regular_grid:
        regular_shift(sample_times, target_times)  # refuse before any work
    x = np.asarray(series, dtype=np.float32)
    out = x if overwrite and x is series else x.copy()
    stats = stats if stats is not None else ResampleStats()
    # min and max propagate NaN and keep inf, so one pass over the data finds the
    # rows that are finite (both finite) and, among them, the constant ones
    with np.errstate(invalid="ignore"):
        low, high = x.min(axis=1), x.max(axis=1)
    all_finite = np.isfinite(low) & np.isfinite(high)
    constant = all_finite & (low == high)
    partial = np.zeros_like(all_finite)
    none_finite = np.zeros_like(all_finite)
    suspects = np.flatnonzero(~all_finite)
    finite = np.isfinite(x[suspects])
    counts = finite.sum(axis=1)
    none_finite[suspects[counts == 0]] = True
    partial[suspects[counts >= 2]] = True
    singles = suspects[counts == 1]  # one finite sample: constant for every purpose
    if singles.size:
        out[singles] = np.where(finite[counts == 1], x[singles], np.nan)
    stats.constant += int(constant.sum())
    stats.partial_nonfinite += int(partial.sum())
    stats.all_nonfinite += int(none_finite.sum())

    work = np.flatnonzero(all_finite & ~constant)
    if work.size == x.shape[0] and work.size <= block_rows:
        out[...] = engine.core(x, sample_times, target_times, workers)
        return out
    for start in range(0, work.size, block_rows):
        rows = work[start : start + block_rows]
        out[rows] = engine.core(x[rows], sample_times, target_times, workers)
    gaps = np.flatnonzero(partial)
    for start in range(0, gaps.size, block_rows):
        rows = gaps[start : start + block_rows]
        filled = np.stack([_fill_gaps(x[r], sample_times) for r in rows])
        done = engine.core(filled, sample_times, target_times, workers)
        bad = ~np.isfinite(x[rows])
        done[bad] = x[rows][bad]
        out[rows] = done
    return out


__all__ = [
    "BLOCK_ROWS",
    "DEFAULT_METHOD",
    "ENGINES",
    "NOISE_PROBE_LENGTH",
    "Engine",
    "IrregularGridError",
    "ResampleStats",
    "get_engine",
    "noise_variance",
    "prepare",
    "regular_shift",
    "resample",
    "sinc_weights",
]
