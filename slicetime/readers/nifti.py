"""Header-only NIfTI-1 / NIfTI-2 reader.

:func:`read_header` reads the header bytes of a ``.nii`` or ``.nii.gz`` file
(never the image data), checks that the dimensions it claims are possible for
the file on disk, and returns a :class:`~slicetime.model.HeaderInfo`.

Both NIfTI versions and both byte orders are handled; the version and byte
order come from ``sizeof_hdr`` (348 or 540, read little- then big-endian).
gzip content is recognised by its magic bytes whatever the file is called, and
only the first 540 decompressed bytes are produced, with a streaming
decompressor (``isal`` when importable, else ``zlib``).

Checks, in order, each before any allocation that depends on the header:

1. the file exists and is a regular file (see :mod:`.errors`);
2. it is gzip when named ``.gz`` and the header decodes: ``sizeof_hdr``,
   magic, a known ``datatype`` (``file/not-nifti``); the header is complete
   (``file/truncated``);
3. ``dim[0]`` is 1..7 and ``dim[1..dim[0]]`` are positive; the claimed image
   size is below 1 PiB, and for gzip content at most 1032 times the
   compressed file size, deflate's maximum ratio (``file/bad-dimensions``);
4. a single-file image's ``vox_offset`` lies at or after the end of the header
   and its 4 extension-flag bytes (352 for NIfTI-1, 544 for NIfTI-2); ``0``
   included, where readers disagree on where the data start
   (``file/bad-data-offset``);
5. an uncompressed file holds ``vox_offset + data_bytes`` bytes; for gzip
   content the ISIZE trailer (uncompressed size mod 2**32) matches
   ``vox_offset + data_bytes`` mod 2**32 (``file/truncated``);
6. when the extension flag is set, the chain of extensions between the header
   and ``vox_offset`` is whole: every ``esize`` a positive multiple of 16 (so at
   least 16, holding its own ``esize`` and ``ecode``), no extension running past
   ``vox_offset`` or the end of the file (``file/bad-extensions``). As the
   reference library reads them, the chain is followed while 16 or more bytes
   are left before ``vox_offset``.

The same checks of the data offset and the extensions run in
:mod:`.volumes` before correction reads the data (:func:`data_offset_problem`,
:func:`extension_problem`), so the audit and ``correct`` agree.

gzip trailer policy: the ISIZE trailer describes only the *last* member of a
multi-member gzip file, and garbage after the last member hides it too. So a
trailer mismatch is not reported at once: the stream is then decompressed
once in bounded chunks, counting bytes and discarding them, through every
member, stopping as soon as the claimed size is reached (that size is already
known to be within the 1032:1 bound). Only a stream that really ends short, or
is corrupt, is reported as ``file/truncated``. A matching trailer costs
nothing more. Pass ``verify_stream=False`` to report a mismatch without the
count (faster, but multi-member files are then flagged).
"""

from __future__ import annotations

import math
import os
import struct
import zlib
from collections.abc import Callable
from pathlib import Path
from typing import Any, BinaryIO, Literal, NamedTuple, cast

from slicetime.model import Finding, HeaderInfo, assembled
from slicetime.numbers import amount, size_words

from .errors import (
    ReadError,
    check_regular_file,
    display_name,
    open_regular,
    os_error,
    read_up_to,
)

try:  # pragma: no cover - depends on the environment
    from isal import isal_zlib as _fast_zlib

    _DECOMPRESS_ERRORS: tuple[type[BaseException], ...] = (
        zlib.error, cast("type[BaseException]", _fast_zlib.error))  # its stub types an instance

    def _new_decompressor() -> Any:
        return _fast_zlib.decompressobj(wbits=31)

except ImportError:  # pragma: no cover
    _DECOMPRESS_ERRORS = (zlib.error,)

    def _new_decompressor() -> Any:
        return zlib.decompressobj(wbits=31)


