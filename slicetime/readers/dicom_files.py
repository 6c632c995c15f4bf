"""Where DICOM objects live and how their headers are read (bounded, header bytes only).

A DICOM object (DICOM PS3.10 file format: a 128-byte preamble, ``DICM``, the
file meta information, then the data set) is found as

* a plain file (any name; ``.dcm``/``.ima`` or the ``DICM`` marker),
* a gzip-compressed file (``.dcm.gz``, ``.ima.gz``, or any ``.gz`` whose content
  has the marker; ``.nii.gz`` and ``.tar.gz`` are not DICOM),
* a member of a ``.zip``, ``.tar``, ``.tar.gz``/``.tgz`` archive (the BIDS
  specification's ``sourcedata/`` often holds the scanner's export that way).

A ``.dcm``/``.ima`` file without the preamble and ``DICM`` (a bare data set, as
some tools write it) is read as pydicom reads it forced, when that gives a data set
with a SOPClassUID; otherwise it is "not a DICOM file".

Only header bytes are read: plain files through pydicom with
``stop_before_pixels`` (large values deferred); compressed files and archive
members as a prefix that ends at the Pixel Data element (7FE0,0010), growing
from 256 KiB to at most :data:`MAX_HEADER_BYTES`. A header longer than that,
an archive with more than :data:`MAX_MEMBERS` members, or a damaged file
raises :class:`~slicetime.readers.errors.ReadError` (``source/unreadable``).

:func:`catalogue` reads every object of a folder (or archive) and groups them
by SeriesInstanceUID (0020,000E), DICOM PS3.3 C.7.3.1: a folder is never taken
for a series by itself, and a folder that mixes several series is said so.
"""

from __future__ import annotations

import contextlib
import functools
import gzip
import io
import os
import re
import tarfile
import warnings
import zipfile
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from typing import Any, TypeVar

from slicetime.readers.errors import ReadError

__all__ = [
    "CATALOGUE_TAGS",
    "MAX_HEADER_BYTES",
    "MAX_MEMBERS",
    "DicomObject",
    "SeriesGroup",
    "catalogue",
    "is_archive_name",
    "is_dicom_path",
    "quiet",
    "read_object",
    "series_uid",
]

_F = TypeVar("_F", bound=Callable[..., Any])


def quiet(fn: _F) -> _F:
    """Run ``fn`` with library warnings silenced: pydicom converts values when they are
    first read and warns on stderr about a malformed one; the readers report what
    matters as findings or notes instead."""
    import functools

    @functools.wraps(fn)
    def wrapper(*args: Any, **kwargs: Any) -> Any:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            return fn(*args, **kwargs)

    return wrapper  # type: ignore[return-value]  # functools.wraps keeps the signature


#: a DICOM UID (PS3.5 section 9.1): numeric components without leading zeros, separated
#: by dots, at most 64 characters
_UID = re.compile(r"(?:0|[1-9][0-9]*)(?:\.(?:0|[1-9][0-9]*))*\Z")


