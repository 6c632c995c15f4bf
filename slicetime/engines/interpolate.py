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

import functools
import importlib.machinery
import importlib.util
import sys
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, NamedTuple

import numpy as np

#: series processed together; bounds the temporaries of every engine
BLOCK_ROWS = 4096

SINC_HALF_WIDTH = 8


def _fft() -> Any:
    """scipy.fft, imported on first use (it is a large import; see ``prepare``)."""
    import scipy.fft

    return scipy.fft


class Transforms(NamedTuple):
    """The three real transforms of the time-axis engine, along axis 0 of a float32
    or float64 array, unnormalised as ``scipy.fft`` defines them (``dct`` is its
    ``dct(type=2)``, ``idct`` and ``idst`` its ``idct(type=2)`` and ``idst(type=2)``).
    The flag lets a transform overwrite its (contiguous) input."""

    dct: Callable[[np.ndarray, bool], np.ndarray]
    idct: Callable[[np.ndarray, bool], np.ndarray]
    idst: Callable[[np.ndarray, bool], np.ndarray]


_POCKETFFT = "scipy.fft._pocketfft.pypocketfft"


def _pocketfft() -> Any:
    """scipy's compiled transform module, loaded without the ``scipy.fft`` package
    around it (whose import, through ``scipy.special``, costs more processor time
    than all the transforms of a typical run), or None where that fails."""
    loaded = sys.modules.get(_POCKETFFT)
    if loaded is not None:
        return loaded
    try:
        found = importlib.util.find_spec("scipy")
        assert found is not None and found.submodule_search_locations
        folder = Path(next(iter(found.submodule_search_locations))) / "fft" / "_pocketfft"
        paths = [p for suffix in importlib.machinery.EXTENSION_SUFFIXES
                 for p in sorted(folder.glob(f"pypocketfft{suffix}"))]
        spec = importlib.util.spec_from_file_location(_POCKETFFT, paths[0])
        assert spec is not None and spec.loader is not None
        module = importlib.util.module_from_spec(spec)
        spec.loader.exec_module(module)
        probe = np.array([[1.0], [2.0]], dtype=np.float32)  # dct-II of [1, 2]: [6, -1.414]
        if not np.allclose(module.dct(probe, 2, (0,), 0, None, 1, None)[:, 0], [6.0, -2**0.5]):
            return None
    except Exception:  # any layout or interface change: use scipy.fft itself
        return None
    sys.modules[_POCKETFFT] = module  # scipy.fft, when imported later, reuses it
    return module


@functools.lru_cache(maxsize=1)
def transforms() -> Transforms:
    """The transforms, from scipy's compiled module directly when possible."""
    module = _pocketfft()
    if module is not None:
        # pocketfft's own conventions (scipy.fft._pocketfft.realtransforms): the
        # inverse of type 2 is type 3 with normalisation 2 (1 / 2n)
        return Transforms(
            lambda x, over: module.dct(x, 2, (0,), 0, x if over else None, 1, None),
            lambda x, over: module.dct(x, 3, (0,), 2, x if over else None, 1, None),
            lambda x, over: module.dst(x, 3, (0,), 2, x if over else None, 1, None),
        )
    fft = _fft()
    return Transforms(
        lambda x, over: fft.dct(x, type=2, axis=0, overwrite_x=over, workers=1),
        lambda x, over: fft.idct(x, type=2, axis=0, overwrite_x=over, workers=1),
        lambda x, over: fft.idst(x, type=2, axis=0, overwrite_x=over, workers=1),
    )


class IrregularGridError(ValueError):
    """The engine needs evenly spaced samples and got something else."""


Core = Callable[[np.ndarray, np.ndarray, np.ndarray, int], np.ndarray]
#: ``(shift in samples, n) -> (response, trend, head, tail)``, see :class:`TimeKernel`
Response = Callable[[float, int], "tuple[np.ndarray, bool, np.ndarray | None, np.ndarray | None]"]


