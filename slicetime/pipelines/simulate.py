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


__all__ = ["RunSimulation", "double_gamma", "random_events", "response", "signal_at",
           "simulate_run", "truth_at"]
