"""`slicetime correct` against a nibabel load-and-save baseline, at three scales.

Three invented datasets, each generated once and cached under --work (a stamp
with the parameters marks a dataset complete). Their content looks like a head:
an ellipsoid of signal around 1000 with a fixed texture, slow drifts, a small
block-design response and thermal noise, and an exactly zero background (a bit
over half the voxels), so gzip behaves like it does on real runs.

* standard: one 64×64×40×600 int16 ``.nii.gz`` run, TR 2 s, interleaved
  SliceTiming over 40 slices (compressed with zlib level 6);
* multiband: one 96×96×66×1200 int16 ``.nii.gz`` run, TR 1 s, 66 slices
  acquired 3 at a time (SliceTiming with 22 distinct times, each 3 times;
  ``MultibandAccelerationFactor`` 3). Its float32 array is 2.7 GiB. It is
  written with a fast threaded gzip (isal level 1) so that generating it takes
  well under a minute;
* batch: six 64×64×32×200 int16 runs (one per subject), TR 2 s, interleaved.

Every measured command runs in a fresh wrapper process that starts it, times
it and reports the peak RSS of that one child (``RUSAGE_CHILDREN`` of a
process that has had no other children; for ``--jobs 2`` the largest single
process of the tree, not their sum):

* baseline: nibabel loads the run, converts it to float32 and saves it as a
  float32 ``.nii.gz`` (the output type ``correct`` writes by default; nibabel
  compresses at its default level 1, as ``correct`` does);
* standard run: ``slicetime correct DS --out OUT`` (fourier, a fresh OUT every
  time) --repeat times, interleaved with the baseline repetitions so drifts in
  machine load hit both; then once each ``--method sinc``, ``cubic``,
  ``linear`` and ``--max-memory CAP``;
* multiband run: the baseline, fourier and ``--max-memory MB_CAP``, once each;
* batch: ``--jobs 1`` and ``--jobs 2`` alternating, --batch-repeat times each;
* the interpreter overhead: a process that only imports what ``correct`` imports.

One unmeasured baseline and correct run of the standard run come first
(--warmup); the multiband and batch files are read once beforehand so that
they sit in the page cache.

Targets (from the design), on the standard run: fourier wall time ≤ 0.5 ×
baseline; fourier peak RSS < 2 × the float32 array; and, on both the standard
and the multiband run, the ``--max-memory`` peak ≤ cap + overhead. The other
ratios (methods, the multiband run's time and memory, ``--jobs 2`` ÷
``--jobs 1``) are reported without a target. Absolute seconds vary between
machines, the ratios are what the targets are about.

With ``--profile`` (the default; standard run only) four more runs show where
``correct`` spends its time: one with timers wrapped around its phases (read,
engine, write, ...; wall clock, and the processor time of all the process's
threads meanwhile; the wrapping happens in the child, slicetime is not
modified; functions that no longer exist are skipped with a note), the same on
the run's ``.nii`` copy, the same with the memory cap, and one ``correct_paths``
call under cProfile (main thread only; the gzip helper threads show up as lock
waits); last, the slowest imports (``python -X importtime``), part of every
command's wall time.

The results are written to --out as JSON after each part (``"complete":
false`` until the end), so a late failure keeps what was measured.

    python benchmarks/bench_correct.py [--runs standard,multiband,batch]
        [--volumes 600] [--repeat 3] [--cap 160M] [--warmup 1]
        [--multiband-volumes 1200] [--multiband-cap 1G]
        [--batch-runs 6] [--batch-volumes 200] [--batch-repeat 3]
        [--work bench-results/work] [--out bench-results/correct.json] [--no-profile]

For a quick check of the script itself: --volumes 40 --multiband-volumes 30
--batch-volumes 20 --repeat 1 --batch-repeat 1 --warmup 0.
"""

from __future__ import annotations

import argparse
import gzip
import json
import os
import platform
import pstats
import shutil
import statistics
import subprocess
import sys
import time
from collections.abc import Callable, Sequence
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import IO, Any

import nibabel as nib
import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from slicetime.schemes.generate import Protocol, slice_timing

REPO = Path(__file__).resolve().parents[1]

GENERATOR_VERSION = 1
GZIP_LEVEL = 6  # standard run: what converters typically use; decoding speed barely depends on it
FAST_GZIP_LEVEL = 1  # multiband and batch runs: isal's fast level, in helper threads
SEED = 20240611
DESC = "timealigned"
MIB = 1 << 20
GIB = 1 << 30
BLOCK_BYTES = 64 * MIB  # float32 working set per block of generated volumes
PARTS = ("standard", "multiband", "batch", "floor")

# Runs ``argv[1]`` (a JSON list) with stdout/stderr to ``argv[2]`` and prints its
# wall time and rusage. ru_maxrss of RUSAGE_CHILDREN is the largest over all
# children so far (and their reaped children): this wrapper has exactly one.
WRAPPER = """
import json, resource, subprocess, sys, time
cmd = json.loads(sys.argv[1])
with open(sys.argv[2], "wb") as log:
    start = time.perf_counter()
    rc = subprocess.call(cmd, stdout=log, stderr=subprocess.STDOUT)
    wall = time.perf_counter() - start
ru = resource.getrusage(resource.RUSAGE_CHILDREN)
print(json.dumps({"rc": rc, "wall": wall, "maxrss_kib": ru.ru_maxrss,
                  "user": ru.ru_utime, "sys": ru.ru_stime}))
"""

BASELINE = """
import sys
import nibabel as nib
import numpy as np
img = nib.load(sys.argv[1])
data = img.get_fdata(dtype=np.float32)
header = img.header.copy()
header.set_data_dtype(np.float32)
nib.save(nib.Nifti1Image(data, img.affine, header), sys.argv[2])
"""

OVERHEAD = "import slicetime.pipelines.correct, scipy.fft, numpy, nibabel"