@dataclass(frozen=True)
class Engine:
    """One interpolation method with its fixed parameters.

    ``core`` works on rows (series, samples); ``response``, when the method has one,
    describes the same operator on an evenly spaced grid as a filter of the mirrored
    series (:func:`time_kernel`), which :func:`shift_columns` applies along the time
    axis in place.
    """

    name: str
    needs_regular_grid: bool
    parameters: Mapping[str, Any]
    core: Core = field(repr=False)
    summary: str = ""
    response: Response | None = field(default=None, repr=False)


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


# ---------------------------------------------------------------------------
# the same operators along the time axis, in place (the correction's hot path)
#
# Every regular-grid operator above is, on the mirrored series y (period 2n, even
# about -1/2), a filter: ``out[m] = sum_j h[j] y[m + j]``. The mirrored series'
# discrete Fourier transform is ``exp(i pi k / 2n) C[k]`` with ``C = dct(x)`` (DCT-II,
# its Nyquist term is zero), so with ``H[k] = sum_j h[j] exp(i pi k j / n)``
# (textbook convolution theorem)
#     out = idct(C Re H) - idst(C[1:] Im H[1:], padded with a zero).
# fourier: ``H = exp(i pi k d / n)`` (a shift by d samples); sinc: H of its 16 taps;
# cubic: H of the spline's interior kernel, with the first and last rows (where
# the not-a-knot ends differ from a mirror) taken from the spline itself.
# The per-series line fit of fourier and sinc (removed, transformed, added back
# shifted) is linear too: ``out = S(x) + slope * (t + d - S(t))``, so only the
# slope is computed per series and the line's contribution is one precomputed
# vector (its DCT is added to the coefficients).

#: rows at each end of a cubic-spline run taken from the exact spline; beyond them
#: the spline's influence of the ends has decayed below 0.27**24 = 2e-14 (the
#: cardinal cubic spline decays by 2 - sqrt(3) per sample: textbook)
SPLINE_EDGE = 24
#: taps of the spline's interior kernel on each side (0.27**32: below 1e-18)
SPLINE_TAPS = 32
#: the longest spline solved to find the kernel and the end rows
_SPLINE_SPAN = 2 * SPLINE_EDGE + 2 * SPLINE_TAPS


@dataclass(frozen=True, eq=False)
class TimeKernel:
    """A regular-grid operator of ``n`` samples, ready for :func:`shift_columns`."""

    n: int
    re: np.ndarray  # (n, 1) float32: Re H
    im: np.ndarray  # (n - 1, 1) float32: Im H[1:]
    #: (n,) float32 centred sample index, or None when no line is removed
    t: np.ndarray | None
    #: (n, 1) float32: DCT of (t + d - S(t)) / (t . t), added per unit of t . x
    line: np.ndarray | None
    head: np.ndarray | None  # (edge, width) float32: exact first rows
    tail: np.ndarray | None  # (edge, width) float32: exact last rows


def _apply_response(x: np.ndarray, re: np.ndarray, im: np.ndarray) -> np.ndarray:
    """The filter on the mirrored series, along axis 0 (float64; kernels only)."""
    fft = transforms()
    coeffs = fft.dct(x, False)
    odd = np.zeros_like(coeffs)
    odd[:-1] = coeffs[1:] * im
    coeffs *= re
    return np.asarray(fft.idct(coeffs, True) - fft.idst(odd, True))


def _response_of_taps(taps: np.ndarray, offsets: np.ndarray, n: int) -> np.ndarray:
    k = np.arange(n, dtype=np.float64)[:, None]
    return np.asarray((taps[None, :] * np.exp(1j * np.pi * k * offsets[None, :] / n)).sum(axis=1))


def _fourier_response(shift: float, n: int) -> tuple[np.ndarray, bool, None, None]:
    return np.exp(1j * np.pi * np.arange(n, dtype=np.float64) * shift / n), True, None, None


def _sinc_response(shift: float, n: int) -> tuple[np.ndarray, bool, None, None]:
    whole = int(np.floor(shift))
    taps = sinc_weights(shift - whole, SINC_HALF_WIDTH)
    offsets = whole + np.arange(-SINC_HALF_WIDTH + 1, SINC_HALF_WIDTH + 1, dtype=np.float64)
    return _response_of_taps(taps, offsets, n), True, None, None