def series_uid(ds: Any, shown: str) -> tuple[str | None, str | None]:
    """The SeriesInstanceUID of a header, and a one-line note naming the file and field
    when the stored value is not a valid UID (the series is still grouped by it)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            value = ds.get("SeriesInstanceUID")
        except Exception:  # a value pydicom cannot decode at all
            return None, f"{shown}: SeriesInstanceUID cannot be decoded"
    if not value:
        return None, None
    text = str(value)
    if len(text) > 64 or not _UID.match(text):
        return text, (f"{shown}: SeriesInstanceUID {text!r} is not a valid UID (digits and "
                      "dots, at most 64 characters); the images are grouped by it as stored")
    return text, None

CODE = "source/unreadable"
HINT = ("check the series under sourcedata/ (a complete copy from the scanner or archive), "
        "or point the run at the right series with --source-map")
#: a header (everything before the pixel data) longer than this is refused
MAX_HEADER_BYTES = 16 * 1024 * 1024
_FIRST_PREFIX = 256 * 1024
#: an archive with more members than this is refused (a scanner export holds thousands)
MAX_MEMBERS = 200_000
#: an archive whose first this many files hold no DICOM is not read on (a recording or
#: a document archive under sourcedata/ is not decompressed to its end)
MAX_LEADING_OTHERS = 64
#: values larger than this stay on disk until asked for (plain files)
_DEFER = 64 * 1024
_ARCHIVE_SUFFIXES = (".zip", ".tar", ".tar.gz", ".tgz")
_GZ_DICOM_SUFFIXES = (".dcm.gz", ".ima.gz", ".dicom.gz")
_DICOM_SUFFIXES = (".dcm", ".ima", ".dicom")
_NOT_DICOM_SUFFIXES = (
    ".json", ".txt", ".tsv", ".csv", ".nii", ".nii.gz", ".bz2", ".xz", ".md", ".log",
    ".html", ".pdf", ".png", ".jpg", ".jpeg", ".xml", ".py", ".bval", ".bvec",
)
#: the Pixel Data elements (7FE0,0010/0008/0009), little then big endian (PS3.5 7.1)
_PIXEL_TAGS = (b"\xe0\x7f\x10\x00", b"\xe0\x7f\x08\x00", b"\xe0\x7f\x09\x00",
               b"\x7f\xe0\x00\x10")
#: the tags the catalogue keeps for every object (the classic reader needs no more)
CATALOGUE_TAGS = (
    "SeriesInstanceUID", "SeriesNumber", "SeriesDescription", "ImagePositionPatient",
    "ImageOrientationPatient", "AcquisitionTime", "AcquisitionDateTime", "TriggerTime",
    "AcquisitionNumber", "TemporalPositionIdentifier", "InstanceNumber", "RepetitionTime",
    "Rows", "Columns", "PixelSpacing", "SliceThickness", "SpacingBetweenSlices",
)


def fail(shown: str, message: str, field: str | None = None, **evidence: Any) -> ReadError:
    return ReadError(CODE, shown, field, f"{shown}: {message}", evidence=evidence, hint=HINT)


def natural(name: str) -> list[Any]:
    return [int(p) if p.isdigit() else p for p in re.split(r"(\d+)", name)]


def is_archive_name(name: str) -> bool:
    return name.lower().endswith(_ARCHIVE_SUFFIXES)


def _skipped(name: str) -> bool:
    lower = name.lower()
    base = lower.rsplit("/", 1)[-1]
    return (base.startswith(".") or not base or lower.endswith(_NOT_DICOM_SUFFIXES)
            or lower.endswith("/"))


def _is_gz(name: str) -> bool:
    return name.lower().endswith(".gz") and not is_archive_name(name)


@dataclass(frozen=True)
class DicomObject:
    """One DICOM object: ``path`` on disk, and ``member`` inside it when an archive."""

    path: str
    member: str | None = None

    @property
    def gzipped(self) -> bool:
        return _is_gz(self.member if self.member is not None else self.path)

    def shown(self, root: str | None = None) -> str:
        base = self.path
        if root is not None:
            try:
                base = os.path.relpath(self.path, root).replace(os.sep, "/")
            except ValueError:
                pass
        return f"{base}/{self.member}" if self.member is not None else base

    @property
    def folder(self) -> str:
        """The folder it lives in (inside an archive: the archive path and the member's
        folder), which names the series for people."""
        if self.member is None:
            return os.path.dirname(self.path)
        inner = self.member.rsplit("/", 1)[0] if "/" in self.member else ""
        return os.path.join(self.path, inner) if inner else self.path


# --------------------------------------------------------------------------- reading


def _marker_ok(head: bytes) -> bool:
    return len(head) >= 132 and head[128:132] == b"DICM"


def _parse(source: Any, shown: str, tags: Sequence[str] | None, defer: bool) -> Any:
    """pydicom's reading of a path or a binary stream, header only."""
    import pydicom
    from pydicom.errors import InvalidDicomError

    start = source.tell() if hasattr(source, "tell") else 0
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            return pydicom.dcmread(source, stop_before_pixels=True,
                                   defer_size=_DEFER if defer else None,
                                   specific_tags=list(tags) if tags else None)
    except InvalidDicomError:
        bare = _bare_data_set(source, start, tags, defer)
        if bare is None:
            raise fail(shown, "not a DICOM file (no DICM marker after the preamble, and "
                       "no data set with a SOPClassUID)") from None
        return bare
    except OSError as exc:
        raise fail(shown, f"cannot read the file ({exc.strerror or exc})") from None
    except Exception as exc:  # pydicom raises many types for damaged files
        raise fail(shown, f"damaged DICOM header ({type(exc).__name__}: {exc})") from None


