"""Image data I/O for correction: stream volumes in, stream volumes out.

Audits read header bytes only (:mod:`.nifti`); correction needs the data. This
module reads a single-file NIfTI-1/NIfTI-2 image (``.nii`` or ``.nii.gz``) a
batch of volumes at a time, never holding the file's whole content, and writes
an image with the same header layout (header, extensions and padding copied
byte for byte, a few fields patched) from batches of volumes.

* gzip is decompressed and compressed with ``isal`` in a helper thread when it
  is importable (several times faster than ``zlib``), else with ``gzip``.
* The input file's bytes (compressed or plain) are hashed (SHA-256) in a thread
  of their own with positional reads of the same descriptor into one reused
  buffer, beside the decoder (the file is then in the page cache): the checksum
  no longer slows the decoder's thread. An uncompressed output is written and
  hashed by two helper threads while the next batch is prepared; a compressed
  one is hashed in the encoder's writer thread.
* Sizes were checked by :func:`.nifti.read_header` before anything here is
  allocated; a stream that still ends early or is corrupt raises ``ReadError``
  (``file/truncated`` / ``file/not-nifti``) naming the file.
* The input is opened as the audit opens it (:func:`.errors.open_regular`: a
  regular file only, never blocking), reads stop at its size when opened (a
  growing file cannot keep a read going), and the data offset and the header
  extensions pass the audit's own checks (:func:`.nifti.data_offset_problem`,
  :func:`.nifti.extension_problem`) before a voxel is read, so a header the
  audit refuses is refused here too, whatever ``--force`` says.
"""

from __future__ import annotations

import contextlib
import errno
import gzip
import hashlib
import io
import math
import os
import struct
import threading
import zlib
from collections.abc import Iterator
from pathlib import Path
from types import TracebackType
from typing import Any, BinaryIO, Protocol, cast

import numpy as np

from slicetime.model import HeaderInfo
from slicetime.numbers import plain

from .errors import ReadError, open_regular, os_error
from .nifti import HEADER_LAYOUT, data_offset_problem, extension_problem
from .scratch import FLOAT32_MAX, float32_range
from .signals import signals_held

_threaded_gzip: Any
_GZIP_ERRORS: tuple[type[BaseException], ...] = (zlib.error, gzip.BadGzipFile, EOFError)
try:  # pragma: no cover - depends on the environment
    from isal import igzip_threaded as _isal_threaded
    from isal import isal_zlib as _isal_zlib

    _threaded_gzip = _isal_threaded
    _GZIP_ERRORS += (cast("type[BaseException]", _isal_zlib.error),)
except ImportError:  # pragma: no cover
    _threaded_gzip = None

#: NIfTI datatype code -> numpy type, for the types correction accepts
DATA_TYPES: dict[int, np.dtype[Any]] = {
    2: np.dtype(np.uint8),
    4: np.dtype(np.int16),
    8: np.dtype(np.int32),
    16: np.dtype(np.float32),
    64: np.dtype(np.float64),
    256: np.dtype(np.int8),
    512: np.dtype(np.uint16),
    768: np.dtype(np.uint32),
    1024: np.dtype(np.int64),
    1280: np.dtype(np.uint64),
}
FLOAT32_CODE = 16
_HASH_CHUNK = 1 << 20

# (offset, format) of the header fields a corrected output changes; nifti1.h / nifti2.h
#: the header fields a corrected output's header gets new values for
_PATCHED = ("datatype", "bitpix", "slice_start", "scl_slope", "scl_inter", "slice_end",
            "slice_code", "cal_max", "cal_min", "slice_duration")
_PATCH_1 = {name: HEADER_LAYOUT[1][name] for name in _PATCHED}
_PATCH_2 = {name: HEADER_LAYOUT[2][name] for name in _PATCHED}


def data_type(header: HeaderInfo, shown: str) -> np.dtype[Any]:
    """The numpy type of the stored voxels (with the header's byte order)."""
    try:
        base = DATA_TYPES[header.datatype]
    except KeyError:
        raise ReadError(
            "file/unsupported",
            shown,
            "datatype",
            f"{shown}: NIfTI datatype {header.datatype} cannot be corrected "
            "(only real integer and float voxels can)",
        ) from None
    return base.newbyteorder(header.byte_order)