def spline_rows(length: int, shift: float) -> np.ndarray:
    """The not-a-knot cubic spline through samples at 0, 1, ..., ``length - 1`` as a
    matrix: row m holds the weight of every sample in the spline's value at
    ``m + shift`` (beyond the ends: the end polynomial). ``length`` >= 4.

    Textbook construction on a unit grid: the second derivatives ``M`` solve
    ``M[i-1] + 4 M[i] + M[i+1] = 6 (y[i+1] - 2 y[i] + y[i-1])`` inside and the
    not-a-knot conditions ``M[0] - 2 M[1] + M[2] = 0`` (and the same at the other
    end); on ``[i, i + 1]`` with ``u = x - i`` the spline is
    ``(1 - u) y[i] + u y[i+1] + ((1 - u)**3 - (1 - u)) M[i] / 6 + (u**3 - u) M[i+1] / 6``.
    """
    system = np.zeros((length, length))
    second = np.zeros((length, length))
    inside = np.arange(1, length - 1)
    system[inside, inside - 1] = 1.0
    system[inside, inside] = 4.0
    system[inside, inside + 1] = 1.0
    second[inside, inside - 1] = 6.0
    second[inside, inside] = -12.0
    second[inside, inside + 1] = 6.0
    system[0, :3] = system[-1, -3:] = (1.0, -2.0, 1.0)
    curvature = np.linalg.solve(system, second)  # M for each unit sample
    where = np.arange(length, dtype=np.float64) + shift
    left = np.clip(np.floor(where).astype(int), 0, length - 2)
    u = (where - left)[:, None]
    rows = (u**3 - u) / 6.0 * curvature[left + 1] + ((1 - u) ** 3 - (1 - u)) / 6.0 * curvature[left]
    rows[np.arange(length), left] += (1 - u)[:, 0]
    rows[np.arange(length), left + 1] += u[:, 0]
    return rows


def _cubic_response(shift: float, n: int) -> tuple[np.ndarray, bool, np.ndarray, np.ndarray]:
    span = min(n, _SPLINE_SPAN)
    rows = spline_rows(span, shift)
    middle = span // 2
    reach = np.arange(-min(SPLINE_TAPS, middle), min(SPLINE_TAPS, span - 1 - middle) + 1)
    response = _response_of_taps(rows[middle, middle + reach], reach.astype(np.float64), n)
    edge = SPLINE_EDGE
    width = min(span, edge + SPLINE_TAPS)
    return response, False, rows[:edge, :width], rows[span - edge :, span - width :]


def _kernel_of(engine: Engine, shift: float, n: int) -> TimeKernel:
    assert engine.response is not None
    response, trend, head, tail = engine.response(shift, n)
    re = response.real
    im = response.imag[1:]
    t_line: np.ndarray | None = None
    line: np.ndarray | None = None
    if trend:
        t = np.arange(n, dtype=np.float64) - (n - 1) / 2.0
        moved = _apply_response(t[:, None], re[:, None], im[:, None])[:, 0]
        line = transforms().dct((t + shift - moved)[:, None], True) / float(np.dot(t, t))
        t_line = t.astype(np.float32)
    return TimeKernel(
        n,
        np.ascontiguousarray(re[:, None], dtype=np.float32),
        np.ascontiguousarray(im[:, None], dtype=np.float32),
        t_line,
        _as32(line),
        _as32(head),
        _as32(tail),
    )


def _as32(array: np.ndarray | None) -> np.ndarray | None:
    return None if array is None else np.ascontiguousarray(array, dtype=np.float32)


@functools.lru_cache(maxsize=256)
def _cached_kernel(name: str, samples: bytes, targets: bytes) -> TimeKernel | None:
    engine = ENGINES[name]
    sample_times = np.frombuffer(samples, dtype=np.float64)
    target_times = np.frombuffer(targets, dtype=np.float64)
    n = sample_times.size
    try:
        shift = regular_shift(sample_times, target_times)
    except IrregularGridError:
        if engine.needs_regular_grid:
            raise
        return None
    if n < _MIN_KERNEL_SAMPLES.get(name, n + 1):
        return None
    return _kernel_of(engine, shift, n)


