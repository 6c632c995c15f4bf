"""The memory side of a correction: the batch sizes a memory cap allows, and the
process-wide allocator settings a run uses (set for the run, restored after it).

``plan_budget`` is pure arithmetic; ``allocator_tuning`` changes glibc's malloc
parameters for the length of a ``with`` block only, so a long-lived worker
(a process pool, a Dask worker, a Python session calling the API) is never left
with another run's settings.
"""

from __future__ import annotations

import contextlib
import ctypes
import re
from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any

from slicetime.numbers import amount
from slicetime.pipelines.errors import CorrectionError

_SIZE_RE = re.compile(r"^\s*(\d+(?:\.\d+)?)\s*([kmgt]?)(?:i?b)?\s*$", re.IGNORECASE)


def parse_size(text: str) -> int:
    """``512M``, ``2G``, ``1.5GiB``, ``800MB``, ``1000000`` → bytes (binary multiples)."""
    match = _SIZE_RE.match(text)
    if not match:
        raise ValueError(f"size {text!r} is not a number with an optional K, M, G or T suffix")
    number, unit = float(match.group(1)), match.group(2).lower()
    factor = {"": 1, "k": 1 << 10, "m": 1 << 20, "g": 1 << 30, "t": 1 << 40}[unit]
    value = int(number * factor)
    if value <= 0:
        raise ValueError(f"size {text!r} must be positive")
    return value


# --------------------------------------------------------------------------- budget


@dataclass(frozen=True)
class Budget:
    """How many volumes and series one step handles, and where the buffer lives."""

    on_disk: bool
    volumes_per_batch: int
    rows_per_block: int
    threads: int = 1
    #: decoded 1 MiB blocks the gzip reader may hold ready (a deep queue keeps the
    #: decoder going while a batch is converted; under a cap, isal's default of 2)
    decode_blocks: int = 2


#: float32-sized temporaries per sample of a series inside an engine (upper bound,
#: the cubic spline's float64 coefficients included)
_ENGINE_COPIES = 14
#: voxels resampled together: small enough that a block's copies stay in cache
BLOCK_VOXELS = 256
#: gzip helper buffers of a compressed run: a base plus this much per helper thread
#: (measured with benchmarks/bench_memory_cap.py: about 4 MiB with 2 threads)
_CODEC_BASE = 2 << 20
_CODEC_PER_THREAD = 1 << 20
#: decoded blocks queued by the gzip reader of a run without a memory cap (16 MiB:
#: one batch, so the decoder never waits while a batch is converted)
UNCAPPED_DECODE_BLOCKS = 16
#: thread stacks and small temporaries of any run (measured: 1 to 3 MiB)
_RUN_OVERHEAD = 4 << 20