def scaling(header: HeaderInfo) -> tuple[float, float] | None:
    """``(slope, inter)`` to apply, or None when the header asks for no scaling
    (``scl_slope`` 0 or not finite: NIfTI-1, nifti1.h). A valid slope with a
    non-finite intercept is kept as it is: :func:`scaling_problem` refuses it."""
    slope, inter = header.scl_slope, header.scl_inter
    if not math.isfinite(slope) or slope == 0.0:
        return None
    if slope == 1.0 and inter == 0.0:
        return None
    return slope, inter




def scaling_problem(header: HeaderInfo) -> str | None:
    """Why the header's scaling cannot give finite float32 values, or None.

    ``value = scl_slope * stored + scl_inter`` (nifti1.h). Refused: a valid slope
    with a non-finite intercept (nibabel refuses such a header too) and a slope or
    intercept beyond the float32 range. Whether the stored values scale beyond
    it depends on the data: correction checks each batch as it is read.
    """
    scale = scaling(header)
    if scale is None:
        return None
    slope, inter = scale
    if not math.isfinite(inter):
        return (f"scl_inter is {inter} while scl_slope is {plain(slope)}; the scaled values "
                "are undefined")
    if abs(slope) > FLOAT32_MAX or abs(inter) > FLOAT32_MAX:
        return (f"scl_slope {plain(slope)} / scl_inter {plain(inter)} lie beyond the float32 range "
                f"(about {float32_range()})")
    return None


class _RawFile(Protocol):
    def read(self, size: int = -1, /) -> bytes | None: ...
    def readinto(self, buffer: Any, /) -> int | None: ...
    @property
    def closed(self) -> bool: ...


class _LimitedReader:
    """A binary file wrapper that reads at most ``limit`` bytes (the size of the file
    when it was opened), so a growing file cannot keep a read going."""

    def __init__(self, fh: _RawFile, limit: int | None = None) -> None:
        self._fh = fh
        self._left = limit

    def _allowed(self, size: int) -> int:
        if self._left is None:
            return size
        return self._left if size < 0 else min(size, self._left)

    def read(self, size: int = -1) -> bytes:
        size = self._allowed(size)
        if size == 0:
            return b""
        data = self._fh.read(size) or b""
        if self._left is not None:
            self._left -= len(data)
        return data

    def readinto(self, buffer: Any) -> int:
        view = memoryview(buffer).cast("B")
        size = self._allowed(len(view))
        if size == 0:
            return 0
        n = self._fh.readinto(view[:size]) or 0
        if self._left is not None:
            self._left -= n
        return n

    def readable(self) -> bool:
        return True

    def seek(self, offset: int, /) -> int:
        raise io.UnsupportedOperation("the image is read once, in order")

    def close(self) -> None:
        pass  # the owner closes the real file

    @property
    def closed(self) -> bool:
        return self._fh.closed


class _FileHasher:
    """SHA-256 of a file's first ``limit`` bytes, computed in a thread of its own with
    positional reads of the same descriptor (they never move the decoder's position),
    so hashing runs beside decoding instead of in its way."""

    def __init__(self, fd: int, limit: int) -> None:
        self._fd = fd
        self._limit = limit
        self._digest = hashlib.sha256()
        self._error: OSError | None = None
        self._stop = False
        self._thread = threading.Thread(target=self._run, name="slicetime-hash", daemon=True)
        self._thread.start()

    def _run(self) -> None:
        offset = 0
        buffer = memoryview(bytearray(_HASH_CHUNK))  # reused: no fresh pages per chunk
        try:
            while offset < self._limit and not self._stop:
                n = os.preadv(self._fd, [buffer[: min(_HASH_CHUNK, self._limit - offset)]],
                              offset)
                if not n:
                    break
                self._digest.update(buffer[:n])
                offset += n
        except OSError as exc:
            self._error = exc

    def hexdigest(self) -> str:
        """Wait for the hash; raises the ``OSError`` a read met."""
        self._thread.join()
        if self._error is not None:
            raise self._error
        return self._digest.hexdigest()

    def stop(self) -> None:
        self._stop = True
        self._thread.join()


#: the gzip helper thread decodes this much at a time
_DECODE_BLOCK = 1 << 20


