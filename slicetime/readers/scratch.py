"""The correction's scratch buffer: a run as ``(slice, volume, in-plane voxel)``
float32, in memory or in a scratch file, and the conversions on the way in
(stored type and scaling → float32, slice-major) and out (float32 → the output
type, volume-major).

The slice-major layout keeps one slice's whole run contiguous, so a slice is
read from a scratch file in one call and the engines get ``(volume, voxel)``
arrays. The scratch file is read and written with ``pwrite``/``preadv``, not a
memory map, so its pages never count against the process under a memory cap.
"""

from __future__ import annotations

import contextlib
import ctypes
import mmap
import os
import sys
import threading
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from slicetime.numbers import grouped, plain, powers

#: the largest finite float32 (IEEE 754 binary32), as numpy gives it
FLOAT32_MAX = float(np.finfo(np.float32).max)


def float32_range() -> str:
    """The float32 range as every message writes it, from :data:`FLOAT32_MAX`:
    ``±3.4 × 10^38`` (two significant digits, as :func:`~slicetime.numbers.powers`
    writes every huge number)."""
    return f"±{powers(FLOAT32_MAX, 2)}"

__all__ = [
    "DiskBuffer",
    "MemoryBuffer",
    "OutputCast",
    "ScalingRangeError",
    "SliceBuffer",
    "c_axis",
    "fresh_float32",
    "slice_major_view",
    "store_scaled",
    "volume_major_target",
]


class ScalingRangeError(ValueError):
    """Finite stored values that become inf or nan as float32; ``field`` names the
    header field responsible (``scl_slope`` or ``datatype``)."""

    def __init__(self, message: str, field: str) -> None:
        super().__init__(message)
        self.field = field


#: a buffer at least this large gets a mapping of its own, faulted in by a helper
#: thread (:func:`fresh_float32`); a smaller one is not worth the thread
PREFAULT_BYTES = 32 << 20
#: the helper faults the buffer in this much at a time: the kernel holds the process's
#: memory-map lock through each call, and the decoder's own allocations wait for it
#: (in one call for the whole buffer, opening the reader waited 0.21 to 0.32 s for the
#: first decoded block; in 16 MiB steps 0.05 to 0.09 s)
PREFAULT_STEP = 16 << 20
#: madvise(2) advice that faults a range in, writable (linux/mman.h; Linux 5.14)
MADV_POPULATE_WRITE = 23


def fresh_float32(shape: tuple[int, ...]) -> tuple[np.ndarray, threading.Thread | None]:
    """A new, uninitialised float32 array for a run's buffer, and the helper thread
    that faults its pages in while the caller starts filling it (None: no helper).

    The first write to each page of fresh memory costs a page fault; for the buffer
    of a typical run (hundreds of MiB) that was most of the main thread's time while
    reading. On Linux the array is an anonymous mapping of its own, in small pages
    (``numpy.empty`` asks for transparent huge pages, whose first writes took 0.04 to
    1.2 s on a virtual machine, against a steadier 0.16 to 0.38 s), and
    the helper asks the kernel to fault the pages in, :data:`PREFAULT_STEP` at a time
    (``MADV_POPULATE_WRITE``, called through ctypes, which releases the interpreter
    lock), beside the decoder. A page the caller reaches first it faults in itself,
    as before; a kernel without the advice leaves every page to fault as it is
    touched. Measured numbers: DEVELOPERS.md. Elsewhere, or for a small buffer:
    ``numpy.empty`` and no helper.
    """
    nbytes = int(np.prod(shape, dtype=np.int64)) * 4
    if nbytes < PREFAULT_BYTES or not sys.platform.startswith("linux"):
        return np.empty(shape, dtype=np.float32), None
    try:
        memory = mmap.mmap(-1, nbytes, flags=mmap.MAP_PRIVATE | mmap.MAP_ANONYMOUS)
    except (OSError, ValueError):  # pragma: no cover - no such mapping here
        return np.empty(shape, dtype=np.float32), None
    array = np.frombuffer(memory, dtype=np.float32).reshape(shape)
    helper = threading.Thread(target=_populate, args=(memory, array.ctypes.data, nbytes),
                              name="slicetime-prefault", daemon=True)
    helper.start()
    return array, helper


