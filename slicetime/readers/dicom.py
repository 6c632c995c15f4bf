"""Per-slice acquisition times from a source DICOM series (headers only).

:func:`read_series` reads one volume of a series and returns a
:class:`~slicetime.model_source.SeriesTiming`. It dispatches on what the file
holds, never on who made it:

* a **mosaic** (several tiles in one image) whose vendor private header holds
  ``MosaicRefAcqTimes`` (ms from the first excitation, one per tile in tile
  order) and ``SliceNormalVector`` (the direction in which the tiles advance):
  one file is read; tile *t* lies at ``position(tile 0) + t × spacing`` along
  that normal, so a normal pointing against the cross product of the row and
  column cosines (a head-to-foot stack) reverses the tiles along the array's
  slice axis;
* an **enhanced multi-frame** file (``PerFrameFunctionalGroupsSequence``):
  per-frame ``FrameAcquisitionDateTime`` (else ``FrameReferenceDateTime``) of
  the frames of the first temporal position, with ``PlanePositionSequence``;
* **classic** one-slice-per-file series: the files of one volume (read in name
  order until the acquisition changes or a position repeats), with the
  per-instance Trigger Time (0018,1060) when it varies within the volume, else
  AcquisitionTime (0008,0032); ordered by ImagePositionPatient along the
  normal of ImageOrientationPatient.

RepetitionTime is (0018,0080), in ms. Tag meanings follow DICOM PS3.3 (C.7.6.2
Image Plane, C.8.3.1 MR Image, C.7.6.16 Multi-frame Functional Groups).

Files are read with ``stop_before_pixels`` and large values deferred, so pixel
data and oversized private blocks are never loaded. A file that cannot be used
(not DICOM, truncated, a required tag missing, a private block too large)
raises :class:`~slicetime.readers.errors.ReadError` with code
``source/unreadable``; callers turn it into a finding.
"""

from __future__ import annotations

import datetime as dt
import math
import os
import re
import warnings
from collections.abc import Sequence
from typing import Any

from slicetime.model import Source
from slicetime.model_source import SeriesTiming
from slicetime.readers.errors import ReadError

__all__ = [
    "MAX_PRIVATE_BYTES",
    "is_dicom_file",
    "read_series",
    "series_files",
    "series_number",
]

#: a vendor private header larger than this is refused (real ones are a few tens of kB)
MAX_PRIVATE_BYTES = 4 * 1024 * 1024
#: values larger than this stay on disk until asked for
_DEFER = 64 * 1024
#: at most this many files are read to isolate one volume of a classic series
MAX_CLASSIC_FILES = 2048
_NOT_DICOM_SUFFIXES = (
    ".json", ".txt", ".tsv", ".csv", ".nii", ".nii.gz", ".gz", ".zip", ".tar", ".bz2",
    ".xz", ".md", ".log", ".html", ".pdf", ".png", ".jpg", ".jpeg", ".xml", ".py",
)
_DICOM_SUFFIXES = (".dcm", ".ima", ".dicom")
CODE = "source/unreadable"
_HINT = ("check the series under sourcedata/ (a complete copy from the scanner or archive), "
         "or point the run at the right series with --source-map")


def _natural(name: str) -> list[Any]:
    return [int(p) if p.isdigit() else p for p in re.split(r"(\d+)", name)]


def series_files(folder: str) -> list[str]:
    """The candidate DICOM files of a series folder, in natural name order."""
    names = []
    with os.scandir(folder) as entries:
        for entry in entries:
            name = entry.name
            if name.startswith(".") or name.lower().endswith(_NOT_DICOM_SUFFIXES):
                continue
            try:
                if entry.is_file():
                    names.append(name)
            except OSError:
                continue
    names.sort(key=_natural)
    return [os.path.join(folder, n) for n in names]


def is_dicom_file(path: str) -> bool:
    """True when the file has the DICOM part-10 marker, or a DICOM file name suffix."""
    if path.lower().endswith(_DICOM_SUFFIXES):
        return True
    try:
        with open(path, "rb") as fh:
            head = fh.read(132)
    except OSError:
        return False
    return head[128:132] == b"DICM"