def plan_budget(
    n_slices: int,
    n_volumes: int,
    plane: int,
    stored_itemsize: int,
    cap: int | None,
    shown: str,
    threads: int = 1,
    compressed: bool = False,
) -> Budget:
    """Batch sizes for a run, from the memory cap (None: no cap, everything in memory).

    The cap bounds the run's working memory: the process's peak resident memory
    minus what it held before the run (the interpreter and its libraries).
    Accounted: the slice-major buffer (unless it goes to a scratch file), a batch of
    stored volumes plus its float32 copies on the way in and out, the gzip helper
    buffers of a compressed run, and per engine thread one slice (twice when it
    comes from a scratch file) and the engine's temporaries for one block of voxels.
    A run fits in memory only when all of it fits under the cap.
    """
    volume_voxels = n_slices * plane
    per_volume = volume_voxels * (stored_itemsize + 8)
    slice_bytes = n_volumes * plane * 4
    per_voxel = n_volumes * 4 * _ENGINE_COPIES
    block_bytes = min(BLOCK_VOXELS, plane) * per_voxel
    if cap is None:
        batch = max(1, min(n_volumes, (16 << 20) // max(1, per_volume)))
        return Budget(False, batch, BLOCK_VOXELS, threads, decode_blocks=UNCAPPED_DECODE_BLOCKS)
    buffer_bytes = slice_bytes * n_slices
    engine_bytes = threads * block_bytes
    codec = _CODEC_BASE + _CODEC_PER_THREAD * max(1, threads) if compressed else 0
    cap_all = cap
    cap = cap - codec - _RUN_OVERHEAD
    # batches as small as without a cap (16 MiB), and at most a quarter of the cap
    batch = max(1, min(n_volumes, (16 << 20) // per_volume, cap // (4 * per_volume)))
    if buffer_bytes + max(engine_bytes, batch * per_volume) <= cap:  # fits: no scratch file
        return Budget(False, int(batch), BLOCK_VOXELS, threads)
    smallest_block = 16
    need = max(2 * slice_bytes + smallest_block * per_voxel, per_volume)
    if cap < need:
        raise CorrectionError(
            f"{shown}: --max-memory {amount(cap_all)} is too small for this run; one "
            f"slice's series and the helper buffers need about "
            f"{amount(need + codec + _RUN_OVERHEAD)}"
        )
    rows = max(smallest_block, min(BLOCK_VOXELS, (cap - 2 * slice_bytes) // per_voxel))
    # each engine thread holds its slice twice (read, written back) and one block
    per_thread = 2 * slice_bytes + rows * per_voxel
    disk_threads = max(1, min(threads, cap // per_thread))
    return Budget(True, int(batch), int(rows), int(disk_threads))


# --------------------------------------------------------------------------- allocator

#: glibc mallopt parameters (malloc.h)
M_TRIM_THRESHOLD = -1
M_MMAP_THRESHOLD = -3
#: glibc's documented defaults for both (mallopt(3)): 128 KiB
GLIBC_DEFAULTS: dict[int, int] = {M_MMAP_THRESHOLD: 128 << 10, M_TRIM_THRESHOLD: 128 << 10}
#: what a run that keeps its buffer in memory asks for: freed blocks up to 64 MiB are
#: kept for reuse instead of being returned to the system after every slice
KEEP_FREED: dict[int, int] = {M_MMAP_THRESHOLD: 64 << 20, M_TRIM_THRESHOLD: 128 << 20}

#: the parameters this module has changed and not yet restored (empty: glibc's own)
_changed: dict[int, int] = {}


def _libc() -> Any:
    """glibc, or None elsewhere (then tuning does nothing)."""
    try:
        return ctypes.CDLL("libc.so.6")
    except OSError:  # pragma: no cover - not glibc
        return None


def allocator_settings() -> dict[int, int]:
    """The malloc parameters currently set by :func:`allocator_tuning` (empty: none)."""
    return dict(_changed)


@contextlib.contextmanager
def allocator_tuning(*, keep_freed: bool) -> Iterator[None]:
    """Process-wide malloc settings for one run, restored when the block ends.

    ``keep_freed``: let glibc reuse freed blocks up to 64 MiB instead of returning
    them after every slice (on virtual machines touching fresh pages costs about
    as much as the transforms; the large buffer is still mapped separately and
    returned when freed). Otherwise (a run under ``--max-memory``) nothing is
    changed, and the caller hands freed memory back between phases
    (:func:`release_memory`) so the cap holds.

    On exit, even by an exception, every parameter this block set goes back to
    what it was (glibc's documented default when nothing had changed it: mallopt
    cannot read a value). glibc's dynamic mmap threshold stays off afterwards,
    which only moves allocations between 128 KiB and 32 MiB to the heap.
    """
    libc = _libc() if keep_freed else None
    set_here: dict[int, int] = {}
    if libc is not None:
        for param, value in KEEP_FREED.items():
            if _changed.get(param) != value and libc.mallopt(param, value):
                set_here[param] = _changed.get(param, GLIBC_DEFAULTS[param])
                _changed[param] = value
    try:
        yield
    finally:
        if libc is not None:
            for param, previous in set_here.items():
                libc.mallopt(param, previous)
                if previous == GLIBC_DEFAULTS[param]:
                    _changed.pop(param, None)
                else:
                    _changed[param] = previous


def release_memory() -> None:
    """Hand freed heap memory back to the system (glibc), so a memory cap holds."""
    libc = _libc()
    if libc is not None:
        with contextlib.suppress(AttributeError):
            libc.malloc_trim(0)