def _populate(memory: mmap.mmap, address: int, nbytes: int) -> None:
    """Fault in the ``nbytes`` of ``memory`` at ``address``; any failure leaves the
    pages to fault as they are touched."""
    try:
        madvise = ctypes.CDLL(None, use_errno=True).madvise
        madvise.argtypes = [ctypes.c_void_p, ctypes.c_size_t, ctypes.c_int]
        for offset in range(0, nbytes, PREFAULT_STEP):
            madvise(address + offset, min(PREFAULT_STEP, nbytes - offset), MADV_POPULATE_WRITE)
    except (OSError, AttributeError):  # pragma: no cover - a libc without madvise
        pass
    del memory  # held (mapped) until the kernel is done with it


class MemoryBuffer:
    """The run as ``(slice, volume, in-plane voxel)`` float32, in memory."""

    def __init__(self, n_slices: int, n_volumes: int, plane: int) -> None:
        self.array, self._prefault = fresh_float32((n_slices, n_volumes, plane))

    def put_volumes(self, first: int, block: np.ndarray, scale: tuple[float, float] | None):
        """Store ``block`` (slice, volume, plane; any type) scaled to float32."""
        store_scaled(self.array[:, first : first + block.shape[1], :], block, scale)

    def get_slice(self, z: int) -> np.ndarray:
        return self.array[z]

    def put_slice(self, z: int, data: np.ndarray) -> None:
        if data is not self.array[z] and not np.may_share_memory(data, self.array[z]):
            self.array[z] = data

    def get_volumes(self, first: int, count: int) -> np.ndarray:
        return self.array[:, first : first + count, :]

    def close(self) -> None:
        if self._prefault is not None:  # no helper outlives its buffer
            self._prefault.join()
            self._prefault = None
        del self.array


class DiskBuffer:
    """The same buffer in a scratch file, read and written with explicit I/O
    (not a memory map, so its pages never count against the process)."""

    def __init__(self, path: Path, n_slices: int, n_volumes: int, plane: int) -> None:
        self.path = path
        self.shape = (n_slices, n_volumes, plane)
        self._fd = os.open(path, os.O_RDWR | os.O_CREAT | os.O_EXCL, 0o600)
        os.ftruncate(self._fd, n_slices * n_volumes * plane * 4)
        self._scratch: np.ndarray | None = None

    def _offset(self, z: int, v: int) -> int:
        _, n_volumes, plane = self.shape
        return (z * n_volumes + v) * plane * 4

    def _write(self, data: np.ndarray, offset: int) -> None:
        view = np.ascontiguousarray(data).reshape(-1).view(np.uint8).data
        done = 0
        while done < len(view):
            done += os.pwrite(self._fd, view[done:], offset + done)

    def put_volumes(self, first: int, block: np.ndarray, scale: tuple[float, float] | None):
        count = block.shape[1]
        if self._scratch is None or self._scratch.shape[1] < count:
            self._scratch = np.empty((self.shape[0], count, self.shape[2]), dtype=np.float32)
        scaled = self._scratch[:, :count, :]
        store_scaled(scaled, block, scale)
        for z in range(self.shape[0]):
            self._write(scaled[z], self._offset(z, first))

    def get_slice(self, z: int) -> np.ndarray:
        self._scratch = None  # the batch scratch is not needed once the engine runs
        _, n_volumes, plane = self.shape
        out = np.empty((n_volumes, plane), dtype=np.float32)
        _read_into(self._fd, out, self._offset(z, 0))
        return out

    def put_slice(self, z: int, data: np.ndarray) -> None:
        self._write(data, self._offset(z, 0))

    def get_volumes(self, first: int, count: int) -> np.ndarray:
        n_slices, _, plane = self.shape
        out = np.empty((n_slices, count, plane), dtype=np.float32)
        for z in range(n_slices):
            _read_into(self._fd, out[z], self._offset(z, first))
        return out

    def close(self) -> None:
        self._scratch = None
        os.close(self._fd)
        with contextlib.suppress(FileNotFoundError):
            os.unlink(self.path)