__all__ = [
    "DATATYPE_BITS",
    "HEADER_LAYOUT",
    "MAX_DEFLATE_RATIO",
    "MAX_IMAGE_BYTES",
    "data_offset_problem",
    "extension_problem",
    "read_header",
]

GZIP_MAGIC = b"\x1f\x8b"
NIFTI1_SIZE = 348
NIFTI2_SIZE = 540
#: deflate cannot expand data by more than about 1032:1 (RFC 1951 block limits).
MAX_DEFLATE_RATIO = 1032
#: No real image holds a pebibyte; anything above it is a corrupt header.
MAX_IMAGE_BYTES = 1 << 50
_READ_CHUNK = 1 << 16
#: the bytes read first: the larger header (NIfTI-2) and its 4 extension-flag bytes
_FIRST_READ = NIFTI2_SIZE + 4
_COUNT_CHUNK = 1 << 20

#: Bits per voxel of each NIfTI datatype code (nifti1.h, from memory).
DATATYPE_BITS: dict[int, int] = {
    1: 1,  # binary
    2: 8,  # uint8
    4: 16,  # int16
    8: 32,  # int32
    16: 32,  # float32
    32: 64,  # complex64
    64: 64,  # float64
    128: 24,  # rgb24
    256: 8,  # int8
    512: 16,  # uint16
    768: 32,  # uint32
    1024: 64,  # int64
    1280: 64,  # uint64
    1536: 128,  # float128
    1792: 128,  # complex128
    2048: 256,  # complex256
    2304: 32,  # rgba32
}

#: (offset, struct format) of every header field slicetime reads or writes, per NIfTI
#: version (nifti1.h / nifti2.h; checked against nibabel's header dtypes in the tests).
#: The audit reads ``READ_FIELDS`` of it; correction patches ``readers.volumes``' subset.
HEADER_LAYOUT: dict[int, dict[str, tuple[int, str]]] = {
    1: {
        "dim_info": (39, "B"),
        "dim": (40, "8h"),
        "datatype": (70, "h"),
        "bitpix": (72, "h"),
        "slice_start": (74, "h"),
        "pixdim": (76, "8f"),
        "vox_offset": (108, "f"),
        "scl_slope": (112, "f"),
        "scl_inter": (116, "f"),
        "slice_end": (120, "h"),
        "slice_code": (122, "B"),
        "xyzt_units": (123, "B"),
        "cal_max": (124, "f"),
        "cal_min": (128, "f"),
        "slice_duration": (132, "f"),
        "magic": (344, "4s"),
    },
    2: {
        "magic": (4, "8s"),
        "datatype": (12, "h"),
        "bitpix": (14, "h"),
        "dim": (16, "8q"),
        "pixdim": (104, "8d"),
        "vox_offset": (168, "q"),
        "scl_slope": (176, "d"),
        "scl_inter": (184, "d"),
        "cal_max": (192, "d"),
        "cal_min": (200, "d"),
        "slice_duration": (208, "d"),
        "slice_start": (224, "q"),
        "slice_end": (232, "q"),
        "slice_code": (496, "i"),
        "xyzt_units": (500, "i"),
        "dim_info": (524, "B"),
    },
}
#: the fields the header-only reader decodes
READ_FIELDS = ("magic", "dim_info", "dim", "datatype", "bitpix", "slice_start", "pixdim",
               "vox_offset", "scl_slope", "scl_inter", "slice_end", "slice_code",
               "xyzt_units", "slice_duration")
_FIELDS_1 = {name: HEADER_LAYOUT[1][name] for name in READ_FIELDS}
_FIELDS_2 = {name: HEADER_LAYOUT[2][name] for name in READ_FIELDS}


