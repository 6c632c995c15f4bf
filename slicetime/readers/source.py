"""Finding a run's source DICOM series and reading what it says (the source cross-check).

A run is matched to one series: the DICOM objects that share a
SeriesInstanceUID (DICOM PS3.3 C.7.3.1), wherever they lie: a folder is never
taken for a series by itself, and one that mixes series is said so.

1. an explicit map (``--source-map FILE``: a TSV of run path and series folder,
   archive or file, relative to the dataset root or absolute) always wins (a
   mapped folder holding several series is narrowed as below);
2. otherwise the series under ``sourcedata/sub-X[/ses-Y]/`` (any depth; plain,
   gzip-compressed and archived DICOM, see :mod:`slicetime.readers.dicom_files`)
   are the candidates: the sidecar's ``SeriesNumber`` picks the series with that
   number (several with it, e.g. sessions kept side by side, are narrowed by
   geometry, TR and volume count); without it, the geometry (slice count,
   in-plane matrix, voxel size, orientation), TR and volume count must fit
   exactly one series.

No match, or more than one, is reported as such, never guessed. One
:class:`SourceIndex` per dataset root and chunk of runs caches the catalogue
of series and their reads, so each series is read at most once per chunk.
"""

from __future__ import annotations

import csv
import os
from collections import OrderedDict
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any, Literal

from slicetime.model import TIME_TOLERANCE, RunRecord
from slicetime.model_source import SeriesTiming, SourceEvidence
from slicetime.readers.errors import ReadError, open_regular, read_bounded

if TYPE_CHECKING:
    from slicetime.readers.dicom_files import SeriesGroup

# the DICOM readers and the correspondence are imported where a series is read: an
# audit of a dataset without sourcedata/ never needs them (a few ms of every start)

__all__ = ["SourceIndex", "SourceOptions", "find_source", "load_source_map", "run_geometry"]

SOURCEDATA = "sourcedata"
Geometry = tuple[tuple[tuple[float, ...], ...], tuple[int, ...]]
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


#: the largest --source-map read (a line per run: far more than any study needs)
MAX_SOURCE_MAP_BYTES = 16 << 20


def load_source_map(path: Path) -> dict[str, str]:
    """Read a ``--source-map`` TSV (run path, series folder). Raises ReadError (exit 2)."""
    shown = str(path)
    try:
        fh, st = open_regular(path, shown, what="source map")  # a FIFO or device: refused
        with fh:
            raw = read_bounded(fh, st.st_size, MAX_SOURCE_MAP_BYTES)
        if len(raw) > MAX_SOURCE_MAP_BYTES:
            raise ReadError("source/bad-map", shown, None, f"{shown}: the source map is larger "
                            f"than {MAX_SOURCE_MAP_BYTES} bytes; it is not read")
        text = raw.decode("utf-8")
    except ReadError as exc:
        if exc.code == "source/bad-map":
            raise
        raise ReadError("source/bad-map", shown, None, exc.message) from None
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


def run_geometry(path: str) -> Geometry | None:
    """The run's affine (RAS+, the header's best: sform, else qform) and shape, or None."""
    import nibabel

    try:
        image: Any = nibabel.load(path)
        affine = image.affine
        shape = tuple(int(d) for d in image.shape)
    except Exception:  # a bad image is reported by the audit's own reader
        return None
    return tuple(tuple(float(v) for v in row) for row in affine), shape


#: catalogues kept by this process from one chunk of runs to the next (reading every
#: DICOM header is the cost of the cross-check); each is checked against the size and
#: modification time of every file under it, so a changed tree is read again
_KEPT: OrderedDict[tuple[str, str, bool], tuple[tuple[tuple[str, int, int], ...],
                                                list[SeriesGroup]]] = OrderedDict()
_KEEP = 16


def _signature(path: str, recursive: bool) -> tuple[tuple[str, int, int], ...]:
    """Every file under ``path`` (the folder itself, or below when ``recursive``) with
    its size and modification time; the file itself when ``path`` is a file."""
    out: list[tuple[str, int, int]] = []

    def add(file: str) -> None:
        try:
            st = os.stat(file)
        except OSError:
            return
        out.append((file, st.st_size, st.st_mtime_ns))

    if not os.path.isdir(path):
        add(path)
    elif recursive:
        for folder, dirs, files in os.walk(path):
            dirs[:] = sorted(d for d in dirs if not d.startswith("."))
            for name in sorted(files):
                add(os.path.join(folder, name))
    else:
        try:
            names = sorted(os.listdir(path))
        except OSError:
            names = []
        for name in names:
            add(os.path.join(path, name))
    return tuple(out)