# The I/O floor of a correction, by hand: decode the image (isal, in a helper
# thread with correct's queue depth), convert the stored int16 to float32 a batch
# at a time into one float32 array (allocated and faulted in as correct's buffer is,
# by a helper thread beside the decoder; as correct fills its buffer), encode the float32
# (with glibc's allocator set as correct sets it for writing)
# volumes (isal level 1 in two helper threads, as correct does) and write them
# durably (fsync, as correct does). No interpolation and no audit. The float32
# values are the stored ones times a fixed pattern of factors just above 1, so they
# have random low mantissa bits as interpolated values do: the encoder then sees
# data of the entropy of a real corrected run (the script reports both sizes).
# A .nii input is read and written uncompressed. argv: input image, output image,
# and "hash" or "none". With "hash" the floor also computes what correct must record
# for provenance, each byte hashed once and off the main thread: the SHA-256 of the
# input file (of the bytes as they are read for .nii; of the compressed file, read
# again from the page cache by a helper thread, for .nii.gz) and of the output file
# (of each chunk as it is written for .nii; of the compressed bytes in the encoder's
# writer thread for .nii.gz).
FLOOR = """
import ctypes, hashlib, io, mmap, os, queue, sys, threading
import numpy as np
from isal import igzip_threaded

CHUNK = 16 << 20
src, dst, hashing = sys.argv[1], sys.argv[2], sys.argv[3] == "hash"
compressed = src.endswith(".gz")


class Hasher:  # one helper thread: digest.update(view) in the order submitted
    def __init__(self):
        self.jobs = queue.Queue()
        threading.Thread(target=self.run, daemon=True).start()

    def run(self):
        while True:
            digest, view = self.jobs.get()
            digest.update(view)
            self.jobs.task_done()

    def submit(self, digest, view):
        self.jobs.put((digest, view))

    def wait(self):
        self.jobs.join()


class HashingFile:  # the compressed output's bytes, hashed where they are written
    def __init__(self, fh, digest):
        self.fh, self.digest = fh, digest

    def write(self, data):
        self.digest.update(data)
        return self.fh.write(data)

    def flush(self):
        self.fh.flush()

    def writable(self):
        return True

    def close(self):
        pass

    @property
    def closed(self):
        return self.fh.closed


hasher = Hasher() if hashing else None
in_digest, out_digest = hashlib.sha256(), hashlib.sha256()
if hashing and compressed:  # the compressed input file, read again by a helper thread
    def hash_file():
        with open(src, "rb", buffering=0) as fh:
            buf = memoryview(bytearray(1 << 20))
            while n := fh.readinto(buf):
                in_digest.update(buf[:n])
    input_hash = threading.Thread(target=hash_file, daemon=True)
    input_hash.start()
if compressed:  # a decoder thread keeping 16 blocks of 1 MiB ready, as correct's does
    fh = io.BufferedReader(igzip_threaded._ThreadedGzipReader(src, queue_size=16,
                                                              block_size=1 << 20))
else:
    fh = open(src, "rb", buffering=0)
with fh:
    head = fh.read(348)
    assert np.frombuffer(head, "<i4", 1, 0)[0] == 348, "a little-endian NIfTI-1 header"
    assert np.frombuffer(head, "<i2", 1, 70)[0] == 4, "int16 voxels"
    prefix = head + fh.read(int(np.frombuffer(head, "<f4", 1, 108)[0]) - 348)
    if hashing and not compressed:
        in_digest.update(prefix)
    dim = np.frombuffer(head, "<i2", 8, 40)
    n = int(np.prod(dim[1:1 + dim[0]], dtype=np.int64))
    # the float32 array as correct allocates its buffer (readers.scratch.fresh_float32):
    # a mapping of its own, its pages faulted in by a helper thread beside the decoder
    memory = mmap.mmap(-1, n * 4, flags=mmap.MAP_PRIVATE | mmap.MAP_ANONYMOUS)
    data = np.frombuffer(memory, np.float32)
    madvise = ctypes.CDLL(None).madvise
    madvise.argtypes = [ctypes.c_void_p, ctypes.c_size_t, ctypes.c_int]

    def populate(address=data.ctypes.data, size=n * 4, step=16 << 20):
        for offset in range(0, size, step):
            madvise(address + offset, min(step, size - offset), 23)  # MADV_POPULATE_WRITE

    threading.Thread(target=populate, daemon=True).start()
    table = 1 + np.random.default_rng(0).random(1 << 20, dtype=np.float32) * np.float32(1e-3)
    step = CHUNK // 2
    stored = np.empty(step, np.int16)  # one batch, reused
    for first in range(0, n, step):
        count = min(step, n - first)
        part = stored[:count].view(np.uint8).data
        if hasher is not None:
            hasher.wait()  # the previous batch is hashed before it is overwritten
        got = 0
        while got < len(part):
            got += fh.readinto(part[got:])
        if hasher is not None and not compressed:
            hasher.submit(in_digest, part)  # hashed while it is converted
        # stored type -> float32 (a cast, as correct's), then times the pattern in
        # float32 (the same values as a mixed int16 x float32 multiply, which took
        # about twice as long)
        part_out = data[first:first + count]
        np.copyto(part_out, stored[:count], casting="unsafe")
        whole = count - count % table.size
        rows = part_out[:whole].reshape(-1, table.size)
        rows *= table
        part_out[whole:] *= table[:count - whole]
    if hasher is not None and not compressed:
        hasher.wait()
        in_digest.update(fh.read())  # whatever follows the data
del stored
# the allocator as correct sets it for its engine and write phases
# (pipelines.memory.allocator_tuning): freed blocks up to 64 MiB kept for reuse, so the
# encoder's blocks do not come from fresh pages each time
try:
    libc = ctypes.CDLL("libc.so.6")
    libc.mallopt(-3, 64 << 20)  # M_MMAP_THRESHOLD
    libc.mallopt(-1, 128 << 20)  # M_TRIM_THRESHOLD
except (OSError, AttributeError):  # not glibc: as correct, nothing is set
    pass
header = bytearray(prefix)
header[70:74] = np.array([16, 32], "<i2").tobytes()  # datatype float32, bitpix 32
raw = open(dst, "xb")
sink = HashingFile(raw, out_digest) if hashing and compressed else raw
out = igzip_threaded.open(sink, "wb", compresslevel=1, threads=2) if compressed else raw
out.write(bytes(header))
if hasher is not None and not compressed:
    out_digest.update(bytes(header))
bytes_view = memoryview(data).cast("B")
for first in range(0, len(bytes_view), CHUNK):
    chunk = bytes_view[first:first + CHUNK]
    if hasher is not None and not compressed:
        hasher.submit(out_digest, chunk)  # hashed while it is written
    out.write(chunk)
if out is not raw:
    out.close()
raw.flush()
os.fsync(raw.fileno())
raw.close()
if hashing:
    if hasher is not None:
        hasher.wait()
    if compressed:
        input_hash.join()
    print(in_digest.hexdigest(), out_digest.hexdigest())
"""

# Runs correct_paths in-process with wall-clock timers around its phases and
# prints them as JSON. For each phase it also records by how much the process's
# peak RSS (a high-water mark) rose while inside it, and the highest value it
# left behind: that shows which phase sets the peak. Functions are named by
# their dotted path in slicetime.pipelines.correct (or "module:path"); a path that no longer
# resolves is listed under "missing" instead of failing. argv: dataset, out,
# method, cap in bytes or "".
PHASES = """
import importlib, json, resource, sys, time
from pathlib import Path
start = time.perf_counter()
import slicetime.pipelines.correct as mod
import slicetime.pipelines.correct_batch as batch
from slicetime.interfaces.report_json import correct_run_object
from slicetime.pipelines.executor import available_cpus
imported = time.perf_counter() - start
totals = {}
calls = {}
raised = {}
peak_after = {}
missing = []

cpu = {}

def maxrss():
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024

def used():  # processor seconds of every thread of the process (user, system)
    ru = resource.getrusage(resource.RUSAGE_SELF)
    return ru.ru_utime, ru.ru_stime

def timed(name, fn):
    def wrapper(*args, **kwargs):
        before = maxrss()
        user, system = used()
        began = time.perf_counter()
        try:
            return fn(*args, **kwargs)
        finally:
            totals[name] = totals.get(name, 0.0) + time.perf_counter() - began
            user_after, system_after = used()
            spent = cpu.setdefault(name, [0.0, 0.0])
            spent[0] += user_after - user
            spent[1] += system_after - system
            calls[name] = calls.get(name, 0) + 1
            after = maxrss()
            if after > before:
                raised[name] = raised.get(name, 0) + after - before
                peak_after[name] = max(peak_after.get(name, 0), after)
    return wrapper

def patch(path, name):
    # "attr.path" on slicetime.pipelines.correct, or "module:attr.path"
    module, _, path = path.rpartition(":")
    owner = importlib.import_module(module) if module else mod
    *parents, attr = path.split(".")
    for part in parents:
        owner = getattr(owner, part, None)
        if owner is None:
            missing.append(path)
            return
    fn = getattr(owner, attr, None)
    if not callable(fn):
        missing.append(path)
        return
    setattr(owner, attr, timed(name, fn))

patch("slicetime.pipelines.correct_batch:audit_paths", "audit (walk, headers, rules)")
patch("VolumeReader.__enter__", "read: open, start decoder, header bytes")
patch("VolumeReader.read_into", "read: decompress (wait on decoder)")
patch("VolumeReader.sha256", "read: SHA-256 (wait on its thread)")
patch("slicetime.readers.scratch:store_scaled", "read: stored type -> float32 slice-major")
for cls, kind in (("MemoryBuffer", "memory"), ("DiskBuffer", "scratch file")):
    patch(f"{cls}.__init__", f"buffer ({kind}): allocate")
    patch(f"{cls}.put_volumes", f"buffer ({kind}): put volumes")
    patch(f"{cls}.get_slice", f"engine: buffer ({kind}) get slice")
    patch(f"{cls}.put_slice", f"engine: buffer ({kind}) put slice")
    patch(f"{cls}.get_volumes", f"write: buffer ({kind}) get volumes")
patch("_fill", "read (whole phase)")
patch("_drain", "write (whole phase, but the close)")
patch("_engine_pass", "engine (whole pass)")
patch("slicetime.engines.align:shift_columns", "engine: transforms (shift_columns)")
patch("slicetime.engines.align:resample", "engine: row engine (awkward series)")
patch("OutputCast.__call__", "write: slice-major -> volume order, output type")
patch("VolumeWriter.__init__", "write: open, start encoder")
patch("VolumeWriter.write", "write: compress + SHA-256 (feed encoder)")
patch("VolumeWriter.settle", "write: wait for the helpers (.nii)")
patch("VolumeWriter.close", "write: flush encoder + fsync")
patch("_closing_with", "write: close and fsync, beside the noise probe")
patch("slicetime.pipelines.correct:noise_per_slice", "provenance: noise probe")
patch("run_inputs", "provenance: hash sidecars (and an events table)")
patch("slicetime.pipelines.correct_batch:write_description", "provenance: dataset_description")
patch("slicetime.pipelines.correct_batch:write_provenance", "provenance: provenance file")
cap = int(sys.argv[4]) if sys.argv[4] else None
options = mod.CorrectOptions(out=Path(sys.argv[2]), method=sys.argv[3], max_memory=cap,
                             threads=available_cpus())
rss_before = maxrss()
user, system = used()
began = time.perf_counter()
result = batch.correct_paths([Path(sys.argv[1])], options)
total = time.perf_counter() - began
user_after, system_after = used()
assert result.counts()["corrected"] == 1, [correct_run_object(r) for r in result.runs]
print(json.dumps({"imports_s": imported, "correct_paths_s": total,
                  "correct_paths_user_s": user_after - user,
                  "correct_paths_system_s": system_after - system,
                  "peak_rss_before_bytes": rss_before, "peak_rss_bytes": maxrss(),
                  "missing": missing,
                  "phases": {k: {"s": v, "calls": calls[k], "peak_raised_bytes": raised.get(k, 0),
                                 "peak_after_bytes": peak_after.get(k),
                                 "user_s": cpu[k][0], "system_s": cpu[k][1]}
                             for k, v in totals.items()}}))
"""

