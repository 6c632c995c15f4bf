"""Finding a run's source DICOM series and reading what it says (the source cross-check).

A run is matched to one series folder:

1. an explicit map (``--source-map FILE``: a TSV of run path and series folder,
   relative to the dataset root or absolute) always wins;
2. otherwise the series folders under ``sourcedata/sub-X[/ses-Y]/`` (any depth;
   a folder is a series when its first file is DICOM) are the candidates:
   the sidecar's ``SeriesNumber`` picks the series with that number (several
   with it are narrowed by geometry); without it, the geometry (slice count,
   in-plane matrix, voxel size, orientation), TR and volume count must fit
   exactly one series.

No match, or more than one, is reported as such, never guessed. One
:class:`SourceIndex` per dataset root and chunk of runs caches folder listings,
series numbers and series reads, so each series is read at most once per chunk.
"""

from __future__ import annotations

import csv
import os
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Literal

from slicetime.model import TIME_TOLERANCE, RunRecord
from slicetime.model_source import SeriesTiming, SourceEvidence
from slicetime.readers.dicom import is_dicom_file, read_series, series_files, series_number
from slicetime.readers.errors import ReadError
from slicetime.schemes.correspond import Mismatch, correspond

__all__ = ["SourceIndex", "SourceOptions", "find_source", "load_source_map", "run_geometry"]

SOURCEDATA = "sourcedata"
SIZE_TOLERANCE = 0.02  # relative, for voxel sizes


@dataclass(frozen=True)
class SourceOptions:
    """Whether and how the audit consults the source series.

    ``mode``: ``auto`` checks runs whose subject has DICOM series under
    ``sourcedata/`` and says nothing about the others; ``on`` also notes runs for
    which no series was found; ``off`` skips the check. ``mapping`` maps a run
    (absolute path, or path relative to its dataset root) to a series folder
    (absolute, or relative to the run's dataset root).
    """

    mode: Literal["auto", "on", "off"] = "auto"
    mapping: Mapping[str, str] = field(default_factory=dict)


def load_source_map(path: Path) -> dict[str, str]:
    """Read a ``--source-map`` TSV (run path, series folder). Raises ReadError (exit 2)."""
    shown = str(path)
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise ReadError("source/bad-map", shown, None,
                        f"{shown}: cannot read the source map ({exc})") from None
    mapping: dict[str, str] = {}
    for number, row in enumerate(csv.reader(text.splitlines(), delimiter="\t"), start=1):
        if not row or not "".join(row).strip() or row[0].lstrip().startswith("#"):
            continue
        if len(row) != 2 or not row[0].strip() or not row[1].strip():
            raise ReadError("source/bad-map", shown, None,
                            f"{shown}: line {number}: expected two tab-separated columns "
                            "(run path, series folder)")
        run, series = row[0].strip(), row[1].strip()
        if number == 1 and run.lower() in {"run", "run_path", "path"}:
            continue  # a header line
        if run in mapping and mapping[run] != series:
            raise ReadError("source/bad-map", shown, None,
                            f"{shown}: line {number}: {run} is mapped twice")
        mapping[run] = series
    return mapping


def run_geometry(path: str) -> tuple[tuple[tuple[float, ...], ...], tuple[int, ...]] | None:
    """The run's affine (RAS+, the header's best: sform, else qform) and shape, or None."""
    import nibabel

    try:
        image = nibabel.load(path)
        affine = image.affine
        shape = tuple(int(d) for d in image.shape)
    except Exception:  # a bad image is reported by the audit's own reader
        return None
    return tuple(tuple(float(v) for v in row) for row in affine), shape


class SourceIndex:
    """Series folders, numbers and reads of one dataset root, cached for one chunk."""

    def __init__(self, root: Path | str) -> None:
        self.root = str(root)
        self.base = os.path.join(self.root, SOURCEDATA)
        self._folders: dict[str, list[str]] = {}
        self._numbers: dict[str, int | ReadError | None] = {}
        self._series: dict[str, SeriesTiming | ReadError] = {}
        self._has_base: bool | None = None

    def shown(self, path: str) -> str:
        try:
            return os.path.relpath(path, self.root).replace(os.sep, "/")
        except ValueError:
            return path

    def has_sourcedata(self) -> bool:
        if self._has_base is None:
            self._has_base = os.path.isdir(self.base)
        return self._has_base

    def folders(self, subject: str, session: str | None) -> list[str]:
        """Series folders under sourcedata/sub-X[/ses-Y], sorted."""
        top = os.path.join(self.base, f"sub-{subject}")
        if session:
            top = os.path.join(top, f"ses-{session}")
        if top in self._folders:
            return self._folders[top]
        found: list[str] = []
        if self.has_sourcedata() and os.path.isdir(top):
            for folder, dirs, _ in os.walk(top):
                dirs[:] = sorted(d for d in dirs if not d.startswith("."))
                try:
                    files = series_files(folder)
                except OSError:
                    continue
                if files and is_dicom_file(files[0]):
                    found.append(folder)
        self._folders[top] = sorted(found)
        return self._folders[top]

    def number(self, folder: str) -> int | ReadError | None:
        if folder not in self._numbers:
            try:
                self._numbers[folder] = series_number(folder, self.shown(folder))
            except ReadError as exc:
                self._numbers[folder] = exc
        return self._numbers[folder]

    def series(self, folder: str) -> SeriesTiming | ReadError:
        if folder not in self._series:
            try:
                self._series[folder] = read_series(folder, self.shown(folder), self.root)
            except ReadError as exc:
                self._series[folder] = exc
        return self._series[folder]


