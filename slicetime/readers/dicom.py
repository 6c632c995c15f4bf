"""Per-slice acquisition times from a source DICOM series (headers only).

:func:`read_group` reads one volume of a series (the objects of one
SeriesInstanceUID, found by :func:`slicetime.readers.dicom_files.catalogue`)
and returns a :class:`~slicetime.model_source.SeriesTiming`. It dispatches on
what the first object holds, never on who made it:

* an **enhanced multi-frame** object (``PerFrameFunctionalGroupsSequence``,
  DICOM PS3.3 C.7.6.16): per-frame ``FrameAcquisitionDateTime`` (else
  ``FrameReferenceDateTime``) of the frames of the first temporal position,
  placed by their ``PlanePositionSequence``;
* a **mosaic** (several tiles in one image), only when it has tiles to read: a
  private image header whose ``NumberOfImagesInMosaic`` has an entry, or whose
  ``MosaicRefAcqTimes`` (ms from the first excitation, one per tile in tile
  order) has entries in an image typed ``MOSAIC``. ``SliceNormalVector`` gives
  the direction in which the tiles advance: tile *t* lies at
  ``position(tile 0) + t × spacing`` along it, so a normal pointing against the
  cross product of the row and column cosines (a head-to-foot stack) reverses
  the tiles along the array's slice axis. A private header whose keys are there
  but empty (localizers, field maps, scouts) is not a mosaic;
* **classic** one-slice-per-file series (DICOM PS3.3 C.7.6.2 Image Plane,
  C.8.3.1 MR Image): the objects of one volume (in name order until the
  acquisition changes or a position repeats; by InstanceNumber when names are
  not in acquisition order) with the same ImageOrientationPatient, ordered by
  ImagePositionPatient along its normal; times from the per-object Trigger
  Time (0018,1060) when it varies within the volume, else AcquisitionTime
  (0008,0032), else AcquisitionDateTime (0008,002A).

A series that records no per-slice times is not an error: its timing has
``times`` None and a note saying why. RepetitionTime is (0018,0080), in ms.

A file that cannot be used (not DICOM, truncated, a required tag missing, a
private block too large) raises :class:`~slicetime.readers.errors.ReadError`
with code ``source/unreadable``; callers turn it into a finding.
"""

from __future__ import annotations

import datetime as dt
import math
import os
import re
import warnings
from collections.abc import Callable, Sequence
from typing import Any

from slicetime.model import Source
from slicetime.model_source import SeriesTiming
from slicetime.readers.dicom_files import (
    DicomObject,
    SeriesGroup,
    catalogue,
    fail,
    full_header,
    is_archive_name,
    is_dicom_path,
    natural,
    quiet,
)
from slicetime.readers.errors import ReadError

__all__ = [
    "MAX_PRIVATE_BYTES",
    "is_dicom_file",
    "is_dicom_input",
    "read_all_series",
    "read_group",
    "read_series",
    "series_files",
]

#: a private image header larger than this is refused (real ones are a few tens of kB)
MAX_PRIVATE_BYTES = 4 * 1024 * 1024
#: at most this many objects are looked at to isolate one volume of a classic series
MAX_CLASSIC_FILES = 2048
_fail = fail


def series_files(folder: str) -> list[str]:
    """The candidate DICOM files of a folder (plain, compressed or archives), natural order."""
    names = []
    with os.scandir(folder) as entries:
        for entry in entries:
            try:
                if entry.is_file() and (is_archive_name(entry.name) or
                                        is_dicom_path(entry.path)):
                    names.append(entry.name)
            except OSError:
                continue
    names.sort(key=natural)
    return [os.path.join(folder, n) for n in names]


def is_dicom_input(path: str) -> bool:
    """A series folder, an archive or a DICOM file (plain or compressed), not a NIfTI run:
    what ``show`` reads as a source series."""
    lower = os.path.basename(path).lower()
    if lower.endswith((".nii", ".nii.gz", ".json", ".tsv")):
        return False
    if os.path.isdir(path):
        try:
            return bool(series_files(path))
        except OSError:
            return False
    return os.path.isfile(path) and is_dicom_file(path)