def _fail(shown: str, message: str, field: str | None = None, **evidence: Any) -> ReadError:
    return ReadError(CODE, shown, field, f"{shown}: {message}", evidence=evidence, hint=_HINT)


def _read(path: str, shown: str, tags: Sequence[str] | None = None) -> Any:
    """One file's header as a pydicom Dataset; ReadError for anything unusable."""
    import pydicom
    from pydicom.errors import InvalidDicomError

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            return pydicom.dcmread(path, stop_before_pixels=True, defer_size=_DEFER,
                                   specific_tags=list(tags) if tags else None)
    except InvalidDicomError:
        raise _fail(shown, "not a DICOM file (no DICM marker after the preamble)") from None
    except OSError as exc:
        raise _fail(shown, f"cannot read the file ({exc.strerror or exc})") from None
    except Exception as exc:  # pydicom raises many types for damaged files
        raise _fail(shown, f"damaged DICOM header ({type(exc).__name__}: {exc})") from None


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
    """The vendor private image header's entries (name -> items), or None when absent."""
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
        raise _fail(shown, f"the vendor private header cannot be parsed ({type(exc).__name__})",
                    "vendor private header") from None
    if not header:
        return None
    return {name: entry.get("items", []) for name, entry in header.get("tags", {}).items()}


def _is_mosaic(ds: Any, private: dict[str, Any] | None) -> bool:
    image_type = ds.get("ImageType")
    types = [str(t).upper() for t in image_type] if image_type else []
    if private and ("MosaicRefAcqTimes" in private or private.get("NumberOfImagesInMosaic")):
        return True
    return "MOSAIC" in types


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