class SourceIndex:
    """The series (grouped by SeriesInstanceUID) under one dataset root's sourcedata/,
    cached for one chunk of runs, with their reads."""

    def __init__(self, root: Path | str) -> None:
        self.root = str(root)
        self.base = os.path.join(self.root, SOURCEDATA)
        self._groups: dict[str, list[SeriesGroup]] = {}
        self._series: dict[int, SeriesTiming | ReadError] = {}
        self._has_base: bool | None = None
        self._problems: dict[str, list[ReadError]] = {}

    def shown(self, path: str) -> str:
        try:
            return os.path.relpath(path, self.root).replace(os.sep, "/")
        except ValueError:
            return path

    def has_sourcedata(self) -> bool:
        if self._has_base is None:
            self._has_base = os.path.isdir(self.base)
        return self._has_base

    def groups_in(self, path: str, recursive: bool) -> list[SeriesGroup]:
        """The series of a folder (and below when ``recursive``), an archive or a file."""
        key = f"{int(recursive)}{path}"
        if key not in self._groups:
            kept_key = (self.root, path, recursive)
            signature = _signature(path, recursive)
            kept = _KEPT.get(kept_key)
            if kept is not None and kept[0] == signature:
                _KEPT.move_to_end(kept_key)
                self._groups[key] = kept[1]
                return kept[1]
            from slicetime.readers.dicom_files import catalogue, natural

            found: list[SeriesGroup] = []
            if os.path.exists(path):
                try:
                    found, problems = catalogue(path, self.shown, recursive=recursive)
                    self._problems[key] = problems
                except OSError:
                    found = []
            found.sort(key=lambda g: natural(g.objects[0].shown(self.root)))
            self._groups[key] = found
            _KEPT[kept_key] = (signature, found)
            while len(_KEPT) > _KEEP:
                _KEPT.popitem(last=False)
        return self._groups[key]

    def groups(self, subject: str, session: str | None) -> list[SeriesGroup]:
        """The series under sourcedata/sub-X[/ses-Y] (any depth, archives included)."""
        top = os.path.join(self.base, f"sub-{subject}")
        if session:
            top = os.path.join(top, f"ses-{session}")
        if not self.has_sourcedata():
            return []
        return self.groups_in(top, recursive=True)

    def name(self, group: SeriesGroup) -> str:
        from slicetime.readers.dicom import group_name

        return group_name(group, self.root)

    def skipped(self, group: SeriesGroup) -> tuple[str, ...]:
        """The files in the group's folders that could not be read (their messages)."""
        folders = {self.shown(f) for f in group.folders}
        out: list[str] = []
        for problems in self._problems.values():
            for problem in problems:
                if problem.file is not None and os.path.dirname(problem.file) in folders:
                    out.append(problem.message)
        return tuple(dict.fromkeys(out))

    def series(self, group: SeriesGroup) -> SeriesTiming | ReadError:
        if id(group) not in self._series:
            try:
                from slicetime.readers.dicom import read_group

                self._series[id(group)] = read_group(group, self.name(group), self.root)
            except ReadError as exc:
                self._series[id(group)] = exc
        return self._series[id(group)]


def _declared_axis(record: RunRecord) -> int | None:
    value = record.metadata.get("SliceEncodingDirection")
    if isinstance(value, str) and value[:1] in ("i", "j", "k"):
        return "ijk".index(value[0])
    return None


def _fits(series: SeriesTiming, record: RunRecord, geometry: Geometry) -> bool:
    """Geometry, TR and volume count all agree (used to match without SeriesNumber)."""
    from slicetime.schemes.correspond import Mismatch, correspond

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


def _read_matched(index: SourceIndex, group: SeriesGroup, how: str,
                  geometry: Geometry | None) -> SourceEvidence:
    affine, shape = geometry if geometry is not None else (None, None)
    series = index.series(group)
    if isinstance(series, ReadError):
        return SourceEvidence("unreadable", how, error=series.to_finding(), affine=affine,
                              shape=shape, candidates=(index.name(group),))
    return SourceEvidence("matched", how, series=series, affine=affine, shape=shape,
                          skipped=index.skipped(group))