def is_dicom_file(path: str) -> bool:
    """True for a DICOM file (marker or suffix, plain or gzip-compressed) or an archive."""
    return is_archive_name(path) or is_dicom_path(path)


def _get(ds: Any, keyword: str, shown: str) -> Any:
    """A tag's value, None when absent; ReadError when the stored bytes are damaged."""
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            element = ds.get(keyword)
    except Exception as exc:
        raise _fail(shown, f"{keyword} cannot be decoded ({type(exc).__name__})",
                    keyword) from None
    if element is None:
        return None
    return element


def _floats(value: Any, n: int, keyword: str, shown: str, required: bool = True
            ) -> tuple[float, ...] | None:
    if value is None or value == "":
        if required:
            raise _fail(shown, f"{keyword} is missing (needed to place the slices)", keyword)
        return None
    try:
        items = [float(v) for v in (value if isinstance(value, Sequence | list)
                                    and not isinstance(value, str) else [value])]
    except (TypeError, ValueError):
        raise _fail(shown, f"{keyword} is not numeric: {value!r}", keyword) from None
    if len(items) != n or not all(math.isfinite(v) for v in items):
        if required:
            raise _fail(shown, f"{keyword} must hold {n} finite numbers, not {value!r}",
                        keyword)
        return None
    return tuple(items)


def _number(value: Any) -> float | None:
    try:
        out = float(value)
    except (TypeError, ValueError):
        return None
    return out if math.isfinite(out) else None


def _int(value: Any) -> int | None:
    number = _number(value)
    return int(number) if number is not None and number == int(number) else None


def _cross(a: Sequence[float], b: Sequence[float]) -> tuple[float, float, float]:
    return (a[1] * b[2] - a[2] * b[1], a[2] * b[0] - a[0] * b[2], a[0] * b[1] - a[1] * b[0])


def _dot(a: Sequence[float], b: Sequence[float]) -> float:
    return sum(x * y for x, y in zip(a, b, strict=True))


def _unit(v: Sequence[float]) -> tuple[float, float, float] | None:
    norm = math.sqrt(_dot(v, v))
    if not norm or not math.isfinite(norm):
        return None
    return (v[0] / norm, v[1] / norm, v[2] / norm)


def _orientation(value: Any, shown: str) -> tuple[tuple[float, ...], tuple[float, ...],
                                                  tuple[float, float, float]]:
    iop = _floats(value, 6, "ImageOrientationPatient", shown)
    assert iop is not None
    row, col = iop[:3], iop[3:]
    normal = _unit(_cross(row, col))
    if normal is None:
        raise _fail(shown, "ImageOrientationPatient has parallel or zero cosines",
                    "ImageOrientationPatient")
    return row, col, normal


def _tm_seconds(value: Any) -> float | None:
    """A DICOM TM (HHMMSS.FFFFFF, or the old HH:MM:SS.frac) as seconds of the day."""
    text = str(value).strip().replace(":", "") if value is not None else ""
    match = re.fullmatch(r"(\d{2})(\d{2})?(\d{2})?(\.\d{1,6})?", text)
    if not match:
        return None
    hh, mm, ss, frac = match.groups()
    return int(hh) * 3600 + int(mm or 0) * 60 + int(ss or 0) + float(frac or 0)


def _dt_seconds(value: Any) -> float | None:
    """A DICOM DT (YYYYMMDDHHMMSS.FFFFFF&ZZXX) as seconds since an epoch."""
    text = str(value).strip() if value is not None else ""
    match = re.fullmatch(r"(\d{8})(\d{2,6})?(\.\d{1,6})?([+-]\d{4})?", text)
    if not match:
        return None
    date, clock, frac, _ = match.groups()
    try:
        day = dt.date(int(date[:4]), int(date[4:6]), int(date[6:8]))
    except ValueError:
        return None
    clock = (clock or "").ljust(6, "0")
    seconds = int(clock[:2]) * 3600 + int(clock[2:4]) * 60 + int(clock[4:6]) + float(frac or 0)
    return day.toordinal() * 86400.0 + seconds