def _bare_data_set(source: Any, start: int, tags: Sequence[str] | None, defer: bool) -> Any:
    """A data set written without the PS3.10 preamble, ``DICM`` and file meta (DICOM
    PS3.10 7.1 makes them the file format; a bare data set is still DICOM), read as
    pydicom reads it when forced, or None when it is not one: every composite object
    carries SOPClassUID (0008,0016), DICOM PS3.3 C.12.1 (SOP Common module, type 1),
    which bytes that are no DICOM do not give."""
    import pydicom

    wanted = None if not tags else [*tags, "SOPClassUID"]
    try:
        if hasattr(source, "seek"):
            source.seek(start)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            dataset = pydicom.dcmread(source, stop_before_pixels=True, force=True,
                                      defer_size=_DEFER if defer else None,
                                      specific_tags=wanted)
        return dataset if dataset.get("SOPClassUID") else None
    except Exception:  # pydicom raises many types for bytes that are no DICOM
        return None


def _read_more(stream: Any, n: int, shown: str) -> bytes:
    try:
        return bytes(stream.read(n))
    except (OSError, EOFError, zipfile.BadZipFile, tarfile.TarError) as exc:
        raise fail(shown, f"cannot decompress the file ({type(exc).__name__}: {exc})") \
            from None


def _header(stream: Any, shown: str, tags: Sequence[str] | None) -> tuple[bytes, Any]:
    """The object's header bytes (up to its Pixel Data element) and their parse with
    ``tags``: read as a prefix growing from 256 KiB to at most MAX_HEADER_BYTES. A prefix
    is complete when the parse stops before its end (at the pixel data) or the object
    ends; a prefix that a Pixel Data tag value inside the header only seems to end is
    read on."""
    data = b""
    want = _FIRST_PREFIX
    while True:
        data += _read_more(stream, want - len(data), shown)
        ended = len(data) < want
        if ended or any(tag in data for tag in _PIXEL_TAGS):
            buffer = io.BytesIO(data)
            try:
                dataset = _parse(buffer, shown, tags, defer=False)
            except ReadError:
                if ended or want >= MAX_HEADER_BYTES:
                    raise
            else:
                if ended or buffer.tell() < len(data):
                    return data[: buffer.tell()], dataset
        if ended:  # pragma: no cover - a parse at the end either returns or raises
            raise fail(shown, "the header ends before it is complete")
        if want >= MAX_HEADER_BYTES:
            raise fail(shown, f"no pixel data within the first {MAX_HEADER_BYTES:,} bytes: the "
                       "header is too large to read", bytes=MAX_HEADER_BYTES)
        want = min(want * 4, MAX_HEADER_BYTES)


def read_object(obj: DicomObject, shown: str, tags: Sequence[str] | None = None) -> Any:
    """One object's header as a pydicom Dataset; ReadError for anything unusable."""
    if obj.member is None and not obj.gzipped:
        return _parse(obj.path, shown, tags, defer=True)
    if obj.member is None:
        try:
            with gzip.open(obj.path, "rb") as stream:
                return _header(stream, shown, tags)[1]
        except OSError as exc:
            raise fail(shown, f"cannot read the file ({exc.strerror or exc})") from None
    for _, data, _slim in _archive_members(obj.path, shown, only=obj.member):
        return _parse(io.BytesIO(data), shown, tags, defer=False)
    raise fail(shown, "the archive member is gone")


def _member_header(stream: Any, name: str, shown: str) -> tuple[bytes, Any] | None:
    """A member's header bytes and catalogue tags, or None when it is not DICOM (no
    marker and no DICOM name)."""
    if _is_gz(name):
        stream = gzip.GzipFile(fileobj=stream, mode="rb")
    named = name.lower().endswith(_DICOM_SUFFIXES + _GZ_DICOM_SUFFIXES)
    head = _read_more(stream, 132, shown)
    if not named and not _marker_ok(head):
        return None
    return _header(_Joined(head, stream), shown, CATALOGUE_TAGS)