def _layout_struct(
    fields: dict[str, tuple[int, str]], order: str
) -> tuple[struct.Struct, tuple[tuple[str, int, int], ...]]:
    """One struct for all ``fields`` (padding between them) and where each value lands:
    (name, index of its first value, number of values)."""
    fmt, at, index = order, 0, 0
    places: list[tuple[str, int, int]] = []
    for name, (offset, code) in sorted(fields.items(), key=lambda item: item[1][0]):
        fmt += f"{offset - at}x{code}" if offset > at else code
        count = 1 if code.endswith("s") else int(code[:-1] or 1)
        places.append((name, index, count))
        at = offset + struct.calcsize(order + code)
        index += count
    return struct.Struct(fmt), tuple(places)


_LAYOUTS = {
    (version, order): _layout_struct(fields, order)
    for version, fields in ((1, _FIELDS_1), (2, _FIELDS_2))
    for order in ("<", ">")
}
_MAGIC_1 = {b"n+1\x00": True, b"ni1\x00": False}  # value: image data in the same file
_MAGIC_2 = {b"n+2\x00\r\n\x1a\n": True, b"ni2\x00\r\n\x1a\n": False}
_TIME_UNITS: dict[int, tuple[Literal["s", "ms", "us", "unknown"], float]] = {
    8: ("s", 1.0),
    16: ("ms", 1e-3),
    24: ("us", 1e-6),
}


class _GzipReader:
    """Bounded streaming decompression of a gzip file, across members."""

    def __init__(self, fh: BinaryIO, shown: str, first: bytes, left: int | None = None) -> None:
        self._fh = fh
        self._shown = shown
        self._pending = first
        #: compressed bytes still to be read from ``fh`` (its size on disk when opened), so
        #: a file that keeps growing cannot keep the reader going
        self._left = left
        self._d = _new_decompressor()
        self.ended_cleanly = False  # the last member seen had its end marker

    def _input(self) -> bytes:
        if self._pending:
            data, self._pending = self._pending, b""
            return data
        return self._read_input(_READ_CHUNK)

    def _read_input(self, size: int) -> bytes:
        if self._left is not None:
            size = min(size, self._left)
            if size <= 0:
                return b""
        data = self._fh.read(size) or b""
        if self._left is not None:
            self._left -= len(data)
        return data

    def read(self, limit: int, sink: Callable[[bytes], None]) -> int:
        """Decompress up to ``limit`` bytes into ``sink``; return how many were produced."""
        produced = 0
        while produced < limit:
            tail = self._d.unconsumed_tail
            data = tail if tail else self._input()
            try:
                out = self._d.decompress(data, min(limit - produced, _COUNT_CHUNK))
            except _DECOMPRESS_ERRORS as exc:
                raise ReadError(
                    "file/not-nifti",
                    self._shown,
                    None,
                    f"{self._shown}: the gzip-compressed data is corrupt ({exc})",
                ) from None
            if out:
                sink(out)
                produced += len(out)
            if self._d.eof:
                rest = self._d.unused_data or self._read_input(_READ_CHUNK)
                if rest[:2] != GZIP_MAGIC:
                    self.ended_cleanly = True  # end of the last member (trailing bytes ignored)
                    break
                self._d = _new_decompressor()
                self._pending = rest
            elif not data and not out:
                self.ended_cleanly = False  # input exhausted inside a member
                break
        return produced