def _relative(values: Sequence[float]) -> tuple[float, ...]:
    """Clock readings as seconds from the earliest (a volume never spans 12 hours)."""
    low = min(values)
    shifted = [v + 86400.0 if v - low > 43200.0 else v for v in values]  # past midnight
    low = min(shifted)
    return tuple(v - low for v in shifted)


def _private_header(ds: Any, shown: str) -> dict[str, Any] | None:
    """The private image header's entries (name -> items), or None when absent. Damage is
    an error only in an image typed MOSAIC (which needs it); elsewhere it is ignored."""
    for tag in list(ds.keys()):
        if tag.group != 0x0029 or (tag.element & 0xFF) != 0x10 or tag.element < 0x1000:
            continue
        try:
            raw = ds.get_item(tag)
        except Exception:
            continue
        length = getattr(raw, "length", None)
        if length is not None and length != 0xFFFFFFFF and length > MAX_PRIVATE_BYTES:
            raise _fail(shown, f"the vendor private header is {length:,} bytes (more than "
                        f"{MAX_PRIVATE_BYTES:,}): refused", "vendor private header",
                        bytes=length)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # nibabel warns on importing its DICOM package
            from nibabel.nicom import csareader

            header = csareader.get_csa_header(ds, "image")
    except Exception as exc:
        if not _is_mosaic_type(ds):
            return None
        raise _fail(shown, f"the vendor private header cannot be parsed ({type(exc).__name__})",
                    "vendor private header") from None
    if not header:
        return None
    return {name: entry.get("items", []) for name, entry in header.get("tags", {}).items()}


def _is_mosaic_type(ds: Any) -> bool:
    image_type = ds.get("ImageType")
    return "MOSAIC" in ([str(t).upper() for t in image_type] if image_type else [])


def _has_tiles(ds: Any, private: dict[str, Any] | None) -> bool:
    """A mosaic with tiles to read: NumberOfImagesInMosaic has an entry, or an image typed
    MOSAIC has MosaicRefAcqTimes entries. Keys present but empty are no mosaic."""
    if not private:
        return False
    count = _int((private.get("NumberOfImagesInMosaic") or [None])[0])
    if count is not None and count > 0:
        return True
    return bool(private.get("MosaicRefAcqTimes")) and _is_mosaic_type(ds)


def _common(ds: Any, shown: str) -> dict[str, Any]:
    tr = _number(_get(ds, "RepetitionTime", shown))
    spacing = _floats(_get(ds, "PixelSpacing", shown), 2, "PixelSpacing", shown, required=False)
    return {
        "series_number": _int(_get(ds, "SeriesNumber", shown)),
        "description": (str(ds.get("SeriesDescription")) if ds.get("SeriesDescription")
                        else None),
        "repetition_time": tr / 1000.0 if tr and tr > 0 else None,
        "pixel_spacing": spacing,
    }


def _slice_gap(ds: Any, shown: str) -> float | None:
    for keyword in ("SpacingBetweenSlices", "SliceThickness"):
        value = _number(_get(ds, keyword, shown))
        if value is not None and value > 0:
            return abs(value)
    return None


# --------------------------------------------------------------------------- mosaic


