"""Slice-timing correction of arrays: the one implementation every caller uses.

``align_slice`` resamples the series of one slice in place; ``align_array``
applies a :class:`~slicetime.engines.plan.ResamplingPlan` to a whole 4-D array.
The batch pipeline (``pipelines/correct.py``) calls ``align_slice`` on its
slice-major buffer; the public ``slicetime.correct_array`` and
``slicetime.correct_image``, the demo and the validation study call
``align_array``. There is no second implementation of the correction.

Pure: arrays in, arrays out; no files.
"""

from __future__ import annotations

import contextlib
from collections.abc import Callable, Iterator, Sequence

import numpy as np

from slicetime.engines.interpolate import (
    NOISE_PROBE_LENGTH,
    Engine,
    ResampleStats,
    noise_variance,
    resample,
    shift_columns,
    time_kernel,
)
from slicetime.engines.plan import ResamplingPlan, ShiftGroup

#: voxels transformed together inside one slice: small enough that a block's copies
#: and the engine's temporaries stay in the processor's cache
ROWS_PER_BLOCK = 256

#: shifts smaller than this (seconds) leave a slice as it is
NO_SHIFT = 1e-9


def align_slice(
    view: np.ndarray,
    plan: ResamplingPlan,
    group: ShiftGroup,
    engine: Engine,
    *,
    stats: ResampleStats | None = None,
    rows_per_block: int = ROWS_PER_BLOCK,
) -> None:
    """Resample one slice's series in place.

    Parameters
    ----------
    view
        float32 array of shape ``(n_volumes, n_voxels)``: the slice's voxels
        (any in-plane order), one row per volume. Changed in place.
    plan
        The run's resampling plan (sample and target times).
    group
        The excitation group the slice belongs to (its shift).
    engine
        The interpolation engine.
    stats
        Counts of constant and non-finite series, added to in place.
    rows_per_block
        Voxels transformed together (bounds the temporaries).

    One minimum and maximum per voxel finds the constant series (left as they
    are) and those with non-finite samples (handed to the row engine,
    :func:`~slicetime.engines.interpolate.resample`, which handles them series by
    series). The other voxels are packed side by side into contiguous blocks and
    transformed along the time axis
    (:func:`~slicetime.engines.interpolate.shift_columns`, with one kernel per
    shift, computed once), so the result is what ``resample`` gives for every
    series, to float32 rounding. Methods without such a kernel (linear, or a grid
    that is not evenly spaced) run the row engine on the transposed blocks.
    """
    if abs(group.shift) < NO_SHIFT:
        return
    stats = stats if stats is not None else ResampleStats()
    samples = plan.sample_times(group)
    targets = plan.target_times()
    kernel = time_kernel(engine, samples, targets)
    # one minimum and maximum per voxel: the constant series are left where they
    # are (copied, not transformed); those with non-finite samples go to the row
    # engine, which handles them series by series
    with np.errstate(invalid="ignore"):
        low, high = view.min(axis=0), view.max(axis=0)
    finite = np.isfinite(low) & np.isfinite(high)
    constant = finite & (low == high)
    stats.constant += int(np.count_nonzero(constant))
    for group_runs in _packed(_runs(finite & ~constant), rows_per_block):
        # the voxels to move, packed side by side into one contiguous block
        block = np.concatenate([view[:, a:b] for a, b in group_runs], axis=1)
        if kernel is not None:
            shift_columns(block, kernel)
        else:
            series = np.ascontiguousarray(block.T)
            block = resample(engine, series, samples, targets, workers=1, stats=stats,
                             overwrite=True).T
        offset = 0
        for a, b in group_runs:
            view[:, a:b] = block[:, offset : offset + b - a]
            offset += b - a
    for group_runs in _packed(_runs(~finite), rows_per_block):
        for a, b in group_runs:
            series = np.ascontiguousarray(view[:, a:b].T)
            view[:, a:b] = resample(engine, series, samples, targets, workers=1, stats=stats,
                                    overwrite=True).T


def _runs(mask: np.ndarray) -> list[tuple[int, int]]:
    """``(start, stop)`` of each run of True in a 1-D mask."""
    edges = np.flatnonzero(np.diff(np.concatenate(([False], mask, [False])).astype(np.int8)))
    return [(int(a), int(b)) for a, b in edges.reshape(-1, 2)]


def _packed(runs: list[tuple[int, int]], size: int) -> Iterator[list[tuple[int, int]]]:
    """The runs cut and grouped so that each group spans at most ``size`` columns."""
    group: list[tuple[int, int]] = []
    room = size
    for a, b in runs:
        while a < b:
            take = min(b - a, room)
            group.append((a, a + take))
            a += take
            room -= take
            if room == 0:
                yield group
                group, room = [], size
    if group:
        yield group


