"""NIfTI-1 ``slice_code`` both ways: header fields to slice times and back.

The codes are those of nifti1.h. ``slice_start`` and ``slice_end`` bound the
slices the code covers (0-based, inclusive); slices outside them are padding
and have no time. A ``slice_end`` of 0 means the last slice, as nibabel reads
it. Within the timed range, position ``i`` (counted from ``slice_start``) is
acquired at ``rank(i) * slice_duration``, where the acquisition order is:

1 sequential increasing   0, 1, 2, ...
2 sequential decreasing   n-1, n-2, ...
3 alternating increasing  0, 2, 4, ..., then 1, 3, ...
4 alternating decreasing  n-1, n-3, ..., then n-2, n-4, ...
5 alternating increasing 2  1, 3, ..., then 0, 2, ...
6 alternating decreasing 2  n-2, n-4, ..., then n-1, n-3, ...
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

__all__ = [
    "SLICE_CODE_NAMES",
    "HeaderTiming",
    "acquisition_order",
    "header_slice_times",
    "header_timing_for",
]

SLICE_CODE_NAMES: dict[int, str] = {
    0: "unknown",
    1: "sequential increasing",
    2: "sequential decreasing",
    3: "alternating increasing",
    4: "alternating decreasing",
    5: "alternating increasing 2",
    6: "alternating decreasing 2",
}


def acquisition_order(slice_code: int, n_timed: int) -> tuple[int, ...]:
    """Positions within the timed range (0-based) in the order they are acquired."""
    n = n_timed
    if slice_code == 1:
        return tuple(range(n))
    if slice_code == 2:
        return tuple(range(n - 1, -1, -1))
    if slice_code == 3:
        return (*range(0, n, 2), *range(1, n, 2))
    if slice_code == 4:
        return (*range(n - 1, -1, -2), *range(n - 2, -1, -2))
    if slice_code == 5:
        return (*range(1, n, 2), *range(0, n, 2))
    if slice_code == 6:
        return (*range(n - 2, -1, -2), *range(n - 1, -1, -2))
    raise ValueError(f"slice_code {slice_code} does not define an order (expected 1 to 6)")


def _ranks(slice_code: int, n_timed: int) -> list[int]:
    """Acquisition rank of each position within the timed range."""
    ranks = [0] * n_timed
    for rank, position in enumerate(acquisition_order(slice_code, n_timed)):
        ranks[position] = rank
    return ranks


def header_slice_times(
    slice_code: int,
    slice_start: int,
    slice_end: int,
    slice_duration: float,
    n_slices: int,
) -> tuple[float | None, ...]:
    """Slice times (seconds, data-array order) encoded by the NIfTI slice fields.

    Padding slices (outside ``slice_start .. slice_end``) get ``None``.
    ``slice_end`` 0 means the last slice. Raises ValueError naming the field
    when the fields do not define times.
    """
    if n_slices < 1:
        raise ValueError(f"the slice axis must hold at least one slice (got {n_slices})")
    if slice_code == 0:
        raise ValueError("slice_code is 0 (unknown): the header does not say the slice order")
    if slice_code not in SLICE_CODE_NAMES:
        raise ValueError(f"slice_code {slice_code} is not defined by NIfTI-1 (expected 0 to 6)")
    if slice_start < 0:
        raise ValueError(f"slice_start must not be negative (got {slice_start})")
    end = n_slices - 1 if slice_end == 0 else slice_end
    if end >= n_slices:
        raise ValueError(
            f"slice_end {slice_end} is beyond the last slice (the slice axis has {n_slices})"
        )
    if end < slice_start:
        raise ValueError(f"slice_end ({end}) must not be less than slice_start ({slice_start})")
    if not (math.isfinite(slice_duration) and slice_duration > 0):
        raise ValueError(f"slice_duration must be positive (got {slice_duration})")
    n_timed = end - slice_start + 1
    timed = [rank * slice_duration for rank in _ranks(slice_code, n_timed)]
    return (None,) * slice_start + tuple(timed) + (None,) * (n_slices - end - 1)


@dataclass(frozen=True)
class HeaderTiming:
    """NIfTI-1 slice fields: ``slice_end`` is always the explicit last timed index."""

    slice_code: int
    slice_start: int
    slice_end: int
    slice_duration: float


def header_timing_for(
    times: Sequence[float | None],
    *,
    tolerance: float = 1e-4,
    fallback_duration: float | None = None,
) -> HeaderTiming | None:
    """The NIfTI slice fields that encode ``times``, or None when no code fits.

    ``times`` are in data-array order; ``None`` entries at either end are
    padding. No code fits when a ``None`` lies between timed slices, when two
    slices share a time (multiband), when the spacing is uneven, when the
    earliest time is not 0, or when the order is none of codes 1-6. Values may
    deviate from ``rank * slice_duration`` by ``tolerance`` seconds. When
    several codes fit (one or two timed slices) the lowest code is chosen.

    A single timed slice does not show its duration: ``fallback_duration`` is
    used then, and without it the result is None.
    """
    values = list(times)
    timed_at = [i for i, t in enumerate(values) if t is not None]
    if not timed_at:
        return None
    start, end = timed_at[0], timed_at[-1]
    if len(timed_at) != end - start + 1:
        return None  # padding in the middle
    timed = [float(t) for t in values[start : end + 1] if t is not None]
    if not all(math.isfinite(t) for t in timed):
        return None
    n_timed = len(timed)
    if abs(min(timed)) > tolerance:
        return None
    if n_timed == 1:
        if fallback_duration is None or not fallback_duration > 0:
            return None
        return HeaderTiming(1, start, end, float(fallback_duration))
    duration = (max(timed) - min(timed)) / (n_timed - 1)
    if duration <= 2 * tolerance:
        return None
    ranks = [round(t / duration) for t in timed]
    if sorted(ranks) != list(range(n_timed)):
        return None
    if any(abs(t - r * duration) > tolerance for t, r in zip(timed, ranks, strict=True)):
        return None
    for code in range(1, 7):
        if _ranks(code, n_timed) == ranks:
            return HeaderTiming(code, start, end, duration)
    return None