def _mosaic(ds: Any, private: dict[str, Any] | None, files: Sequence[object], series: str,
            shown: str, first: str) -> SeriesTiming:
    private = private or {}
    _, _, cross = _orientation(_get(ds, "ImageOrientationPatient", shown), shown)
    ipp = _floats(_get(ds, "ImagePositionPatient", shown), 3, "ImagePositionPatient", shown)
    assert ipp is not None
    times_ms = [_number(v) for v in private.get("MosaicRefAcqTimes", [])]
    count = _int((private.get("NumberOfImagesInMosaic") or [None])[0])
    if count is None or count <= 0:
        count = len(times_ms) if times_ms else None
    if count is None:
        raise _fail(shown, "a mosaic without NumberOfImagesInMosaic in its vendor private "
                    "header: the number of tiles is unknown", "NumberOfImagesInMosaic")
    normal_items = private.get("SliceNormalVector") or []
    normal = _unit([float(v) for v in normal_items]) if len(normal_items) == 3 else None
    notes: list[str] = []
    if normal is None:
        normal = cross
        notes.append("no slice normal in the vendor private header: the tiles are assumed to "
                     "advance along the cross product of the row and column cosines")
    elif abs(_dot(normal, cross)) < 0.99:
        raise _fail(shown, "the vendor private header's SliceNormalVector is not perpendicular "
                    "to ImageOrientationPatient", "SliceNormalVector")
    gap = _slice_gap(ds, shown)
    if gap is None:
        raise _fail(shown, "neither SpacingBetweenSlices nor SliceThickness is given: the "
                    "tiles cannot be placed", "SpacingBetweenSlices")
    rows, columns = _int(ds.get("Rows")), _int(ds.get("Columns"))
    tiles_per_side = math.ceil(math.sqrt(count))
    # in-plane offsets of tile 0 do not move it along the normal: project the mosaic's position
    start = _dot(ipp, normal)
    positions = tuple(start + t * gap for t in range(count))
    times: tuple[float, ...] | None = None
    source: Source | None = None
    if times_ms and len(times_ms) >= count and all(t is not None for t in times_ms[:count]):
        times = tuple(float(t) / 1000.0 for t in times_ms[:count])  # type: ignore[arg-type]
        source = Source("dicom", "MosaicRefAcqTimes (vendor private header)", first)
    else:
        notes.append("the vendor private header holds no MosaicRefAcqTimes for every tile")
    return SeriesTiming(
        series=series, layout="mosaic", files_read=(first,), n_files=len(files),
        normal=normal, positions=positions,
        labels=tuple(f"tile {t + 1}" for t in range(count)),
        times=times, times_source=source,
        rows=rows // tiles_per_side if rows else None,
        columns=columns // tiles_per_side if columns else None,
        slice_spacing=gap, n_volumes=len(files), notes=tuple(notes),
        **_common(ds, shown),
    )


# --------------------------------------------------------------------------- enhanced


def _item(sequence: Any) -> Any:
    try:
        return sequence[0] if sequence else None
    except Exception:
        return None


def _frame_value(frame: Any, shared: Any, group: str, keyword: str) -> Any:
    for holder in (frame, shared):
        if holder is None:
            continue
        item = _item(holder.get(group))
        if item is not None and keyword in item:
            return item.get(keyword)
    return None


