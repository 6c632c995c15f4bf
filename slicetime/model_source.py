"""Plain values for the source cross-check: what a DICOM series under ``sourcedata/``
says about one volume's slices, and which series a run was matched to. No I/O.

Positions are in the DICOM patient frame (LPS, millimetres), projected on the
series' slice normal; times are seconds from the volume's first excitation.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

from slicetime.model import Finding, Source

Layout = Literal["mosaic", "enhanced", "classic"]
MatchStatus = Literal["matched", "no-match", "ambiguous", "unreadable"]


@dataclass(frozen=True)
class SeriesTiming:
    """One volume of one DICOM series, as the scanner recorded it.

    ``positions`` and ``times`` run in the order the source lists its slices
    (tile order for a mosaic, frame order for an enhanced file, position order
    for classic files); ``labels`` names each slice the way the source does
    (``tile 1``, ``frame 3``, ``instance 12``). ``normal`` is the unit vector
    (LPS) along which ``positions`` are measured: for a mosaic, the normal of
    the vendor private header, whose sign says in which direction the tiles go.
    """

    series: str  # the series folder (or file), as shown to people
    layout: Layout
    files_read: tuple[str, ...]
    n_files: int
    series_number: int | None
    description: str | None
    normal: tuple[float, float, float] | None
    positions: tuple[float, ...]
    labels: tuple[str, ...]
    times: tuple[float, ...] | None
    times_source: Source | None
    repetition_time: float | None  # seconds
    rows: int | None  # of one slice
    columns: int | None
    pixel_spacing: tuple[float, float] | None  # mm between rows, between columns
    slice_spacing: float | None  # mm between slice centres
    n_volumes: int | None
    #: why the series carries no per-slice times, or anything else people should know
    notes: tuple[str, ...] = ()
    #: how many other series share the folders this one's images lie in
    neighbours: int = 0

    @property
    def n_slices(self) -> int:
        return len(self.positions)

    def by_position(self) -> tuple[tuple[float, ...], tuple[float, ...] | None]:
        """Positions ascending along the normal, with their times."""
        order = sorted(range(len(self.positions)), key=lambda i: self.positions[i])
        positions = tuple(self.positions[i] for i in order)
        times = tuple(self.times[i] for i in order) if self.times is not None else None
        return positions, times


@dataclass(frozen=True)
class SourceEvidence:
    """The outcome of looking for a run's source series, and the run's geometry.

    ``status`` ``matched`` carries ``series``; ``no-match`` and ``ambiguous``
    carry the ``candidates`` looked at and the ``reason``; ``unreadable``
    carries ``error``, the finding for the bad file; ``skipped`` names the files
    beside a matched series that could not be read. ``affine`` (RAS, from the
    NIfTI header) and ``shape`` give the run's slice centres.
    """

    status: MatchStatus
    how: str = ""  # how the series was chosen, for people
    series: SeriesTiming | None = None
    candidates: tuple[str, ...] = ()
    reason: str = ""
    error: Finding | None = None
    affine: tuple[tuple[float, ...], ...] | None = None
    shape: tuple[int, ...] | None = None
    #: files in the matched series' folders that could not be read (one message each):
    #: the series was judged on its readable files
    skipped: tuple[str, ...] = ()


__all__ = ["Layout", "MatchStatus", "SeriesTiming", "SourceEvidence"]
