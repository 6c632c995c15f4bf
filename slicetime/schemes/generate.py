"""Generate slice times from a protocol description (the inverse of inference).

A :class:`Protocol` says how many slices there are, in which order the
excitation groups were acquired along the slice encoding direction, the
multiband factor and the timing. :func:`array_times` gives one time per slice
in data-array order; :func:`slice_timing` gives the same times as a BIDS
``SliceTiming`` list (which runs along the slice encoding direction, so it is
reversed when the direction is ``-``).

Order, ``ascending`` and ``start`` are read along the slice encoding
direction, in the ``SliceTiming`` list's own order: with direction ``-`` and an
ascending order, ``SliceTiming[0]`` (the highest array index) is acquired
first. Group ``k`` (``k = 0 .. Nb-1`` in acquisition order) is acquired at
``k * A / Nb``, where ``A`` is the active part of the TR (``active_time``: the
repetition time minus the BIDS ``DelayTime``; the repetition time when
not given) and ``Nb = n_slices / multiband``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Literal

from slicetime.numbers import duration, secs

__all__ = [
    "Protocol",
    "array_groups",
    "array_times",
    "base_order",
    "resolve_start",
    "slice_timing",
    "timing_problem",
    "validate_protocol",
]

Order = Literal["sequential", "interleaved"]


@dataclass(frozen=True)
class Protocol:
    """A slice acquisition protocol.

    ``start`` is the first base slice acquired, counted along the slice
    encoding direction. ``None`` means 0 for ascending and the last base
    slice for descending orders. ``"auto"`` (interleaved step 2 only; for
    other orders it means the same as ``None``) starts an ascending series at
    base slice 1 when the number of excitation groups is even and at 0 when it
    is odd, and a descending series at ``Nb - 2`` when even and ``Nb - 1`` when
    odd (common practice, no source).

    For interleaved orders with step ``k`` the base slices are acquired in
    ``k`` runs, each holding every base slice of one residue modulo ``k``
    (ascending: lowest first; descending: highest first). The first run
    contains ``start``; each later run begins one slice above (descending:
    below) where the previous run began, wrapping around. Hence ``start`` must
    be one of ``0 .. k-1`` when ascending and one of ``Nb-k .. Nb-1`` when
    descending.
    """

    n_slices: int
    order: Order = "sequential"
    ascending: bool = True
    step: int = 2
    start: int | Literal["auto"] | None = None
    multiband: int = 1
    repetition_time: float | None = None
    #: the active part of the TR, over which the groups are spread (RepetitionTime minus
    #: the BIDS DelayTime, the silent part); None: the whole TR. Not the time from the
    #: first to the last slice, which is one group spacing shorter.
    active_time: float | None = None
    direction: Literal["+", "-"] = "+"
    decimals: int | None = None

    @property
    def n_groups(self) -> int:
        """Number of excitation groups (``n_slices / multiband``)."""
        return self.n_slices // self.multiband

    @property
    def window(self) -> float:
        """The time over which the groups are spread: the active part of the TR
        (``active_time``, i.e. ``RepetitionTime - DelayTime``), else the TR."""
        if self.active_time is not None:
            return float(self.active_time)
        assert self.repetition_time is not None
        return float(self.repetition_time)


def _is_int(value: object) -> bool:
    return isinstance(value, int) and not isinstance(value, bool)


def _positive_time(name: str, value: object) -> None:
    if value is None:
        return
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise ValueError(f"{name} must be a number of seconds (got {value!r})")
    if not (math.isfinite(value) and value > 0):
        raise ValueError(f"{name} must be a positive number of seconds (got {value!r})")


#: the most slices a protocol may have: a NIfTI-1 dimension is a signed 16-bit
#: integer (nifti1.h, ``short dim[8]``), so no image can hold more along one axis
MAX_SLICES = 32767


def validate_protocol(p: Protocol) -> None:
    """Raise ValueError with a one-line message naming the bad parameter."""
    if not _is_int(p.n_slices) or p.n_slices < 1:
        raise ValueError(f"n_slices must be a whole number of at least 1 (got {p.n_slices!r})")
    if p.n_slices > MAX_SLICES:
        raise ValueError(f"n_slices must be at most {MAX_SLICES}, the largest dimension a "
                         f"NIfTI image can have (got {p.n_slices})")
    if p.order not in ("sequential", "interleaved"):
        raise ValueError(f"order must be 'sequential' or 'interleaved' (got {p.order!r})")
    if not isinstance(p.ascending, bool):
        raise ValueError(f"ascending must be true or false (got {p.ascending!r})")
    if p.direction not in ("+", "-"):
        raise ValueError(f"direction must be '+' or '-' (got {p.direction!r})")
    if not _is_int(p.multiband) or p.multiband < 1:
        raise ValueError(f"multiband must be a whole number of at least 1 (got {p.multiband!r})")
    if p.n_slices % p.multiband:
        raise ValueError(
            f"multiband must divide n_slices (got multiband={p.multiband}, n_slices={p.n_slices})"
        )
    n_groups = p.n_slices // p.multiband
    if p.order == "interleaved":
        if not _is_int(p.step):
            raise ValueError(f"step must be a whole number (got {p.step!r})")
        if n_groups < 3:
            raise ValueError(
                f"step: interleaved order needs at least 3 excitation groups "
                f"(got {n_groups}); use order 'sequential'"
            )
        if not 2 <= p.step <= n_groups - 1:
            raise ValueError(
                f"step must be between 2 and {n_groups - 1} for {n_groups} excitation groups "
                f"(got {p.step})"
            )
    if p.start is not None and p.start != "auto":
        if not _is_int(p.start):
            raise ValueError(f"start must be a slice index, 'auto' or empty (got {p.start!r})")
        low, high = _start_range(p, n_groups)
        if not low <= p.start <= high:
            what = (
                f"interleaved step {p.step} {'ascending' if p.ascending else 'descending'}"
                if p.order == "interleaved"
                else f"sequential {'ascending' if p.ascending else 'descending'}"
            )
            allowed = str(low) if low == high else f"between {low} and {high}"
            raise ValueError(
                f"start must be {allowed} for {what} with {n_groups} excitation groups "
                f"(got {p.start})"
            )
    if p.repetition_time is None and p.active_time is None:
        raise ValueError("repetition_time or active_time must be given")
    _positive_time("repetition_time", p.repetition_time)
    _positive_time("active_time", p.active_time)
    if (
        p.repetition_time is not None
        and p.active_time is not None
        and p.active_time > p.repetition_time + 1e-9
    ):
        raise ValueError(
            f"active_time ({p.active_time}) must not exceed "
            f"repetition_time ({p.repetition_time})"
        )
    if p.decimals is not None and (not _is_int(p.decimals) or p.decimals < 0):
        raise ValueError(f"decimals must be a whole number of at least 0 (got {p.decimals!r})")


def _start_range(p: Protocol, n_groups: int) -> tuple[int, int]:
    if p.order == "sequential":
        natural = 0 if p.ascending else n_groups - 1
        return natural, natural
    if p.ascending:
        return 0, p.step - 1
    return n_groups - p.step, n_groups - 1


def resolve_start(p: Protocol) -> int:
    """The first base slice acquired (along the encoding direction)."""
    n_groups = p.n_groups
    if isinstance(p.start, int) and not isinstance(p.start, bool):
        return p.start
    if p.start == "auto" and p.order == "interleaved" and p.step == 2:
        even = n_groups % 2 == 0
        if p.ascending:
            return 1 if even else 0
        return n_groups - 2 if even else n_groups - 1
    return 0 if p.ascending else n_groups - 1


def base_order(p: Protocol) -> tuple[int, ...]:
    """Base slices in acquisition order, counted along the encoding direction."""
    validate_protocol(p)
    n_groups = p.n_groups
    if p.order == "sequential":
        forward = tuple(range(n_groups))
        return forward if p.ascending else forward[::-1]
    start = resolve_start(p)
    first = start % p.step
    order: list[int] = []
    for i in range(p.step):
        if p.ascending:
            residue = (first + i) % p.step
            order.extend(range(residue, n_groups, p.step))
        else:
            residue = (first - i) % p.step
            top = residue + ((n_groups - 1 - residue) // p.step) * p.step
            order.extend(range(top, -1, -p.step))
    return tuple(order)


def array_groups(p: Protocol) -> tuple[tuple[int, ...], ...]:
    """Excitation groups in acquisition order, as sorted data-array indices."""
    validate_protocol(p)
    n, n_groups = p.n_slices, p.n_groups
    groups: list[tuple[int, ...]] = []
    for base in base_order(p):
        along = range(base, n, n_groups)  # indices along the encoding direction
        if p.direction == "+":
            groups.append(tuple(along))
        else:
            groups.append(tuple(sorted(n - 1 - j for j in along)))
    return tuple(groups)


def array_times(p: Protocol) -> tuple[float, ...]:
    """One acquisition time per slice, in data-array order (slice 0 first)."""
    groups = array_groups(p)
    spacing = p.window / p.n_groups
    times = [0.0] * p.n_slices
    for k, group in enumerate(groups):
        t = k * spacing
        if p.decimals is not None:
            t = round(t, p.decimals) + 0.0
        else:  # no binary noise (3 * 0.15 is 0.44999999999999996): 12 significant digits
            t = float(f"{t:.12g}") + 0.0
        for index in group:
            times[index] = t
    return tuple(times)


def slice_timing(p: Protocol) -> list[float]:
    """The times as a BIDS ``SliceTiming`` list (reversed when direction is ``-``)."""
    times = list(array_times(p))
    return times if p.direction == "+" else times[::-1]


def timing_problem(p: Protocol) -> str | None:
    """Why the list :func:`slice_timing` makes for ``p`` is no usable slice order, or
    None when it is one. The audit reads the list back with
    :func:`~slicetime.schemes.infer.infer_scheme`; a list it would take for another
    order is refused here, naming the parameter to change:

    - ``multiband`` equal to ``n_slices`` (more than one slice) excites every slice at
      once: there is no order;
    - rounding to ``decimals`` gives two excitation groups the same time or swaps them,
      or puts a time at or past the TR (BIDS: each SliceTiming value is below
      RepetitionTime);
    - the groups are closer than the audit can tell apart (the grouping threshold of
      :func:`~slicetime.schemes.infer.grouping_threshold`).
    """
    from slicetime.schemes.infer import group_slices

    validate_protocol(p)
    if p.n_slices > 1 and p.multiband == p.n_slices:
        return (f"multiband={p.multiband} equals n_slices: every slice is excited at once, "
                "which is not a slice order (a 3-D acquisition has no SliceTiming)")
    groups = array_groups(p)
    times = array_times(p)
    starts = [times[g[0]] for g in groups]
    if p.decimals is not None:
        unit = 10.0 ** -p.decimals
        for k in range(1, len(starts)):
            if starts[k] <= starts[k - 1]:
                spacing = p.window / p.n_groups
                return (f"decimals={p.decimals}: rounding makes excitation groups {k} and "
                        f"{k + 1} {'simultaneous' if starts[k] == starts[k - 1] else 'swap'} "
                        f"(they are {duration(spacing)} apart, below the {duration(unit)} step "
                        f"of {p.decimals} decimals); give more decimals")
    tr = p.repetition_time
    if tr is not None and starts and max(starts) >= tr:
        return (f"decimals={p.decimals}: rounding puts a slice at {secs(max(starts))}, not "
                f"below the TR of {secs(tr)} (each slice time must be shorter than the TR); "
                "give more decimals")
    found, _ = group_slices(times)
    if len(groups) > 1 and len(found) != len(groups):
        spacing = p.window / p.n_groups
        return (f"n_slices={p.n_slices}: {len(groups)} excitation groups over "
                f"{secs(p.window)} are {duration(spacing)} apart, too close to tell apart (the "
                f"audit reads {len(found)} group{'s' if len(found) != 1 else ''}); give fewer "
                f"slices or a longer repetition_time (now {secs(p.window)})")
    return None