# cProfile of one correct_paths call, after the imports. argv: dataset, out, profile file.
PROFILE = """
import cProfile, sys
from pathlib import Path
import slicetime.pipelines.correct as mod
import slicetime.pipelines.correct_batch as batch
from slicetime.interfaces.report_json import correct_run_object
from slicetime.pipelines.executor import available_cpus
options = mod.CorrectOptions(out=Path(sys.argv[2]), threads=available_cpus())
profiler = cProfile.Profile()
result = profiler.runcall(batch.correct_paths, [Path(sys.argv[1])], options)
profiler.dump_stats(sys.argv[3])
assert result.counts()["corrected"] == 1, [correct_run_object(r) for r in result.runs]
"""


@dataclass
class Measurement:
    label: str
    wall_s: float
    peak_rss_bytes: int
    user_s: float
    sys_s: float


# ---------------------------------------------------------------------------
# the invented datasets


@dataclass(frozen=True)
class Spec:
    """One invented dataset: ``runs`` runs of the same shape and protocol."""

    key: str
    folder: str
    shape: tuple[int, int, int]
    volumes: int
    tr: float
    voxel_mm: tuple[float, float, float]
    protocol: Protocol
    # head ellipsoid in voxel units (centre, semi-axes)
    centre: tuple[float, float, float]
    axes: tuple[float, float, float]
    compressor: str  # "zlib" (gzip module) or "isal" (threaded igzip)
    level: int
    runs: int = 1
    acq: str | None = None
    sidecar_extra: dict[str, Any] = field(default_factory=dict)

    @property
    def images(self) -> list[Path]:
        acq = f"_acq-{self.acq}" if self.acq else ""
        subjects = [f"sub-{i + 1:02d}" for i in range(self.runs)]
        return [Path(s) / "func" / f"{s}_task-fingertap{acq}_bold.nii.gz" for s in subjects]

    @property
    def float32_bytes(self) -> int:
        """Bytes of one run's float32 array."""
        return int(np.prod(self.shape)) * self.volumes * 4

    def stamp(self) -> dict[str, Any]:
        # the standard run keeps the stamp it always had, so existing caches stay valid
        wanted: dict[str, Any] = {"version": GENERATOR_VERSION,
                                  "shape": [*self.shape, self.volumes], "tr": self.tr,
                                  "seed": SEED, "gzip_level": self.level}
        if self.key != "standard":
            wanted |= {"kind": self.key, "compressor": self.compressor, "runs": self.runs,
                       "multiband": self.protocol.multiband, "centre": list(self.centre),
                       "axes": list(self.axes), "voxel_mm": list(self.voxel_mm)}
        return wanted

    def describe(self, root: Path) -> dict[str, Any]:
        sizes = [(root / image).stat().st_size for image in self.images]
        return {"shape": [*self.shape, self.volumes], "dtype": "int16", "tr_s": self.tr,
                "runs": self.runs, "multiband": self.protocol.multiband,
                "slices": self.protocol.n_slices, "compressed_mib": round(sum(sizes) / MIB, 1),
                "float32_mib": round(self.float32_bytes / MIB, 1),
                "gzip": f"{self.compressor} level {self.level}", "gzip_level": self.level}

    def title(self) -> str:
        size = "×".join(str(n) for n in (*self.shape, self.volumes))
        runs = f"{self.runs} runs of " if self.runs > 1 else ""
        mb = f", multiband {self.protocol.multiband}" if self.protocol.multiband > 1 else ""
        return (f"{self.key}: {runs}{size} int16, TR {self.tr:g} s{mb}; float32 array "
                f"{self.float32_bytes / MIB:.0f} MiB per run")


def standard_spec(volumes: int) -> Spec:
    return Spec("standard", f"ds-v{volumes}", (64, 64, 40), volumes, 2.0, (3.0, 3.0, 3.5),
                Protocol(n_slices=40, order="interleaved", repetition_time=2.0, decimals=4),
                centre=(31.5, 33.0, 19.0), axes=(29.0, 31.0, 19.5), compressor="zlib",
                level=GZIP_LEVEL)


def multiband_spec(volumes: int) -> Spec:
    return Spec("multiband", f"ds-mb3-v{volumes}", (96, 96, 66), volumes, 1.0,
                (2.4, 2.4, 2.4),
                Protocol(n_slices=66, order="interleaved", multiband=3, repetition_time=1.0,
                         decimals=4),
                centre=(47.5, 49.5, 31.5), axes=(43.5, 46.5, 32.0), compressor="isal",
                level=FAST_GZIP_LEVEL, acq="mb3",
                sidecar_extra={"MultibandAccelerationFactor": 3})


def batch_spec(runs: int, volumes: int) -> Spec:
    return Spec("batch", f"ds-batch{runs}-v{volumes}", (64, 64, 32), volumes, 2.0,
                (3.0, 3.0, 3.5),
                Protocol(n_slices=32, order="interleaved", repetition_time=2.0, decimals=4),
                centre=(31.5, 33.0, 15.2), axes=(29.0, 31.0, 15.6), compressor="isal",
                level=FAST_GZIP_LEVEL, runs=runs)


def _smooth_field(grid: tuple[np.ndarray, ...], rng: np.random.Generator, terms: int) -> np.ndarray:
    """A smooth random field in about [-1, 1] from a few low-frequency cosines."""
    field = np.zeros(np.broadcast_shapes(*(g.shape for g in grid)), dtype=np.float32)
    for _ in range(terms):
        freq = rng.uniform(0.5, 2.5, size=3) * np.pi
        phase = rng.uniform(0, 2 * np.pi)
        field += np.cos(freq[0] * grid[0] + freq[1] * grid[1] + freq[2] * grid[2] + phase)
    return field / terms


def _open_gzip(path: Path, spec: Spec) -> IO[bytes]:
    if spec.compressor == "isal":
        from isal import igzip_threaded

        stream: IO[bytes] = igzip_threaded.open(path, "wb", compresslevel=spec.level,
                                                threads=2)
        return stream
    return gzip.GzipFile(path, "wb", compresslevel=spec.level, mtime=0)


def _header(spec: Spec) -> nib.Nifti1Header:
    nx, ny, nz = spec.shape
    affine = np.diag([*spec.voxel_mm, 1.0])
    affine[:3, 3] = [-(nx - 1) * spec.voxel_mm[0] / 2, -(ny - 1) * spec.voxel_mm[1] / 2,
                     -(nz - 1) * spec.voxel_mm[2] / 2]
    header = nib.Nifti1Header()
    header.set_data_shape((*spec.shape, spec.volumes))
    header.set_data_dtype(np.int16)
    header.set_zooms((*spec.voxel_mm, spec.tr))
    header.set_xyzt_units("mm", "sec")
    header.set_dim_info(freq=0, phase=1, slice=2)
    header.set_qform(affine, code=1)
    header.set_sform(affine, code=1)
    header.set_data_offset(352)
    header.set_slope_inter(1.0, 0.0)
    return header


