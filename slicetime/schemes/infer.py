"""Infer the acquisition scheme of a volume from its per-slice times.

The input is one time per slice, in seconds within a volume, in data-array
order (slice 0 first). The output is a :class:`~slicetime.model.Scheme`: the
excitation groups in acquisition order, the multiband factor, whether the
order and the timing are regular, and a human label.

Inference runs in five steps:

1. **Grouping.** Slices whose times are equal up to rounding form one
   excitation group (see :func:`grouping_threshold` for what "equal" means).
2. **Multiband factor.** The common size of the groups; unequal sizes make the
   scheme irregular.
3. **Structure.** With a factor ``m > 1`` and ``N`` slices, every group must be
   ``{b, b + N/m, b + 2N/m, ...}``; ``b`` is the group's *base slice*.
4. **Order.** The base slices, in acquisition order, must be ascending,
   descending or interleaved (see :func:`describe_order`).
5. **Timing.** Consecutive groups must be evenly spaced within ``tolerance``.
   A constant offset before the first group and an idle period after the last
   group (sparse acquisitions) are regular.

Labels are part of the report contract: ``single slice``, ``simultaneous``,
``ascending``, ``descending``, ``interleaved ascending from S`` (step 2),
``interleaved step K descending from S``, ``interleaved step K ascending,
residue order 0,2,1`` (unusual run order), ``multiband ×M, <one of the
above>`` and ``irregular`` (see :meth:`OrderDescription.label`).

A single slice or a single group (``simultaneous``) is regular with ``start``
0 and ``step``/``ascending`` None: it has no order to describe.
"""

from __future__ import annotations

import functools
import itertools
import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from slicetime.model import TIME_TOLERANCE, Scheme
from slicetime.schemes.labels import (
    IRREGULAR,
    SIMULTANEOUS,
    SINGLE_SLICE,
    order_label,
    with_multiband,
)

__all__ = [
    "DEFAULT_TOLERANCE",
    "IRREGULAR",
    "MIN_SEPARATION",
    "SIMULTANEOUS",
    "SINGLE_SLICE",
    "OrderDescription",
    "describe_order",
    "group_slices",
    "grouping_threshold",
    "infer_scheme",
    "median",
]

#: the default tolerance: :data:`slicetime.model.TIME_TOLERANCE` (defined there only)
DEFAULT_TOLERANCE = TIME_TOLERANCE

MIN_SEPARATION = 0.0005
"""Seconds. Differences between slice times at or below this are never taken
as a gap between excitation groups when estimating the typical gap (they are
float noise or rounding jitter; no protocol excites groups 0.5 ms apart)."""

SPLIT_FRACTION = 0.5
"""Two neighbouring times belong to different groups only when they differ by
more than this fraction of the typical gap between groups (and by more than
the tolerance, whichever is smaller)."""



# --------------------------------------------------------------------------- grouping


def grouping_threshold(
    times: Sequence[float], tolerance: float = DEFAULT_TOLERANCE
) -> float:
    """The largest difference between two slice times that still counts as "equal".

    Equal to ``min(tolerance, SPLIT_FRACTION * g)``, where ``g`` is the typical
    gap between excitation groups: the upper quartile of the differences
    between neighbouring sorted times that exceed :data:`MIN_SEPARATION`.

    Why: within a group, times differ only by float noise or, rarely, by one
    rounding step (1 ms or 2.5 ms) when a converter rounded a value lying on a
    rounding boundary; between groups they differ by the slice spacing, which
    in real protocols is 10 ms or more. The tolerance (3 ms by default) sits
    between the two. Taking half the typical gap as well keeps distinct groups
    apart when the spacing is unusually short (unrounded times a few ms
    apart). The upper quartile rather than the median is used because rounding
    jitter inside multiband groups can add small differences, and
    over-estimating the gap is harmless (the tolerance caps the threshold).
    """
    values = sorted(float(t) for t in times)
    big = sorted(d for d in (b - a for a, b in itertools.pairwise(values)) if d > MIN_SEPARATION)
    if not big:
        return float(tolerance)
    typical = _quantile(big, 0.75)
    return float(min(tolerance, SPLIT_FRACTION * typical))