def _decode(buf: bytes, shown: str) -> tuple[int, Literal["<", ">"], dict[str, Any]]:
    """Version, byte order and raw fields of a header held in ``buf``."""
    if len(buf) == 0:
        raise ReadError("file/not-nifti", shown, None, f"{shown}: the file is empty")
    if len(buf) < 4:
        raise ReadError(
            "file/not-nifti",
            shown,
            "sizeof_hdr",
            f"{shown}: only {size_words(len(buf))}, too short for a NIfTI header",
        )
    order: Literal["<", ">"] = "<"
    size = struct.unpack_from("<i", buf)[0]
    if size not in (NIFTI1_SIZE, NIFTI2_SIZE):
        size = struct.unpack_from(">i", buf)[0]
        order = ">"
    if size not in (NIFTI1_SIZE, NIFTI2_SIZE):
        raise ReadError(
            "file/not-nifti",
            shown,
            "sizeof_hdr",
            f"{shown}: not a NIfTI file (sizeof_hdr is neither 348 nor 540 in either byte order)",
            evidence={"first_bytes": buf[:8].hex()},
        )
    version = 1 if size == NIFTI1_SIZE else 2
    if len(buf) < size:
        raise ReadError(
            "file/truncated",
            shown,
            None,
            f"{shown}: the NIfTI-{version} header is cut short ({len(buf)} of {size} bytes)",
            evidence={"header_bytes": len(buf), "expected": size},
        )
    layout, places = _LAYOUTS[version, order]
    values = layout.unpack_from(buf)
    raw: dict[str, Any] = {
        name: values[index] if count == 1 else values[index : index + count]
        for name, index, count in places
    }
    magics = _MAGIC_1 if version == 1 else _MAGIC_2
    if raw["magic"] not in magics:
        if version == 2 and raw["magic"][:4] in (b"n+2\x00", b"ni2\x00"):
            message = f"{shown}: NIfTI-2 magic is damaged (line-ending conversion in transfer?)"
        else:
            message = f"{shown}: not a NIfTI file (magic {raw['magic']!r} is not a NIfTI magic)"
        raise ReadError(
            "file/not-nifti", shown, "magic", message, evidence={"magic": raw["magic"].hex()}
        )
    raw["single_file"] = magics[raw["magic"]]
    return version, order, raw


def _check_dimensions(raw: dict[str, Any], shown: str) -> tuple[tuple[int, ...], int, int]:
    """Shape, bits per voxel and claimed data bytes; raise on impossible dimensions."""
    dim = raw["dim"]
    ndim = dim[0]
    if not 1 <= ndim <= 7:
        raise ReadError(
            "file/bad-dimensions",
            shown,
            "dim",
            f"{shown}: dim[0] is {ndim}; NIfTI allows 1 to 7 dimensions",
            evidence={"dim": list(dim)},
        )
    shape = tuple(map(int, dim[1 : ndim + 1]))
    if any(d <= 0 for d in shape):
        raise ReadError(
            "file/bad-dimensions",
            shown,
            "dim",
            f"{shown}: dimension sizes must be positive, header has {list(shape)}",
            evidence={"dim": list(dim)},
        )
    datatype = int(raw["datatype"])
    bits = DATATYPE_BITS.get(datatype)
    if bits is None:
        raise ReadError(
            "file/not-nifti",
            shown,
            "datatype",
            f"{shown}: unknown NIfTI datatype code {datatype}",
            evidence={"datatype": datatype, "bitpix": int(raw["bitpix"])},
        )
    data_bytes = (math.prod(shape) * bits + 7) // 8
    if data_bytes > MAX_IMAGE_BYTES:
        raise ReadError(
            "file/bad-dimensions",
            shown,
            "dim",
            f"{shown}: header claims {amount(data_bytes)} of image data "
            f"(shape {list(shape)}), which no real image holds",
            evidence={"shape": list(shape), "data_bytes": data_bytes},
        )
    return shape, bits, data_bytes


def _vox_offset(raw: dict[str, Any], shown: str) -> int:
    value = raw["vox_offset"]
    if (isinstance(value, float) and not math.isfinite(value)) or value < 0:
        raise ReadError(
            "file/not-nifti",
            shown,
            "vox_offset",
            f"{shown}: vox_offset {value!r} is not a valid byte offset",
        )
    return int(value)


def _read_isize(fh: BinaryIO, file_size: int) -> int | None:
    if file_size < 18:  # smallest gzip member: 10-byte header, 8-byte trailer
        return None
    fh.seek(file_size - 4)
    return int(struct.unpack("<I", read_up_to(fh, 4))[0])