def write_image(path: Path, spec: Spec, seed: int) -> float:
    """Write one run; return the fraction of voxels inside the head.

    The volumes are made in blocks (one array operation per step for a whole
    block) and written in Fortran order, one volume after the other, after the
    348-byte header and the 4 bytes that say there are no extensions.
    """
    rng = np.random.default_rng(seed)
    nx, ny, nz = spec.shape
    (cx, cy, cz), (ax, ay, az) = spec.centre, spec.axes
    # coordinates in units of the head's semi-axes: inside the head where r < 1
    x = ((np.arange(nx, dtype=np.float32) - cx) / ax)[:, None, None]
    y = ((np.arange(ny, dtype=np.float32) - cy) / ay)[None, :, None]
    z = ((np.arange(nz, dtype=np.float32) - cz) / az)[None, None, :]
    r = np.sqrt(x * x + y * y + z * z)
    mask = r < 1.0
    n_in = int(mask.sum())
    # static image: bright cortex-like rim, darker centre, a coil-like bias, texture
    rim = 1.0 + 0.12 * np.exp(-(((r - 0.85) / 0.08) ** 2))
    bias = 1.0 + 0.15 * _smooth_field((x, y, z), rng, 3)
    texture = 0.05 * rng.standard_normal(spec.shape, dtype=np.float32)
    base = (1000.0 * (0.9 + 0.1 * r) * rim * bias * (1.0 + texture))[mask].astype(np.float32)
    # temporal: a slow global drift, a spatially varying slow oscillation, a
    # block-design response (30 s on / 30 s off) in a small region, noise
    t = np.arange(spec.volumes, dtype=np.float32) * spec.tr
    drift = 0.01 * t / max(t[-1], 1.0) + 0.004 * np.cos(2 * np.pi * t / 180.0)
    wobble_amp = (0.003 * (1 + _smooth_field((x, y, z), rng, 2)))[mask]
    wobble = np.sin(2 * np.pi * t / 97.0 + 1.3)
    region = ((x - 0.45) ** 2 + (y + 0.2) ** 2 + (z - 0.3) ** 2 < 0.04) & mask
    response_amp = np.where(region, 0.02, 0.0)[mask].astype(np.float32)
    block = ((t // 30.0) % 2 == 1).astype(np.float32)
    noise_sd = np.float32(18.0)
    one_plus_drift = 1.0 + drift
    # where each head voxel (listed in C order, as ``mask`` lists them) sits in a
    # Fortran-ordered volume
    where = np.ravel_multi_index(np.nonzero(mask), spec.shape, order="F")

    per_block = max(1, BLOCK_BYTES // (4 * n_in))
    volumes = np.zeros((min(per_block, spec.volumes), mask.size), dtype=np.int16)
    with _open_gzip(path, spec) as fh:
        _header(spec).write_to(fh)  # header + 4 zero bytes (no extensions)
        for first in range(0, spec.volumes, per_block):
            b = slice(first, min(first + per_block, spec.volumes))
            count = b.stop - b.start
            # the same float32 operations, in the same order, as one volume at a
            # time: gain = 1 + drift + wobble + response; base * gain + noise
            values = wobble_amp[None, :] * wobble[b, None]
            values += one_plus_drift[b, None]
            values += response_amp[None, :] * block[b, None]
            values *= base[None, :]
            values += noise_sd * rng.standard_normal((count, n_in), dtype=np.float32)
            np.rint(values, out=values)
            out = volumes[:count]
            out[:, where] = values
            fh.write(memoryview(out).cast("B"))
    return n_in / mask.size


def make_dataset(root: Path, spec: Spec) -> Path:
    """Write the dataset (once: a stamp with the parameters marks it complete)."""
    stamp = root / ".bench-stamp.json"
    wanted = spec.stamp()
    if stamp.is_file() and all((root / image).is_file() for image in spec.images):
        try:
            if json.loads(stamp.read_text()) == wanted:
                return root
        except ValueError:
            pass
    shutil.rmtree(root, ignore_errors=True)
    started = time.perf_counter()
    timing = slice_timing(spec.protocol)
    fraction = 0.0
    for index, rel in enumerate(spec.images):
        image = root / rel
        image.parent.mkdir(parents=True)
        fraction = write_image(image, spec, SEED + index)
        sidecar = {"TaskName": "fingertap", "RepetitionTime": spec.tr, "SliceTiming": timing,
                   **spec.sidecar_extra, "EchoTime": 0.03}
        image.with_name(image.name.replace(".nii.gz", ".json")).write_text(
            json.dumps(sidecar, indent=2))
        check = nib.load(image)
        assert check.shape == (*spec.shape, spec.volumes), check.shape
    name = "run" if spec.key == "standard" else f"dataset ({spec.key})"
    (root / "dataset_description.json").write_text(
        json.dumps({"Name": f"Invented finger-tapping benchmark {name}", "BIDSVersion": "1.10.0"},
                   indent=2))
    stamp.write_text(json.dumps(wanted))
    total = sum((root / rel).stat().st_size for rel in spec.images)
    print(f"generated {root} ({spec.runs} run(s), {total / MIB:.0f} MiB, "
          f"{fraction:.0%} of voxels in the head) in "
          f"{time.perf_counter() - started:.1f} s", flush=True)
    return root


def available_memory() -> int | None:
    """MemAvailable from /proc/meminfo in bytes (None where there is none)."""
    try:
        with open("/proc/meminfo") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    return None


def warm_page_cache(root: Path, spec: Spec) -> None:
    """Read the images once, so the first measured command does not pay for the disk."""
    for rel in spec.images:
        with open(root / rel, "rb") as fh:
            while fh.read(16 * MIB):
                pass


# ---------------------------------------------------------------------------
# measuring


def slicetime_command() -> list[str]:
    script = Path(sys.executable).parent / "slicetime"
    return [str(script)] if script.is_file() else [sys.executable, "-m", "slicetime"]


def child_env() -> dict[str, str]:
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(p for p in (str(REPO), env.get("PYTHONPATH")) if p)
    return env


def measure(label: str, cmd: list[str], log: Path) -> Measurement:
    """Run ``cmd`` in a fresh wrapper; fail loudly (with the log) if it fails."""
    log.parent.mkdir(parents=True, exist_ok=True)
    done = subprocess.run([sys.executable, "-c", WRAPPER, json.dumps(cmd), str(log)],
                          capture_output=True, text=True, check=True, env=child_env())
    report = json.loads(done.stdout)
    if report["rc"] != 0:
        tail = log.read_text(errors="replace")[-3000:]
        raise SystemExit(f"{label} failed with exit code {report['rc']}:\n{tail}")
    return Measurement(label, report["wall"], report["maxrss_kib"] * 1024, report["user"],
                       report["sys"])


def _say(prefix: str, m: Measurement) -> None:
    print(f"  {prefix:<34} {m.wall_s:7.2f} s, {m.peak_rss_bytes / MIB:6.0f} MiB", flush=True)


def expected_outputs(spec: Spec, out: Path) -> list[Path]:
    from slicetime.pipelines.outputs import output_name

    return [out / rel.parent / output_name(rel.name, DESC) for rel in spec.images]


def run_correct(label: str, dataset: Path, spec: Spec, work: Path, tag: str,
                *extra: str) -> Measurement:
    out = work / f"out-{tag}"
    shutil.rmtree(out, ignore_errors=True)
    cmd = [*slicetime_command(), "correct", str(dataset), "--out", str(out), *extra]
    result = measure(label, cmd, work / "logs" / f"{tag}.log")
    missing = [p for p in expected_outputs(spec, out) if not p.is_file()]
    if missing:
        raise SystemExit(f"{label}: no output at {', '.join(map(str, missing))} "
                         f"(log: {work / 'logs' / f'{tag}.log'})")
    shutil.rmtree(out, ignore_errors=True)
    _say(label, result)
    return result


def run_baseline(dataset: Path, spec: Spec, work: Path, tag: str,
                 label: str = "baseline (nibabel)") -> Measurement:
    out = work / f"baseline-{tag}.nii.gz"
    out.unlink(missing_ok=True)
    result = measure("baseline", [sys.executable, "-c", BASELINE,
                                  str(dataset / spec.images[0]), str(out)],
                     work / "logs" / f"baseline-{tag}.log")
    out.unlink(missing_ok=True)
    _say(label, result)
    return result


def phase_profile(dataset: Path, work: Path, method: str, cap: int | None,
                  tag: str) -> dict[str, Any]:
    out = work / f"out-{tag}"
    shutil.rmtree(out, ignore_errors=True)
    log = work / "logs" / f"{tag}.log"
    measure("phase timing", [sys.executable, "-c", PHASES, str(dataset), str(out), method,
                             str(cap or "")], log)
    shutil.rmtree(out, ignore_errors=True)
    result: dict[str, Any] = json.loads(log.read_text().strip().splitlines()[-1])
    return result


def engine_wall(dataset: Path, work: Path, method: str, tag: str) -> float:
    """The wall time of correct's engine pass alone (``_engine_pass``, in the phase
    timing of one whole run of ``method`` on the dataset)."""
    phases = phase_profile(dataset, work, method, None, tag)
    return float(phases["phases"]["engine (whole pass)"]["s"])


def _where(key: tuple[str, int, str]) -> str:
    filename, line, name = key
    for marker in ("site-packages/", str(REPO) + "/"):
        if marker in filename:
            filename = filename.split(marker, 1)[1]
    return f"{filename}:{line}({name})"


def cprofile(dataset: Path, work: Path, top: int) -> dict[str, Any]:
    """cProfile one ``correct_paths`` call (after the imports): the top functions
    by cumulative time and by own time."""
    out = work / "out-cprofile"
    prof = work / "correct.prof"
    shutil.rmtree(out, ignore_errors=True)
    cmd = [sys.executable, "-c", PROFILE, str(dataset), str(out), str(prof)]
    measure("cprofile", cmd, work / "logs" / "cprofile.log")
    shutil.rmtree(out, ignore_errors=True)
    stats = pstats.Stats(str(prof))
    entries: dict[tuple[str, int, str], Any] = stats.stats  # type: ignore[attr-defined]
    total = stats.total_tt  # type: ignore[attr-defined]

    def rows(key: int) -> list[dict[str, Any]]:
        ranked = sorted(entries, key=lambda k: entries[k][key], reverse=True)[:top]
        return [{"function": _where(k), "calls": entries[k][1],
                 "tottime_s": round(entries[k][2], 3), "cumtime_s": round(entries[k][3], 3)}
                for k in ranked]

    return {"file": str(prof), "total_s": round(total, 3), "top_by_cumtime": rows(3),
            "top_by_tottime": rows(2)}


def import_times(top: int) -> list[dict[str, Any]]:
    """The slowest imports (cumulative) of what the ``correct`` command imports."""
    done = subprocess.run([sys.executable, "-X", "importtime", "-c",
                           "import slicetime.interfaces.cli, slicetime.pipelines.correct"],
                          capture_output=True, text=True, check=True, env=child_env())
    rows = []
    for line in done.stderr.splitlines():
        parts = line.removeprefix("import time:").split("|")
        if len(parts) != 3 or not parts[1].strip().isdigit():
            continue
        rows.append({"module": parts[2].strip(), "self_s": int(parts[0]) / 1e6,
                     "cumulative_s": int(parts[1]) / 1e6})
    rows.sort(key=lambda r: r["cumulative_s"], reverse=True)
    seen: set[str] = set()
    unique = [r for r in rows if not (r["module"] in seen or seen.add(r["module"]))]
    return unique[:top]


def _print_profile_rows(title: str, rows: list[dict[str, Any]]) -> None:
    print(title)
    print(f"  {'cumtime':>8} {'tottime':>8} {'calls':>7}  function")
    for row in rows:
        print(f"  {row['cumtime_s']:8.2f} {row['tottime_s']:8.2f} {row['calls']:7d}  "
              f"{row['function']}")


# ---------------------------------------------------------------------------
# reporting


def _median(values: Sequence[Measurement]) -> float:
    return statistics.median(m.wall_s for m in values)


def _peak(values: Sequence[Measurement]) -> int:
    return max(m.peak_rss_bytes for m in values)


def _summary(values: Sequence[Measurement]) -> dict[str, Any]:
    return {"wall_s_median": round(_median(values), 3),
            "wall_s": [round(m.wall_s, 3) for m in values],
            "cpu_s": [round(m.user_s + m.sys_s, 3) for m in values],
            "peak_rss_mib": round(_peak(values) / MIB, 1),
            "runs": [asdict(m) for m in values]}


def _ratios(values: Sequence[Measurement], base_wall: float, f32: int) -> dict[str, Any]:
    return _summary(values) | {"time_ratio": round(_median(values) / base_wall, 3),
                               "peak_over_float32": round(_peak(values) / f32, 3)}


HEAD = (f"{'command':<34} {'wall s':>8} {'cpu s':>8} {'÷ base':>8} {'peak MiB':>9} "
        f"{'÷ f32':>8}")


def _row(name: str, values: Sequence[Measurement], base_wall: float, f32: int) -> str:
    wall, peak = _median(values), _peak(values)
    cpu = statistics.median(m.user_s + m.sys_s for m in values)
    return (f"{name:<34} {wall:8.2f} {cpu:8.2f} {wall / base_wall:8.2f} "
            f"{peak / MIB:9.0f} {peak / f32:8.2f}")


def _verdict(met: bool) -> str:
    return "MET" if met else "NOT MET"


def _cap_target(capped: Sequence[Measurement], cap: int, overhead: int,
                cap_text: str) -> dict[str, Any]:
    limit = cap + overhead
    peak = _peak(capped)
    return {"value": round(peak / limit, 3), "target": "<= 1", "cap": cap_text,
            "cap_mib": round(cap / MIB, 1), "overhead_mib": round(overhead / MIB, 1),
            "peak_mib": round(peak / MIB, 1), "met": peak <= limit}


def _print_cap(cap_text: str, target: dict[str, Any]) -> None:
    print(f"--max-memory {cap_text}: peak {target['peak_mib']:.0f} MiB vs cap "
          f"{target['cap_mib']:.0f} MiB + overhead {target['overhead_mib']:.0f} MiB = "
          f"{target['cap_mib'] + target['overhead_mib']:.0f} MiB  {_verdict(target['met'])}")


# ---------------------------------------------------------------------------
# the three parts


@dataclass
class Context:
    args: argparse.Namespace
    work: Path
    overhead: list[Measurement]
    results: dict[str, Any]
    targets: dict[str, Any]
    tables: list[Callable[[], None]]

    @property
    def overhead_peak(self) -> int:
        return _peak(self.overhead)

    def save(self, complete: bool) -> None:
        out: Path = self.args.out
        out.parent.mkdir(parents=True, exist_ok=True)
        out.write_text(json.dumps(self.results | {"targets": self.targets,
                                                  "complete": complete}, indent=2))


def standard_part(ctx: Context, spec: Spec, dataset: Path) -> None:
    args, work = ctx.args, ctx.work
    from slicetime.pipelines.memory import parse_size

    cap = parse_size(args.cap)
    f32 = spec.float32_bytes
    for i in range(args.warmup):  # page cache, CPU frequency, first-run effects
        run_baseline(dataset, spec, work, f"warmup-{i}")
        run_correct("correct (warm-up)", dataset, spec, work, f"warmup-{i}")
    baseline: list[Measurement] = []
    fourier: list[Measurement] = []
    for i in range(args.repeat):
        baseline.append(run_baseline(dataset, spec, work, str(i)))
        fourier.append(run_correct("correct (fourier)", dataset, spec, work, f"fourier-{i}"))
    methods: dict[str, list[Measurement]] = {"fourier": fourier}
    for method in ("sinc", "cubic", "linear"):
        methods[method] = [run_correct(f"correct --method {method}", dataset, spec, work,
                                       method, "--method", method)]
    capped = [run_correct(f"correct --max-memory {args.cap}", dataset, spec, work, "capped",
                          "--max-memory", args.cap)]

    base_wall = _median(baseline)
    time_ratio = _median(fourier) / base_wall
    mem_ratio = _peak(fourier) / f32
    ctx.targets |= {
        "time_ratio": {"value": round(time_ratio, 3), "target": "<= 0.5",
                       "met": time_ratio <= 0.5},
        "peak_over_float32": {"value": round(mem_ratio, 3), "target": "< 2",
                              "met": mem_ratio < 2},
        "max_memory_peak_over_cap_plus_overhead": _cap_target(capped, cap, ctx.overhead_peak,
                                                              args.cap),
    }
    ctx.results |= {
        "run": spec.describe(dataset), "repeat": args.repeat,
        "baseline": _summary(baseline),
        **{f"correct_{name}": _summary(values) for name, values in methods.items()},
        "correct_max_memory": _summary(capped) | {"cap": args.cap},
        "methods": {name: _ratios(values, base_wall, f32) for name, values in methods.items()},
    }

    def table() -> None:
        print(f"\n{spec.title()}")
        print(HEAD)
        print("-" * len(HEAD))
        rows: list[tuple[str, list[Measurement]]] = [
            ("imports only (overhead)", ctx.overhead), ("baseline (nibabel)", baseline),
            ("correct (fourier)", fourier),
            *((f"correct --method {m}", methods[m]) for m in ("sinc", "cubic", "linear")),
            (f"correct --max-memory {args.cap}", capped)]
        for name, values in rows:
            print(_row(name, values, base_wall, f32))
        print(f"(wall: median of {args.repeat} for overhead, baseline and fourier, else one "
              "run; peak: the largest)")
        print(f"time  fourier / baseline      {time_ratio:6.3f}  (target ≤ 0.5)  "
              f"{_verdict(ctx.targets['time_ratio']['met'])}")
        print(f"peak  fourier / float32 array {mem_ratio:6.3f}  (target < 2)    "
              f"{_verdict(ctx.targets['peak_over_float32']['met'])}")
        _print_cap(args.cap, ctx.targets["max_memory_peak_over_cap_plus_overhead"])

    ctx.tables.append(table)


def multiband_part(ctx: Context, spec: Spec, dataset: Path) -> None:
    args, work = ctx.args, ctx.work
    from slicetime.pipelines.memory import parse_size

    cap = parse_size(args.multiband_cap)
    f32 = spec.float32_bytes
    warm_page_cache(dataset, spec)
    baseline = [run_baseline(dataset, spec, work, "mb", "multiband: baseline (nibabel)")]
    fourier = [run_correct("multiband: correct (fourier)", dataset, spec, work, "mb-fourier")]
    capped = [run_correct(f"multiband: correct --max-memory {args.multiband_cap}", dataset,
                          spec, work, "mb-capped", "--max-memory", args.multiband_cap)]
    base_wall = _median(baseline)
    ctx.targets["multiband_max_memory_peak_over_cap_plus_overhead"] = _cap_target(
        capped, cap, ctx.overhead_peak, args.multiband_cap)
    ctx.results["multiband"] = {
        "run": spec.describe(dataset), "baseline": _summary(baseline),
        "correct_fourier": _ratios(fourier, base_wall, f32),
        "correct_max_memory": _ratios(capped, base_wall, f32) | {"cap": args.multiband_cap},
        "note": "one run each; time and memory ratios without a design target",
    }

    def table() -> None:
        print(f"\n{spec.title()}")
        print(HEAD)
        print("-" * len(HEAD))
        for name, values in (("baseline (nibabel)", baseline), ("correct (fourier)", fourier),
                             (f"correct --max-memory {args.multiband_cap}", capped)):
            print(_row(name, values, base_wall, f32))
        print("(one run each; no design target for the ratios of this run)")
        _print_cap(args.multiband_cap,
                   ctx.targets["multiband_max_memory_peak_over_cap_plus_overhead"])

    ctx.tables.append(table)


def batch_part(ctx: Context, spec: Spec, dataset: Path) -> None:
    args, work = ctx.args, ctx.work
    warm_page_cache(dataset, spec)
    by_jobs: dict[int, list[Measurement]] = {1: [], 2: []}
    for i in range(args.batch_repeat):
        for jobs in by_jobs:
            by_jobs[jobs].append(run_correct(f"batch: correct --jobs {jobs}", dataset, spec,
                                             work, f"batch-jobs{jobs}-{i}", "--jobs", str(jobs)))
    serial = _median(by_jobs[1])
    ratio = _median(by_jobs[2]) / serial
    ctx.results["batch"] = {
        "run": spec.describe(dataset), "repeat": args.batch_repeat,
        **{f"jobs_{jobs}": _summary(values) for jobs, values in by_jobs.items()},
        "jobs_2_over_jobs_1": round(ratio, 3),
        "note": "peak: the largest single process (the wrapper's RUSAGE_CHILDREN), not the "
                "sum over the worker processes",
    }

    def table() -> None:
        print(f"\n{spec.title()}")
        head = (f"{'command':<34} {'wall s':>8} {'cpu s':>8} {'÷ jobs 1':>9} "
                f"{'peak MiB':>9}")
        print(head)
        print("-" * len(head))
        for jobs, values in by_jobs.items():
            cpu = statistics.median(m.user_s + m.sys_s for m in values)
            print(f"{f'correct --jobs {jobs}':<34} {_median(values):8.2f} {cpu:8.2f} "
                  f"{_median(values) / serial:9.2f} {_peak(values) / MIB:9.0f}")
        print(f"(wall: median of {args.batch_repeat}; peak: the largest single process, not "
              f"the sum; ideal ÷ on {os.cpu_count()} CPUs: {1 / min(2, os.cpu_count() or 1):.2f})")

    ctx.tables.append(table)


def nii_copy(root: Path, spec: Spec, work: Path) -> tuple[Path, list[Path]]:
    """The dataset with its images stored uncompressed (``.nii``), made once."""
    from isal import igzip_threaded

    target = work / f"{spec.folder}-nii"
    stamp = target / ".bench-stamp.json"
    wanted = spec.stamp() | {"uncompressed": True}
    images = [rel.with_name(rel.name.removesuffix(".gz")) for rel in spec.images]
    if stamp.is_file() and all((target / image).is_file() for image in images):
        if json.loads(stamp.read_text()) == wanted:
            return target, images
    shutil.rmtree(target, ignore_errors=True)
    for rel, plain in zip(spec.images, images, strict=True):
        (target / plain).parent.mkdir(parents=True, exist_ok=True)
        with igzip_threaded.open(root / rel, "rb") as src, open(target / plain, "wb") as dst:
            shutil.copyfileobj(src, dst, 16 * MIB)
        sidecar = rel.with_name(rel.name.replace(".nii.gz", ".json"))
        shutil.copyfile(root / sidecar, target / sidecar)
    shutil.copyfile(root / "dataset_description.json", target / "dataset_description.json")
    stamp.write_text(json.dumps(wanted))
    return target, images


def run_floor(label: str, image: Path, work: Path, tag: str,
              hashing: bool = False) -> tuple[Measurement, int]:
    """The I/O floor script on one image (with ``hashing``, also the SHA-256 of input
    and output); its wall time and output size."""
    out = work / f"floor-{tag}{''.join(image.suffixes[-2:]) if image.suffix == '.gz' else '.nii'}"
    out.unlink(missing_ok=True)
    mode = "hash" if hashing else "none"
    result = measure(label, [sys.executable, "-c", FLOOR, str(image), str(out), mode],
                     work / "logs" / f"floor-{mode}-{tag}.log")
    size = out.stat().st_size
    out.unlink()
    _say(label, result)
    return result, size


def run_correct_sized(label: str, dataset: Path, image: Path, work: Path, tag: str,
                      *extra: str) -> tuple[Measurement, int]:
    """``correct`` on a one-run dataset; its wall time and output image size."""
    from slicetime.pipelines.outputs import output_name

    out = work / f"out-{tag}"
    shutil.rmtree(out, ignore_errors=True)
    cmd = [*slicetime_command(), "correct", str(dataset), "--out", str(out), *extra]
    result = measure(label, cmd, work / "logs" / f"{tag}.log")
    written = out / image.parent / output_name(image.name, DESC)
    if not written.is_file():
        raise SystemExit(f"{label}: no output at {written} (log: {work / 'logs' / f'{tag}.log'})")
    size = written.stat().st_size
    shutil.rmtree(out, ignore_errors=True)
    _say(label, result)
    return result, size


#: the issue's targets: correct within this many times its I/O floor
FLOOR_TARGETS = {"fourier": 1.2, "sinc": 1.2, "cubic": 2.0}
#: the two floors: the I/O alone, and the I/O with the SHA-256 of input and output
#: that correct records for provenance (each byte hashed once, off the main thread)
FLOORS = {"floor": False, "floor+hash": True}


def _cpu(values: Sequence[Measurement]) -> float:
    return statistics.median(m.user_s + m.sys_s for m in values)


def _user(values: Sequence[Measurement]) -> float:
    """Median user seconds: on a shared machine the steadiest of the three (system time
    includes reclaiming other processes' page cache for fresh pages)."""
    return statistics.median(m.user_s for m in values)


def floor_part(ctx: Context, specs: dict[str, Spec]) -> None:
    """``correct`` against the I/O floor scripts, in alternating rounds (floor,
    floor+hash, fourier, sinc, cubic), on ``.nii.gz`` and ``.nii`` copies of the
    standard and the multiband run; every ratio is of medians measured in the same
    rounds, in wall time and in processor time (user + system)."""
    args, work = ctx.args, ctx.work
    results: dict[str, Any] = {}
    rows: list[tuple[str, str, str, dict[str, tuple[float, float, float]],
                     tuple[float, float, float], bool, float | None]] = []
    for key in args.floor_runs:
        spec = specs[key]
        dataset = make_dataset(work / spec.folder, spec)
        plain_root, plain_images = nii_copy(dataset, spec, work)
        rounds = args.floor_repeat if key == "standard" else args.floor_multiband_repeat
        for fmt, root, image in ((".nii.gz", dataset, spec.images[0]),
                                 (".nii", plain_root, plain_images[0])):
            with open(root / image, "rb") as fh:  # into the page cache
                while fh.read(16 * MIB):
                    pass
            floors: dict[str, list[Measurement]] = {name: [] for name in FLOORS}
            sizes: dict[str, int] = {}
            by_method: dict[str, list[Measurement]] = {m: [] for m in FLOOR_TARGETS}
            engine: dict[str, list[float]] = {m: [] for m in FLOOR_TARGETS}
            for i in range(rounds):
                tag = f"{key}-{fmt.strip('.').replace('.', '')}-{i}"
                for name, hashing in FLOORS.items():
                    m, sizes[name] = run_floor(f"{key} {fmt}: I/O {name}", root / image,
                                               work, tag, hashing)
                    floors[name].append(m)
                for method in FLOOR_TARGETS:
                    m, sizes[method] = run_correct_sized(
                        f"{key} {fmt}: correct {method}", root, image, work,
                        f"floor-{method}-{tag}", "--method", method)
                    by_method[method].append(m)
                if args.floor_engine:
                    for method in FLOOR_TARGETS:
                        engine[method].append(engine_wall(root, work, method,
                                                          f"floor-engine-{method}-{tag}"))
                        print(f"  {key} {fmt}: engine alone ({method})".ljust(36)
                              + f" {engine[method][-1]:7.2f} s", flush=True)
            base = {name: (_median(values), _cpu(values), _user(values))
                    for name, values in floors.items()}
            entry: dict[str, Any] = {"rounds": rounds, "output_bytes": sizes}
            for name, values in floors.items():
                entry[name] = _summary(values) | {"cpu_s_median": round(_cpu(values), 3),
                                                  "user_s_median": round(_user(values), 3)}
            for method, values in by_method.items():
                times = (_median(values), _cpu(values), _user(values))
                over = {name: {kind: round(t / b, 3) for kind, t, b
                               in zip(("wall", "cpu", "user"), times, floor_times, strict=True)}
                        for name, floor_times in base.items()}
                ratio = times[0] / base["floor"][0]
                met = ratio <= FLOOR_TARGETS[method]
                # the bound no I/O can hide: the floor plus the engine's own wall time
                # (every output volume depends on every input volume, so the engine
                # runs between the last read and the first write)
                alone = statistics.median(engine[method]) if engine[method] else None
                bound = None if alone is None else (base["floor"][0] + alone) / base["floor"][0]
                entry[method] = _summary(values) | {
                    "cpu_s_median": round(times[1], 3), "user_s_median": round(times[2], 3),
                    "over_floor": round(ratio, 3), "over": over,
                    "target": f"<= {FLOOR_TARGETS[method]}", "met": met,
                    **({} if alone is None or bound is None else {
                        "engine_s": [round(t, 3) for t in engine[method]],
                        "engine_s_median": round(alone, 3),
                        "floor_plus_engine_s": round(base["floor"][0] + alone, 3),
                        "floor_plus_engine_over_floor": round(bound, 3)})}
                ctx.targets[f"floor_{key}_{fmt}_{method}"] = {
                    "value": round(ratio, 3), "target": f"<= {FLOOR_TARGETS[method]}",
                    "met": met, "over": over,
                    **({} if bound is None else {"floor_plus_engine_over_floor": round(bound, 3)})}
                rows.append((key, fmt, method, base, times, met, alone))
            results[f"{key} {fmt}"] = entry
    ctx.results["floor"] = results

    def table() -> None:
        print("\ncorrect against its I/O floors (decode, int16 -> float32, encode, fsync; "
              "floor+hash also SHA-256s input and output as correct must for provenance; "
              "medians of alternating rounds)")
        head = (f"{'run':<10} {'format':<8} {'method':<8} {'floor s':>7} {'+hash s':>7} "
                f"{'correct s':>9}  {'÷ floor wall/cpu/user':>22}  "
                f"{'÷ floor+hash wall/cpu/user':>26}  {'engine s':>8} {'bound':>5}  target")
        print(head)
        print("-" * len(head))
        for key, fmt, method, base, times, met, alone in rows:
            plain, hashed = base["floor"], base["floor+hash"]
            over = "/".join(f"{t / b:.2f}" for t, b in zip(times, plain, strict=True))
            over_hash = "/".join(f"{t / b:.2f}" for t, b in zip(times, hashed, strict=True))
            bound = ("    -     -" if alone is None
                     else f"{alone:8.2f} {(plain[0] + alone) / plain[0]:5.2f}")
            print(f"{key:<10} {fmt:<8} {method:<8} {plain[0]:7.2f} {hashed[0]:7.2f} "
                  f"{times[0]:9.2f}  {over:>22}  {over_hash:>26}  {bound}  "
                  f"≤ {FLOOR_TARGETS[method]:g} {_verdict(met)}")
        print("(wall: elapsed; cpu: user + system seconds; user: user seconds alone, the "
              "steadiest on a shared machine; the verdict is the wall ratio to the floor "
              "without hashing; engine s: the engine's own wall time inside correct, median; "
              "bound: (floor + engine) ÷ floor, the lowest wall ratio correct can reach, as "
              "the engine runs between the last read and the first write)")
        for name, entry in results.items():
            sizes = entry["output_bytes"]
            print(f"{name}: output {sizes['fourier'] / MIB:.0f} MiB (fourier), floor's "
                  f"{sizes['floor'] / MIB:.0f} MiB")

    ctx.tables.append(table)


def profile_part(ctx: Context, spec: Spec, dataset: Path) -> None:
    args, work = ctx.args, ctx.work
    from slicetime.pipelines.memory import parse_size

    cap = parse_size(args.cap)
    plain_root, _ = nii_copy(dataset, spec, work)
    profile: dict[str, Any] = {}
    for key, method, run_cap, root in (("fourier", "fourier", None, dataset),
                                       ("fourier_nii", "fourier", None, plain_root),
                                       ("max_memory", "fourier", cap, dataset)):
        phases = phase_profile(root, work, method, run_cap, f"phases-{key}")
        profile[f"phases_{key}"] = phases
        title = "fourier" if run_cap is None else f"fourier, --max-memory {args.cap}"
        fmt = ".nii" if root == plain_root else ".nii.gz"
        print(f"\nphases of one correct ({title}; standard run, {fmt}; in-process; "
              f"imports {phases['imports_s']:.2f} s, correct_paths "
              f"{phases['correct_paths_s']:.2f} s, {phases['correct_paths_user_s']:.2f} s "
              f"user + {phases['correct_paths_system_s']:.2f} s system; peak RSS "
              f"{phases['peak_rss_before_bytes'] / MIB:.0f} MiB before correct_paths, "
              f"{phases['peak_rss_bytes'] / MIB:.0f} MiB after):")
        print(f"  {'phase':<48} {'wall s':>7} {'share':>6} {'user s':>7} {'sys s':>6} "
              f"{'calls':>6} {'peak +MiB':>9} {'peak MiB':>9}")
        for name, entry in sorted(phases["phases"].items()):
            share = entry["s"] / phases["correct_paths_s"]
            after = entry["peak_after_bytes"]
            print(f"  {name:<48} {entry['s']:7.2f} {share:6.1%} {entry['user_s']:7.2f} "
                  f"{entry['system_s']:6.2f} {entry['calls']:6d} "
                  f"{entry['peak_raised_bytes'] / MIB:9.0f} "
                  f"{after / MIB if after else float('nan'):9.0f}")
        print("  (user s, sys s: processor time of every thread of the process while the "
              "phase ran, the helper threads' included; peak +MiB: how much the peak RSS "
              "rose inside the phase; peak MiB: the highest peak it left; nested phases "
              "count in their parents too)")
        if phases.get("missing"):
            print("  note: not timed, no longer in slicetime.pipelines.correct: "
                  + ", ".join(phases["missing"]))
    profiled = cprofile(dataset, work, args.top)
    profile["cprofile"] = profiled
    print(f"\ncProfile of one correct_paths call (fourier, standard run, after the imports; "
          f"main thread only, the gzip helper threads appear as lock waits; total "
          f"{profiled['total_s']:.2f} s; {profiled['file']})")
    _print_profile_rows(f"top {args.top} by cumulative time:", profiled["top_by_cumtime"])
    _print_profile_rows(f"top {args.top} by own time:", profiled["top_by_tottime"])
    imports = import_times(15)
    profile["slowest_imports"] = imports
    print("\nslowest imports of the correct command (python -X importtime, cumulative):")
    for row in imports:
        print(f"  {row['cumulative_s']:6.3f} s  {row['module']}")
    ctx.results["profile"] = profile


def _parts(text: str) -> list[str]:
    chosen = [p.strip() for p in text.split(",") if p.strip()]
    unknown = sorted(set(chosen) - set(PARTS))
    if unknown or not chosen:
        raise argparse.ArgumentTypeError(
            f"choose from {','.join(PARTS)} (got {text!r})")
    return [p for p in PARTS if p in chosen]


def _floor_runs(text: str) -> list[str]:
    chosen = [p.strip() for p in text.split(",") if p.strip()]
    if not chosen or set(chosen) - {"standard", "multiband"}:
        raise argparse.ArgumentTypeError(f"choose from standard,multiband (got {text!r})")
    return chosen


def _positive(text: str) -> int:
    value = int(text)
    if value < 1:
        raise argparse.ArgumentTypeError(f"must be at least 1 (got {value})")
    return value


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--runs", type=_parts, default=list(PARTS),
                        help=f"comma-separated parts to measure (default: {','.join(PARTS)})")
    parser.add_argument("--work", type=Path, default=REPO / "bench-results" / "work",
                        help="folder for the cached datasets, outputs and logs")
    parser.add_argument("--out", type=Path, default=REPO / "bench-results" / "correct.json")
    parser.add_argument("--volumes", type=_positive, default=600,
                        help="volumes of the standard run")
    parser.add_argument("--repeat", type=_positive, default=3,
                        help="baseline/fourier pairs on the standard run; overhead runs")
    parser.add_argument("--warmup", type=int, default=1,
                        help="unmeasured baseline + correct runs first (standard run)")
    parser.add_argument("--cap", default="160M", help="--max-memory of the standard run")
    parser.add_argument("--multiband-volumes", type=_positive, default=1200,
                        help="volumes of the multiband run (fewer only to check this script)")
    parser.add_argument("--multiband-cap", default="1G",
                        help="--max-memory of the multiband run")
    parser.add_argument("--batch-runs", type=_positive, default=6, help="runs in the batch")
    parser.add_argument("--batch-volumes", type=_positive, default=200,
                        help="volumes of each batch run")
    parser.add_argument("--batch-repeat", type=_positive, default=3,
                        help="--jobs 1 / --jobs 2 pairs on the batch")
    parser.add_argument("--floor-runs", type=_floor_runs, default=["standard", "multiband"],
                        help="runs compared with the I/O floor (standard,multiband)")
    parser.add_argument("--floor-repeat", type=_positive, default=5,
                        help="floor/correct rounds on the standard run")
    parser.add_argument("--floor-multiband-repeat", type=_positive, default=1,
                        help="floor/correct rounds on the multiband run")
    parser.add_argument("--floor-engine", action=argparse.BooleanOptionalAction, default=True,
                        help="also time the engine alone in each round (one more run per "
                        "method): the floor + engine bound")
    parser.add_argument("--profile", action=argparse.BooleanOptionalAction, default=True,
                        help="also time the phases of one standard run and cProfile another")
    parser.add_argument("--top", type=int, default=25, help="cProfile rows shown")
    args = parser.parse_args()
    from slicetime.pipelines.memory import parse_size

    for option in ("cap", "multiband_cap"):
        try:
            parse_size(getattr(args, option))
        except ValueError as exc:
            parser.error(f"--{option.replace('_', '-')}: {exc}")
    # measure what an installed slicetime costs, as bench_audit does: pip writes the
    # bytecode at install time, but this machine sets PYTHONDONTWRITEBYTECODE, so every
    # command would compile the package's modules again (0.11 s of processor time of
    # each correct) unless they are compiled once here (bytecode is read even so)
    import compileall

    compileall.compile_dir(str(REPO / "slicetime"), quiet=1)
    work: Path = args.work.resolve()
    work.mkdir(parents=True, exist_ok=True)
    specs = {"standard": standard_spec(args.volumes),
             "multiband": multiband_spec(args.multiband_volumes),
             "batch": batch_spec(args.batch_runs, args.batch_volumes)}
    datasets = {key: make_dataset(work / specs[key].folder, specs[key]) for key in args.runs
                if key in specs}
    for key, dataset in datasets.items():
        described = specs[key].describe(dataset)
        print(f"{specs[key].title()}; {described['compressed_mib']:.0f} MiB compressed",
              flush=True)
    print(f"{os.cpu_count()} CPUs", flush=True)
    if "multiband" in datasets:
        # the baseline holds the stored array and its float32 copy at once
        need = specs["multiband"].float32_bytes * 3 // 2 + GIB
        free = available_memory()
        if free is not None and free < need:
            print(f"warning: {free / GIB:.1f} GiB of memory available, the multiband "
                  f"baseline needs about {need / GIB:.1f} GiB (skip it with --runs)", flush=True)

    overhead = [measure("overhead", [sys.executable, "-c", OVERHEAD],
                        work / "logs" / f"overhead-{i}.log") for i in range(args.repeat)]
    ctx = Context(args, work, overhead, results={
        "machine": platform.platform(), "python": platform.python_version(),
        "cpus": os.cpu_count(), "parts": args.runs,
        "runs": {key: specs[key].describe(dataset) for key, dataset in datasets.items()},
        "overhead": _summary(overhead)}, targets={}, tables=[])
    parts = {"standard": standard_part, "multiband": multiband_part, "batch": batch_part}
    for key in args.runs:
        print(f"\n{key}:", flush=True)
        if key == "floor":
            floor_part(ctx, specs)
        else:
            parts[key](ctx, specs[key], datasets[key])
        ctx.save(complete=False)

    for table in ctx.tables:
        table()
    if args.profile:
        if "standard" in datasets:
            profile_part(ctx, specs["standard"], datasets["standard"])
        else:
            print("\n(--profile: skipped, it profiles the standard run, which is not in --runs)")
    ctx.save(complete=True)
    print(f"\nwritten {args.out}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