def _quantile(ordered: Sequence[float], q: float) -> float:
    """``numpy.quantile(values, q)`` (its default, linear method) of sorted values,
    without importing numpy: position q·(n−1), interpolated as numpy does."""
    position = q * (len(ordered) - 1)
    low = math.floor(position)
    high = min(low + 1, len(ordered) - 1)
    a, b = ordered[low], ordered[high]
    t = position - low
    return b - (b - a) * (1 - t) if t >= 0.5 else a + (b - a) * t


def median(values: Sequence[float]) -> float:
    """``numpy.median`` without numpy (nor ``numpy.ma``, which ``numpy.median`` loads)."""
    ordered = sorted(values)
    middle = len(ordered) // 2
    if len(ordered) % 2:
        return ordered[middle]
    return (ordered[middle - 1] + ordered[middle]) / 2.0


def group_slices(
    times: Sequence[float], tolerance: float = DEFAULT_TOLERANCE
) -> tuple[tuple[tuple[int, ...], ...], tuple[float, ...]]:
    """Cluster slices with equal times into groups ordered by time.

    Returns ``(groups, group_times)``: each group is a sorted tuple of slice
    indices, ``group_times[k]`` is the mean time of group ``k``. Neighbouring
    sorted times closer than :func:`grouping_threshold` join one group.
    """
    values = [float(t) for t in times]
    threshold = grouping_threshold(values, tolerance)
    order = sorted(range(len(values)), key=values.__getitem__)  # stable, as numpy's
    groups: list[list[int]] = []
    previous: float | None = None
    for index in order:
        t = values[index]
        if previous is None or t - previous > threshold:
            groups.append([])
        groups[-1].append(int(index))
        previous = t
    sorted_groups = tuple(tuple(sorted(g)) for g in groups)
    plain = values
    group_times = tuple(math.fsum(plain[i] for i in g) / len(g) for g in sorted_groups)
    return sorted_groups, group_times


# --------------------------------------------------------------------------- order


@dataclass(frozen=True)
class OrderDescription:
    """A recognised order of base slices.

    ``step`` is 1 for sequential orders. For interleaved orders the base slices
    form ``step`` runs, each holding every index of one residue modulo
    ``step``; ``residue_order`` lists the residues in the order their runs were
    acquired, and ``consecutive`` says whether that is the usual order (each
    run begins one slice above, for descending below, where the previous run
    began, wrapping around).
    """

    step: int
    ascending: bool
    start: int
    residue_order: tuple[int, ...] | None = None
    consecutive: bool = True

    @property
    def label(self) -> str:
        residues = None if self.consecutive else self.residue_order
        return order_label(self.step, self.ascending, self.start, residues)


def _interleaved(order: Sequence[int], step: int, ascending: bool) -> tuple[int, ...] | None:
    """The residue order when ``order`` is interleaved with ``step``, else None."""
    n = len(order)
    position = 0
    residues: list[int] = []
    seen: set[int] = set()
    while position < n:
        residue = order[position] % step
        if residue in seen:
            return None
        seen.add(residue)
        run = list(range(residue, n, step))
        if not ascending:
            run.reverse()
        if list(order[position : position + len(run)]) != run:
            return None
        residues.append(residue)
        position += len(run)
    return tuple(residues) if len(residues) == step else None


def _is_consecutive(residues: Sequence[int], step: int, ascending: bool) -> bool:
    """Whether each run starts one slice beyond the previous run's first slice."""
    if ascending:
        return all((b - a) % step == 1 for a, b in itertools.pairwise(residues))
    # descending runs start at the highest index of their residue; stepping one
    # slice down from there lowers the residue by one (mirror of ascending)
    return all((a - b) % step == 1 for a, b in itertools.pairwise(residues))