def _threaded_gzip_reader(fileobj: Any, blocks: int) -> Any:
    """isal's threaded gzip reader keeping up to ``blocks`` decoded blocks ready (its
    default is 2: the decoder then waits whenever the reader converts a batch)."""
    assert _threaded_gzip is not None
    reader_class = getattr(_threaded_gzip, "_ThreadedGzipReader", None)
    if reader_class is None or blocks <= 2:  # pragma: no cover - another isal version
        return _threaded_gzip.open(fileobj, "rb", threads=1)
    try:
        raw = reader_class(fileobj, queue_size=blocks, block_size=_DECODE_BLOCK)
    except TypeError:  # pragma: no cover - another isal version
        return _threaded_gzip.open(fileobj, "rb", threads=1)
    return io.BufferedReader(raw)


class VolumeReader:
    """Read the volumes of a single-file NIfTI image in batches, in file order.

    Use as a context manager. ``prefix`` holds the bytes before the image data
    (header, extensions, padding). With ``checksum`` the file's SHA-256 is computed
    in a thread of its own while the volumes are read (:meth:`sha256`); a gzip image
    is decoded in a helper thread that keeps up to ``decode_blocks`` MiB ready.
    ``read(count)`` returns a C-ordered array of shape
    ``(count, *reversed(spatial shape))`` in the stored type, i.e. the NIfTI
    (Fortran-ordered) volumes viewed without a copy of the bytes.
    """

    def __init__(
        self, path: Path, header: HeaderInfo, shown: str, *, threads: int = 1,
        checksum: bool = False, decode_blocks: int = 2,
    ) -> None:
        if not header.is_four_d:
            raise ReadError(
                "file/unsupported",
                shown,
                "dim",
                f"{shown}: correction needs a 4-D image, this one has "
                f"{len(header.shape)} dimensions {list(header.shape)}",
            )
        self.path = path
        self.header = header
        self.shown = shown
        self.dtype = data_type(header, shown)
        self.spatial = tuple(header.shape[:3])
        self.n_volumes = header.shape[3]
        self.volume_bytes = math.prod(self.spatial) * self.dtype.itemsize
        self._threads = threads
        self._checksum = checksum
        self._decode_blocks = decode_blocks
        self._size = 0
        self._fh: BinaryIO | None = None
        self._hasher: _FileHasher | None = None
        self._stream: Any = None
        self._done = 0
        self.prefix = b""

    def __enter__(self) -> VolumeReader:
        problem = data_offset_problem(self.header.version, self.header.vox_offset, self.shown)
        if problem is not None:
            raise problem
        raw, st = open_regular(self.path, self.shown, what="NIfTI file")
        self._fh = raw
        self._size = st.st_size
        if self._checksum:  # from the start, beside the decoder
            self._hasher = _FileHasher(raw.fileno(), st.st_size)
        limited = _LimitedReader(cast(_RawFile, raw), st.st_size)  # an unbuffered FileIO
        self._stream = limited
        if self.header.compressed:
            if _threaded_gzip is not None and self._threads > 0:
                self._stream = _threaded_gzip_reader(limited, self._decode_blocks)
            else:
                self._stream = gzip.GzipFile(fileobj=limited, mode="rb")
        try:
            self.prefix = self._read_exact(self.data_offset, "the header and extensions")
            prefix = self.prefix
            problem = extension_problem(
                lambda offset, count: prefix[offset : offset + count],
                version=self.header.version,
                order=self.header.byte_order,
                vox_offset=self.header.vox_offset,
                shown=self.shown,
            )
            if problem is not None:
                raise problem
        except BaseException:
            self.__exit__(None, None, None)
            raise
        return self

    @property
    def data_offset(self) -> int:
        """Where the voxels start: ``vox_offset`` (checked on entry: never inside the
        header)."""
        return self.header.vox_offset

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        try:
            self._close_stream()
        finally:
            if self._hasher is not None:
                self._hasher.stop()
            if self._fh is not None:
                self._fh.close()

    def _read_exact(self, size: int, what: str) -> bytes:
        out = bytearray(size)
        self._fill(memoryview(out), what)
        return bytes(out)

    def _fill(self, view: memoryview, what: str) -> None:
        got = 0
        total = len(view)
        try:
            while got < total:
                n = self._stream.readinto(view[got:])
                if not n:
                    break
                got += n
        except _GZIP_ERRORS as exc:
            raise ReadError(
                "file/truncated",
                self.shown,
                None,
                f"{self.shown}: the gzip-compressed image data is damaged ({exc})",
                evidence={"while_reading": what},
            ) from None
        except OSError as exc:
            raise os_error(exc, self.shown, what="NIfTI file") from None
        if got < total:
            raise ReadError(
                "file/truncated",
                self.shown,
                None,
                f"{self.shown}: the image data ends early, while reading {what}",
                evidence={"expected_bytes": total, "read_bytes": got},
            )

    def read(self, count: int) -> np.ndarray:
        count = min(count, self.n_volumes - self._done)
        out = np.empty((count, *reversed(self.spatial)), dtype=self.dtype)
        self.read_into(out)
        return out

    def read_into(self, out: np.ndarray) -> None:
        """Fill ``out`` (C-contiguous, ``(count, k, j, i)`` of ``self.dtype``) with the
        next ``count`` volumes; reusing one array avoids fresh pages per batch."""
        count = out.shape[0]
        if count > self.n_volumes - self._done or not out.flags.c_contiguous:
            raise ValueError("read_into needs a contiguous array within the remaining volumes")
        first = self._done
        what = f"volumes {first} to {first + count - 1}"
        self._fill(out.reshape(-1).view(np.uint8).data, what)
        self._done += count

    def batches(self, count: int) -> Iterator[tuple[int, np.ndarray]]:
        """``(first volume index, volumes)`` until the image is read."""
        while self._done < self.n_volumes:
            first = self._done
            yield first, self.read(count)

    def sha256(self) -> str:
        """SHA-256 of the whole file on disk (as large as it was when opened), from the
        hashing thread started on entry (``checksum=True``) or now."""
        assert self._fh is not None
        self._close_stream()
        if self._hasher is None:
            self._hasher = _FileHasher(self._fh.fileno(), self._size)
        try:
            return self._hasher.hexdigest()
        except OSError as exc:
            raise os_error(exc, self.shown, what="NIfTI file") from None

    def _close_stream(self) -> None:
        stream, self._stream = self._stream, None
        if stream is not None and not isinstance(stream, _LimitedReader):
            with contextlib.suppress(*_GZIP_ERRORS):
                stream.close()