def _fitting(index: SourceIndex, groups: list[SeriesGroup], record: RunRecord,
             geometry: Geometry) -> list[SeriesGroup]:
    out = []
    for group in groups:
        series = index.series(group)
        if not isinstance(series, ReadError) and _fits(series, record, geometry):
            out.append(group)
    return out


def _mapped_evidence(record: RunRecord, index: SourceIndex, target: str) -> SourceEvidence:
    geometry = run_geometry(record.abs_path)
    shown = index.shown(target)
    if not os.path.exists(target):
        return SourceEvidence("unreadable", "the source map", error=ReadError(
            "source/unreadable", shown, None,
            f"{shown}: the series folder or file does not exist").to_finding(),
            candidates=(shown,))
    groups = index.groups_in(target, recursive=False)
    if not groups:
        from slicetime.readers.dicom import read_all_series

        try:
            read_all_series(target, shown, index.root)
        except ReadError as exc:
            return SourceEvidence("unreadable", "the source map", error=exc.to_finding(),
                                  candidates=(shown,))
    if len(groups) == 1:
        return _read_matched(index, groups[0], "the source map", geometry)
    fitting = _fitting(index, groups, record, geometry) if geometry is not None else []
    if len(fitting) == 1:
        return _read_matched(index, fitting[0], "the source map, geometry, TR and volume "
                             "count", geometry)
    return SourceEvidence("ambiguous", candidates=tuple(index.name(g) for g in groups),
                          reason=f"the mapped {shown} holds {len(groups)} series and "
                          "geometry, TR and volume count do not single one out")


def find_source(record: RunRecord, index: SourceIndex,
                options: SourceOptions) -> SourceEvidence | None:
    """The run's source series and its evidence; None when the check does not apply."""
    if options.mode == "off" or record.header is None:
        return None
    mapped = _mapped(record, options)
    if mapped is not None:
        return _mapped_evidence(record, index, mapped)
    subject = record.entities.get("sub")
    session = record.entities.get("ses")
    where = f"{SOURCEDATA}/sub-{subject}" + (f"/ses-{session}" if session else "")
    groups = index.groups(subject, session) if subject else []
    if not groups:
        if options.mode == "on":
            return SourceEvidence("no-match", reason=f"no DICOM series under {where}/")
        return None
    shown = tuple(index.name(g) for g in groups)
    geometry = run_geometry(record.abs_path)
    wanted = record.metadata.get("SeriesNumber")
    if isinstance(wanted, int | float) and not isinstance(wanted, bool) and wanted == int(wanted):
        same = [g for g in groups if g.number == int(wanted)]
        if len(same) == 1:
            return _read_matched(index, same[0], f"SeriesNumber {int(wanted)}", geometry)
        if not same:
            return SourceEvidence("no-match", candidates=shown,
                                  reason=f"no series under {where}/ has SeriesNumber "
                                  f"{int(wanted)} (the sidecar's)")
        fitting = _fitting(index, same, record, geometry) if geometry is not None else []
        if len(fitting) == 1:
            return _read_matched(index, fitting[0], f"SeriesNumber {int(wanted)}, geometry, "
                                 "TR and volume count", geometry)
        return SourceEvidence("ambiguous", candidates=tuple(index.name(g) for g in same),
                              reason=f"{len(same)} series under {where}/ have SeriesNumber "
                              f"{int(wanted)} and their geometry, TR and volume count do not "
                              "single one out")
    if geometry is None:
        return SourceEvidence("no-match", candidates=shown,
                              reason="the run has no SeriesNumber and its geometry is unknown")
    fitting = _fitting(index, groups, record, geometry)
    if len(fitting) == 1:
        return _read_matched(index, fitting[0], "geometry, TR and volume count", geometry)
    if not fitting:
        return SourceEvidence("no-match", candidates=shown,
                              reason=f"none of the {len(groups)} series under {where}/ has "
                              "the run's geometry, TR and volume count (and the sidecar has no "
                              "SeriesNumber)")
    return SourceEvidence("ambiguous", candidates=tuple(index.name(g) for g in fitting),
                          reason=f"{len(fitting)} series under {where}/ have the run's geometry, "
                          "TR and volume count (and the sidecar has no SeriesNumber)")
