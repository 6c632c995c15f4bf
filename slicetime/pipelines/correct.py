"""The correction pipeline: audit, plan, resample and write BIDS-derivative runs.

For each run (found by the audit's walker):

1. the audit decides whether the timing can be trusted: a run without a
   resolved schedule is always refused; a run with error findings is refused
   unless ``force`` (which never invents missing timing);
2. the output path is the input's path relative to its dataset root, under
   ``out``, with ``desc-<label>`` added; a run whose output sidecar records the
   same inputs (SHA-256), settings and output checksum is skipped;
3. the image is read a batch of volumes at a time into a slice-major float32
   buffer (in memory, or a scratch file under ``out`` with ``max_memory``),
   each excitation group is resampled with the chosen engine, and the volumes
   are written back out, compressed like the input;
4. the image, then the sidecar (which records the provenance and acts as the
   "done" marker) appear under their final names by atomic rename; a failure
   at any point removes the temporary files.

The buffer layout ``(slice, volume, in-plane voxel)`` keeps one slice's whole
run contiguous, so a slice can be read from a scratch file in one call, and
the engines get ``(voxel, volume)`` arrays with time contiguous.
"""

from __future__ import annotations

import contextlib
import dataclasses
import json
import math
import os
import re
import threading
import time
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from slicetime import __version__
from slicetime.engines.align import align_slice, run_tasks, slice_tasks
from slicetime.engines.interpolate import (
    Engine,
    IrregularGridError,
    ResampleStats,
    get_engine,
    prepare,
)
from slicetime.engines.plan import (
    ImplausibleTiming,
    PlanError,
    ReferenceChoice,
    ResamplingPlan,
    ShiftGroup,
    check_plausible,
    make_plan,
)
from slicetime.model import Finding, RunRecord, Severity
from slicetime.pipelines.audit import AuditResult, RunResult, audit_paths
from slicetime.pipelines.executor import (
    Executor,
    Interrupted,
    Progress,
    available_cpus,
    map_chunks,
)
from slicetime.readers.dataset import find_root
from slicetime.readers.entities import parse_name
from slicetime.readers.errors import ReadError
from slicetime.readers.nifti import size_text
from slicetime.readers.volumes import (
    FLOAT32_CODE,
    FLOAT32_MAX,
    VolumeReader,
    VolumeWriter,
    file_sha256,
    patched_prefix,
    scaling,
    scaling_problem,
)

DEFAULT_DESC = "timealigned"
PROVENANCE_KEY = "SliceTimeAlignment"
PROVENANCE_FILE = "slicetime-provenance.json"
TEMP_PREFIX = ".slicetime-partial-"
_DESC_RE = re.compile(r"[A-Za-z0-9]+\Z")
_SIZE_RE = re.compile(r"^\s*(\d+(?:\.\d+)?)\s*([kmgt]?)(?:i?b)?\s*$", re.IGNORECASE)
#: fields dropped from the output sidecar: they describe per-slice offsets that no
#: longer exist in the corrected image
DROPPED_FIELDS = ("SliceTiming",)


class CorrectionError(Exception):
    """A run cannot be corrected; the message names the file and the reason.

    With a ``code`` (a registered ``correct/*`` code) the run is *refused* and the
    code becomes one of its blocking findings; without one it *failed*."""

    def __init__(self, message: str, code: str | None = None, field: str | None = None):
        super().__init__(message)
        self.code = code
        self.field = field


#: codes of the refusals ``correct`` makes itself (documented in rules/correction.py)
CLASH_CODE = "correct/output-clash"
IMPLAUSIBLE_CODE = "correct/implausible-timing"
SCALING_CODE = "correct/scaling-range"


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


@dataclass(frozen=True)
class CorrectOptions:
    out: Path
    method: str = "fourier"
    reference: ReferenceChoice = field(default_factory=lambda: ReferenceChoice("middle"))
    desc: str = DEFAULT_DESC
    keep_dtype: bool = False
    force: bool = False
    max_memory: int | None = None
    threads: int = 1  # engine and gzip helper threads per run; 0: share the CPUs
    #: allow an --out folder made from other input datasets (their links are kept)
    mix_inputs: bool = False
    #: when the batch began (time.time()): an output already in place that this batch
    #: wrote (its worker was lost before it could say so) is reported as corrected
    batch_started: float | None = None

    def settings(self, engine: Engine) -> dict[str, Any]:
        """What must match for an earlier output to be reused."""
        return {
            "Method": engine.name,
            "Parameters": dict(engine.parameters),
            "Reference": self.reference.to_json(),
            "KeepDataType": self.keep_dtype,
            "Desc": self.desc,
            "Version": __version__,
        }


@dataclass
class RunOutcome:
    """What happened to one run."""

    path: str  # input, relative to its root
    root: str
    status: str  # corrected | up-to-date | refused | failed
    reason: str | None = None
    output: str | None = None  # relative to out
    reference: float | None = None
    warnings: list[str] = field(default_factory=list)
    blocking: list[Finding] = field(default_factory=list)
    seconds: float = 0.0
    provenance: dict[str, Any] | None = None
    removed: str | None = None  # an earlier output of this run, removed as stale (rel. to out)

    @property
    def ok(self) -> bool:
        return self.status in ("corrected", "up-to-date")

    def to_json(self) -> dict[str, Any]:
        return {
            "path": self.path,
            "status": self.status,
            "reason": self.reason,
            "output": self.output,
            "reference_time": self.reference,
            "warnings": self.warnings,
            "blocking_findings": [f.to_json() for f in self.blocking],
            "removed_output": self.removed,
            "seconds": round(self.seconds, 3),
        }


@dataclass
class CorrectResult:
    out: str
    runs: list[RunOutcome] = field(default_factory=list)
    dataset_findings: list[Finding] = field(default_factory=list)

    def counts(self) -> dict[str, int]:
        counts = {"corrected": 0, "up-to-date": 0, "refused": 0, "failed": 0}
        for run in self.runs:
            counts[run.status] += 1
        return counts

    def exit_code(self) -> int:
        return 0 if all(r.ok for r in self.runs) else 1


# ---------------------------------------------------------------------------
# paths


