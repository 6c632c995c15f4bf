"""Edge error of each correction engine, and the noise each one leaves (README table).

Each engine shifts random sums of six sinusoids (frequencies up to ``--band`` × Nyquist,
random phases and amplitudes) by half a sample, the largest shift the default ``middle``
reference gives a slice (half a TR between the first and last slice). The error at
volume ``v`` is ``|corrected - truth|`` averaged over series and seeds, as a fraction of
the uncorrected error (``|sample - truth|`` averaged the same way), so 1.0 means "as bad
as doing nothing". Whole-run errors of short runs (2 to 24 volumes) show where a run is
too short to correct at all. The white-noise figure is the variance of the corrected
interior sample when the input is unit white noise (the sum of the squared weights of
the engine's linear operator, measured on impulses: ``engines.interpolate.noise_variance``).

    .venv/bin/python benchmarks/bench_edges.py [--seeds 15] [--out bench-results/edges.json]

Takes a few seconds.
"""

from __future__ import annotations

import argparse
import json
from pathlib import Path

import numpy as np

from slicetime.engines.interpolate import ENGINES, noise_variance, resample

POSITIONS = (0, 1, 2, 5, 10, 20, 50, 100)
SHORT_RUNS = (2, 3, 4, 5, 6, 8, 10, 12, 16, 20, 24)


def signals(n: int, seed: int, band: float, rows: int = 64) -> tuple[np.ndarray, np.ndarray]:
    """(samples at t = 0..n-1, truth at t + 0.5): ``rows`` random sums of six sinusoids."""
    rng = np.random.default_rng(seed)
    freq = rng.uniform(0.02, band * 0.5, size=(rows, 6, 1))  # cycles per sample
    phase = rng.uniform(0, 2 * np.pi, size=(rows, 6, 1))
    amp = rng.uniform(0.5, 1.5, size=(rows, 6, 1))
    t = np.arange(n, dtype=np.float64)

    def at(times: np.ndarray) -> np.ndarray:
        return (amp * np.sin(2 * np.pi * freq * times + phase)).sum(axis=1)

    return at(t).astype(np.float32), at(t + 0.5)


def edge_profile(name: str, seeds: int, band: float, n: int = 240) -> dict[int, float]:
    """Error at each position from the start (both ends pooled), fraction of uncorrected."""
    err = np.zeros(n)
    base = np.zeros(n)
    t = np.arange(n, dtype=np.float64)
    for seed in range(seeds):
        x, truth = signals(n, seed, band)
        y = resample(ENGINES[name], x, t, t + 0.5)
        err += np.abs(y - truth).mean(axis=0)
        base += np.abs(x - truth).mean(axis=0)
    ratio = err / base
    pooled = (ratio + ratio[::-1]) / 2  # the first and the last volumes alike
    return {p: float(pooled[p]) for p in POSITIONS}


def short_runs(name: str, seeds: int, band: float) -> dict[int, float]:
    out = {}
    for n in SHORT_RUNS:
        err = base = 0.0
        t = np.arange(n, dtype=np.float64)
        for seed in range(seeds):
            x, truth = signals(n, seed, band)
            y = resample(ENGINES[name], x, t, t + 0.5)
            err += float(np.abs(y - truth).mean())
            base += float(np.abs(x - truth).mean())
        out[n] = err / base
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=int, default=15)
    parser.add_argument("--band", type=float, default=0.5, help="highest frequency, × Nyquist")
    parser.add_argument("--out", type=Path, default=None)
    args = parser.parse_args()
    result: dict[str, dict[str, object]] = {}
    for name in ENGINES:
        result[name] = {
            "edge": edge_profile(name, args.seeds, args.band),
            "short_runs": short_runs(name, args.seeds, args.band),
            "white_noise_variance_half_sample": noise_variance(ENGINES[name], 0.5),
        }
    header = "volume from the end | " + " | ".join(ENGINES)
    print(header)
    for p in POSITIONS:
        print(f"{p:>19} | " + " | ".join(f"{result[n]['edge'][p]:.2g}"  # type: ignore[index]
                                         for n in ENGINES))
    print("\nwhole run of N volumes | " + " | ".join(ENGINES))
    for n_vol in SHORT_RUNS:
        print(f"{n_vol:>22} | " + " | ".join(
            f"{result[n]['short_runs'][n_vol]:.2f}" for n in ENGINES))  # type: ignore[index]
    print("\nwhite-noise variance at a half-sample shift | " + " | ".join(
        f"{n} {result[n]['white_noise_variance_half_sample']:.2f}" for n in ENGINES))
    if args.out is not None:
        args.out.parent.mkdir(parents=True, exist_ok=True)
        args.out.write_text(json.dumps(result, indent=2) + "\n")


if __name__ == "__main__":
    main()