def _paired_image(path: Path) -> Path | None:
    """The ``.img`` file holding the data of a two-file (``ni1``/``ni2``) header."""
    name = path.name
    for hdr_ext, img_ext in ((".hdr.gz", ".img.gz"), (".hdr", ".img"), (".nii", ".img")):
        if name.lower().endswith(hdr_ext):
            return path.with_name(name[: -len(hdr_ext)] + img_ext)
    return None


def read_header(
    path: str | os.PathLike[str], display: str | None = None, *, verify_stream: bool = True,
    root: str | os.PathLike[str] | None = None, plain: bool = False,
) -> tuple[HeaderInfo, list[Finding]]:
    """Read and check the header of the NIfTI file at ``path``.

    ``display`` is how messages name the file (default: ``str(path)``); with
    ``root`` (its dataset root) a link out of the dataset is not read
    (``file/link-leaves-dataset``).
    Returns the header and a list of non-fatal findings (currently always
    empty: every header problem this reader detects makes the file unusable).
    Raises :class:`ReadError` (``file/*`` codes, see the module docstring)
    for anything that makes the file unusable, in bounded time and memory.
    """
    file = os.fspath(path)
    shown = display if display is not None else display_name(Path(file), None)
    try:
        # unbuffered: a header read is a few small reads, a buffer would only be filled
        fh, st = open_regular(file, shown, what="NIfTI file", root=root, plain=plain)
        with fh:
            if st.st_size == 0:
                # not read: an empty file, or a pseudo-file (/proc) whose read may not end
                raise ReadError(
                    "file/not-nifti", shown, None, f"{shown}: the file is empty (0 bytes on disk)"
                )
            return _read_open(path, fh, st.st_size, shown, verify_stream)
    except OSError as exc:
        raise os_error(exc, shown, what="NIfTI file") from None


def _read_open(
    path: str | os.PathLike[str], fh: BinaryIO, file_size: int, shown: str, verify_stream: bool
) -> tuple[HeaderInfo, list[Finding]]:
    findings: list[Finding] = []
    first = read_up_to(fh, _FIRST_READ, file_size)
    compressed = first[:2] == GZIP_MAGIC
    if compressed:
        parts: list[bytes] = []
        reader = _GzipReader(fh, shown, first, file_size - len(first))
        reader.read(_FIRST_READ, parts.append)
        buf = b"".join(parts)
        if len(buf) < NIFTI1_SIZE and not reader.ended_cleanly:
            raise ReadError(
                "file/truncated",
                shown,
                None,
                f"{shown}: the gzip stream ends after {size_words(len(buf))}, inside the "
                "NIfTI header",
                evidence={"decompressed_size": len(buf), "file_size": file_size},
            )
        if not buf:
            raise ReadError("file/not-nifti", shown, None, f"{shown}: the gzip content is empty")
    else:
        if Path(path).name.lower().endswith(".gz") and first:
            raise ReadError(
                "file/not-nifti",
                shown,
                None,
                f"{shown}: named .gz but the content is not gzip-compressed",
                evidence={"first_bytes": first[:8].hex()},
            )
        buf = first
    version, order, single_file, shape, data_bytes, vox_offset, fields = _decoded(buf, shown)
    if single_file:
        problem = data_offset_problem(version, vox_offset, shown)
        if problem is not None:
            raise problem
        needed = vox_offset + data_bytes
        if compressed:
            limit = file_size * MAX_DEFLATE_RATIO
            if needed > limit:
                raise ReadError(
                    "file/bad-dimensions",
                    shown,
                    "dim",
                    f"{shown}: header claims {amount(needed)} but a "
                    f"{amount(file_size)} gzip file can hold at most {amount(limit)}",
                    evidence={
                        "shape": list(shape),
                        "claimed_bytes": needed,
                        "file_size": file_size,
                        "max_ratio": MAX_DEFLATE_RATIO,
                    },
                )
            isize = _read_isize(fh, file_size)
            if isize != needed % (1 << 32):
                _check_stream_length(fh, first, shown, needed, isize, verify_stream, file_size)
        elif file_size < needed:
            raise ReadError(
                "file/truncated",
                shown,
                None,
                f"{shown}: file has {size_words(file_size)} but the header implies "
                f"{size_words(needed)} (vox_offset {vox_offset} + "
                f"{size_words(data_bytes)} of data)",
                evidence={"file_size": file_size, "expected_size": needed},
            )
        if _extension_flag(buf, version):
            problem = extension_problem(
                _stream_bytes(fh, first, buf, file_size, shown) if compressed
                else _file_bytes(fh, buf),
                version=version, order=order, vox_offset=vox_offset, shown=shown,
            )
            if problem is not None:
                raise problem
    else:
        _check_paired_image(Path(path), shown, vox_offset + data_bytes)

    # HeaderInfo(...) without its per-field setattr
    header = assembled(HeaderInfo, {**fields, "compressed": compressed, "file_size": file_size,
                                    "data_bytes": data_bytes})
    return header, findings