def _mosaic(ds: Any, private: dict[str, Any] | None, files: Sequence[str], series: str,
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


def _enhanced(ds: Any, files: Sequence[str], series: str, shown: str,
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

_CLASSIC_TAGS = (
    "ImagePositionPatient", "ImageOrientationPatient", "AcquisitionTime", "TriggerTime",
    "AcquisitionNumber", "TemporalPositionIdentifier", "InstanceNumber", "SeriesNumber",
    "SeriesDescription", "RepetitionTime", "Rows", "Columns", "PixelSpacing",
    "SliceThickness", "SpacingBetweenSlices", "SeriesInstanceUID",
)


def _volume_of(datasets: Sequence[tuple[str, Any]], normal: Sequence[float],
               shown_of: Any) -> list[tuple[str, Any, float]]:
    """The leading slices that belong to the first file's volume."""
    first = datasets[0][1]
    key = (first.get("AcquisitionNumber"), first.get("TemporalPositionIdentifier"))
    kept: list[tuple[str, Any, float]] = []
    for path, ds in datasets:
        if (ds.get("AcquisitionNumber"), ds.get("TemporalPositionIdentifier")) != key:
            break
        ipp = _floats(ds.get("ImagePositionPatient"), 3, "ImagePositionPatient",
                      shown_of(path))
        assert ipp is not None
        position = _dot(ipp, normal)
        if any(abs(position - p) < 1e-3 for _, _, p in kept):
            break
        kept.append((path, ds, position))
    return kept


def _classic(ds0: Any, files: Sequence[str], series: str, shown_of: Any) -> SeriesTiming:
    first_shown = shown_of(files[0])
    _, _, normal = _orientation(ds0.get("ImageOrientationPatient"), first_shown)
    datasets: list[tuple[str, Any]] = [(files[0], ds0)]
    kept = _volume_of(datasets, normal, shown_of)
    for path in files[1:MAX_CLASSIC_FILES]:
        datasets.append((path, _read(path, shown_of(path), _CLASSIC_TAGS)))
        now = _volume_of(datasets, normal, shown_of)
        if len(now) == len(kept):
            break  # this file starts the next volume
        kept = now
    if len(kept) == 1 and len(files) > 2:
        # names not in acquisition order: read the files and order them by InstanceNumber
        for path in files[len(datasets):MAX_CLASSIC_FILES]:
            datasets.append((path, _read(path, shown_of(path), _CLASSIC_TAGS)))
        datasets.sort(key=lambda item: (_int(item[1].get("InstanceNumber")) or 0))
        kept = _volume_of(datasets, normal, shown_of)
    kept.sort(key=lambda item: item[2])
    notes: list[str] = []
    times: tuple[float, ...] | None = None
    source: Source | None = None
    trigger = [_number(ds.get("TriggerTime")) for _, ds, _ in kept]
    clock = [_tm_seconds(ds.get("AcquisitionTime")) for _, ds, _ in kept]
    if len(kept) > 1 and all(t is not None for t in trigger) and len(set(trigger)) > 1:
        times = tuple(float(t) / 1000.0 for t in trigger)  # type: ignore[arg-type]
        source = Source("dicom", "TriggerTime (0018,1060), per file", first_shown)
    elif len(kept) > 1 and all(t is not None for t in clock) and len(set(clock)) > 1:
        times = _relative([t for t in clock if t is not None])
        source = Source("dicom", "AcquisitionTime (0008,0032), per file", first_shown)
    else:
        notes.append("the files of one volume carry no differing AcquisitionTime or Trigger "
                     "Time")
    positions = tuple(p for _, _, p in kept)
    gap = abs(positions[1] - positions[0]) if len(positions) > 1 else _slice_gap(
        ds0, first_shown)
    n = len(kept)
    return SeriesTiming(
        series=series, layout="classic",
        files_read=tuple(shown_of(p) for p, _ in datasets), n_files=len(files),
        normal=normal, positions=positions,
        labels=tuple(f"instance {_int(ds.get('InstanceNumber')) or '?'}" for _, ds, _ in kept),
        times=times, times_source=source, rows=_int(ds0.get("Rows")),
        columns=_int(ds0.get("Columns")), slice_spacing=gap,
        n_volumes=len(files) // n if n and len(files) % n == 0 else None,
        notes=tuple(notes), **_common(ds0, first_shown),
    )


# --------------------------------------------------------------------------- entry points


def read_series(path: str, shown: str, root: str | None = None) -> SeriesTiming:
    """One volume's slice times from a series folder (or a single DICOM file).

    ``shown`` names ``path`` in messages; files inside it are shown relative to
    ``root`` when given. Raises ReadError (``source/unreadable``) for bad input.
    """

    def shown_of(file: str) -> str:
        if root is not None:
            try:
                return os.path.relpath(file, root).replace(os.sep, "/")
            except ValueError:
                return file
        return file

    if os.path.isdir(path):
        try:
            files = series_files(path)
        except OSError as exc:
            raise _fail(shown, f"cannot list the series folder ({exc.strerror or exc})") \
                from None
        if not files:
            raise _fail(shown, "the series folder holds no DICOM files")
    elif os.path.isfile(path):
        files = [path]
    else:
        raise _fail(shown, "the series folder or file does not exist")
    first = files[0]
    ds = _read(first, shown_of(first))
    if "PerFrameFunctionalGroupsSequence" in ds:
        return _enhanced(ds, files, shown, shown_of(first), shown_of(first))
    private = _private_header(ds, shown_of(first))
    if _is_mosaic(ds, private):
        return _mosaic(ds, private, files, shown, shown_of(first), shown_of(first))
    if ds.get("ImagePositionPatient") is None:
        raise _fail(shown_of(first), "ImagePositionPatient is missing (needed to place the "
                    "slices)", "ImagePositionPatient")
    return _classic(ds, files, shown, shown_of)


def series_number(folder: str, shown: str) -> int | None:
    """The SeriesNumber (0020,0011) of a series folder's first file (one tag read)."""
    files = series_files(folder) if os.path.isdir(folder) else [folder]
    if not files:
        raise _fail(shown, "the series folder holds no DICOM files")
    ds = _read(files[0], shown, ("SeriesNumber",))
    return _int(ds.get("SeriesNumber"))