def output_name(name: str, desc: str) -> str:
    """``sub-01_task-x_bold.nii.gz`` → ``sub-01_task-x_desc-<desc>_bold.nii.gz``.

    ``desc`` goes last among the entities, as BIDS derivatives order it; an
    existing ``desc`` value is replaced.
    """
    parsed = parse_name(name)
    if parsed is None:
        stem, dot, ext = name.partition(".")
        return f"{stem}_desc-{desc}{dot}{ext}"
    entities = {k: v for k, v in parsed.entities.items() if k != "desc"}
    entities["desc"] = desc
    parts = [f"{k}-{v}" for k, v in entities.items()]
    return "_".join([*parts, parsed.suffix]) + parsed.extension


def sidecar_name(image_name: str) -> str:
    for ext in (".nii.gz", ".nii"):
        if image_name.endswith(ext):
            return image_name[: -len(ext)] + ".json"
    return image_name + ".json"


def check_output_location(
    out: Path,
    roots: Sequence[Path],
    paths: Sequence[Path] = (),
    *,
    include_derivatives: bool = False,
) -> None:
    """Refuse an output folder that would put files into an input dataset.

    ``out`` may be outside every root and every given path, or inside a root's
    ``derivatives/`` folder (the BIDS convention); nowhere else inside a root or
    a given path. ``roots`` are all the roots given or found, also those that
    contribute no run. With ``include_derivatives`` even a root's derivatives
    folder is refused when a given path holds it (the outputs would become inputs).
    """
    out_real = Path(os.path.realpath(out))
    in_derivatives = False
    for root in roots:
        root_real = Path(os.path.realpath(root))
        if out_real == root_real:
            raise ValueError(f"--out {out} is the input dataset {root}; choose another folder")
        if out_real.is_relative_to(root_real):
            rel = out_real.relative_to(root_real)
            if rel.parts[0] != "derivatives" or len(rel.parts) < 2:
                raise ValueError(
                    f"--out {out} is inside the input dataset {root}; use a folder outside "
                    f"it or under {root / 'derivatives'}"
                )
            in_derivatives = True
        if root_real.is_relative_to(out_real):
            raise ValueError(f"--out {out} contains the input dataset {root}")
    for path in paths:
        path_real = Path(os.path.realpath(path))
        if out_real == path_real or path_real.is_relative_to(out_real):
            raise ValueError(f"--out {out} is or contains the input path {path}")
        if out_real.is_relative_to(path_real) and (include_derivatives or not in_derivatives):
            raise ValueError(
                f"--out {out} is inside the input path {path}"
                + (" and --include-derivatives would read the outputs back as inputs"
                   if in_derivatives else "")
                + "; choose a folder outside it"
            )


# ---------------------------------------------------------------------------
# memory planning


@dataclass(frozen=True)
class Budget:
    """How many volumes and series one step handles, and where the buffer lives."""

    on_disk: bool
    volumes_per_batch: int
    rows_per_block: int
    threads: int = 1