class _Decoded(NamedTuple):
    version: int
    order: Literal["<", ">"]
    single_file: bool
    shape: tuple[int, ...]
    data_bytes: int
    vox_offset: int
    #: the HeaderInfo fields the header's bytes give, in order (all but the last three:
    #: compressed, file_size, data_bytes)
    fields: dict[str, Any]


#: header bytes -> what they decode to (see _decoded); emptied when full
_DECODED: dict[bytes, _Decoded] = {}
_DECODED_KEPT = 256
#: sizeof_hdr 348 in either byte order: a NIfTI-1 header, read to its extension flag
_NIFTI1_SIZES = (struct.pack("<i", NIFTI1_SIZE), struct.pack(">i", NIFTI1_SIZE))


def _decoded(buf: bytes, shown: str) -> _Decoded:
    """The header held in ``buf`` decoded and checked (``_decode``, ``_check_dimensions``,
    ``_vox_offset``; they raise for a bad header). Remembered by the bytes these read
    (the header and its extension flag: the runs of a study have headers alike byte for
    byte); a header that raised is decoded again each time, so its message names its
    file."""
    key = buf[: NIFTI1_SIZE + 4] if buf[:4] in _NIFTI1_SIZES else buf[: NIFTI2_SIZE + 4]
    found = _DECODED.get(key)
    if found is None:
        found = _decode_fields(buf, shown)
        if len(_DECODED) >= _DECODED_KEPT:
            _DECODED.clear()
        _DECODED[key] = found
    return found


def _decode_fields(buf: bytes, shown: str) -> _Decoded:
    version, order, raw = _decode(buf, shown)
    shape, _bits, data_bytes = _check_dimensions(raw, shown)
    vox_offset = _vox_offset(raw, shown)
    unit_bits = int(raw["xyzt_units"]) & 0x38
    time_unit, factor = _TIME_UNITS.get(unit_bits) or ("unknown", 1.0)
    pixdim_all = raw["pixdim"]
    raw_tr = float(pixdim_all[4])
    tr = raw_tr * factor if len(shape) >= 4 and math.isfinite(raw_tr) and raw_tr != 0 else None
    raw_sd = float(raw["slice_duration"])
    sd = raw_sd * factor if math.isfinite(raw_sd) and raw_sd != 0 else None
    info = int(raw["dim_info"])
    freq, phase, slc = info & 3, (info >> 2) & 3, (info >> 4) & 3
    return _Decoded(version, order, bool(raw["single_file"]), shape, data_bytes, vox_offset, {
        "version": version,
        "shape": shape,
        "pixdim": tuple(float(v) for v in pixdim_all[1 : len(shape) + 1]),
        "datatype": int(raw["datatype"]),
        "bitpix": int(raw["bitpix"]),
        "vox_offset": vox_offset,
        "byte_order": order,
        "time_unit": time_unit,
        "raw_pixdim4": raw_tr,
        "repetition_time": tr,
        "freq_dim": freq - 1 if freq else None,
        "phase_dim": phase - 1 if phase else None,
        "slice_dim": slc - 1 if slc else None,
        "slice_code": int(raw["slice_code"]),
        "slice_start": int(raw["slice_start"]),
        "slice_end": int(raw["slice_end"]),
        "raw_slice_duration": raw_sd,
        "slice_duration": sd,
        "scl_slope": float(raw["scl_slope"]),
        "scl_inter": float(raw["scl_inter"]),
    })


