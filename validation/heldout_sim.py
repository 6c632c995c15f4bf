"""A second, independent simulator of fMRI runs for checking ``slicetime verify``.

Written separately from :mod:`slicetime.pipelines.simulate` and from the verify engine
(no code shared, nothing imported from ``slicetime``), so that rates measured on it are
not rates of a simulator the check was tuned on.

Every slice is sampled at its own true time: the value stored for slice ``z`` of volume
``v`` is the continuous signal at ``v * TR + t[z]`` (``t`` the true slice times). The
shared signal comes from one family per run (or a mix), each a continuous function of
time evaluated exactly at those instants:

* ``wander``: slow random fluctuation (white noise smoothed by a Gaussian of about 10 s),
  a few tenths of a percent, ending elsewhere than it began;
* ``linear``, ``quadratic``, ``exponential``: scanner drift;
* ``sinusoid``: one shared sinusoid between 0.01 and 0.1 Hz at about 1 %;
* ``block``: a block design (on/off boxcar cut anywhere by the run's start and end),
  convolved with the double-gamma response of Glover 1999 (NeuroImage 9:416-429);
* ``event``: jittered events, same response;
* ``physio``: respiration (0.2-0.35 Hz) and cardiac (0.9-1.3 Hz) fluctuations, with a
  sign and size of their own in every slice and half of the image, aliased by the TR
  (sampling theorem);
* ``step``: a level step that starts at an arbitrary instant (mid-volume);
* ``network``: several band-limited (0.01-0.1 Hz) components with their own spatial maps;
* ``realistic``: a task (block or event) plus network, physiology and a small drift.

Thermal noise is independent in every voxel. Pure numeric code: arrays out.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np

FAMILIES = ("wander", "linear", "quadratic", "exponential", "sinusoid", "block", "event",
            "physio", "step", "network", "realistic")

Course = Callable[..., np.ndarray]


# --------------------------------------------------------------------------- slice orders


def order_times(n: int, window: float, kind: str, multiband: int = 1) -> tuple[float, ...]:
    """Slice times (array order) of a few common acquisition orders, written here from the
    definitions rather than taken from the project: ``ascending``, ``descending``,
    ``interleaved-odd`` (0, 2, 4, ... then 1, 3, ...), ``interleaved-even`` (1, 3, ... then
    0, 2, ...), ``interleaved-desc`` (the odd interleave run from the top). With multiband
    ``m``, slice ``z`` shares its time with ``z mod (n / m)`` (the first package)."""
    if n % multiband:
        raise ValueError("slice count not divisible by the multiband factor")
    groups = n // multiband
    if kind == "ascending":
        sequence = list(range(groups))
    elif kind == "descending":
        sequence = list(range(groups - 1, -1, -1))
    elif kind == "interleaved-odd":
        sequence = list(range(0, groups, 2)) + list(range(1, groups, 2))
    elif kind == "interleaved-even":
        sequence = list(range(1, groups, 2)) + list(range(0, groups, 2))
    elif kind == "interleaved-desc":
        top = groups - 1
        sequence = list(range(top, -1, -2)) + list(range(top - 1, -1, -2))
    else:
        raise ValueError(kind)
    step = window / groups
    position = {z: i for i, z in enumerate(sequence)}
    return tuple(round(position[z % groups] * step, 6) for z in range(n))


#: the kinds of wrong claim, each a function of the true order -> the claimed order
MISTAKES = ("reversed", "sequential-for-interleaved", "interleaved-for-sequential", "parity",
            "multiband")


def wrong_claim(n: int, window: float, kind: str, multiband: int, mistake: str
                ) -> tuple[float, ...] | None:
    """A wrong claim of the given kind for the true order (None when it does not apply)."""
    if mistake == "reversed":
        other = {"ascending": "descending", "descending": "ascending",
                 "interleaved-odd": "interleaved-desc", "interleaved-desc": "interleaved-odd",
                 "interleaved-even": "interleaved-desc"}[kind]
        return order_times(n, window, other, multiband)
    if mistake == "sequential-for-interleaved":
        return order_times(n, window, "ascending", multiband) if kind.startswith(
            "interleaved") else None
    if mistake == "interleaved-for-sequential":
        return order_times(n, window, "interleaved-odd", multiband) if not kind.startswith(
            "interleaved") else None
    if mistake == "parity":
        swap = {"interleaved-odd": "interleaved-even", "interleaved-even": "interleaved-odd"}
        return order_times(n, window, swap[kind], multiband) if kind in swap else None
    if mistake == "multiband":
        factor = 1 if multiband > 1 else next((m for m in (2, 3, 4) if n % m == 0), 1)
        if factor == multiband:
            return None
        return order_times(n, window, kind, factor)
    raise ValueError(mistake)


# --------------------------------------------------------------------------- courses


def glover_response(t: np.ndarray) -> np.ndarray:
    """Glover 1999's double-gamma response (NeuroImage 9:416-429, eq. 3 with the auditory
    fit: a1 = 6, a2 = 12, b1 = b2 = 0.9 s, c = 0.35), written as (t/d)^a exp(-(t-d)/b)
    with d = a b so each gamma peaks at 1 at t = d."""
    t = np.maximum(np.asarray(t, dtype=np.float64), 0.0)
    out = np.zeros_like(t)
    for a, b, c in ((6.0, 0.9, 1.0), (12.0, 0.9, -0.35)):
        d = a * b
        with np.errstate(divide="ignore"):
            out += c * np.exp(a * np.log(np.where(t > 0, t / d, 1.0)) - (t - d) / b) * (t > 0)
    return out


def _fine(rng: np.random.Generator, end: float, dt: float = 0.05) -> np.ndarray:
    return np.arange(-60.0, end + 60.0, dt)


def _interp(grid: np.ndarray, values: np.ndarray) -> Course:
    return lambda t: np.interp(t, grid, values)


def _smoothed_noise(rng: np.random.Generator, grid: np.ndarray, sigma_s: float) -> np.ndarray:
    """White noise on ``grid`` smoothed by a Gaussian of ``sigma_s`` seconds, unit sd."""
    dt = grid[1] - grid[0]
    half = int(4 * sigma_s / dt)
    kernel = np.exp(-0.5 * (np.arange(-half, half + 1) * dt / sigma_s) ** 2)
    x = np.convolve(rng.standard_normal(grid.size), kernel / kernel.sum(), mode="same")
    return x / (x[half:-half].std() or 1.0)


def _band(rng: np.random.Generator, grid: np.ndarray, low: float, high: float) -> np.ndarray:
    """Band-limited noise (an ideal filter in the Fourier domain of a long grid), unit sd."""
    spectrum = np.fft.rfft(rng.standard_normal(grid.size))
    f = np.fft.rfftfreq(grid.size, grid[1] - grid[0])
    spectrum[(f < low) | (f > high)] = 0.0
    x = np.fft.irfft(spectrum, grid.size)
    return x / (x.std() or 1.0)


def _convolved(grid: np.ndarray, boxcar: np.ndarray) -> np.ndarray:
    dt = grid[1] - grid[0]
    h = glover_response(np.arange(0.0, 32.0, dt))
    y = np.convolve(boxcar, h)[:grid.size] * dt
    return y / (np.abs(y).max() or 1.0)


def block_course(rng: np.random.Generator, end: float) -> Course:
    """On/off blocks of 10-30 s, the design's phase random so the run may cut a block."""
    grid = _fine(rng, end)
    period = float(rng.uniform(20.0, 60.0))
    phase = float(rng.uniform(0.0, period))
    boxcar = (((grid + phase) % period) < period / 2).astype(float)
    return _interp(grid, _convolved(grid, boxcar))