def _declared_axis(record: RunRecord) -> int | None:
    value = record.metadata.get("SliceEncodingDirection")
    if isinstance(value, str) and value[:1] in ("i", "j", "k"):
        return "ijk".index(value[0])
    return None


def _fits(series: SeriesTiming, record: RunRecord,
          geometry: tuple[tuple[tuple[float, ...], ...], tuple[int, ...]]) -> bool:
    """Geometry, TR and volume count all agree (used to match without SeriesNumber)."""
    affine, shape = geometry
    outcome = correspond(series, affine, shape, _declared_axis(record))
    if isinstance(outcome, Mismatch):
        return False
    sizes = [sum(affine[r][c] ** 2 for r in range(3)) ** 0.5 for c in range(3)]
    if series.pixel_spacing is not None:
        in_plane = sorted(sizes[a] for a in range(3) if a != outcome.axis)
        if any(abs(a - b) > SIZE_TOLERANCE * b
               for a, b in zip(in_plane, sorted(series.pixel_spacing), strict=True)):
            return False
    if series.slice_spacing and abs(sizes[outcome.axis] - series.slice_spacing) > \
            SIZE_TOLERANCE * series.slice_spacing:
        return False
    tr = record.timing.repetition_time  # seconds, the sidecar's before the header's
    if tr is not None and series.repetition_time is not None and \
            abs(tr - series.repetition_time) > TIME_TOLERANCE:
        return False
    volumes = shape[3] if len(shape) > 3 else 1
    return series.n_volumes is None or series.n_volumes == volumes


def _mapped(record: RunRecord, options: SourceOptions) -> str | None:
    for key in (record.abs_path, record.path):
        if key in options.mapping:
            target = options.mapping[key]
            return target if os.path.isabs(target) else os.path.join(record.root, target)
    return None


def _read_matched(index: SourceIndex, folder: str, how: str,
                  geometry: tuple[tuple[tuple[float, ...], ...], tuple[int, ...]] | None
                  ) -> SourceEvidence:
    affine, shape = geometry if geometry is not None else (None, None)
    series = index.series(folder)
    if isinstance(series, ReadError):
        return SourceEvidence("unreadable", how, error=series.to_finding(), affine=affine,
                              shape=shape, candidates=(index.shown(folder),))
    return SourceEvidence("matched", how, series=series, affine=affine, shape=shape)


def find_source(record: RunRecord, index: SourceIndex,
                options: SourceOptions) -> SourceEvidence | None:
    """The run's source series and its evidence; None when the check does not apply."""
    if options.mode == "off" or record.header is None:
        return None
    mapped = _mapped(record, options)
    if mapped is not None:
        return _read_matched(index, mapped, "the source map", run_geometry(record.abs_path))
    subject = record.entities.get("sub")
    session = record.entities.get("ses")
    where = f"{SOURCEDATA}/sub-{subject}" + (f"/ses-{session}" if session else "")
    folders = index.folders(subject, session) if subject else []
    if not folders:
        if options.mode == "on":
            return SourceEvidence("no-match", reason=f"no DICOM series under {where}/")
        return None
    shown = tuple(index.shown(f) for f in folders)
    geometry = run_geometry(record.abs_path)
    wanted = record.metadata.get("SeriesNumber")
    if isinstance(wanted, int | float) and not isinstance(wanted, bool) and wanted == int(wanted):
        same = [f for f in folders if index.number(f) == int(wanted)]
        if len(same) == 1:
            return _read_matched(index, same[0], f"SeriesNumber {int(wanted)}", geometry)
        if not same:
            return SourceEvidence("no-match", candidates=shown,
                                  reason=f"no series under {where}/ has SeriesNumber "
                                  f"{int(wanted)} (the sidecar's)")
        if geometry is not None:
            fitting = [f for f in same if not isinstance(index.series(f), ReadError)
                       and _fits(index.series(f), record, geometry)]  # type: ignore[arg-type]
            if len(fitting) == 1:
                return _read_matched(index, fitting[0], f"SeriesNumber {int(wanted)} and "
                                     "geometry", geometry)
        return SourceEvidence("ambiguous", candidates=tuple(index.shown(f) for f in same),
                              reason=f"{len(same)} series under {where}/ have SeriesNumber "
                              f"{int(wanted)} and their geometry does not single one out")
    if geometry is None:
        return SourceEvidence("no-match", candidates=shown,
                              reason="the run has no SeriesNumber and its geometry is unknown")
    fitting = []
    for folder in folders:
        series = index.series(folder)
        if not isinstance(series, ReadError) and _fits(series, record, geometry):
            fitting.append(folder)
    if len(fitting) == 1:
        return _read_matched(index, fitting[0], "geometry, TR and volume count", geometry)
    if not fitting:
        return SourceEvidence("no-match", candidates=shown,
                              reason=f"none of the {len(folders)} series under {where}/ has "
                              "the run's geometry, TR and volume count (and the sidecar has no "
                              "SeriesNumber)")
    return SourceEvidence("ambiguous", candidates=tuple(index.shown(f) for f in fitting),
                          reason=f"{len(fitting)} series under {where}/ have the run's geometry, "
                          "TR and volume count (and the sidecar has no SeriesNumber)")