#: float32-sized temporaries per sample of a series inside an engine (upper bound,
#: the cubic spline's float64 coefficients included)
_ENGINE_COPIES = 14
#: voxels resampled together: small enough that a block's copies stay in cache
BLOCK_VOXELS = 256
#: gzip helper buffers of a compressed run: a base plus this much per helper thread
#: (measured with benchmarks/bench_memory_cap.py: about 4 MiB with 2 threads)
_CODEC_BASE = 2 << 20
_CODEC_PER_THREAD = 1 << 20
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
        return Budget(False, batch, BLOCK_VOXELS, threads)
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
            f"{shown}: --max-memory {size_text(cap_all)} is too small for this run; one "
            f"slice's series and the helper buffers need about "
            f"{size_text(need + codec + _RUN_OVERHEAD)}"
        )
    rows = max(smallest_block, min(BLOCK_VOXELS, (cap - 2 * slice_bytes) // per_voxel))
    # each engine thread holds its slice twice (read, written back) and one block
    per_thread = 2 * slice_bytes + rows * per_voxel
    disk_threads = max(1, min(threads, cap // per_thread))
    return Budget(True, int(batch), int(rows), int(disk_threads))


class _MemoryBuffer:
    """The run as ``(slice, volume, in-plane voxel)`` float32, in memory."""

    def __init__(self, n_slices: int, n_volumes: int, plane: int) -> None:
        self.array = np.empty((n_slices, n_volumes, plane), dtype=np.float32)

    def put_volumes(self, first: int, block: np.ndarray, scale: tuple[float, float] | None):
        """Store ``block`` (slice, volume, plane; any type) scaled to float32."""
        _store_scaled(self.array[:, first : first + block.shape[1], :], block, scale)

    def get_slice(self, z: int) -> np.ndarray:
        return self.array[z]

    def put_slice(self, z: int, data: np.ndarray) -> None:
        if data is not self.array[z] and not np.may_share_memory(data, self.array[z]):
            self.array[z] = data

    def get_volumes(self, first: int, count: int) -> np.ndarray:
        return self.array[:, first : first + count, :]

    def close(self) -> None:
        del self.array


class _DiskBuffer:
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
        view = memoryview(np.ascontiguousarray(data).reshape(-1).view(np.uint8))
        done = 0
        while done < len(view):
            done += os.pwrite(self._fd, view[done:], offset + done)

    def put_volumes(self, first: int, block: np.ndarray, scale: tuple[float, float] | None):
        count = block.shape[1]
        if self._scratch is None or self._scratch.shape[1] < count:
            self._scratch = np.empty((self.shape[0], count, self.shape[2]), dtype=np.float32)
        scaled = self._scratch[:, :count, :]
        _store_scaled(scaled, block, scale)
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
    view = memoryview(target.reshape(-1).view(np.uint8))
    got = 0
    while got < len(view):
        n = os.preadv(fd, [view[got:]], offset + got)
        if n <= 0:
            raise OSError("scratch file ended early")
        got += n


def _store_scaled(
    target: np.ndarray, block: np.ndarray, scale: tuple[float, float] | None
) -> None:
    """``target[...] = block * slope + inter`` in float32, without a temporary.

    Raises a refusal (``correct/scaling-range``) when a finite stored value becomes
    inf or nan on the way: float64 voxels beyond the float32 range, or a scaling
    that takes stored values beyond it. The output never holds such a value silently.
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
        how = (f"scl_slope {scale[0]:g} and scl_inter {scale[1]:g} take" if scale is not None
               else "the stored float64 values include")
        raise CorrectionError(
            f"{how} {count} value(s) beyond the float32 range (±{FLOAT32_MAX:.4g}); the "
            "output would hold inf or nan, so the run is refused",
            code=SCALING_CODE, field="scl_slope" if scale is not None else "datatype",
        )


def _keep_freed_memory() -> None:
    """Let glibc reuse freed blocks up to 64 MiB instead of returning them to the
    system after every slice: on virtual machines touching fresh pages costs
    more than the transforms. Process-wide; the large buffer is still mapped
    separately and returned when freed."""
    try:
        import ctypes

        libc = ctypes.CDLL("libc.so.6")
        libc.mallopt(-3, 64 << 20)  # M_MMAP_THRESHOLD
        libc.mallopt(-1, 128 << 20)  # M_TRIM_THRESHOLD
    except (OSError, AttributeError):  # pragma: no cover - not glibc
        pass


def _release_memory() -> None:
    """Hand freed heap memory back to the system (glibc), so a memory cap holds."""
    try:
        import ctypes

        ctypes.CDLL("libc.so.6").malloc_trim(0)
    except (OSError, AttributeError):  # pragma: no cover - not glibc
        pass


# ---------------------------------------------------------------------------
# one run


def _c_axis(axis_index: int) -> int:
    """The axis of a ``(volume, k, j, i)`` C-ordered batch that holds ``axis_index``."""
    return 3 - axis_index


def _slice_major_view(batch: np.ndarray, axis_index: int) -> np.ndarray:
    """``(volume, k, j, i)`` → ``(slice, volume, plane)`` (a view unless the axis is j)."""
    moved = np.moveaxis(batch, _c_axis(axis_index), 0)
    return moved.reshape(moved.shape[0], moved.shape[1], -1)


def _volume_major_target(out: np.ndarray, axis_index: int) -> np.ndarray:
    """A writable ``(slice, volume, o1, o2)`` view of a ``(volume, k, j, i)`` array."""
    return np.moveaxis(out, _c_axis(axis_index), 0)


@dataclass
class _Cast:
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


def _engine_pass(
    buffer: _MemoryBuffer | _DiskBuffer,
    plan: ResamplingPlan,
    engine: Engine,
    budget: Budget,
    stats: ResampleStats,
) -> None:
    """Resample every slice that is not already at the reference, one slice per task
    (slices run in ``budget.threads`` threads: the transforms release the GIL), with
    the same per-slice code as ``slicetime.correct_array`` (``engines.align``)."""

    def work(task: tuple[ShiftGroup, int]) -> ResampleStats:
        group, z = task
        local = ResampleStats()
        view = buffer.get_slice(z)  # (volume, plane)
        align_slice(view, plan, group, engine, stats=local, rows_per_block=budget.rows_per_block)
        buffer.put_slice(z, view)
        return local

    stats.add(run_tasks(slice_tasks(plan), work, budget.threads))


def _hash_inputs(record: RunRecord, image_sha: str | None) -> dict[str, Any]:
    """The run's true inputs: its dataset (file URI), image and sidecars with their
    SHA-256, as written in the output (text made JSON-safe)."""
    root = Path(record.root)
    sidecars = []
    for rel in record.sidecar_chain:
        sidecars.append({"Path": rel, "SHA256": file_sha256(root / rel)})
    image = {"Path": record.path, "SHA256": image_sha or file_sha256(Path(record.abs_path))}
    return json_safe({"Dataset": dataset_uri(root), "Image": image, "Sidecars": sidecars})


def _up_to_date(
    image_out: Path, sidecar_out: Path, settings: dict[str, Any], inputs: dict[str, Any]
) -> bool:
    try:
        with open(sidecar_out, encoding="utf-8") as fh:
            recorded = json.load(fh).get(PROVENANCE_KEY, {})
    except (OSError, ValueError, AttributeError):
        return False
    if not isinstance(recorded, dict):
        return False
    if recorded.get("Settings") != settings or recorded.get("Inputs") != inputs:
        return False
    output = recorded.get("Output", {})
    if not image_out.is_file() or not isinstance(output, dict):
        return False
    return output.get("SHA256") == file_sha256(image_out)


def _temp_path(final: Path) -> Path:
    return final.with_name(f"{TEMP_PREFIX}{os.getpid()}-{final.name}")


_SURROGATE = re.compile("[\ud800-\udfff]")


def _escape_surrogate(match: re.Match[str]) -> str:
    code = ord(match.group(0))
    if 0xDC80 <= code <= 0xDCFF:  # a file-name byte that is not UTF-8 (surrogateescape)
        return f"\\x{code - 0xDC00:02x}"
    return f"\\u{code:04x}"


def json_safe(value: Any) -> Any:
    """Every string of a JSON-like value encodable as UTF-8: a file-name byte that is
    not UTF-8 (a lone surrogate in Python) becomes a visible ``\\xNN``, as the
    reports write it (interfaces/safe_text.py; this layer cannot import it)."""
    if isinstance(value, str):
        return _SURROGATE.sub(_escape_surrogate, value) if _SURROGATE.search(value) else value
    if isinstance(value, dict):
        return {json_safe(k): json_safe(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [json_safe(v) for v in value]
    return value


_ESCAPED_BYTE = re.compile(r"\\x([89a-f][0-9a-f])")


def _unescaped(text: str) -> str:
    """The file name behind a :func:`json_safe` text (``\\xNN`` back to its byte)."""
    return _ESCAPED_BYTE.sub(lambda m: chr(0xDC00 + int(m.group(1), 16)), text)


def _write_json_atomic(path: Path, content: Any) -> None:
    tmp = _temp_path(path)
    content = json_safe(content)
    try:
        with open(tmp, "x", encoding="utf-8") as fh:
            json.dump(content, fh, indent=2, ensure_ascii=False, allow_nan=False)
            fh.write("\n")
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    finally:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)


def _output_sidecar(
    record: RunRecord,
    plan: ResamplingPlan,
    options: CorrectOptions,
    settings: dict[str, Any],
    inputs: dict[str, Any],
    output_sha: str,
    dataset_name: str,
    stats: ResampleStats,
) -> dict[str, Any]:
    metadata = {k: v for k, v in record.metadata.items() if k not in DROPPED_FIELDS}
    schedule = record.schedule
    assert schedule is not None
    metadata["SliceTimingCorrected"] = True
    metadata["StartTime"] = round(plan.reference, 6)
    metadata["Sources"] = [f"bids:{dataset_name}:{record.path}"]
    metadata[PROVENANCE_KEY] = {
        "Tool": "slicetime",
        "Settings": settings,
        "ReferenceTime": round(plan.reference, 6),
        "OriginalSliceTiming": [round(t, 6) for t in schedule.sidecar_order()],
        "SliceAxis": schedule.axis,
        "SliceDirection": schedule.direction,
        "TimingOrigin": record.timing_origin,
        "ConstantSeries": stats.constant,
        "SeriesWithGaps": stats.partial_nonfinite,
        "Inputs": inputs,
        "Output": {"SHA256": output_sha},
    }
    return metadata


def correct_run(
    run: RunResult, options: CorrectOptions, dataset_name: str = "raw"
) -> RunOutcome:
    """Correct one audited run. Never raises for a bad run: returns an outcome
    (Ctrl-C still propagates, after the run's temporary files are removed)."""
    started = time.perf_counter()
    record = run.record
    outcome = RunOutcome(record.path, record.root, "refused")
    forced: list[str] = []
    try:
        forced = _correct(run, options, dataset_name, outcome)
    except (CorrectionError, PlanError, IrregularGridError, ReadError) as exc:
        refused = isinstance(exc, PlanError | IrregularGridError) or (
            isinstance(exc, CorrectionError) and exc.code is not None
        )
        outcome.status = "refused" if refused else "failed"
        message = exc.message if isinstance(exc, ReadError) else str(exc)
        outcome.reason = message if message.startswith(record.path) else f"{record.path}: {message}"
        code = (IMPLAUSIBLE_CODE if isinstance(exc, ImplausibleTiming)
                else exc.code if isinstance(exc, CorrectionError) else None)
        if code is not None:
            field_name = exc.field if isinstance(exc, CorrectionError) else None
            outcome.blocking.append(
                Finding(code, Severity.ERROR, message, file=record.path, field=field_name)
            )
    except OSError as exc:
        outcome.status = "failed"
        outcome.reason = f"{record.path}: cannot write the output ({exc.strerror or exc})"
    except Exception as exc:  # a bug on one run never stops the batch
        outcome.status = "failed"
        outcome.reason = f"{record.path}: internal error ({type(exc).__name__}: {exc})"
    if outcome.ok:
        # said once, and only of a run that was corrected (never of a refused one)
        outcome.warnings[:0] = forced
    outcome.seconds = time.perf_counter() - started
    return outcome


def _refusal(run: RunResult, errors: list[Finding], force: bool) -> tuple[str | None, list[str]]:
    """Why the run is not corrected (None: it is), and the warnings when forced.

    The physical plausibility gate (:func:`check_plausible`) comes before
    ``force``: no judgement makes an impossible timing usable."""
    record = run.record
    if record.header is None:
        first = errors[0].message if errors else "the image header cannot be read"
        raise CorrectionError(first)
    if record.schedule is None:
        why = "; ".join(p.message for p in record.timing_problems) or "no slice timing found"
        return f"{record.path}: no usable slice timing ({why})", []
    try:
        check_plausible(record.schedule)
    except ImplausibleTiming as exc:
        if not errors:
            raise
        codes = ", ".join(sorted({f.code for f in errors}))
        raise ImplausibleTiming(f"{exc} (the audit found {codes}; see slicetime show)") from None
    problem = scaling_problem(record.header)
    if problem is not None:
        raise CorrectionError(f"{problem}, so the run is refused", code=SCALING_CODE,
                              field="scl_inter")
    if errors and not force:
        codes = ", ".join(sorted({f.code for f in errors}))
        return (
            f"{record.path}: the audit found errors that make the timing untrustworthy "
            f"({codes}); fix them (see slicetime show), or pass --force if you judge them "
            "harmless",
            [],
        )
    return None, [f"corrected despite audit error {f.code}: {f.message}" for f in errors]


def output_path(record_path: str, desc: str) -> Path | None:
    """The output image of a run, relative to ``--out`` (None: the input path cannot
    be mirrored)."""
    rel_in = Path(record_path)
    if rel_in.is_absolute() or ".." in rel_in.parts or not rel_in.parts:
        return None
    return rel_in.with_name(output_name(rel_in.name, desc))


def dataset_uri(root: str | Path) -> str:
    """How outputs and ``DatasetLinks`` name an input dataset: its resolved file URI."""
    return Path(os.path.realpath(root)).as_uri()


def _correct(
    run: RunResult, options: CorrectOptions, dataset_name: str, outcome: RunOutcome
) -> list[str]:
    """Correct the run into ``outcome``; return the warnings about forced audit errors."""
    record = run.record
    outcome.blocking = [f for f in run.findings if f.severity is Severity.ERROR]
    reason, forced = _refusal(run, outcome.blocking, options.force)
    if reason is not None:
        outcome.reason = reason
        return []
    header, schedule = record.header, record.schedule
    assert header is not None and schedule is not None
    engine = get_engine(options.method)
    if len(header.shape) != 4:
        raise CorrectionError(
            f"correction needs a 4-D image; this one has {len(header.shape)} dimensions "
            f"{list(header.shape)} (dim)"
        )
    if not header.compressed and not record.path.endswith(".nii"):
        raise CorrectionError("only single-file NIfTI images (.nii, .nii.gz) can be corrected")
    axis_length = header.shape[schedule.axis_index]
    if axis_length != schedule.n_slices:
        raise CorrectionError(
            f"SliceTiming has {schedule.n_slices} entries but the image has {axis_length} "
            f"slices along {schedule.axis}"
        )
    plan = make_plan(schedule, header.shape[3], options.reference)
    outcome.reference = plan.reference
    if engine.needs_regular_grid and not plan.regular:
        raise IrregularGridError(
            f"VolumeTiming spaces the volumes unevenly; the {engine.name} method needs evenly "
            "spaced volumes (use --method cubic or --method linear)"
        )

    rel_out = output_path(record.path, options.desc)
    if rel_out is None:
        raise CorrectionError("the run is outside its dataset root, so its path cannot be mirrored")
    image_out = options.out / rel_out
    sidecar_out = image_out.with_name(sidecar_name(image_out.name))
    outcome.output = rel_out.as_posix()
    settings = options.settings(engine)
    image_out.parent.mkdir(parents=True, exist_ok=True)
    if not Path(os.path.realpath(image_out.parent)).is_relative_to(os.path.realpath(options.out)):
        raise CorrectionError(
            f"{image_out.parent} leads outside --out (a symbolic link?); nothing was written"
        )
    owner = _recorded_input(sidecar_out)
    if owner is not None and owner != (dataset_uri(record.root), json_safe(record.path)):
        raise CorrectionError(
            f"{rel_out.as_posix()} in --out was written from {owner[1]} of {owner[0]}, not "
            "from this run; it is kept and this run is not written",
            code=CLASH_CODE,
        )
    if sidecar_out.exists() and image_out.exists():
        inputs = _hash_inputs(record, None)
        if _up_to_date(image_out, sidecar_out, settings, inputs):
            since = options.batch_started
            outcome.status = (
                "corrected" if since is not None and _mtime(image_out) >= since else "up-to-date"
            )
            outcome.provenance = _provenance_entry(sidecar_out, rel_out.as_posix())
            return forced

    spatial = tuple(header.shape[:3])
    n_volumes = header.shape[3]
    plane = math.prod(spatial) // axis_length
    budget = plan_budget(
        axis_length,
        n_volumes,
        plane,
        _stored_itemsize(header),
        options.max_memory,
        record.path,
        threads=max(1, options.threads),
        compressed=header.compressed,
    )
    scale = scaling(header)
    tmp_image = _temp_path(image_out)
    stats = ResampleStats()
    buffer: _MemoryBuffer | _DiskBuffer | None = None
    writer: VolumeWriter | None = None
    spatial_c = tuple(reversed(spatial))
    # the engine's imports load in a thread while the decompressor fills the buffer
    warm_up = threading.Thread(target=prepare, args=(engine,), daemon=True)
    warm_up.start()
    try:
        with VolumeReader(
            Path(record.abs_path), header, record.path, threads=options.threads
        ) as reader:
            if budget.on_disk:
                scratch = options.out / f"{TEMP_PREFIX}{os.getpid()}-scratch.f32"
                buffer = _DiskBuffer(scratch, axis_length, n_volumes, plane)
            else:
                buffer = _MemoryBuffer(axis_length, n_volumes, plane)
            batch = np.empty((budget.volumes_per_batch, *spatial_c), dtype=reader.dtype)
            for first in range(0, n_volumes, budget.volumes_per_batch):
                count = min(budget.volumes_per_batch, n_volumes - first)
                reader.read_into(batch[:count])
                buffer.put_volumes(first, _slice_major_view(batch[:count], plan.axis_index),
                                   scale)
            del batch
            prefix = reader.prefix
            image_sha = reader.sha256()
            stored_dtype = reader.dtype
        if budget.on_disk:
            _release_memory()
        else:
            _keep_freed_memory()
        warm_up.join()
        _engine_pass(buffer, plan, engine, budget, stats)
        if budget.on_disk:
            _release_memory()

        out_dtype, code, bitpix, out_scale = _output_type(header, stored_dtype, options.keep_dtype)
        cast = _Cast(out_dtype, out_scale)
        slope, inter = out_scale if out_scale is not None else (1.0, 0.0)
        new_prefix = patched_prefix(
            prefix, header, datatype=code, bitpix=bitpix, slope=slope, inter=inter
        )
        writer = VolumeWriter(
            tmp_image, new_prefix, compress=header.compressed, threads=options.threads
        )
        others = [d for i, d in enumerate(spatial_c) if i != _c_axis(plan.axis_index) - 1]
        outgoing = np.empty((budget.volumes_per_batch, *spatial_c), dtype=out_dtype)
        for first in range(0, n_volumes, budget.volumes_per_batch):
            count = min(budget.volumes_per_batch, n_volumes - first)
            block = buffer.get_volumes(first, count).reshape(axis_length, count, *others)
            target = outgoing[:count]
            cast(_volume_major_target(target, plan.axis_index), block)
            del block
            writer.write(target)
        del outgoing
        writer.close()
        output_sha = writer.sha256()
        writer = None
        buffer.close()
        buffer = None
        if cast.clipped:
            outcome.warnings.append(
                f"{cast.clipped} values were clipped to the range of {out_dtype.name}"
            )
        if cast.nonfinite:
            outcome.warnings.append(
                f"{cast.nonfinite} non-finite values were stored as 0 in {out_dtype.name}"
            )
        inputs = _hash_inputs(record, image_sha)
        sidecar = _output_sidecar(
            record, plan, options, settings, inputs, output_sha, dataset_name, stats
        )
        _commit(tmp_image, image_out, sidecar_out, sidecar)
        outcome.status = "corrected"
        outcome.provenance = _entry_of(sidecar, rel_out.as_posix())
    finally:
        if writer is not None:
            writer.abort()
        if buffer is not None:
            buffer.close()
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp_image)
    return forced


def _mtime(path: Path) -> float:
    try:
        return path.stat().st_mtime
    except OSError:
        return 0.0


def _commit(tmp_image: Path, image_out: Path, sidecar_out: Path, sidecar: dict[str, Any]) -> None:
    """Put a finished run in place as one unit: an earlier image goes first, then the
    new sidecar, then the image by atomic rename. Whatever stops this half way
    leaves at most a sidecar without an image, which never counts as a result (it
    is not up to date, and the next batch or an interrupted one removes it); a
    sidecar that cannot be written leaves no image at all."""
    content = json_safe(sidecar)
    with contextlib.suppress(FileNotFoundError):
        os.unlink(image_out)
    try:
        _write_json_atomic(sidecar_out, content)
        os.replace(tmp_image, image_out)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(sidecar_out)
        raise


def _stored_itemsize(header: Any) -> int:
    return max(1, header.bitpix // 8)


def _output_type(
    header: Any, stored: np.dtype[Any], keep: bool
) -> tuple[np.dtype[Any], int, int, tuple[float, float] | None]:
    """(numpy type with byte order, NIfTI code, bitpix, scaling) of the output."""
    if keep:
        return stored, header.datatype, header.bitpix, scaling(header)
    return np.dtype(np.float32).newbyteorder(header.byte_order), FLOAT32_CODE, 32, None


# ---------------------------------------------------------------------------
# batches


def _correct_chunk(
    items: Sequence[tuple[RunResult, str]], options: CorrectOptions
) -> list[RunOutcome]:
    return [correct_run(run, options, name) for run, name in items]


def _read_description(root: Path) -> dict[str, Any]:
    try:
        with open(root / "dataset_description.json", encoding="utf-8") as fh:
            value = json.load(fh)
        return value if isinstance(value, dict) else {}
    except (OSError, ValueError):
        return {}


def _dataset_names(
    out: Path, roots: Sequence[str], *, mix_inputs: bool
) -> tuple[dict[str, str], dict[str, str]]:
    """``(name of each root, DatasetLinks to write)``.

    An ``out`` that slicetime wrote before keeps its links and names (so the
    ``Sources`` of earlier outputs stay true); a root it does not link to is
    refused unless ``mix_inputs``, then added under a name not yet used. A folder
    that holds a dataset slicetime did not write is always refused.
    """
    path = out / "dataset_description.json"
    links: dict[str, str] = {}
    if path.exists():
        content = _read_description(out)
        generated = content.get("GeneratedBy")
        names = (
            {g.get("Name") for g in generated if isinstance(g, dict)}
            if isinstance(generated, list)
            else set()
        )
        if "slicetime" not in names:
            raise ValueError(
                f"--out {out} already holds a dataset that slicetime did not write "
                f"({path.name} has no GeneratedBy entry for slicetime); choose an empty folder"
            )
        found = content.get("DatasetLinks")
        if isinstance(found, dict):
            links = {str(k): str(v) for k, v in found.items() if isinstance(v, str)}
    by_uri = {uri: name for name, uri in links.items()}
    others = [root for root in roots if dataset_uri(root) not in by_uri]
    if links and others and not mix_inputs:
        raise ValueError(
            f"--out {out} holds outputs made from {', '.join(sorted(links.values()))}, not "
            f"from {others[0]}; choose another folder, or pass --mix-inputs to add this "
            "dataset's runs beside them"
        )
    result: dict[str, str] = {}
    for root in roots:
        uri = dataset_uri(root)
        if uri not in by_uri:
            number = len(links) + 1
            while (name := "raw" if number == 1 else f"raw{number}") in links:
                number += 1
            links[name] = uri
            by_uri[uri] = name
        result[root] = by_uri[uri]
    return result, links


def _write_description(
    out: Path, roots: Sequence[str], links: dict[str, str], options: CorrectOptions
) -> None:
    engine = get_engine(options.method)
    first = _read_description(Path(roots[0])) if roots else {}
    bids_version = first.get("BIDSVersion") if isinstance(first.get("BIDSVersion"), str) else None
    description = {
        "Name": "Slice-timing corrected runs (slicetime)",
        "BIDSVersion": bids_version or "1.10.0",
        "DatasetType": "derivative",
        "GeneratedBy": [
            {
                "Name": "slicetime",
                "Version": __version__,
                "Description": (
                    f"Slice-timing correction with the {engine.name} method "
                    f"({engine.summary}); reference {options.reference.describe()}; "
                    f"parameters {json.dumps(dict(engine.parameters), sort_keys=True)}"
                ),
            }
        ],
        "DatasetLinks": dict(sorted(links.items())),
    }
    _write_json_atomic(out / "dataset_description.json", description)


def _entry_of(sidecar: dict[str, Any], output: str) -> dict[str, Any] | None:
    """The provenance file's entry for one output, from its sidecar: every field of
    the sidecar's provenance, its ``Sources`` and ``OutputPath`` (the same for a run
    corrected now and one corrected by an earlier, possibly killed, batch)."""
    recorded = sidecar.get(PROVENANCE_KEY)
    if not isinstance(recorded, dict):
        return None
    return {**recorded, "Sources": sidecar.get("Sources"), "OutputPath": output}


def _read_sidecar_json(path: Path) -> dict[str, Any] | None:
    try:
        with open(path, encoding="utf-8") as fh:
            value = json.load(fh)
        return value if isinstance(value, dict) else None
    except (OSError, ValueError):
        return None


def _provenance_entry(sidecar_out: Path, output: str) -> dict[str, Any] | None:
    content = _read_sidecar_json(sidecar_out)
    return _entry_of(content, output) if content is not None else None


def _recorded_input(sidecar_out: Path) -> tuple[str, str] | None:
    """``(dataset URI, image path)`` an existing output sidecar records as its input
    (None: no such sidecar, or not one slicetime wrote with its dataset)."""
    content = _read_sidecar_json(sidecar_out) if sidecar_out.exists() else None
    recorded = content.get(PROVENANCE_KEY) if content else None
    inputs = recorded.get("Inputs") if isinstance(recorded, dict) else None
    if not isinstance(inputs, dict) or not isinstance(inputs.get("Dataset"), str):
        return None
    image = inputs.get("Image")
    path = image.get("Path") if isinstance(image, dict) else None
    return (inputs["Dataset"], path) if isinstance(path, str) else None


def _output_files(out: Path, output: str) -> tuple[Path, Path]:
    image = out / output
    return image, image.with_name(sidecar_name(image.name))


def _write_provenance(out: Path, outcomes: Sequence[RunOutcome]) -> None:
    """Rewrite ``slicetime-provenance.json`` to match the files: an entry (with
    ``OutputPath``) for every output whose image and sidecar are in ``out``, none for
    an output that is gone, and under ``Removed`` the outputs this tool withdrew."""
    path = out / PROVENANCE_FILE
    existing = _read_sidecar_json(path) or {}
    runs = existing.get("Runs", {})
    runs = dict(runs) if isinstance(runs, dict) else {}
    removed = existing.get("Removed", {})
    removed = dict(removed) if isinstance(removed, dict) else {}
    for outcome in outcomes:
        if outcome.removed is not None:
            runs.pop(json_safe(outcome.removed), None)
            removed[json_safe(outcome.removed)] = outcome.reason or "withdrawn"
        if outcome.output is None or not outcome.ok:
            continue
        key = json_safe(outcome.output)
        removed.pop(key, None)
        entry = outcome.provenance
        if entry is None:
            entry = _provenance_entry(_output_files(out, outcome.output)[1], outcome.output)
        if entry is not None:
            runs[key] = entry
    for key in list(runs):
        if not any(image.is_file() and sidecar.is_file()
                   for image, sidecar in (_output_files(out, k) for k in {key, _unescaped(key)})):
            del runs[key]
    content = {
        "Tool": {"Name": "slicetime", "Version": __version__},
        "Runs": dict(sorted(runs.items())),
    }
    if removed:
        content["Removed"] = dict(sorted(removed.items()))
    _write_json_atomic(path, content)


def _owner_alive(name: str) -> bool:
    """Whether the process that named a temporary file (by its pid) still runs."""
    pid_text = name[len(TEMP_PREFIX) :].split("-", 1)[0]
    if not pid_text.isdigit():
        return False
    pid = int(pid_text)
    if pid == os.getpid():
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def remove_stale_temporaries(out: Path) -> int:
    """Delete temporary files an interrupted earlier batch left under ``out``
    (not those of a batch that is still running)."""
    removed = 0
    if not out.is_dir():
        return 0
    for dirpath, _dirs, files in os.walk(out):
        for name in files:
            if name.startswith(TEMP_PREFIX) and not _owner_alive(name):
                with contextlib.suppress(FileNotFoundError):
                    os.unlink(os.path.join(dirpath, name))
                    removed += 1
    return removed


def correct_paths(
    paths: Sequence[Path],
    options: CorrectOptions,
    *,
    jobs: int = 1,
    progress: Progress | None = None,
    policy_file: Path | None = None,
    include_derivatives: bool = False,
    include_sourcedata: bool = False,
    include_hidden: bool = False,
    executor: Executor | None = None,
) -> CorrectResult:
    """Correct every run under ``paths`` into ``options.out``.

    Raises ``ValueError`` for a bad output location (usage error) and
    ``ReadError`` for a missing given path; everything about a single run
    becomes its outcome.
    """
    get_engine(options.method)
    if not _DESC_RE.match(options.desc):
        raise ValueError(f"--desc {options.desc!r} must be letters and digits only")
    audit: AuditResult = audit_paths(
        paths,
        include_derivatives=include_derivatives,
        include_sourcedata=include_sourcedata,
        include_hidden=include_hidden,
        policy_file=policy_file,
    )
    roots = sorted({r.record.root for r in audit.runs})
    given_roots = {str(find_root(Path(p))) for p in paths} | set(audit.roots) | set(roots)
    check_output_location(
        options.out, [Path(r) for r in sorted(given_roots)], list(paths),
        include_derivatives=include_derivatives,
    )
    names, links = _dataset_names(options.out, roots, mix_inputs=options.mix_inputs)
    result = CorrectResult(out=str(options.out))
    result.dataset_findings = [
        f for f in audit.dataset_findings if f.severity is Severity.ERROR
    ]
    clashes = _clashing_runs(audit.runs, options.desc)
    created_out = not options.out.exists()
    options.out.mkdir(parents=True, exist_ok=True)
    remove_stale_temporaries(options.out)
    if any(r.record.abs_path not in clashes for r in audit.runs):
        # before any output: a batch killed half way still names its inputs
        _write_description(options.out, roots, links, options)
    items = [(run, names[run.record.root]) for run in audit.runs
             if run.record.abs_path not in clashes]
    started = time.time()
    options = dataclasses.replace(options, batch_started=started)
    if options.threads <= 0:
        options = dataclasses.replace(options, threads=_auto_threads(executor, jobs, len(items)))
    job = _ChunkJob(options)
    try:
        done = map_chunks(
            job,
            items,
            lost=_lost_run,
            executor=executor,
            jobs=jobs,
            chunk_size=1,
            progress=progress,
            failed_of=lambda outcome: not outcome.ok,
        )
    except Interrupted as stop:
        # the workers are gone: what is on disk now is final; report exactly that
        remove_stale_temporaries(options.out)
        finished: list[RunOutcome] = []
        for item, outcome in zip(items, stop.results, strict=True):
            found = outcome if outcome is not None else _found_on_disk(item, options, started)
            if found is not None:
                finished.append(found)
        result.runs = _in_input_order(audit.runs, finished, clashes)
        _withdraw_stale(options, audit.runs, result.runs)
        _finish(options, roots, links, result, created_out)
        raise CorrectInterrupted(result, len(items) - len(finished)) from None
    result.runs = _in_input_order(audit.runs, done, clashes)
    _withdraw_stale(options, audit.runs, result.runs)
    remove_stale_temporaries(options.out)  # of a worker that was lost
    _finish(options, roots, links, result, created_out)
    return result


def _in_input_order(
    runs: Sequence[RunResult], outcomes: Sequence[RunOutcome], clashes: dict[str, RunOutcome]
) -> list[RunOutcome]:
    by_key = {(o.root, o.path): o for o in outcomes}
    ordered = []
    for run in runs:
        record = run.record
        outcome = clashes.get(record.abs_path) or by_key.get((record.root, record.path))
        if outcome is not None:
            ordered.append(outcome)
    return ordered


def _found_on_disk(
    item: tuple[RunResult, str], options: CorrectOptions, since: float
) -> RunOutcome | None:
    """After Ctrl-C, a run whose worker was stopped: ``corrected`` when this batch put
    its image and sidecar in place (the image matches the sidecar's checksum), else
    nothing, after removing a sidecar or image of this batch that lacks its partner."""
    record = item[0].record
    rel_out = output_path(record.path, options.desc)
    if rel_out is None:
        return None
    image, sidecar = _output_files(options.out, rel_out.as_posix())

    def fresh(path: Path) -> bool:
        try:
            return path.stat().st_mtime >= since - 0.05
        except OSError:
            return False

    if not (fresh(image) or fresh(sidecar)):
        return None  # untouched by this batch: left as it was
    content = _read_sidecar_json(sidecar)
    entry = _entry_of(content, rel_out.as_posix()) if content is not None else None
    output = entry.get("Output") if entry is not None else None
    if (image.is_file() and isinstance(output, dict)
            and output.get("SHA256") == file_sha256(image)
            and _recorded_input(sidecar) == (dataset_uri(record.root), json_safe(record.path))):
        outcome = RunOutcome(record.path, record.root, "corrected", output=rel_out.as_posix())
        outcome.provenance = entry
        return outcome
    for path in (image, sidecar):
        if fresh(path):
            with contextlib.suppress(OSError):
                os.unlink(path)
    return None


def _withdraw_stale(
    options: CorrectOptions, runs: Sequence[RunResult], outcomes: Sequence[RunOutcome]
) -> None:
    """A run refused or failed now whose earlier output is still in ``out`` (written
    from this very input): remove that output, so nothing stale looks valid, and
    say so in the run's reason and in the provenance file (``Removed``)."""
    for outcome in outcomes:
        if outcome.ok:
            continue
        rel_out = output_path(outcome.path, options.desc)
        if rel_out is None:
            continue
        image, sidecar = _output_files(options.out, rel_out.as_posix())
        if _recorded_input(sidecar) != (dataset_uri(outcome.root), json_safe(outcome.path)):
            continue  # not an output of this run (or not one slicetime wrote)
        for path in (image, sidecar):
            with contextlib.suppress(FileNotFoundError):
                os.unlink(path)
        outcome.removed = rel_out.as_posix()
        note = f"its earlier output {rel_out.as_posix()} was removed, as it no longer holds"
        outcome.reason = f"{outcome.reason}; {note}" if outcome.reason else note


def _clashing_runs(runs: Sequence[RunResult], desc: str) -> dict[str, RunOutcome]:
    """Runs that would be written onto one output (same output sidecar: names that
    differ only in ``desc``, ``.nii``/``.nii.gz`` twins, one path in two roots):
    each is refused with a ``correct/output-clash`` finding naming all of them."""
    groups: dict[str, list[RunRecord]] = {}
    for run in runs:
        rel_out = output_path(run.record.path, desc)
        if rel_out is None:
            continue
        key = rel_out.with_name(sidecar_name(rel_out.name)).as_posix()
        groups.setdefault(key, []).append(run.record)
    clashes: dict[str, RunOutcome] = {}
    for key, records in groups.items():
        if len(records) < 2:
            continue
        for record in records:
            others = [r for r in records if r is not record]
            named = ", ".join(
                o.path if o.root == record.root else f"{o.path} (in {o.root})" for o in others
            )
            message = (
                f"{record.path} and {named} would be written to one output "
                f"({key} in --out); none of them is corrected"
            )
            finding = Finding(CLASH_CODE, Severity.ERROR, message, file=record.path,
                              evidence={"inputs": [record.path, *[o.path for o in others]],
                                        "output": key})
            clashes[record.abs_path] = RunOutcome(
                record.path, record.root, "refused", reason=message, blocking=[finding]
            )
    return clashes


def _auto_threads(executor: Executor | None, jobs: int, n_runs: int) -> int:
    """Threads per run so that the runs corrected at once share the CPUs."""
    if executor is not None and executor.name == "dask":
        return 1  # a Dask worker runs as many tasks as it has threads
    at_once = getattr(executor, "jobs", jobs) if executor is not None else jobs
    return max(1, available_cpus() // max(1, min(at_once, n_runs)))


class CorrectInterrupted(KeyboardInterrupt):
    """Ctrl-C during a batch: ``result`` holds the runs that finished."""

    def __init__(self, result: CorrectResult, not_finished: int) -> None:
        super().__init__("interrupted")
        self.result = result
        self.not_finished = not_finished


def _finish(
    options: CorrectOptions,
    roots: Sequence[str],
    links: dict[str, str],
    result: CorrectResult,
    created_out: bool,
) -> None:
    withdrawn = any(r.removed for r in result.runs)
    if any(r.ok for r in result.runs) or withdrawn:
        _write_description(options.out, roots, links, options)
        _write_provenance(options.out, result.runs)
    elif created_out:  # nothing was written: leave no folder behind
        for name in ("dataset_description.json", PROVENANCE_FILE):
            with contextlib.suppress(FileNotFoundError):
                os.unlink(options.out / name)
    _prune_empty_folders(options.out, result.runs, options.desc, remove_out=created_out)


def _lost_run(item: tuple[RunResult, str], why: str) -> RunOutcome:
    record = item[0].record
    return RunOutcome(record.path, record.root, "failed", reason=f"{record.path}: {why}")


def _prune_empty_folders(
    out: Path, runs: Sequence[RunOutcome], desc: str, *, remove_out: bool
) -> None:
    """Remove the folders made for runs that produced nothing, so a failed batch
    leaves nothing behind (and ``out`` itself when this batch created it)."""
    for run in runs:
        if run.ok:
            continue
        target = output_path(run.path, desc)
        if target is None:
            continue
        folder = (out / target).parent
        while folder != out and out in folder.parents:
            try:
                folder.rmdir()
            except OSError:
                break  # not empty (other outputs live there) or already gone
            folder = folder.parent
    if remove_out:
        with contextlib.suppress(OSError):
            out.rmdir()


@dataclass(frozen=True)
class _ChunkJob:
    options: CorrectOptions

    def __call__(self, items: Sequence[tuple[RunResult, str]]) -> list[RunOutcome]:
        return _correct_chunk(items, self.options)


__all__ = [
    "DEFAULT_DESC",
    "PROVENANCE_FILE",
    "PROVENANCE_KEY",
    "CorrectInterrupted",
    "CorrectOptions",
    "CorrectResult",
    "CorrectionError",
    "RunOutcome",
    "check_output_location",
    "correct_paths",
    "correct_run",
    "output_name",
    "parse_size",
    "remove_stale_temporaries",
]