def _read_into(fd: int, target: np.ndarray, offset: int) -> None:
    view = target.reshape(-1).view(np.uint8).data
    got = 0
    while got < len(view):
        n = os.preadv(fd, [view[got:]], offset + got)
        if n <= 0:
            raise OSError("scratch file ended early")
        got += n


def store_scaled(
    target: np.ndarray, block: np.ndarray, scale: tuple[float, float] | None
) -> None:
    """``target[...] = block * slope + inter`` in float32, without a temporary.

    Raises :class:`ScalingRangeError` (a ``correct/scaling-range`` refusal) when
    a finite stored value becomes inf or nan on the way: float64 voxels beyond
    the float32 range, or a scaling that takes stored values beyond it. The
    output never holds such a value silently.
    """
    wide = block.dtype.kind == "f" and block.dtype.itemsize > 4
    with np.errstate(over="ignore", invalid="ignore"):
        np.copyto(target, block, casting="unsafe")
        if scale is not None:
            slope, inter = scale
            target *= np.float32(slope)
            if inter:
                target += np.float32(inter)
        if scale is None and not wide:
            return
        bad = ~np.isfinite(target)
        if not bad.any():
            return
        if block.dtype.kind == "f":
            bad &= np.isfinite(block)
        count = int(np.count_nonzero(bad))
    if count:
        how = (f"scl_slope {plain(scale[0])} and scl_inter {plain(scale[1])} take"
               if scale is not None
               else "the stored float64 values include")
        raise ScalingRangeError(
            f"{how} {grouped(count)} value(s) beyond the float32 range (about "
            f"{float32_range()}); the output would hold inf or nan, so the run is refused",
            field="scl_slope" if scale is not None else "datatype",
        )


SliceBuffer = MemoryBuffer | DiskBuffer


def c_axis(axis_index: int) -> int:
    """The axis of a ``(volume, k, j, i)`` C-ordered batch that holds ``axis_index``."""
    return 3 - axis_index


def slice_major_view(batch: np.ndarray, axis_index: int) -> np.ndarray:
    """``(volume, k, j, i)`` → ``(slice, volume, plane)`` (a view unless the axis is j)."""
    moved = np.moveaxis(batch, c_axis(axis_index), 0)
    return moved.reshape(moved.shape[0], moved.shape[1], -1)


def volume_major_target(out: np.ndarray, axis_index: int) -> np.ndarray:
    """A writable ``(slice, volume, o1, o2)`` view of a ``(volume, k, j, i)`` array."""
    return np.moveaxis(out, c_axis(axis_index), 0)


@dataclass
class OutputCast:
    """float32 → the output type into a reused batch array, counting clipped values."""

    dtype: np.dtype[Any]
    scale: tuple[float, float] | None
    clipped: int = 0
    nonfinite: int = 0

    def __call__(self, target: np.ndarray, values: np.ndarray) -> None:
        if self.dtype.kind == "f":
            np.copyto(target, values, casting="unsafe")
            return
        data = values.astype(np.float64)
        if self.scale is not None:
            slope, inter = self.scale
            data = (data - inter) / slope
        info = np.iinfo(self.dtype)
        bad = ~np.isfinite(data)
        if bad.any():
            self.nonfinite += int(bad.sum())
            data[bad] = 0.0
        np.rint(data, out=data)
        self.clipped += int(np.count_nonzero(data < info.min) + np.count_nonzero(data > info.max))
        np.clip(data, info.min, info.max, out=data)
        np.copyto(target, data, casting="unsafe")