@contextlib.contextmanager
def single_threaded_blas() -> Iterator[None]:
    """BLAS on one thread while the engine runs (its slices already run in parallel
    threads; BLAS's own threads would only contend with them). Uses threadpoolctl
    when it is installed; without it BLAS keeps its settings."""
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # pragma: no cover - optional
        yield
        return
    with threadpool_limits(limits=1, user_api="blas"):
        yield


def slice_tasks(plan: ResamplingPlan) -> list[tuple[ShiftGroup, int]]:
    """The (group, slice index) pairs that need resampling, in acquisition order."""
    return [(g, z) for g in plan.groups if abs(g.shift) >= NO_SHIFT for z in g.slices]


def run_tasks(
    tasks: Sequence[tuple[ShiftGroup, int]],
    work: Callable[[tuple[ShiftGroup, int]], ResampleStats],
    threads: int,
) -> ResampleStats:
    """Run ``work`` over ``tasks`` in ``threads`` threads (the transforms release
    the GIL) and add up their statistics."""
    total = ResampleStats()
    with single_threaded_blas():
        if threads > 1 and len(tasks) > 1:
            from concurrent.futures import ThreadPoolExecutor

            with ThreadPoolExecutor(max_workers=threads) as pool:
                for local in pool.map(work, tasks):
                    total.add(local)
        else:
            for task in tasks:
                total.add(work(task))
    return total


def align_array(
    data: np.ndarray,
    plan: ResamplingPlan,
    engine: Engine,
    *,
    threads: int = 1,
    stats: ResampleStats | None = None,
) -> np.ndarray:
    """Align every slice of a 4-D array (three spatial axes, then time).

    Returns a new float32 array; ``data`` is not changed. The slice axis is
    ``plan.axis_index``; the time axis is the last one and must have
    ``plan.n_volumes`` entries.
    """
    if data.ndim != 4:
        raise ValueError(f"expected a 4-D array (x, y, z, time), got {data.ndim}-D")
    if data.shape[3] != plan.n_volumes:
        raise ValueError(
            f"the array has {data.shape[3]} volumes but the plan has {plan.n_volumes}"
        )
    axis = plan.axis_index
    n_slices = data.shape[axis]
    expected = sum(len(g.slices) for g in plan.groups)
    if n_slices != expected:
        raise ValueError(
            f"the array has {n_slices} slices along axis {axis} but the schedule has "
            f"{expected} slice times"
        )
    # slice-major working copy: (slice, volume, in-plane voxel), time rows contiguous
    # per slice, so each slice is one (volume, voxel) view for align_slice
    moved = np.moveaxis(np.asarray(data), (axis, 3), (0, 1))
    work = np.array(moved, dtype=np.float32, order="C").reshape(n_slices, plan.n_volumes, -1)

    def one(task: tuple[ShiftGroup, int]) -> ResampleStats:
        group, z = task
        local = ResampleStats()
        align_slice(work[z], plan, group, engine, stats=local)
        return local

    total = run_tasks(slice_tasks(plan), one, threads)
    if stats is not None:
        stats.add(total)
    aligned = work.reshape(moved.shape)
    return np.ascontiguousarray(np.moveaxis(aligned, (0, 1), (axis, 3)))


def noise_per_slice(plan: ResamplingPlan, engine: Engine, n_slices: int) -> list[float]:
    """The variance each slice's white noise keeps after correction (1: unchanged), in
    data-array order (:func:`~slicetime.engines.interpolate.noise_variance`, measured
    on the middle of the run's own grid; a slice left in place keeps 1)."""
    ratios = [1.0] * n_slices
    n = plan.n_volumes
    half = min(n, NOISE_PROBE_LENGTH) // 2
    middle = slice(max(0, n // 2 - half), max(0, n // 2 - half) + min(n, NOISE_PROBE_LENGTH))
    targets = plan.target_times()[middle]
    with single_threaded_blas():  # the kernels' small solves and products
        for group in plan.groups:
            if abs(group.shift) < NO_SHIFT:
                continue
            ratio = noise_variance(engine, 0.0, sample_times=plan.sample_times(group)[middle],
                                   target_times=targets)
            for z in group.slices:
                ratios[z] = round(ratio, 3)
    return ratios


__all__ = ["NO_SHIFT", "ROWS_PER_BLOCK", "align_array", "align_slice", "noise_per_slice",
           "run_tasks", "single_threaded_blas", "slice_tasks"]