def describe_order(order: Sequence[int]) -> OrderDescription | None:
    """Describe a permutation of ``0..n-1`` as sequential or interleaved.

    The simplest description wins: sequential before interleaved, a smaller
    step before a larger one. Returns None when no description fits (or when
    ``order`` is not a permutation). Orders of length 1 are ascending.
    """
    values = [int(v) for v in order]
    n = len(values)
    if n == 0 or sorted(values) != list(range(n)):
        return None
    if values == list(range(n)):
        return OrderDescription(step=1, ascending=True, start=0)
    if values == list(range(n - 1, -1, -1)):
        return OrderDescription(step=1, ascending=False, start=n - 1)
    for step in range(2, n):
        for ascending in (True, False):
            residues = _interleaved(values, step, ascending)
            if residues is not None:
                return OrderDescription(
                    step=step,
                    ascending=ascending,
                    start=values[0],
                    residue_order=residues,
                    consecutive=_is_consecutive(residues, step, ascending),
                )
    return None


# --------------------------------------------------------------------------- scheme


def _round(value: float) -> float:
    return round(float(value), 6)


def _irregular(
    groups: tuple[tuple[int, ...], ...],
    group_times: tuple[float, ...],
    multiband: int,
    spacing: float | None,
    why: dict[str, Any],
) -> Scheme:
    """The irregular scheme of these groups; ``why`` is its evidence (``kind``,
    ``reason`` and the details)."""
    return Scheme(
        groups=groups,
        group_times=group_times,
        multiband_factor=multiband,
        label=IRREGULAR,
        regular=False,
        spacing=spacing,
        evidence=why,
    )


def _check_values(times: Sequence[float]) -> list[float]:
    """The times as floats (as ``numpy.asarray(times, dtype=float)`` would read them:
    None is NaN); ValueError for anything else than a flat, non-empty, finite list."""
    try:
        values = [math.nan if v is None else float(v) for v in times]
    except TypeError:
        raise ValueError("slice times must be a flat sequence of numbers") from None
    if not values:
        raise ValueError("no slice times given")
    bad = [i for i, v in enumerate(values) if not math.isfinite(v)]
    if bad:
        raise ValueError(f"slice times must be finite numbers (slice {bad[0]} is {values[bad[0]]})")
    return values


def infer_scheme(times: Sequence[float], *, tolerance: float = DEFAULT_TOLERANCE) -> Scheme:
    """Infer the acquisition scheme from per-slice times (data-array order).

    Memoised: the runs of a dataset share a handful of schedules, and a
    :class:`Scheme` is immutable. See :func:`_infer_scheme` for the method.
    """
    key = tuple(map(float, times))
    return _infer_cached(key, float(tolerance))


@functools.lru_cache(maxsize=4096)
def _infer_cached(times: tuple[float, ...], tolerance: float) -> Scheme:
    return _infer_scheme(times, tolerance=tolerance)