#: the shortest series each kernel is used for (below: the row engines). The
#: cubic kernel needs its two blocks of exact end rows.
_MIN_KERNEL_SAMPLES = {"fourier": 2, "sinc": 2, "cubic": 2 * SPLINE_EDGE + 1}


def time_kernel(
    engine: Engine, sample_times: np.ndarray, target_times: np.ndarray
) -> TimeKernel | None:
    """The engine's operator for these times as a :class:`TimeKernel` (computed once
    per distinct grid and shift), or None when the engine has no such form for them
    (linear; cubic on an uneven grid; very short series): then the row engines
    (:func:`resample`) apply. Raises ``IrregularGridError`` like :func:`resample`."""
    if engine.response is None or ENGINES.get(engine.name) is not engine:
        return None
    samples = np.ascontiguousarray(sample_times, dtype=np.float64)
    targets = np.ascontiguousarray(target_times, dtype=np.float64)
    if samples.size != targets.size:
        raise ValueError("one sample time and one target time per sample are needed")
    return _cached_kernel(engine.name, samples.tobytes(), targets.tobytes())


def shift_columns(block: np.ndarray, kernel: TimeKernel) -> None:
    """Apply ``kernel`` to every column of ``block`` (float32, ``(n, columns)``, time
    along axis 0, any strides), in place.

    Every column is transformed: the caller restores columns that must not be
    (constant and non-finite ones; see ``engines.align``). A non-finite sample
    stays in its own column. The first row is subtracted before the transforms and
    added back after (the transforms' rounding then scales with the signal's
    variation, not its level).
    """
    fft = transforms()
    base = block[0].copy()
    head = tail = None
    if kernel.head is not None and kernel.tail is not None:
        width = kernel.head.shape[1]
        head = kernel.head @ block[:width]
        tail = kernel.tail @ block[block.shape[0] - width :]
    if block.flags.c_contiguous:
        block -= base  # the transforms read contiguous data fastest
        varying = block
    else:
        varying = np.subtract(block, base)
    slope = kernel.t @ varying if kernel.t is not None else None
    coeffs = fft.dct(varying, True)
    odd = np.empty_like(coeffs)
    np.multiply(coeffs[1:], kernel.im, out=odd[:-1])
    odd[-1] = 0.0
    coeffs *= kernel.re
    if kernel.line is not None and slope is not None:
        coeffs += kernel.line * slope
    del varying
    out = fft.idct(coeffs, True)
    out += base
    np.subtract(out, fft.idst(odd, True), out=block)
    if head is not None and tail is not None:
        block[: head.shape[0]] = head
        block[block.shape[0] - tail.shape[0] :] = tail


ENGINES: dict[str, Engine] = {
    "fourier": Engine(
        "fourier",
        True,
        {"detrend": "mean and linear", "extension": "mirror", "precision": "float32"},
        _fourier_core,
        "linear phase ramp on the mirrored, detrended series",
        _fourier_response,
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
        _sinc_response,
    ),
    "cubic": Engine(
        "cubic",
        False,
        {"boundary": "not-a-knot", "beyond_ends": "extend end polynomial"},
        _cubic_core,
        "cubic spline, not-a-knot ends",
        _cubic_response,
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
    if engine.response is not None:
        transforms()


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
    kernel = time_kernel(engine, sample_times, target_times)
    if kernel is not None:  # the correction's own path: impulses as columns
        columns = np.eye(n, dtype=np.float32)
        shift_columns(columns, kernel)
        row = columns[n // 2].astype(np.float64)  # columns[m, j] = H[m, j]
        return float(np.dot(row, row))
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
    "TimeKernel",
    "Transforms",
    "get_engine",
    "noise_variance",
    "prepare",
    "regular_shift",
    "resample",
    "shift_columns",
    "sinc_weights",
    "time_kernel",
    "transforms",
]