def patched_prefix(
    prefix: bytes,
    header: HeaderInfo,
    *,
    datatype: int,
    bitpix: int,
    slope: float,
    inter: float,
    volumes: int | None = None,
) -> bytes:
    """The input header bytes with the fields a corrected image changes.

    Changed: ``datatype``, ``bitpix``, ``scl_slope``, ``scl_inter``;
    ``cal_min``/``cal_max`` are reset to 0 (the display range may no longer
    hold); ``slice_code``, ``slice_start``, ``slice_end`` and
    ``slice_duration`` are reset to 0 so the corrected image no longer claims a
    slice acquisition order (nothing downstream corrects it twice). Everything
    else (affine, units, ``dim_info``, intent, description, extensions) is kept,
    except ``dim[4]`` when ``volumes`` is given (leading volumes left out).
    """
    fields = _PATCH_1 if header.version == 1 else _PATCH_2
    values = {
        "datatype": datatype,
        "bitpix": bitpix,
        "scl_slope": slope,
        "scl_inter": inter,
        "cal_max": 0.0,
        "cal_min": 0.0,
        "slice_code": 0,
        "slice_start": 0,
        "slice_end": 0,
        "slice_duration": 0.0,
    }
    out = bytearray(prefix)
    for name, (offset, fmt) in fields.items():
        struct.pack_into(header.byte_order + fmt, out, offset, values[name])
    if volumes is not None:
        offset, fmt = HEADER_LAYOUT[header.version]["dim"]  # "8h" or "8q": dim[4] is 5th
        struct.pack_into(header.byte_order + fmt[1:], out,
                         offset + 4 * struct.calcsize(fmt[1:]), volumes)
    return bytes(out)