def _infer_scheme(times: Sequence[float], *, tolerance: float = DEFAULT_TOLERANCE) -> Scheme:
    """Infer the acquisition scheme from per-slice times (data-array order).

    ``tolerance`` (seconds, default :data:`DEFAULT_TOLERANCE`) bounds how far
    the gap between consecutive groups may deviate from the median gap, and
    caps the threshold for equal times (:func:`grouping_threshold`).

    Raises ValueError for empty input or non-finite values.
    """
    if not (tolerance > 0 and math.isfinite(tolerance)):
        raise ValueError(f"tolerance must be a positive number of seconds (got {tolerance})")
    values = _check_values(times)
    n = len(values)
    groups, group_times = group_slices(values, tolerance)
    gaps = [b - a for a, b in itertools.pairwise(group_times)]
    spacing = median(gaps) if gaps else None

    # 2. multiband factor: the common group size
    multiband = _most_common([len(g) for g in groups])
    why = _unequal_sizes(groups, multiband)
    if why is not None:
        return _irregular(groups, group_times, multiband, spacing, why)
    n_groups = len(groups)

    if n == 1:
        return Scheme(groups, group_times, 1, SINGLE_SLICE, True, start=0, spacing=None)
    if n_groups == 1:
        return Scheme(groups, group_times, multiband, SIMULTANEOUS, True, start=0, spacing=None)

    # 3. structure: group b holds {b, b + Nb, b + 2 Nb, ...}
    why = _misplaced_group(groups, n, multiband)
    if why is not None:
        return _irregular(groups, group_times, multiband, spacing, why)

    # 4. order of base slices
    bases = [g[0] for g in groups]
    description = describe_order(bases)
    if description is None:
        return _irregular(groups, group_times, multiband, spacing, {
            "kind": "order",
            "reason": "the order of excitation groups is not ascending, descending or "
            "interleaved",
            "base_order": bases,
        })
    label = with_multiband(description.label, multiband)

    # 5. timing regularity
    assert spacing is not None
    why = _uneven_gaps(gaps, spacing, tolerance, label)
    if why is not None:
        return _irregular(groups, group_times, multiband, spacing, why)

    return Scheme(
        groups=groups,
        group_times=group_times,
        multiband_factor=multiband,
        label=label,
        regular=True,
        step=description.step,
        ascending=description.ascending,
        start=description.start,
        residue_order=description.residue_order,
        spacing=spacing,
    )


def _unequal_sizes(groups: Sequence[tuple[int, ...]], common: int) -> dict[str, Any] | None:
    """Groups of different sizes (no one multiband factor): how many of each size, and
    one group whose size is not the ``common`` one."""
    sizes = [len(g) for g in groups]
    if len(set(sizes)) <= 1:
        return None
    odd_group = next(g for g in groups if len(g) != common)
    return {"kind": "unequal-groups", "reason": "excitation groups have unequal sizes",
            "group_sizes": {str(size): sizes.count(size) for size in sorted(set(sizes))},
            "example_group": list(odd_group)}


def _misplaced_group(groups: Sequence[tuple[int, ...]], n: int,
                     multiband: int) -> dict[str, Any] | None:
    """With multiband, the first group whose slices are not N/m apart (group b must hold
    b, b + N/m, b + 2 N/m, ...)."""
    if multiband <= 1:
        return None
    n_groups = len(groups)
    for group in groups:
        expected = tuple(range(group[0], n, n_groups))
        if group != expected:
            return {"kind": "group-spacing",
                    "reason": f"groups are not spaced N/m apart (N={n}, m={multiband}, "
                    f"N/m={n_groups})",
                    "group": list(group), "expected": list(expected)}
    return None


def _uneven_gaps(gaps: Sequence[float], spacing: float, tolerance: float,
                 label: str) -> dict[str, Any] | None:
    """Gaps between groups that differ from the median ``spacing`` by more than
    ``tolerance``: a pause (only longer gaps) or uneven spacing."""
    slack = tolerance + 1e-9
    if not any(abs(g - spacing) > slack for g in gaps):
        return None
    too_long = [k for k, g in enumerate(gaps) if g - spacing > slack]
    too_short = [k for k, g in enumerate(gaps) if spacing - g > slack]
    pause = bool(too_long and not too_short)
    return {
        "kind": "uneven-gaps",
        "reason": "pause between excitation groups" if pause
        else "excitation groups are not evenly spaced in time",
        "gaps": [_round(g) for g in gaps],
        "median_gap": _round(spacing),
        "order_label": label,
        **({"pause_after_group": too_long} if pause
           else {"uneven_after_group": sorted(too_long + too_short)}),
    }


def _most_common(values: Sequence[int]) -> int:
    return max(sorted(set(values)), key=values.count)