def event_course(rng: np.random.Generator, end: float) -> Course:
    grid = _fine(rng, end)
    boxcar = np.zeros(grid.size)
    t = float(rng.uniform(-20.0, 5.0))
    while t < end + 30:
        boxcar[(grid >= t) & (grid < t + 1.0)] = 1.0
        t += float(rng.uniform(3.0, 10.0))
    return _interp(grid, _convolved(grid, boxcar))


@dataclass(frozen=True)
class Run:
    """One simulated run and its truth."""

    data: np.ndarray  # (x, y, z, volumes)
    true_times: tuple[float, ...]
    repetition_time: float
    family: str


def _brain(nx: int, ny: int) -> np.ndarray:
    x, y = np.meshgrid(np.linspace(-1, 1, nx), np.linspace(-1, 1, ny), indexing="ij")
    return (x ** 2 / 0.8 + y ** 2 / 0.9) < 1.0


def simulate(family: str, true_times: Sequence[float], repetition_time: float, volumes: int,
             seed: int, *, shape: tuple[int, int] = (24, 24), noise: float = 0.01,
             amplitude: float | None = None) -> Run:
    """A run of ``volumes`` volumes whose slices are sampled at ``true_times``.

    ``noise`` is the thermal noise sd per voxel (fraction of the baseline);
    ``amplitude`` the shared signal's sd (fraction; a family default when None)."""
    if family not in FAMILIES:
        raise ValueError(family)
    rng = np.random.default_rng(seed)
    nz = len(true_times)
    nx, ny = shape
    end = volumes * repetition_time + 1.0
    st = np.asarray(true_times, dtype=np.float64)
    # sampling instants: (slices, volumes)
    instants = np.arange(volumes)[None, :] * repetition_time + st[:, None]
    brain = _brain(nx, ny)
    base = 1000.0 * (0.8 + 0.4 * rng.random((nx, ny, nz))) * brain[:, :, None]
    half = (np.arange(ny) >= ny // 2)  # two halves of the image along y
    # relative signal per voxel: (x, y, z, v)
    signal = np.zeros((nx, ny, nz, volumes))

    def add_global(course: Course, size: float, gains: np.ndarray | None = None) -> None:
        values = course(instants)  # (z, v)
        g = np.ones((nx, ny, nz)) if gains is None else gains
        signal[...] += size * g[..., None] * values[None, None, :, :]

    def smooth_map(width: float = 4.0) -> np.ndarray:
        m = rng.standard_normal((nx, ny, nz))
        from scipy.ndimage import gaussian_filter

        m = gaussian_filter(m, width)
        return m / (m.std() or 1.0)

    def physio(size: float) -> None:
        for low, high in ((0.2, 0.35), (0.9, 1.3)):
            f0 = float(rng.uniform(low, high))
            grid = _fine(rng, end, 0.02)
            wobble = np.cumsum(rng.standard_normal(grid.size)) * 0.002
            phase = 2 * np.pi * f0 * grid + wobble
            wave = np.sin(phase) + 0.3 * np.sin(2 * phase + 1.0)
            # a sign and size per slice and half of the image (mixed signs)
            gains = np.empty((nx, ny, nz))
            for z in range(nz):
                for h in (False, True):
                    gains[:, half == h, z] = rng.choice([-1.0, 1.0]) * rng.uniform(0.3, 1.0)
            add_global(_interp(grid, wave), size, gains)

    families = [family] if family != "realistic" else ["task", "network", "physio", "drift"]
    for part in families:
        if part == "wander":
            grid = _fine(rng, end)
            add_global(_interp(grid, _smoothed_noise(rng, grid, 10.0)),
                       amplitude or float(rng.uniform(0.002, 0.006)))
        elif part == "linear":
            add_global(lambda t: t / end - 0.5, amplitude or float(rng.uniform(0.01, 0.05)))
        elif part == "quadratic":
            c = float(rng.uniform(0.2, 0.8))
            add_global(lambda t, c=c: (t / end - c) ** 2,
                       amplitude or float(rng.uniform(0.02, 0.08)))
        elif part == "exponential":
            tau = float(rng.uniform(20.0, 120.0))
            add_global(lambda t, tau=tau: np.exp(-t / tau),
                       amplitude or float(rng.uniform(0.01, 0.05)))
        elif part == "sinusoid":
            f = float(rng.uniform(0.01, 0.1))
            ph = float(rng.uniform(0, 2 * np.pi))
            add_global(lambda t, f=f, ph=ph: np.sin(2 * np.pi * f * t + ph), amplitude or 0.01)
        elif part in ("block", "event", "task"):
            kind = part if part != "task" else ("block" if rng.random() < 0.5 else "event")
            course = block_course(rng, end) if kind == "block" else event_course(rng, end)
            active = np.clip(smooth_map(3.0), 0.0, None)  # a patchy response map
            add_global(course, amplitude or 0.02, active)
        elif part == "physio":
            physio(amplitude or 0.004)
        elif part == "step":
            at = float(rng.uniform(0.2, 0.8)) * end + float(rng.uniform(0, repetition_time))
            add_global(lambda t, at=at: (t >= at).astype(float), amplitude or 0.01)
        elif part in ("network", "drift"):
            if part == "drift":
                add_global(lambda t: t / end, 0.01)
                continue
            for _ in range(3):
                grid = _fine(rng, end, 0.1)
                add_global(_interp(grid, _band(rng, grid, 0.01, 0.1)), 0.004, smooth_map(4.0))
    noisy = signal + noise * rng.standard_normal(signal.shape)
    data = base[..., None] * (1.0 + noisy)
    return Run(data.astype(np.float32), tuple(float(t) for t in st), float(repetition_time),
               family)


def family_list() -> tuple[str, ...]:
    return FAMILIES


def orders_for(n: int) -> list[tuple[str, int]]:
    """True orders (kind, multiband factor) for ``n`` slices."""
    out = [(k, 1) for k in ("ascending", "descending", "interleaved-odd", "interleaved-even",
                            "interleaved-desc")]
    for m in (2, 3, 4):
        if n % m == 0 and n // m >= 6:
            out += [("interleaved-odd", m), ("ascending", m)]
    return out


__all__ = ["FAMILIES", "MISTAKES", "Run", "glover_response", "order_times", "orders_for",
           "simulate", "wrong_claim"]