class _Joined(io.RawIOBase):
    """The bytes already read, then the rest of the stream."""

    def __init__(self, head: bytes, rest: Any) -> None:
        super().__init__()
        self.head, self.rest = head, rest

    def readable(self) -> bool:
        return True

    def read(self, n: int = -1) -> bytes:
        out = self.head[:n] if n >= 0 else self.head
        self.head = self.head[len(out):]
        if n < 0:
            return out + bytes(self.rest.read())
        if len(out) < n:
            out += bytes(self.rest.read(n - len(out)))
        return out


def _entries(path: str) -> Iterator[tuple[str, bool, Callable[[], Any]]]:
    """(name, is a regular file, a function that opens it) of every member of a zip or
    tar archive, in archive order; a tar member must be opened before the next one is
    asked for (the archive is read as one stream). The opened value is a context
    manager giving a stream, or None for a member with no content."""
    if path.lower().endswith(".zip"):
        with zipfile.ZipFile(path) as packed:
            for info in packed.infolist():
                yield info.filename, not info.is_dir(), functools.partial(packed.open, info)
        return
    with tarfile.open(path, "r|*") as archive:
        for entry in archive:
            yield (entry.name, entry.isfile(),
                   functools.partial(_tar_member, archive, entry))


@contextlib.contextmanager
def _tar_member(archive: tarfile.TarFile, entry: tarfile.TarInfo) -> Iterator[Any]:
    extracted = archive.extractfile(entry)
    try:
        yield extracted
    finally:
        if extracted is not None:
            extracted.close()


def _archive_members(path: str, shown: str, only: str | None = None,
                     problems: list[ReadError] | None = None
                     ) -> Iterator[tuple[str, bytes, Any]]:
    """(member name, header bytes, catalogue tags) of the DICOM members of an archive, in
    archive order.
    Tar archives are read as one stream (no seeking back and forth in a compressed one).
    Reading stops when the first :data:`MAX_LEADING_OTHERS` files hold no DICOM. A member
    that cannot be read goes to ``problems`` when given (the others are still read), else
    raises."""
    seen = found = others = 0

    def counted(name: str, is_file: bool) -> bool:
        """Whether to read this member; raises past MAX_MEMBERS."""
        nonlocal seen, others
        seen += 1
        if seen > MAX_MEMBERS:
            raise fail(shown, f"more than {MAX_MEMBERS:,} members: refused")
        if only is not None:
            return is_file and name == only
        if not is_file:
            return False
        if _skipped(name):
            others += 1
            return False
        return True

    def given_up() -> bool:
        return only is None and not found and others >= MAX_LEADING_OTHERS

    def member(stream: Any, name: str) -> tuple[bytes, Any] | None:
        try:
            return _member_header(stream, name, f"{shown}/{name}")
        except ReadError as exc:
            if problems is None:
                raise
            problems.append(exc)
            return None

    try:
        for name, is_file, opened in _entries(path):
            if given_up():
                return
            if not counted(name, is_file):
                continue
            with opened() as stream:
                got = None if stream is None else member(stream, name)
            if stream is None:
                continue
            if got is None:
                others += 1
                continue
            found += 1
            yield name, got[0], got[1]
    except ReadError:
        raise
    except (OSError, EOFError, zipfile.BadZipFile, tarfile.TarError) as exc:
        raise fail(shown, f"cannot read the archive ({type(exc).__name__}: {exc})") from None


def is_dicom_path(path: str) -> bool:
    """A plain or gzip-compressed file that holds DICOM (marker or suffix)."""
    lower = path.lower()
    if lower.endswith(_DICOM_SUFFIXES + _GZ_DICOM_SUFFIXES):
        return True
    if _skipped(os.path.basename(path)) or is_archive_name(path):
        return False
    try:
        if _is_gz(path):
            with gzip.open(path, "rb") as fh:
                head = fh.read(132)
        else:
            with open(path, "rb") as fh:
                head = fh.read(132)
    except (OSError, EOFError):
        return False
    return _marker_ok(head)


# --------------------------------------------------------------------------- catalogue