def _header_size(version: int) -> int:
    return NIFTI1_SIZE if version == 1 else NIFTI2_SIZE


def data_offset_problem(version: int, vox_offset: int, shown: str) -> ReadError | None:
    """The error for a single-file image whose ``vox_offset`` lies inside the header, else None.

    The data of a ``.nii`` file start after the header and the 4 extension-flag bytes
    (NIfTI-1: 348 + 4 = 352; NIfTI-2: 540 + 4 = 544; nifti1.h and nifti2.h). A smaller
    value, 0 included, makes readers disagree: some refuse the file, some read the data
    from byte 0, some from the end of the header.
    """
    minimum = _header_size(version) + 4
    if vox_offset >= minimum:
        return None
    if vox_offset == 0:
        detail = (
            "vox_offset is 0, but in a single-file image the data start after the header "
            f"and the 4 extension-flag bytes (byte {minimum} or later); readers disagree on "
            f"where the data start (byte 0 or byte {minimum})"
        )
    else:
        detail = (
            f"vox_offset {vox_offset} points inside the NIfTI-{version} header; the data of a "
            f"single-file image start at byte {minimum} or later"
        )
    return ReadError(
        "file/bad-data-offset",
        shown,
        "vox_offset",
        f"{shown}: {detail}",
        evidence={"vox_offset": vox_offset, "minimum": minimum, "version": version},
        hint="rewrite the file with a reference library, which sets vox_offset after the header",
    )


def _extension_flag(buf: bytes, version: int) -> bool:
    """True when the first byte of the 4 extension-flag bytes after the header is set."""
    at = _header_size(version)
    return len(buf) > at and buf[at] != 0


ByteSource = Callable[[int, int], bytes]


def extension_problem(
    read: ByteSource, *, version: int, order: str, vox_offset: int, shown: str
) -> ReadError | None:
    """The error for a broken chain of header extensions, else None.

    ``read(offset, count)`` returns up to ``count`` bytes of the (decompressed) file at
    ``offset``; offsets only grow. With the extension flag set (the byte after the
    header), extensions follow it as long as 16 or more bytes are left before
    ``vox_offset`` (as the reference library reads them); each starts with ``esize``
    and ``ecode`` (int32 in the header's byte order) and ``esize`` counts the whole
    extension and must be a positive multiple of 16 (nifti1.h).
    """
    start = _header_size(version)
    flag = read(start, 4)
    if len(flag) < 4 or flag[0] == 0:
        return None
    pos = start + 4
    number = 0
    while vox_offset - pos >= 16:
        number += 1
        head = read(pos, 8)
        where = f"extension {number} (at byte {pos})"
        evidence: dict[str, Any] = {"extension": number, "offset": pos, "vox_offset": vox_offset}
        detail: str | None = None
        if len(head) < 8:
            detail = f"{where} is cut off by the end of the file"
        else:
            esize, ecode = struct.unpack(order + "ii", head)
            evidence.update(esize=esize, ecode=ecode)
            if esize < 8:
                detail = (
                    f"{where} has esize {esize}, less than its own 8 bytes of esize and ecode"
                )
            elif esize % 16:
                detail = f"{where} has esize {esize}, not a multiple of 16 as NIfTI requires"
            elif esize > vox_offset - pos:
                detail = (
                    f"{where} has esize {esize} and runs to byte {pos + esize}, past "
                    f"vox_offset {vox_offset} where the image data start"
                )
            else:
                pos += esize
                continue
        return ReadError(
            "file/bad-extensions",
            shown,
            "extensions",
            f"{shown}: the header extension chain is broken: {detail}",
            evidence=evidence,
            hint="rewrite the file with a reference library, or clear the extension flag "
            "(the byte after the header) when the extensions are not needed",
        )
    return None


