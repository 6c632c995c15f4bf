"""The interpolation engines against textbook identities and reference libraries."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.interpolate import CubicSpline

from slicetime.engines.interpolate import (
    ENGINES,
    IrregularGridError,
    ResampleStats,
    get_engine,
    regular_shift,
    resample,
    sinc_weights,
)

TR = 2.0


def band_limited(
    times: np.ndarray, rng: np.random.Generator, n_series: int, top: float
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Random sums of 6 sinusoids below ``top`` × Nyquist, as callable parameters."""
    nyquist = 0.5 / TR
    freq = rng.uniform(0.002, top * nyquist, (n_series, 6))
    phase = rng.uniform(0, 2 * np.pi, (n_series, 6))
    amp = rng.uniform(0.2, 1.0, (n_series, 6))
    offset = rng.uniform(-50, 1000, (n_series, 1))
    return freq, phase, amp, offset


def evaluate(params: tuple[np.ndarray, ...], times: np.ndarray) -> np.ndarray:
    freq, phase, amp, offset = params
    waves = amp[..., None] * np.sin(2 * np.pi * freq[..., None] * times + phase[..., None])
    return waves.sum(axis=1) + offset


def interior(n: int) -> slice:
    """Volumes away from both ends (10 % each side): where the issue's targets apply."""
    edge = max(2, n // 10)
    return slice(edge, n - edge)


# ---------------------------------------------------------------------------- accuracy


@pytest.mark.parametrize(
    ("method", "limit", "top"),
    # The targets of the correction issue: error at most this fraction of the
    # uncorrected error, in interior volumes. The band-limited methods are held to
    # them up to 0.8 x Nyquist; the polynomial ones up to half the Nyquist frequency
    # (0.125 Hz at TR 2 s, where a canonical BOLD response has almost all its power:
    # common practice, no source). DEVELOPERS.md tabulates other bandwidths.
    [
        ("fourier", 0.02, 0.8),
        ("sinc", 0.15, 0.8),
        ("cubic", 0.15, 0.5),
        ("linear", 0.60, 0.5),
    ],
)
@pytest.mark.parametrize("seed", [1, 2, 3, 4, 5])
def test_band_limited_signals_are_recovered(
    method: str, limit: float, top: float, seed: int
) -> None:
    # Whittaker-Shannon sampling theorem (textbook): a sum of sinusoids below the
    # Nyquist frequency is determined by its samples, so the value at the reference
    # time is recoverable from samples taken at the slice's own time.
    rng = np.random.default_rng(seed)
    n = 240
    onsets = np.arange(n) * TR
    params = band_limited(onsets, rng, 200, top=top)
    slice_time = rng.uniform(0.0, TR)
    reference = rng.uniform(0.0, TR)
    sampled = evaluate(params, onsets + slice_time).astype(np.float32)
    truth = evaluate(params, onsets + reference)
    out = resample(get_engine(method), sampled, onsets + slice_time, onsets + reference)
    keep = interior(n)
    corrected = np.abs(out[:, keep] - truth[:, keep]).mean()
    uncorrected = np.abs(sampled[:, keep] - truth[:, keep]).mean()
    assert out.dtype == np.float32
    assert corrected <= limit * uncorrected, (method, corrected / uncorrected)


def test_linear_is_worse_than_cubic_but_bounded() -> None:
    # Common practice (no source): linear interpolation low-passes the signal, so it
    # recovers less than a cubic spline; it still beats doing nothing.
    rng = np.random.default_rng(7)
    n = 200
    onsets = np.arange(n) * TR
    params = band_limited(onsets, rng, 100, top=0.6)
    sampled = evaluate(params, onsets + 1.5).astype(np.float32)
    truth = evaluate(params, onsets + 0.5)
    keep = interior(n)
    errors = {
        m: np.abs(resample(get_engine(m), sampled, onsets + 1.5, onsets + 0.5) - truth)[
            :, keep
        ].mean()
        for m in ("linear", "cubic")
    }
    uncorrected = np.abs(sampled - truth)[:, keep].mean()
    assert errors["cubic"] < errors["linear"] < uncorrected


def test_fourier_is_exact_for_the_mirror_basis() -> None:
    # Textbook identity (DCT-II): cos(pi k (n + 1/2) / N) is periodic with period 2N and
    # even about n = -1/2 and n = N - 1/2, so the mirrored extension is exactly a
    # band-limited signal; for even k the line fit removes nothing (zero slope by
    # symmetry), so the phase ramp must shift it exactly, at every volume, including
    # the first and the last, to float32 precision.
    n = 128
    index = np.arange(n)
    ks = np.array([2, 6, 10, 24, 40])
    rng = np.random.default_rng(11)
    amps = rng.uniform(0.5, 2.0, ks.size)

    def basis(positions: np.ndarray) -> np.ndarray:
        pairs = zip(ks, amps, strict=True)
        return sum(a * np.cos(np.pi * k * (positions + 0.5) / n) for k, a in pairs)

    shift = 0.37  # samples
    samples = (100.0 + basis(index)).astype(np.float32)[None, :]
    truth = 100.0 + basis(index + shift)
    out = resample(ENGINES["fourier"], samples, index * TR, (index + shift) * TR)
    assert np.max(np.abs(out[0] - truth)) < 2e-4  # float32 spacing at 100 is 7.6e-6


def test_integer_shift_of_sinc_returns_the_samples() -> None:
    # Textbook identity: sinc(n) = 1 for n = 0 and 0 at other integers, so a
    # whole-sample shift must reproduce neighbouring samples exactly.
    rng = np.random.default_rng(3)
    x = rng.normal(500, 20, (5, 50)).astype(np.float32)
    t = np.arange(50) * TR
    out = resample(ENGINES["sinc"], x, t, t + TR)
    np.testing.assert_allclose(out[:, :-1], x[:, 1:], rtol=0, atol=1e-3)


def test_sinc_weights_are_a_normalised_hann_windowed_sinc() -> None:
    # The definition documented in the engine: sinc(u) * 0.5 (1 + cos(pi u / H)),
    # normalised to sum to 1 (so a constant is preserved: common practice, no source).
    taps = sinc_weights(0.5, 8)
    u = np.arange(-7, 9) - 0.5
    expected = np.sinc(u) * 0.5 * (1 + np.cos(np.pi * u / 8))
    np.testing.assert_allclose(taps, expected / expected.sum())
    assert taps.sum() == pytest.approx(1.0)
    np.testing.assert_allclose(taps, taps[::-1])  # half-way: symmetric


# ------------------------------------------------------------------------- references


def test_cubic_agrees_with_scipy_cubic_spline_on_an_uneven_grid() -> None:
    # Reference library: scipy.interpolate.CubicSpline (not-a-knot ends), on uneven
    # volume times such as VolumeTiming gives.
    rng = np.random.default_rng(5)
    onsets = np.cumsum(rng.uniform(1.5, 3.5, 90))
    x = rng.normal(1000, 30, (40, 90)).astype(np.float32)
    targets = onsets + 0.4
    samples = onsets - 0.3
    out = resample(ENGINES["cubic"], x, samples, targets)
    expected = CubicSpline(samples, x.astype(np.float64), axis=1)(targets)
    np.testing.assert_allclose(out, expected, rtol=2e-7, atol=1e-3)


def test_linear_agrees_with_numpy_interp_including_beyond_the_ends() -> None:
    # Reference library: numpy.interp (holds the end values outside the samples).
    rng = np.random.default_rng(6)
    onsets = np.cumsum(rng.uniform(1.0, 3.0, 60))
    x = rng.normal(0, 5, (12, 60)).astype(np.float32)
    for offset in (-0.9, 0.25, 1.7):
        out = resample(ENGINES["linear"], x, onsets, onsets + offset)
        for row in range(x.shape[0]):
            expected = np.interp(onsets + offset, onsets, x[row].astype(np.float64))
            np.testing.assert_allclose(out[row], expected, rtol=1e-6, atol=1e-5)


@pytest.mark.parametrize("method", ["fourier", "sinc"])
def test_regular_engines_refuse_uneven_volume_times(method: str) -> None:
    onsets = np.array([0.0, 2.0, 4.0, 7.0, 9.0, 11.0])
    x = np.ones((2, 6), dtype=np.float32) * np.arange(6, dtype=np.float32)
    with pytest.raises(IrregularGridError, match="not evenly spaced"):
        resample(ENGINES[method], x, onsets, onsets + 0.5)


def test_regular_shift_is_in_samples() -> None:
    t = np.arange(10) * 2.5
    assert regular_shift(t, t + 1.25) == pytest.approx(0.5)
    assert regular_shift(t, t - 2.5) == pytest.approx(-1.0)


# ------------------------------------------------------------------- awkward voxels


@pytest.mark.parametrize("method", sorted(ENGINES))
def test_constant_and_empty_series_are_copied(method: str) -> None:
    t = np.arange(30) * TR
    x = np.zeros((4, 30), dtype=np.float32)
    x[1] = 731.5
    x[2] = np.nan
    x[3] = np.sin(t / 7).astype(np.float32)
    stats = ResampleStats()
    out = resample(ENGINES[method], x, t, t + 0.8, stats=stats)
    assert np.array_equal(out[0], x[0])
    assert np.array_equal(out[1], x[1])
    assert np.isnan(out[2]).all()
    assert not np.array_equal(out[3], x[3])
    assert (stats.constant, stats.all_nonfinite, stats.partial_nonfinite) == (2, 1, 0)


@pytest.mark.parametrize("method", sorted(ENGINES))
def test_a_nan_sample_stays_where_it_was(method: str) -> None:
    rng = np.random.default_rng(9)
    t = np.arange(60) * TR
    clean = (100 + 5 * np.sin(2 * np.pi * 0.03 * t)[None, :] + rng.normal(0, 0.1, (3, 60)))
    clean = clean.astype(np.float32)
    damaged = clean.copy()
    damaged[1, 20] = np.nan
    damaged[1, 41] = np.inf
    out_clean = resample(ENGINES[method], clean, t, t + 0.6)
    out = resample(ENGINES[method], damaged, t, t + 0.6)
    # the other series are untouched by their neighbour's bad samples (up to float32
    # rounding: they are processed in a differently sized block)
    np.testing.assert_allclose(out[[0, 2]], out_clean[[0, 2]], rtol=1e-6)
    # the bad samples keep their place; nothing else in the series becomes non-finite
    assert np.isnan(out[1, 20]) and np.isinf(out[1, 41])
    others = np.delete(out[1], [20, 41])
    assert np.isfinite(others).all()
    # away from the gaps the series is corrected about as well as without them
    far = np.r_[0:15, 26:36, 47:60]
    assert np.max(np.abs(out[1, far] - out_clean[1, far])) < 0.5


def test_unknown_method_is_a_clear_error() -> None:
    with pytest.raises(ValueError, match="unknown method 'spline'; expected one of"):
        get_engine("spline")
