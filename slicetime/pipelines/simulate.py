"""Simulated BOLD-like runs whose slices are sampled at their own acquisition times.

Used by the demo (realistic small data) and by the validation study (ground
truth for the correction). Pure numeric code: arrays in, arrays out.

A simulated voxel's signal is a baseline, a response to events (events
convolved with the canonical double-gamma haemodynamic response of Glover
1999, NeuroImage 9:416-429), a slow
drift, and optionally physiological-like fluctuations and thermal noise. The
value stored for slice ``z`` of volume ``v`` is that signal at time
``v * TR + slice_time[z]``: what the scanner records.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy import stats


def double_gamma(t: np.ndarray) -> np.ndarray:
    """The canonical double-gamma response at times ``t`` (seconds), peak 1.

    Glover's parameterisation (1999): a gamma peak with delay 6 s and dispersion
    0.9, minus 0.35 of an undershoot with delay 12 s and dispersion 0.9 (from
    memory; the tests cross-check the shape against nilearn's "glover" model).
    """
    t = np.asarray(t, dtype=np.float64)

    def shape(x: np.ndarray) -> np.ndarray:
        return (stats.gamma.pdf(x, 6.0 / 0.9, scale=0.9)
                - 0.35 * stats.gamma.pdf(x, 12.0 / 0.9, scale=0.9))

    top = float(np.max(shape(np.linspace(0, 32, 3201))))
    return np.where(t >= 0, shape(t), 0.0) / top


def random_events(rng: np.random.Generator, duration: float, *, gap: tuple[float, float] =
                  (5.0, 13.0), lead: float = 4.0, tail: float = 20.0) -> np.ndarray:
    """Event onsets (seconds) with jittered gaps, clear of both ends of the run."""
    onsets = []
    t = lead
    while t < duration - tail:
        onsets.append(t)
        t += float(rng.uniform(*gap))
    return np.asarray(onsets)


def response(times: np.ndarray, onsets: Sequence[float] | np.ndarray, event_duration: float = 1.0,
             step: float = 0.05) -> np.ndarray:
    """The haemodynamic response to boxcar events, evaluated at ``times`` (seconds)."""
    times = np.asarray(times, dtype=np.float64)
    end = float(times.max()) + 40.0
    grid = np.arange(0.0, end, step)
    boxcar = np.zeros_like(grid)
    for onset in onsets:
        boxcar[(grid >= onset) & (grid < onset + event_duration)] = 1.0
    kernel = double_gamma(np.arange(0.0, 32.0, step)) * step
    fine = np.convolve(boxcar, kernel)[: grid.size]
    return np.interp(times, grid, fine)


@dataclass(frozen=True)
class RunSimulation:
    """The parameters of one simulated run."""

    shape: tuple[int, int, int, int]  # (i, j, k, volumes), slices along ``axis``
    repetition_time: float
    slice_times: Sequence[float]  # data-array order, along ``axis``
    axis: int = 2
    baseline: float = 1000.0
    amplitude: float = 20.0  # response peak, in signal units
    drift: float = 5.0  # slow drift amplitude
    physio: float = 0.0  # amplitude of fluctuations near 0.1-0.3 Hz (aliased)
    noise: float = 0.0  # thermal noise standard deviation
    event_duration: float = 1.0
    seed: int = 0


def signal_at(sim: RunSimulation, onsets: Sequence[float] | np.ndarray, times: np.ndarray,
              phases: np.ndarray) -> np.ndarray:
    """The noiseless signal (without thermal noise) at ``times``, for voxels whose
    physiological fluctuations have the given phases. Shape: phases.shape + times.shape."""
    times = np.asarray(times, dtype=np.float64)
    duration = float(sim.shape[3] * sim.repetition_time)
    base = (sim.baseline + sim.amplitude * response(times, onsets, sim.event_duration)
            + sim.drift * np.sin(2 * np.pi * times / max(duration, 1.0) + 0.3))
    out = np.broadcast_to(base, (*phases.shape, times.size)).copy()
    if sim.physio:
        for freq, share in ((0.13, 0.6), (0.27, 0.4)):
            out += sim.physio * share * np.sin(2 * np.pi * freq * times + phases[..., None])
    return out


def simulate_run(sim: RunSimulation) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``(data, onsets, phases)``: float32 data of ``sim.shape`` sampled at each slice's
    own time, the event onsets and each voxel's physiological phase."""
    rng = np.random.default_rng(sim.seed)
    n_volumes = sim.shape[3]
    duration = n_volumes * sim.repetition_time
    onsets = random_events(rng, duration)
    spatial = sim.shape[:3]
    phases = rng.uniform(0, 2 * np.pi, spatial)
    data = np.empty(sim.shape, dtype=np.float32)
    volumes = np.arange(n_volumes) * sim.repetition_time
    for z, t in enumerate(sim.slice_times):
        index: list[slice | int] = [slice(None)] * 3
        index[sim.axis] = z
        plane = phases[tuple(index)]
        values = signal_at(sim, onsets, volumes + float(t), plane)
        if sim.noise:
            values += rng.normal(0.0, sim.noise, values.shape)
        target: list[slice | int] = [slice(None)] * 4
        target[sim.axis] = z
        data[tuple(target)] = values.astype(np.float32)
    return data, onsets, phases


def truth_at(sim: RunSimulation, onsets: Sequence[float], phases: np.ndarray,
             reference: float) -> np.ndarray:
    """The noiseless signal of every voxel at ``v * TR + reference`` (what a perfect
    correction to ``reference`` would give), shaped like the run."""
    volumes = np.arange(sim.shape[3]) * sim.repetition_time
    values = signal_at(sim, onsets, volumes + reference, phases)
    return values.astype(np.float64)




# --------------------------------------------------------------------------- physiology


@dataclass(frozen=True)
class BrainRun:
    """A richer simulated run for the verify study: every voxel's signal is a baseline
    times one plus (in % of the baseline) a task response with regional latency, slow
    network and global fluctuations, a drift, respiration and cardiac pulsation with
    wandering rates and their own spatial maps, motion-like events, and AR(1) noise.

    Physiology is generated in continuous time (a rate that wanders, integrated into a
    phase) and sampled at each voxel's own acquisition time, so it aliases exactly as
    it would in a scanner. Rates in adults at rest: respiration about 0.2-0.35 Hz,
    heart about 0.9-1.3 Hz (common practice, no source)."""

    shape: tuple[int, int, int, int]  # (i, j, slices, volumes); slices along axis 2
    repetition_time: float
    slice_times: Sequence[float]  # the true acquisition time of each slice (seconds)
    baseline: float = 1000.0
    task: float = 0.5  # response peak, % of baseline
    latency_sd: float = 0.3  # regional hemodynamic latency differences (s)
    network: float = 0.4  # slow (0.01-0.1 Hz) fluctuations with regional maps, % sd
    global_signal: float = 0.2  # slow global fluctuation, % sd
    drift: float = 0.5  # % over the run
    respiration: float = 0.3  # amplitude of the fundamental, %
    respiration_rate: tuple[float, float] = (0.2, 0.35)  # Hz, range of the mean rate
    cardiac: float = 0.3  # amplitude of the fundamental, %
    cardiac_rate: tuple[float, float] = (0.9, 1.3)
    events_per_100: float = 1.0  # motion-like events per 100 volumes
    event_size: float = 1.0  # % step, decaying
    noise: float = 2.0  # voxel noise sd, % of baseline (tSNR 50)
    ar1: float = 0.3  # lag-one autocorrelation of the noise over volumes
    #: a stress test: the respiration map changes sign between the lower and upper slices
    respiration_flip: bool = False
    #: stress tests: a sign pattern along the slice axis for the respiration and for the
    #: cardiac map (see :func:`slice_signs`), and a delay of both growing linearly along
    #: the slice axis up to this many seconds (a travelling wave)
    respiration_signs: str = "none"
    cardiac_signs: str = "none"
    physio_delay: float = 0.0
    seed: int = 0


#: sign patterns along the slice axis offered by :func:`slice_signs`
SIGN_PATTERNS = ("none", "halves", "thirds", "alternating", "gradient", "random")


def slice_signs(pattern: str, n_slices: int, rng: np.random.Generator | None = None
                ) -> np.ndarray:
    """A gain per slice: ``none`` all 1; ``halves`` -1 in the upper half; ``thirds`` +, -,
    + by thirds; ``alternating`` a sign flip every 4 slices; ``gradient`` a smooth change
    from +1 to -1 (``cos(pi z / (n - 1))``, crossing zero in the middle); ``random`` a
    random sign per slice (``rng`` required)."""
    z = np.arange(n_slices)
    if pattern == "none":
        return np.ones(n_slices)
    if pattern == "halves":
        return np.where(z < n_slices // 2, 1.0, -1.0)
    if pattern == "thirds":
        return np.where((z * 3 // max(n_slices, 1)) == 1, -1.0, 1.0)
    if pattern == "alternating":
        return np.where((z // 4) % 2 == 0, 1.0, -1.0)
    if pattern == "gradient":
        return np.cos(np.pi * z / max(n_slices - 1, 1))
    if pattern == "random":
        if rng is None:
            raise ValueError("a random sign pattern needs a generator")
        return rng.choice((-1.0, 1.0), n_slices)
    raise ValueError(f"unknown sign pattern {pattern!r}")


def _smooth_field(rng: np.random.Generator, shape: tuple[int, ...], width: float
                  ) -> np.ndarray:
    from scipy import ndimage

    field = ndimage.gaussian_filter(rng.normal(0.0, 1.0, shape), width, mode="wrap")
    return (field - field.mean()) / max(float(field.std()), 1e-12)


def _band_noise(rng: np.random.Generator, n: int, step: float, low: float, high: float
                ) -> np.ndarray:
    """Unit-sd noise on a grid of ``n`` points ``step`` s apart, band-limited to
    ``[low, high]`` Hz."""
    spectrum = np.fft.rfft(rng.normal(0.0, 1.0, n))
    freqs = np.fft.rfftfreq(n, step)
    spectrum[(freqs < low) | (freqs > high)] = 0.0
    out = np.fft.irfft(spectrum, n)
    return out / max(float(out.std()), 1e-12)


def wandering_phase(rng: np.random.Generator, grid: np.ndarray, rates: tuple[float, float],
                    wander: float, tau: float = 30.0) -> np.ndarray:
    """The phase (radians) of an oscillator whose rate starts uniformly in ``rates`` and
    wanders (an Ornstein-Uhlenbeck process, sd ``wander`` times the mean rate, time
    constant ``tau`` s), kept inside the range widened by 10 %."""
    step = float(grid[1] - grid[0])
    mean = float(rng.uniform(*rates))
    a = math.exp(-step / tau)
    x = np.empty(grid.size)
    x[0] = rng.normal()
    kicks = rng.normal(0.0, math.sqrt(1 - a * a), grid.size)
    for i in range(1, grid.size):
        x[i] = a * x[i - 1] + kicks[i]
    rate = np.clip(mean * (1.0 + wander * x), 0.9 * rates[0], 1.1 * rates[1])
    return 2 * np.pi * np.cumsum(rate) * step + rng.uniform(0, 2 * np.pi)


def simulate_brain(sim: BrainRun) -> np.ndarray:
    """float32 data of ``sim.shape``: voxel ``(i, j, z)`` of volume ``v`` holds the signal
    at ``v * TR + slice_times[z]`` (plus that voxel's latency for the task response)."""
    rng = np.random.default_rng(sim.seed)
    nx, ny, nz, nv = sim.shape
    tr = sim.repetition_time
    duration = nv * tr + tr
    step = 0.02
    grid = np.arange(-2.0, duration + 2.0, step)
    # an elliptical brain in every slice, darker outside
    x = (np.arange(nx) - (nx - 1) / 2) / (0.45 * nx)
    y = (np.arange(ny) - (ny - 1) / 2) / (0.42 * ny)
    inside = (x[:, None] ** 2 + y[None, :] ** 2) <= 1.0
    brain = np.broadcast_to(inside[:, :, None], (nx, ny, nz))
    baseline = np.where(brain, sim.baseline * (1 + 0.1 * _smooth_field(rng, (nx, ny, nz), 2)),
                        0.03 * sim.baseline)
    # time courses on a fine grid
    onsets = random_events(rng, duration)
    task = response(grid, onsets)
    networks = [_band_noise(rng, grid.size, step, 0.01, 0.1) for _ in range(3)]
    net_maps = [np.clip(_smooth_field(rng, (nx, ny, nz), 3), 0, None) for _ in range(3)]
    glob = _band_noise(rng, grid.size, step, 0.01, 0.15)
    resp_phase = wandering_phase(rng, grid, sim.respiration_rate, 0.08)
    resp = np.cos(resp_phase) + 0.25 * np.cos(2 * resp_phase + 0.7)
    resp_depth = 1.0 + 0.3 * _band_noise(rng, grid.size, step, 0.0, 0.02)
    resp *= resp_depth
    card_phase = wandering_phase(rng, grid, sim.cardiac_rate, 0.05, tau=20.0)
    card = np.cos(card_phase) + 0.5 * np.cos(2 * card_phase + 0.4) \
        + 0.2 * np.cos(3 * card_phase + 1.1)
    # spatial maps: respiration broad (mostly positive, with an edge term of both signs
    # along j, as a field shift would give); cardiac near "vessels"; task in regions
    resp_map = 1.0 + 0.4 * _smooth_field(rng, (nx, ny, nz), 4)
    edge = np.gradient(inside.astype(float), axis=1)[:, :, None] * 2.0
    resp_map = resp_map + edge
    if sim.respiration_flip:
        resp_map[:, :, nz // 2:] *= -1.0
    card_map = np.clip(_smooth_field(rng, (nx, ny, nz), 2) - 0.5, 0, None) * 2.0
    card_delay = 0.1 * (1 + _smooth_field(rng, (nx, ny, nz), 4)).clip(0, None)
    if sim.respiration_signs != "none" or sim.cardiac_signs != "none" or sim.physio_delay:
        # stress patterns drawn from their own generator: the run's other draws unchanged
        extra = np.random.default_rng(sim.seed + 1_000_003)
        resp_map = resp_map * slice_signs(sim.respiration_signs, nz, extra)[None, None, :]
        card_map = card_map * slice_signs(sim.cardiac_signs, nz, extra)[None, None, :]
        card_delay = card_delay + sim.physio_delay * np.linspace(0.0, 1.0, nz)[None, None, :]
    resp_delay = sim.physio_delay * np.linspace(0.0, 1.0, nz)
    task_map = np.clip(0.5 + _smooth_field(rng, (nx, ny, nz), 3), 0, None)
    latency = sim.latency_sd * _smooth_field(rng, (nx, ny, nz), 3)
    count = rng.poisson(sim.events_per_100 * nv / 100.0)
    event_onsets = rng.uniform(0, nv * tr, count)
    event_sizes = rng.normal(0, sim.event_size, count)
    event_maps = [1.0 + 0.5 * _smooth_field(rng, (nx, ny, nz), 5) for _ in range(count)]
    drift_shape = rng.normal(0, 1, 2)
    data = np.empty(sim.shape, dtype=np.float32)
    volumes = np.arange(nv) * tr
    # AR(1) over volumes with unit variance, then scaled: e_v = a e_(v-1) + sqrt(1-a^2) w_v
    noise = rng.normal(0.0, 1.0, (nx, ny, nz, nv)).astype(np.float32)
    keep = np.float32(math.sqrt(1 - sim.ar1 ** 2))
    for v in range(1, nv):
        noise[..., v] = np.float32(sim.ar1) * noise[..., v - 1] + keep * noise[..., v]
    noise *= np.float32(sim.noise / 100.0 * sim.baseline)
    for z in range(nz):
        t = volumes + float(sim.slice_times[z])  # (nv,)
        s = np.zeros((nx, ny, nv))

        def at(course: np.ndarray, times: np.ndarray) -> np.ndarray:
            # linear interpolation on the uniform fine grid
            pos = (times - grid[0]) / step
            low = np.clip(pos.astype(np.int64), 0, grid.size - 2)
            frac = pos - low
            return course[low] * (1.0 - frac) + course[low + 1] * frac

        shifted = t[None, None, :] - latency[:, :, z, None]
        s += sim.task * task_map[:, :, z, None] * at(task, shifted.reshape(-1)).reshape(
            shifted.shape)
        for course, cmap in zip(networks, net_maps, strict=False):
            s += sim.network * cmap[:, :, z, None] * at(course, t)[None, None, :]
        s += sim.global_signal * at(glob, t)[None, None, :]
        rel = t / max(nv * tr, 1.0)
        s += sim.drift * (drift_shape[0] * rel + drift_shape[1] * (rel - 0.5) ** 2)
        s += sim.respiration * resp_map[:, :, z, None] * at(resp, t - resp_delay[z]
                                                            )[None, None, :]
        delayed = t[None, None, :] - card_delay[:, :, z, None]
        s += sim.cardiac * card_map[:, :, z, None] * at(card, delayed.reshape(-1)).reshape(
            delayed.shape)
        for onset, size, emap in zip(event_onsets, event_sizes, event_maps, strict=False):
            after = t >= onset
            if after.any():
                s[:, :, after] += size * emap[:, :, z, None] * np.exp(
                    -(t[after] - onset) / 4.0)[None, None, :]
        values = baseline[:, :, z, None] * (1.0 + s / 100.0) + noise[:, :, z, :] * (
            baseline[:, :, z, None] / sim.baseline)
        data[:, :, z, :] = values.astype(np.float32)
    return data


__all__ = ["SIGN_PATTERNS", "BrainRun", "RunSimulation", "double_gamma", "random_events",
           "response", "signal_at", "simulate_brain", "simulate_run", "slice_signs", "truth_at",
           "wandering_phase"]