class VolumeWriter:
    """Write a NIfTI image: the prefix, then volumes in file order.

    Compressed with gzip when ``compress`` (``isal`` at its fastest level in a
    helper thread when available, else zlib level 1). The SHA-256 of the bytes
    written to disk is available from ``sha256()`` after ``close()``.

    Uncompressed, each batch is written and hashed by two helper threads while the
    caller prepares the next one: the array given to :meth:`write` may still be read
    until the next ``write``, :meth:`settle` or ``close`` returns (a caller that
    reuses one array calls ``settle`` before changing it; with two arrays in turn,
    ``write`` itself waits for the one given before). A compressed batch is copied
    by the encoder before ``write`` returns.
    """

    def __init__(
        self, path: Path, prefix: bytes, *, compress: bool, threads: int = 1, level: int = 1
    ) -> None:
        self.path = path
        self._raw: BinaryIO = open(path, "xb")
        self._digest = hashlib.sha256()
        self._hashing = _HashingWriter(self._raw, self._digest)
        self._stream: Any
        self._helpers: Any = None
        self._pending: list[Any] = []
        if compress:
            if _threaded_gzip is not None and threads > 0:
                self._stream = _threaded_gzip.open(
                    self._hashing, "wb", compresslevel=level, threads=threads
                )
            else:
                self._stream = gzip.GzipFile(
                    fileobj=self._hashing,
                    mode="wb",
                    compresslevel=level,
                    mtime=0,
                )
        else:
            self._stream = self._hashing
        with signals_held():
            self._stream.write(prefix)

    def write(self, volumes: np.ndarray) -> None:
        with signals_held():  # never a Ctrl-C inside the helpers' locks (readers.signals)
            self._write(volumes)

    def _write(self, volumes: np.ndarray) -> None:
        data = np.ascontiguousarray(volumes).reshape(-1).view(np.uint8).data
        if self._stream is not self._hashing:
            self._stream.write(data)  # the encoder's writer thread hashes what it writes
            return
        # uncompressed: one helper thread writes the bytes, another hashes them (both
        # release the GIL), in order, while the caller prepares the next batch
        self._settle()
        if self._helpers is None:
            from concurrent.futures import ThreadPoolExecutor

            self._helpers = ThreadPoolExecutor(max_workers=2,
                                               thread_name_prefix="slicetime-write")
        self._pending = [self._helpers.submit(self._raw.write, data),
                         self._helpers.submit(self._digest.update, data)]

    def settle(self) -> None:
        """Wait until the last batch given to :meth:`write` is written and hashed
        (raises the ``OSError`` its write met). A Ctrl-C while it waits is raised once
        the batch is done, as in :meth:`write`, :meth:`close` and :meth:`abort`."""
        with signals_held():
            self._settle()

    def _settle(self) -> None:
        pending, self._pending = self._pending, []
        for future in pending:
            future.result()

    def _stop_helpers(self) -> None:
        helpers, self._helpers = self._helpers, None
        if helpers is not None:
            helpers.shutdown(wait=True)

    def close(self) -> None:
        with signals_held():
            try:
                self._settle()
            finally:
                self._stop_helpers()
            if self._stream is not self._hashing:
                self._stream.close()
            self._raw.flush()
            os.fsync(self._raw.fileno())
            self._raw.close()

    def abort(self) -> None:
        with signals_held():
            try:
                self._settle()
                if self._stream is not self._hashing:
                    self._stream.close()
            except Exception:
                pass
            finally:
                self._stop_helpers()
            self._raw.close()

    def sha256(self) -> str:
        return self._digest.hexdigest()


class _HashingWriter:
    def __init__(self, fh: BinaryIO, digest: Any) -> None:
        self._fh = fh
        self._digest = digest

    def write(self, data: Any) -> int:
        self._digest.update(data)
        return self._fh.write(data)

    def writable(self) -> bool:
        return True

    def flush(self) -> None:
        self._fh.flush()

    def close(self) -> None:
        pass

    @property
    def closed(self) -> bool:
        return self._fh.closed


def _open_regular_or_oserror(path: Path) -> BinaryIO:
    """:func:`.errors.open_regular` for callers that expect ``OSError`` (a missing file
    raises ``FileNotFoundError``; a FIFO or device an ``OSError`` with ``EINVAL``)."""
    try:
        fh, _st = open_regular(path, str(path))
    except ReadError as exc:
        if exc.code == "file/missing":
            raise FileNotFoundError(errno.ENOENT, exc.message, str(path)) from None
        raise OSError(errno.EINVAL, exc.message, str(path)) from None
    return fh


def file_sha256(path: Path) -> str:
    """SHA-256 of a file's bytes."""
    digest = hashlib.sha256()
    with _open_regular_or_oserror(path) as fh:
        while chunk := fh.read(_HASH_CHUNK):
            digest.update(chunk)
    return digest.hexdigest()


__all__ = [
    "DATA_TYPES",
    "FLOAT32_CODE",
    "FLOAT32_MAX",
    "VolumeReader",
    "VolumeWriter",
    "data_type",
    "file_sha256",
    "patched_prefix",
    "scaling",
    "scaling_problem",
]
