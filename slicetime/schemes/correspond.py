"""Slice correspondence between a run and its source series, by position (pure).

Each NIfTI slice centre (voxel centre of the slice, through the image affine,
RAS+) is converted to the DICOM patient frame (LPS: x and y negated) and
projected on the series' slice normal; it corresponds to the source slice at
the same position within half the slice spacing. The run's slice axis must be
parallel to the normal (within about 8 degrees), the slice counts and the
in-plane matrix must agree, and every run slice must find its own source slice:
otherwise the geometry differs and nothing is compared.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

from slicetime.model_source import SeriesTiming
from slicetime.numbers import plain

#: |cos| between the run's slice axis and the series' normal for "parallel"
PARALLEL = 0.99


@dataclass(frozen=True)
class Correspondence:
    """Run slice ``k`` (array order along ``axis``) is source slice ``index[k]``."""

    axis: int
    index: tuple[int, ...]
    offsets: tuple[float, ...]  # mm between the centres along the normal
    against_normal: bool  # the array index increases against the series' normal

    def times(self, series: SeriesTiming) -> tuple[float, ...] | None:
        """The source's times in the run's array order along ``axis``."""
        if series.times is None:
            return None
        return tuple(series.times[j] for j in self.index)

    def pairs(self, series: SeriesTiming) -> list[tuple[int, str]]:
        return [(k, series.labels[j]) for k, j in enumerate(self.index)]


@dataclass(frozen=True)
class Mismatch:
    """Why the run and the series cannot be compared slice by slice."""

    reason: str


def _columns(affine: Sequence[Sequence[float]]) -> list[tuple[float, float, float]]:
    # RAS -> LPS: negate the first two rows
    return [(-affine[0][a], -affine[1][a], affine[2][a]) for a in range(3)]


def _dot(a: Sequence[float], b: Sequence[float]) -> float:
    return sum(x * y for x, y in zip(a, b, strict=True))


def slice_axis_for(series: SeriesTiming, affine: Sequence[Sequence[float]]) -> tuple[int, float]:
    """The run's array axis most parallel to the series' normal, with its |cos|."""
    best, best_cos = 2, 0.0
    if series.normal is None:
        return best, best_cos
    for axis, column in enumerate(_columns(affine)):
        norm = math.sqrt(_dot(column, column))
        if not norm:
            continue
        cos = abs(_dot(column, series.normal)) / norm
        if cos > best_cos:
            best, best_cos = axis, cos
    return best, best_cos


def correspond(
    series: SeriesTiming,
    affine: Sequence[Sequence[float]],
    shape: Sequence[int],
    axis: int | None = None,
) -> Correspondence | Mismatch:
    """Match every run slice along ``axis`` (default: the axis parallel to the normal)."""
    if series.normal is None:
        return Mismatch("the series gives no slice normal")
    if len(shape) < 3:
        return Mismatch(f"the run has {len(shape)} dimensions; slices need 3")
    chosen, _ = slice_axis_for(series, affine)
    axis = chosen if axis is None else axis
    column = _columns(affine)[axis]
    norm = math.sqrt(_dot(column, column))
    cos = _dot(column, series.normal) / norm if norm else 0.0
    if abs(cos) < PARALLEL:
        angle = math.degrees(math.acos(min(1.0, abs(cos))))
        return Mismatch(f"the run's slice axis {'ijk'[axis]} is {angle:.0f}° away from the "
                        "series' slice normal")
    if shape[axis] != series.n_slices:
        return Mismatch(f"the run has {shape[axis]} slices along {'ijk'[axis]}, the series "
                        f"{series.n_slices}")
    in_plane = sorted(shape[a] for a in range(3) if a != axis)
    if series.rows and series.columns and in_plane != sorted((series.rows, series.columns)):
        return Mismatch(f"the run's in-plane matrix is {in_plane[0]}×{in_plane[1]}, the "
                        f"series' {series.rows}×{series.columns}")
    spacing = series.slice_spacing or norm
    tolerance = spacing / 2.0
    centre = [(shape[a] - 1) / 2.0 for a in range(3)]
    index: list[int] = []
    offsets: list[float] = []
    for k in range(shape[axis]):
        voxel = list(centre)
        voxel[axis] = float(k)
        ras = [sum(affine[r][c] * voxel[c] for c in range(3)) + affine[r][3] for r in range(3)]
        along = _dot((-ras[0], -ras[1], ras[2]), series.normal)
        j = min(range(series.n_slices), key=lambda i: abs(series.positions[i] - along))
        offset = abs(series.positions[j] - along)
        if offset > tolerance:
            return Mismatch(f"run slice {k} lies {offset:.1f} mm from the nearest source slice "
                            f"(more than half the {plain(spacing)} mm spacing)")
        index.append(j)
        offsets.append(offset)
    if len(set(index)) != len(index):
        return Mismatch("two run slices fall on the same source slice")
    return Correspondence(axis=axis, index=tuple(index), offsets=tuple(offsets),
                          against_normal=cos < 0)


__all__ = ["PARALLEL", "Correspondence", "Mismatch", "correspond", "slice_axis_for"]