def _enhanced(ds: Any, files: Sequence[object], series: str, shown: str,
              first: str) -> SeriesTiming:
    frames = list(ds.get("PerFrameFunctionalGroupsSequence") or [])
    if not frames:
        raise _fail(shown, "PerFrameFunctionalGroupsSequence is empty",
                    "PerFrameFunctionalGroupsSequence")
    shared = _item(ds.get("SharedFunctionalGroupsSequence"))
    iop = _frame_value(frames[0], shared, "PlaneOrientationSequence", "ImageOrientationPatient")
    _, _, normal = _orientation(iop, shown)
    index: list[int | None] = [
        _int(_frame_value(f, None, "FrameContentSequence", "TemporalPositionIndex"))
        for f in frames
    ]
    chosen: list[int] = []
    if all(i is not None for i in index):
        lowest = min(i for i in index if i is not None)
        chosen = [n for n, i in enumerate(index) if i == lowest]
    positions: list[float] = []
    labels: list[str] = []
    acquired: list[float | None] = []
    referenced: list[float | None] = []
    for n, frame in enumerate(frames):
        if chosen and n not in chosen:
            continue
        ipp = _floats(_frame_value(frame, shared, "PlanePositionSequence",
                                   "ImagePositionPatient"), 3,
                      f"ImagePositionPatient (frame {n + 1})", shown)
        assert ipp is not None
        position = _dot(ipp, normal)
        if not chosen and any(abs(position - p) < 1e-3 for p in positions):
            break  # the first volume ends where a position comes round again
        positions.append(position)
        labels.append(f"frame {n + 1}")
        acquired.append(_dt_seconds(_frame_value(frame, None, "FrameContentSequence",
                                                 "FrameAcquisitionDateTime")))
        referenced.append(_dt_seconds(_frame_value(frame, None, "FrameContentSequence",
                                                   "FrameReferenceDateTime")))
    times: tuple[float, ...] | None = None
    source: Source | None = None
    notes: list[str] = []
    for keyword, values in (("FrameAcquisitionDateTime", acquired),
                            ("FrameReferenceDateTime", referenced)):
        known = [v for v in values if v is not None]
        if len(known) == len(values) and len(set(known)) > 1:
            times = _relative(known)
            source = Source("dicom", f"{keyword} (FrameContentSequence)", first)
            break
    if times is None:
        notes.append("the frames of one volume carry no differing acquisition or reference "
                     "date-times")
    common = _common(ds, shown)
    timing = _item(shared.get("MRTimingAndRelatedParametersSequence")) if shared else None
    tr = _number(timing.get("RepetitionTime")) if timing is not None else None
    if tr and tr > 0:
        common["repetition_time"] = tr / 1000.0
    measures = _item(shared.get("PixelMeasuresSequence")) if shared else None
    if measures is not None and measures.get("PixelSpacing"):
        common["pixel_spacing"] = _floats(measures.get("PixelSpacing"), 2, "PixelSpacing",
                                          shown, required=False)
    gap = _slice_gap(measures, shown) if measures is not None else None
    ordered = sorted(positions)
    if len(ordered) > 1:
        gap = abs(ordered[1] - ordered[0])
    frames_per_file = len(frames)
    volumes = (len(files) * frames_per_file) // len(positions) if positions else None
    return SeriesTiming(
        series=series, layout="enhanced", files_read=(first,), n_files=len(files),
        normal=normal, positions=tuple(positions), labels=tuple(labels), times=times,
        times_source=source, rows=_int(ds.get("Rows")), columns=_int(ds.get("Columns")),
        slice_spacing=gap or _slice_gap(ds, shown), n_volumes=volumes, notes=tuple(notes),
        **common,
    )


# --------------------------------------------------------------------------- classic

def _same_plane(ds: Any, row: Sequence[float], col: Sequence[float]) -> bool:
    iop = _floats(ds.get("ImageOrientationPatient"), 6, "ImageOrientationPatient", "",
                  required=False)
    return iop is not None and all(abs(a - b) < 1e-4 for a, b in zip(iop, (*row, *col),
                                                                        strict=True))


def _volume_of(datasets: Sequence[tuple[str, Any]], normal: Sequence[float]
               ) -> list[tuple[str, Any, float]]:
    """The leading slices that belong to the first object's volume."""
    first = datasets[0][1]
    key = (first.get("AcquisitionNumber"), first.get("TemporalPositionIdentifier"))
    kept: list[tuple[str, Any, float]] = []
    for shown, ds in datasets:
        if (ds.get("AcquisitionNumber"), ds.get("TemporalPositionIdentifier")) != key:
            break
        ipp = _floats(ds.get("ImagePositionPatient"), 3, "ImagePositionPatient", shown)
        assert ipp is not None
        position = _dot(ipp, normal)
        if any(abs(position - p) < 1e-3 for _, _, p in kept):
            break
        kept.append((shown, ds, position))
    return kept