def _file_bytes(fh: BinaryIO, known: bytes) -> ByteSource:
    """Reads at any offset of an uncompressed file whose first bytes are ``known``."""
    fd = fh.fileno()

    def read(offset: int, count: int) -> bytes:
        if offset + count <= len(known):
            return known[offset : offset + count]
        return os.pread(fd, count, offset)

    return read


def _stream_bytes(
    fh: BinaryIO, first: bytes, known: bytes, file_size: int, shown: str
) -> ByteSource:
    """Reads at growing offsets of a gzip stream: ``known`` holds its first bytes; beyond
    them the stream is decompressed again from the start (only when needed), keeping
    only the bytes asked for."""
    state: dict[str, Any] = {"reader": None, "at": 0}

    def read(offset: int, count: int) -> bytes:
        if offset + count <= len(known):
            return known[offset : offset + count]
        reader = state["reader"]
        if reader is None:
            fh.seek(len(first))
            reader = state["reader"] = _GzipReader(fh, shown, first, file_size - len(first))
        if offset > state["at"]:
            skipped = reader.read(offset - state["at"], lambda _chunk: None)
            state["at"] += skipped
            if state["at"] < offset:
                return b""
        parts: list[bytes] = []
        got = reader.read(count, parts.append)
        state["at"] += got
        return b"".join(parts)

    return read


def _check_stream_length(
    fh: BinaryIO,
    first: bytes,
    shown: str,
    needed: int,
    isize: int | None,
    verify: bool,
    file_size: int,
) -> None:
    """Called when the ISIZE trailer disagrees: count the real stream length (bounded)."""
    evidence: dict[str, Any] = {"expected_size": needed, "gzip_isize": isize}
    if verify:
        # the stream is counted: when it ends early its last 4 bytes are image data, not a
        # trailer, so the "trailer" value means nothing and is not reported
        evidence = {"expected_size": needed}
        fh.seek(len(first))
        counter = _GzipReader(fh, shown, first, file_size - len(first))
        try:
            total = counter.read(needed, lambda _chunk: None)
        except ReadError as err:
            raise ReadError(
                "file/truncated",
                shown,
                None,
                f"{shown}: the gzip stream is damaged before the image data ends",
                evidence=evidence,
            ) from err
        if total >= needed:
            return  # multi-member gzip or trailing bytes: the data is all there
        evidence["decompressed_size"] = total
        raise ReadError(
            "file/truncated",
            shown,
            None,
            f"{shown}: the gzip stream holds {size_words(total)} but the header implies "
            f"{size_words(needed)}",
            evidence=evidence,
        )
    raise ReadError(
        "file/truncated",
        shown,
        None,
        f"{shown}: the gzip trailer gives {size_words(isize or 0)} (mod 2**32) but the header "
        f"implies {size_words(needed)}",
        evidence=evidence,
    )


def _check_paired_image(p: Path, shown: str, needed: int) -> None:
    img = _paired_image(p)
    img_shown = str(Path(shown).with_name(img.name)) if img is not None else shown
    if img is None:
        raise ReadError(
            "file/missing",
            shown,
            None,
            f"{shown}: header says the image data is in a separate file, none can be named",
        )
    st = check_regular_file(img, img_shown, what="image data file")
    if not img.name.lower().endswith(".gz") and st.st_size < needed:
        raise ReadError(
            "file/truncated",
            img_shown,
            None,
            f"{img_shown}: file has {size_words(st.st_size)} but the header {shown} implies "
            f"{size_words(needed)}",
            evidence={"file_size": st.st_size, "expected_size": needed},
        )
