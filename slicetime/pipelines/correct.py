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
    PlanError,
    ReferenceChoice,
    ResamplingPlan,
    ShiftGroup,
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
from slicetime.readers.entities import parse_name
from slicetime.readers.errors import ReadError
from slicetime.readers.nifti import size_text
from slicetime.readers.volumes import (
    FLOAT32_CODE,
    VolumeReader,
    VolumeWriter,
    file_sha256,
    patched_prefix,
    scaling,
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
    """A run cannot be corrected; the message names the file and the reason."""


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


def check_output_location(out: Path, roots: Sequence[Path]) -> None:
    """Refuse an output folder that would put files into an input dataset.

    ``out`` may be outside every root, or inside a root's ``derivatives/``
    folder (the BIDS convention); nowhere else inside a root.
    """
    out_real = Path(os.path.realpath(out))
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
        if root_real.is_relative_to(out_real):
            raise ValueError(f"--out {out} contains the input dataset {root}")


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


def plan_budget(
    n_slices: int,
    n_volumes: int,
    plane: int,
    stored_itemsize: int,
    cap: int | None,
    shown: str,
    threads: int = 1,
) -> Budget:
    """Batch sizes for a run, from the memory cap (None: no cap, everything in memory).

    Accounted: the slice-major buffer (unless it goes to a scratch file), a batch of
    stored volumes plus its float32 copy on the way in and out, and per engine
    thread one slice (twice when it comes from a scratch file) and the engine's
    temporaries for one block of voxels.
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
    # batches as small as without a cap (16 MiB), and at most a quarter of the cap
    batch = max(1, min(n_volumes, (16 << 20) // per_volume, cap // (4 * per_volume)))
    if buffer_bytes + max(engine_bytes, batch * per_volume) <= cap:  # fits: no scratch file
        return Budget(False, int(batch), BLOCK_VOXELS, threads)
    smallest_block = 16
    need = max(2 * slice_bytes + smallest_block * per_voxel, per_volume)
    if cap < need:
        raise CorrectionError(
            f"{shown}: --max-memory {size_text(cap)} is too small for this run; one slice's "
            f"series need about {size_text(need)}"
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
    """``target[...] = block * slope + inter`` in float32, without a temporary."""
    np.copyto(target, block, casting="unsafe")
    if scale is not None:
        slope, inter = scale
        target *= np.float32(slope)
        if inter:
            target += np.float32(inter)


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
    root = Path(record.root)
    sidecars = []
    for rel in record.sidecar_chain:
        sidecars.append({"Path": rel, "SHA256": file_sha256(root / rel)})
    image = {"Path": record.path, "SHA256": image_sha or file_sha256(Path(record.abs_path))}
    return {"Image": image, "Sidecars": sidecars}


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


def _write_json_atomic(path: Path, content: Any) -> None:
    tmp = _temp_path(path)
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
    """Correct one audited run. Never raises for a bad run: returns an outcome."""
    started = time.perf_counter()
    record = run.record
    outcome = RunOutcome(record.path, record.root, "refused")
    try:
        _correct(run, options, dataset_name, outcome)
    except (CorrectionError, PlanError, IrregularGridError, ReadError) as exc:
        outcome.status = "refused" if isinstance(exc, PlanError | IrregularGridError) else "failed"
        message = exc.message if isinstance(exc, ReadError) else str(exc)
        outcome.reason = message if message.startswith(record.path) else f"{record.path}: {message}"
    except OSError as exc:
        outcome.status = "failed"
        outcome.reason = f"{record.path}: cannot write the output ({exc.strerror or exc})"
    outcome.seconds = time.perf_counter() - started
    return outcome


def _refusal(run: RunResult, errors: list[Finding], force: bool) -> tuple[str | None, list[str]]:
    """Why the run is not corrected (None: it is), and the warnings when forced."""
    record = run.record
    if record.header is None:
        first = errors[0].message if errors else "the image header cannot be read"
        raise CorrectionError(first)
    if record.schedule is None:
        why = "; ".join(p.message for p in record.timing_problems) or "no slice timing found"
        return f"{record.path}: no usable slice timing ({why})", []
    if errors and not force:
        codes = ", ".join(sorted({f.code for f in errors}))
        return (
            f"{record.path}: the audit found errors that make the timing untrustworthy "
            f"({codes}); fix them (see slicetime show), or pass --force if you judge them "
            "harmless",
            [],
        )
    return None, [f"corrected despite audit error {f.code}: {f.message}" for f in errors]


def _correct(
    run: RunResult, options: CorrectOptions, dataset_name: str, outcome: RunOutcome
) -> None:
    record = run.record
    outcome.blocking = [f for f in run.findings if f.severity is Severity.ERROR]
    reason, warnings = _refusal(run, outcome.blocking, options.force)
    outcome.warnings.extend(warnings)
    if reason is not None:
        outcome.reason = reason
        return
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

    rel_in = Path(record.path)
    if rel_in.is_absolute() or ".." in rel_in.parts:
        raise CorrectionError("the run is outside its dataset root, so its path cannot be mirrored")
    rel_out = rel_in.with_name(output_name(rel_in.name, options.desc))
    image_out = options.out / rel_out
    sidecar_out = image_out.with_name(sidecar_name(image_out.name))
    outcome.output = rel_out.as_posix()
    settings = options.settings(engine)
    image_out.parent.mkdir(parents=True, exist_ok=True)
    if not Path(os.path.realpath(image_out.parent)).is_relative_to(os.path.realpath(options.out)):
        raise CorrectionError(
            f"{image_out.parent} leads outside --out (a symbolic link?); nothing was written"
        )
    if sidecar_out.exists() and image_out.exists():
        inputs = _hash_inputs(record, None)
        if _up_to_date(image_out, sidecar_out, settings, inputs):
            outcome.status = "up-to-date"
            return

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
        os.replace(tmp_image, image_out)
        _write_json_atomic(sidecar_out, sidecar)
        outcome.status = "corrected"
        outcome.provenance = sidecar[PROVENANCE_KEY] | {"OutputPath": rel_out.as_posix()}
    finally:
        if writer is not None:
            writer.abort()
        if buffer is not None:
            buffer.close()
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp_image)


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


def _dataset_names(roots: Sequence[str]) -> dict[str, str]:
    return {root: ("raw" if i == 0 else f"raw{i + 1}") for i, root in enumerate(roots)}


def _read_description(root: Path) -> dict[str, Any]:
    try:
        with open(root / "dataset_description.json", encoding="utf-8") as fh:
            value = json.load(fh)
        return value if isinstance(value, dict) else {}
    except (OSError, ValueError):
        return {}


def _check_existing_description(out: Path) -> None:
    path = out / "dataset_description.json"
    if not path.exists():
        return
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


def _write_description(
    out: Path, roots: Sequence[str], names: dict[str, str], options: CorrectOptions
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
        "DatasetLinks": {names[r]: Path(r).resolve().as_uri() for r in roots},
    }
    _write_json_atomic(out / "dataset_description.json", description)


def _write_provenance(out: Path, outcomes: Sequence[RunOutcome]) -> None:
    path = out / PROVENANCE_FILE
    try:
        with open(path, encoding="utf-8") as fh:
            existing = json.load(fh)
        runs = existing.get("Runs", {}) if isinstance(existing, dict) else {}
        runs = runs if isinstance(runs, dict) else {}
    except (OSError, ValueError):
        runs = {}
    for outcome in outcomes:
        if outcome.output is None or not outcome.ok:
            continue
        if outcome.provenance is not None:
            runs[outcome.output] = outcome.provenance
        elif outcome.output not in runs:
            recorded = _recorded_provenance(out / outcome.output)
            if recorded is not None:
                runs[outcome.output] = recorded
    content = {
        "Tool": {"Name": "slicetime", "Version": __version__},
        "Runs": dict(sorted(runs.items())),
    }
    _write_json_atomic(path, content)


def _recorded_provenance(image: Path) -> dict[str, Any] | None:
    try:
        with open(image.with_name(sidecar_name(image.name)), encoding="utf-8") as fh:
            value = json.load(fh).get(PROVENANCE_KEY)
        return value if isinstance(value, dict) else None
    except (OSError, ValueError, AttributeError):
        return None


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
    roots = sorted({r.record.root for r in audit.runs}) or audit.roots
    check_output_location(options.out, [Path(r) for r in roots])
    _check_existing_description(options.out)
    result = CorrectResult(out=str(options.out))
    result.dataset_findings = [
        f for f in audit.dataset_findings if f.severity is Severity.ERROR
    ]
    names = _dataset_names(roots)
    _refuse_collisions(audit.runs)
    created_out = not options.out.exists()
    options.out.mkdir(parents=True, exist_ok=True)
    remove_stale_temporaries(options.out)
    items = [(run, names[run.record.root]) for run in audit.runs]
    if options.threads <= 0:
        options = dataclasses.replace(options, threads=_auto_threads(executor, jobs, len(items)))
    job = _ChunkJob(options)
    try:
        result.runs = map_chunks(
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
        finished = [r for r in stop.results if r is not None]
        result.runs = finished
        _finish(options, roots, names, result, created_out)
        raise CorrectInterrupted(result, len(items) - len(finished)) from None
    _finish(options, roots, names, result, created_out)
    return result


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
    names: dict[str, str],
    result: CorrectResult,
    created_out: bool,
) -> None:
    if any(r.ok for r in result.runs):
        _write_description(options.out, roots, names, options)
        _write_provenance(options.out, result.runs)
    _prune_empty_folders(options.out, result.runs, remove_out=created_out)


def _lost_run(item: tuple[RunResult, str], why: str) -> RunOutcome:
    record = item[0].record
    return RunOutcome(record.path, record.root, "failed", reason=f"{record.path}: {why}")


def _prune_empty_folders(out: Path, runs: Sequence[RunOutcome], *, remove_out: bool) -> None:
    """Remove the folders made for runs that produced nothing, so a failed batch
    leaves nothing behind (and ``out`` itself when this batch created it)."""
    for run in runs:
        if run.ok or run.output is None:
            continue
        folder = (out / run.output).parent
        while folder != out and out in folder.parents:
            try:
                folder.rmdir()
            except OSError:
                break  # not empty (other outputs live there) or already gone
            folder = folder.parent
    if remove_out:
        with contextlib.suppress(OSError):
            out.rmdir()


def _refuse_collisions(runs: Sequence[RunResult]) -> None:
    seen: dict[str, str] = {}
    for run in runs:
        other = seen.setdefault(run.record.path, run.record.root)
        if other != run.record.root:
            raise ValueError(
                f"{run.record.path} exists in both {other} and {run.record.root}; their "
                "outputs would collide, correct the datasets into separate --out folders"
            )


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