def _classic(group: SeriesGroup, series: str, shown_of: Callable[[DicomObject], str]
             ) -> SeriesTiming:
    ds0 = group.slim[0]
    first_shown = shown_of(group.objects[0])
    row, col, normal = _orientation(ds0.get("ImageOrientationPatient"), first_shown)
    notes: list[str] = []
    planes = [(shown_of(o), ds) for o, ds in zip(group.objects, group.slim, strict=True)
              if ds.get("ImagePositionPatient") is not None and _same_plane(ds, row, col)]
    if len(planes) < len(group.objects):
        notes.append(f"{len(group.objects) - len(planes)} of {len(group.objects)} images lie "
                     "in another plane and were left out")
    candidates = planes[:MAX_CLASSIC_FILES]
    kept = _volume_of(candidates, normal)
    if len(kept) == 1 and len(candidates) > 2:
        # names not in acquisition order: order the objects by InstanceNumber
        ordered = sorted(candidates, key=lambda item: _int(item[1].get("InstanceNumber")) or 0)
        kept = _volume_of(ordered, normal)
    read = [shown for shown, _ in candidates[:len(kept) + 1]]
    kept.sort(key=lambda item: item[2])
    times: tuple[float, ...] | None = None
    source: Source | None = None
    trigger = [_number(ds.get("TriggerTime")) for _, ds, _ in kept]
    clock = [_tm_seconds(ds.get("AcquisitionTime")) for _, ds, _ in kept]
    stamp = [_dt_seconds(ds.get("AcquisitionDateTime")) for _, ds, _ in kept]
    if len(kept) > 1 and all(t is not None for t in trigger) and len(set(trigger)) > 1:
        times = tuple(float(t) / 1000.0 for t in trigger)  # type: ignore[arg-type]
        source = Source("dicom", "TriggerTime (0018,1060), per file", first_shown)
    elif len(kept) > 1 and all(t is not None for t in clock) and len(set(clock)) > 1:
        times = _relative([t for t in clock if t is not None])
        source = Source("dicom", "AcquisitionTime (0008,0032), per file", first_shown)
    elif len(kept) > 1 and all(t is not None for t in stamp) and len(set(stamp)) > 1:
        times = _relative([t for t in stamp if t is not None])
        source = Source("dicom", "AcquisitionDateTime (0008,002A), per file", first_shown)
    elif len(kept) == 1:
        notes.append("one image per volume: a single slice has no slice order")
    else:
        notes.append("the images of one volume carry no differing AcquisitionTime, "
                     "AcquisitionDateTime or Trigger Time")
    positions = tuple(p for _, _, p in kept)
    gap = abs(positions[1] - positions[0]) if len(positions) > 1 else _slice_gap(
        ds0, first_shown)
    n = len(kept)
    total = len(planes)
    return SeriesTiming(
        series=series, layout="classic", files_read=tuple(read), n_files=len(group.objects),
        normal=normal, positions=positions,
        labels=tuple(f"instance {_int(ds.get('InstanceNumber')) or '?'}" for _, ds, _ in kept),
        times=times, times_source=source, rows=_int(ds0.get("Rows")),
        columns=_int(ds0.get("Columns")), slice_spacing=gap,
        n_volumes=total // n if n and total % n == 0 else None,
        notes=tuple(notes), **_common(ds0, first_shown),
    )


def _not_an_image(ds: Any, shown: str) -> ReadError:
    """The one line for a DICOM object that is no image (DICOM PS3.3 C.7.6.3: every image
    has the Image Pixel module, whose Rows is type 1), named by its SOP class and
    Modality (a plan, a structure set, a report hold no slices to time)."""
    sop = _get(ds, "SOPClassUID", shown)
    modality = _get(ds, "Modality", shown)
    what = []
    if sop:  # pydicom names the standard's SOP classes (a UID it does not know: itself)
        what.append(f"SOP class {getattr(sop, 'name', '') or sop}")
    if modality:
        what.append(f"Modality {modality}")
    told = f" ({', '.join(what)})" if what else ""
    return _fail(shown, f"not an image series{told}: it holds no slices to time",
                 "SOPClassUID", modality=None if modality is None else str(modality))