@dataclass
class SeriesGroup:
    """The objects of one series (one SeriesInstanceUID), in natural name order.

    ``first`` is the first object's whole header; ``slim`` holds every object's
    :data:`CATALOGUE_TAGS`. ``folders`` are where its objects live;
    ``neighbours`` counts the other series found in those folders.
    """

    uid: str | None
    objects: list[DicomObject]
    slim: list[Any]
    first: Any
    folders: list[str] = field(default_factory=list)
    neighbours: int = 0
    #: a malformed SeriesInstanceUID, one line naming the first file that holds it
    uid_note: str | None = None

    @property
    def number(self) -> int | None:
        value = self.first.get("SeriesNumber")
        try:
            return int(value) if value is not None and value != "" else None
        except (TypeError, ValueError):
            return None


def _plain_entries(folder: str) -> list[str]:
    names = []
    with os.scandir(folder) as entries:
        for entry in entries:
            try:
                if entry.is_file() and not _skipped(entry.name):
                    names.append(entry.name)
            except OSError:
                continue
    names.sort(key=natural)
    return [os.path.join(folder, n) for n in names]


def _objects_of(path: str, shown_of: Any, problems: list[ReadError]
                ) -> Iterator[tuple[DicomObject, Any]]:
    """(object, slim header) for every DICOM object in a file or archive."""
    if is_archive_name(path):
        # one pass over the archive: every member's catalogue tags, and the header bytes
        # of only the first member (in name order) of each series, parsed whole at the end
        items: list[tuple[DicomObject, Any]] = []
        first: dict[str, tuple[list[Any], str, bytes]] = {}
        try:
            for name, data, slim in _archive_members(path, shown_of(path), problems=problems):
                items.append((DicomObject(path, name), slim))
                uid = series_uid(slim, name)[0] or ""
                if uid not in first or natural(name) < first[uid][0]:
                    first[uid] = (natural(name), name, data)
        except ReadError as exc:
            problems.append(exc)
        whole: dict[str, Any] = {}
        for _, name, data in first.values():
            try:
                whole[name] = _parse(io.BytesIO(data), f"{shown_of(path)}/{name}", None,
                                     defer=False)
            except ReadError as exc:
                problems.append(exc)
        items.sort(key=lambda item: natural(item[0].member or ""))
        for obj, slim in items:
            yield obj, whole.get(obj.member or "", slim)
        return
    if not is_dicom_path(path):
        return
    obj = DicomObject(path)
    try:
        # a compressed file is parsed whole from its header bytes: keep every tag
        yield obj, read_object(obj, shown_of(path), None if obj.gzipped else CATALOGUE_TAGS)
    except ReadError as exc:
        problems.append(exc)


@quiet
def catalogue(path: str, shown_of: Any, recursive: bool = False
              ) -> tuple[list[SeriesGroup], list[ReadError]]:
    """The series held by a file, an archive or a folder (and its subfolders when
    ``recursive``), grouped by SeriesInstanceUID; and the objects that could not be read."""
    problems: list[ReadError] = []
    files: list[str] = []
    if os.path.isdir(path):
        if recursive:
            for folder, dirs, _ in os.walk(path):
                dirs[:] = sorted((d for d in dirs if not d.startswith(".")), key=natural)
                try:
                    files.extend(_plain_entries(folder))
                except OSError:
                    continue
        else:
            files = _plain_entries(path)
    else:
        files = [path]
    groups: dict[str, SeriesGroup] = {}
    per_folder: dict[str, set[str]] = {}
    for file in files:
        for obj, slim in _objects_of(file, shown_of, problems):
            shown = shown_of(obj.path)
            uid, uid_note = series_uid(
                slim, f"{shown}/{obj.member}" if obj.member is not None else shown)
            key = uid if uid is not None else f"no uid in {obj.folder}"
            per_folder.setdefault(obj.folder, set()).add(key)
            group = groups.get(key)
            if group is None:
                groups[key] = SeriesGroup(uid, [obj], [slim], slim, [obj.folder],
                                          uid_note=uid_note)
            else:
                group.objects.append(obj)
                group.slim.append(slim)
                if obj.folder not in group.folders:
                    group.folders.append(obj.folder)
    out = list(groups.values())
    for key, group in groups.items():
        others = set().union(*(per_folder[f] for f in group.folders)) - {key}
        group.neighbours = len(others)
    return out, problems


@quiet
def full_header(group: SeriesGroup, shown: str) -> Any:
    """The whole header of the group's first object (the catalogue keeps only some tags
    of plain files)."""
    obj = group.objects[0]
    if obj.member is None and not obj.gzipped:
        group.first = read_object(obj, shown)
    return group.first