# --------------------------------------------------------------------------- entry points


def _shown_by(root: str | None) -> Callable[[DicomObject], str]:
    def shown_of(obj: DicomObject) -> str:
        return obj.shown(root)
    return shown_of


def _path_shown(root: str | None) -> Callable[[str], str]:
    def shown_of(path: str) -> str:
        return DicomObject(path).shown(root)
    return shown_of


@quiet
def read_group(group: SeriesGroup, series: str, root: str | None = None) -> SeriesTiming:
    """One volume's slice times from the objects of one series (see the module's text).

    ``series`` names the series in messages and reports; objects are shown relative
    to ``root`` when given. Raises ReadError (``source/unreadable``) for bad input.
    """
    shown_of = _shown_by(root)
    first = shown_of(group.objects[0])
    ds = full_header(group, first)
    if "PerFrameFunctionalGroupsSequence" in ds:
        timing = _enhanced(ds, group.objects, series, first, first)
    else:
        private = _private_header(ds, first)
        if _has_tiles(ds, private):
            timing = _mosaic(ds, private, group.objects, series, first, first)
        elif ds.get("ImagePositionPatient") is None:
            if _get(ds, "Rows", first) is None:  # no Image Pixel module: no image at all
                raise _not_an_image(ds, first)
            raise _fail(first, "ImagePositionPatient is missing (needed to place the slices)",
                        "ImagePositionPatient")
        else:
            timing = _classic(group, series, shown_of)
    import dataclasses

    if group.uid_note is not None:
        timing = dataclasses.replace(timing, notes=(*timing.notes, group.uid_note))
    if group.neighbours:
        where = ", ".join(_path_shown(root)(f) for f in group.folders)
        note = (f"{where} mixes {group.neighbours + 1} series: only the "
                f"{len(group.objects)} images with SeriesInstanceUID {group.uid} were read")
        timing = dataclasses.replace(timing, notes=(*timing.notes, note),
                                     neighbours=group.neighbours)
    return timing


def group_name(group: SeriesGroup, root: str | None = None) -> str:
    """How people see a series: its folder, with its number when the folder mixes series."""
    where = _path_shown(root)(group.folders[0]) if group.folders else "?"
    return f"{where} ({_label(group)})" if group.neighbours else where


def _label(group: SeriesGroup) -> str:
    return (f"SeriesNumber {group.number}" if group.number is not None
            else f"SeriesInstanceUID {group.uid}")


@quiet
def read_all_series(path: str, shown: str, root: str | None = None
                    ) -> list[SeriesTiming | ReadError]:
    """Every series in a DICOM file, an archive or a folder (not its subfolders)."""
    if not os.path.exists(path):
        raise _fail(shown, "the series folder or file does not exist")
    try:
        groups, problems = catalogue(path, _path_shown(root))
    except OSError as exc:
        raise _fail(shown, f"cannot list the series folder ({exc.strerror or exc})") from None
    if not groups:
        if problems:
            raise problems[0]
        raise _fail(shown, "holds no DICOM files")
    out: list[SeriesTiming | ReadError] = []
    for group in sorted(groups, key=lambda g: (g.number is None, g.number or 0,
                                               natural(g.objects[0].shown(root)))):
        name = shown if len(groups) == 1 else f"{shown} ({_label(group)})"
        try:
            out.append(read_group(group, name, root))
        except ReadError as exc:
            out.append(exc)
    return out


def read_series(path: str, shown: str, root: str | None = None) -> SeriesTiming:
    """The first series of a folder, archive or file (see :func:`read_all_series`)."""
    first = read_all_series(path, shown, root)[0]
    if isinstance(first, ReadError):
        raise first
    return first
