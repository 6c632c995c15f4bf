"""`slicetime correct` on one large run against a nibabel load-and-save baseline.

The run (invented, generated once and cached under --work): 64×64×40×600 int16
``.nii.gz``, TR 2 s, interleaved SliceTiming over 40 slices, in a one-subject
dataset. Its content looks like a head: an ellipsoid of signal around 1000 with
a fixed texture, slow drifts, a small block-design response and thermal noise,
and an exactly zero background (a bit over half the voxels), so gzip behaves
like it does on real runs.

Every measured command runs in a fresh wrapper process that starts it, times
it and reports the peak RSS of that one child (``RUSAGE_CHILDREN`` of a
process that has had no other children):

* baseline: nibabel loads the run, converts it to float32 and saves it as a
  float32 ``.nii.gz`` (the output type ``correct`` writes by default; nibabel
  compresses at its default level 1, as ``correct`` does);
* ``slicetime correct DS --out OUT`` (fourier, a fresh OUT every time),
  interleaved with the baseline repetitions so drifts in machine load hit both;
* once each, informational: ``--method cubic`` and ``--max-memory CAP``;
* the interpreter overhead: a process that only imports what ``correct`` imports.

One unmeasured baseline and correct run come first (--warmup).

Targets (from the design): correct wall time ≤ 0.5 × baseline; correct peak
RSS < 2 × the float32 array; the ``--max-memory`` peak ≤ cap + overhead.
Absolute seconds vary between machines, the ratios are what the targets are about.

With ``--profile`` (the default) three more runs show where ``correct`` spends
its time: one with wall-clock timers wrapped around its phases (read, engine,
write, ...; the wrapping happens in the child, slicetime is not modified), the
same with the memory cap, and one ``correct_paths`` call under cProfile (main
thread only; the gzip helper threads show up as lock waits); last, the slowest
imports (``python -X importtime``), part of every command's wall time.

    python benchmarks/bench_correct.py [--volumes 600] [--repeat 3]
        [--work bench-results/work] [--out bench-results/correct.json]
        [--cap 160M] [--warmup 1] [--no-profile]
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
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any

import nibabel as nib
import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from slicetime.schemes.generate import Protocol, slice_timing

REPO = Path(__file__).resolve().parents[1]

SHAPE = (64, 64, 40)
TR = 2.0
VOXEL_MM = (3.0, 3.0, 3.5)
SUBJECT_PATH = Path("sub-01") / "func" / "sub-01_task-fingertap_bold.nii.gz"
GENERATOR_VERSION = 1
GZIP_LEVEL = 6  # what converters typically use; decompression speed barely depends on it
MIB = 1 << 20

# Runs ``argv[1]`` (a JSON list) with stdout/stderr to ``argv[2]`` and prints its
# wall time and rusage. ru_maxrss of RUSAGE_CHILDREN is the largest over all
# children so far: this wrapper has exactly one.
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

# Runs correct_paths in-process with wall-clock timers around its phases and
# prints them as JSON. For each phase it also records by how much the process's
# peak RSS (a high-water mark) rose while inside it, and the highest value it
# left behind: that shows which phase sets the peak. argv: dataset, out,
# method, cap in bytes or "".
PHASES = """
import json, resource, sys, time
from pathlib import Path
start = time.perf_counter()
import slicetime.pipelines.correct as mod
from slicetime.pipelines.executor import available_cpus
imported = time.perf_counter() - start
totals = {}
calls = {}
raised = {}
peak_after = {}

def maxrss():
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024

def timed(name, fn):
    def wrapper(*args, **kwargs):
        before = maxrss()
        began = time.perf_counter()
        try:
            return fn(*args, **kwargs)
        finally:
            totals[name] = totals.get(name, 0.0) + time.perf_counter() - began
            calls[name] = calls.get(name, 0) + 1
            after = maxrss()
            if after > before:
                raised[name] = raised.get(name, 0) + after - before
                peak_after[name] = max(peak_after.get(name, 0), after)
    return wrapper

def patch(owner, attr, name):
    setattr(owner, attr, timed(name, getattr(owner, attr)))

patch(mod, "audit_paths", "audit (walk, headers, rules)")
patch(mod.VolumeReader, "__enter__", "read: open, start decoder, header bytes")
patch(mod.VolumeReader, "read_into", "read: decompress + SHA-256 (wait on decoder)")
patch(mod, "_store_scaled", "read: stored type -> float32 slice-major")
for cls in (mod._MemoryBuffer, mod._DiskBuffer):
    kind = "memory" if cls is mod._MemoryBuffer else "scratch file"
    patch(cls, "__init__", f"buffer ({kind}): allocate")
    patch(cls, "put_volumes", f"buffer ({kind}): put volumes")
    patch(cls, "get_slice", f"engine: buffer ({kind}) get slice")
    patch(cls, "put_slice", f"engine: buffer ({kind}) put slice")
    patch(cls, "get_volumes", f"write: buffer ({kind}) get volumes")
patch(mod, "_engine_pass", "engine (whole pass)")
patch(mod, "resample", "engine: resample calls")
patch(mod._Cast, "__call__", "write: slice-major -> volume order, output type")
patch(mod.VolumeWriter, "__init__", "write: open, start encoder")
patch(mod.VolumeWriter, "write", "write: compress + SHA-256 (feed encoder)")
patch(mod.VolumeWriter, "close", "write: flush encoder + fsync")
patch(mod, "_hash_inputs", "provenance: hash sidecars")
patch(mod, "_write_description", "provenance: dataset_description")
patch(mod, "_write_provenance", "provenance: provenance file")
cap = int(sys.argv[4]) if sys.argv[4] else None
options = mod.CorrectOptions(out=Path(sys.argv[2]), method=sys.argv[3], max_memory=cap,
                             threads=available_cpus())
rss_before = maxrss()
began = time.perf_counter()
result = mod.correct_paths([Path(sys.argv[1])], options)
total = time.perf_counter() - began
assert result.counts()["corrected"] == 1, [r.to_json() for r in result.runs]
print(json.dumps({"imports_s": imported, "correct_paths_s": total,
                  "peak_rss_before_bytes": rss_before, "peak_rss_bytes": maxrss(),
                  "phases": {k: {"s": v, "calls": calls[k], "peak_raised_bytes": raised.get(k, 0),
                                 "peak_after_bytes": peak_after.get(k)}
                             for k, v in totals.items()}}))
"""

# cProfile of one correct_paths call, after the imports. argv: dataset, out, profile file.
PROFILE = """
import cProfile, sys
from pathlib import Path
import slicetime.pipelines.correct as mod
from slicetime.pipelines.executor import available_cpus
options = mod.CorrectOptions(out=Path(sys.argv[2]), threads=available_cpus())
profiler = cProfile.Profile()
result = profiler.runcall(mod.correct_paths, [Path(sys.argv[1])], options)
profiler.dump_stats(sys.argv[3])
assert result.counts()["corrected"] == 1, [r.to_json() for r in result.runs]
"""


@dataclass
class Measurement:
    label: str
    wall_s: float
    peak_rss_bytes: int
    user_s: float
    sys_s: float


# ---------------------------------------------------------------------------
# the invented run


def _smooth_field(grid: tuple[np.ndarray, ...], rng: np.random.Generator, terms: int) -> np.ndarray:
    """A smooth random field in about [-1, 1] from a few low-frequency cosines."""
    field = np.zeros(np.broadcast_shapes(*(g.shape for g in grid)), dtype=np.float32)
    for _ in range(terms):
        freq = rng.uniform(0.5, 2.5, size=3) * np.pi
        phase = rng.uniform(0, 2 * np.pi)
        field += np.cos(freq[0] * grid[0] + freq[1] * grid[1] + freq[2] * grid[2] + phase)
    return field / terms


def make_run(root: Path, volumes: int, seed: int = 20240611) -> Path:
    """Write the dataset (once: a stamp with the parameters marks it complete)."""
    stamp = root / ".bench-stamp.json"
    wanted = {"version": GENERATOR_VERSION, "shape": [*SHAPE, volumes], "tr": TR,
              "seed": seed, "gzip_level": GZIP_LEVEL}
    image = root / SUBJECT_PATH
    if stamp.is_file() and image.is_file():
        try:
            if json.loads(stamp.read_text()) == wanted:
                return root
        except ValueError:
            pass
    shutil.rmtree(root, ignore_errors=True)
    image.parent.mkdir(parents=True)
    started = time.perf_counter()
    rng = np.random.default_rng(seed)
    nx, ny, nz = SHAPE
    # coordinates in units of the head's semi-axes: inside the head where r < 1
    x = ((np.arange(nx, dtype=np.float32) - 31.5) / 29.0)[:, None, None]
    y = ((np.arange(ny, dtype=np.float32) - 33.0) / 31.0)[None, :, None]
    z = ((np.arange(nz, dtype=np.float32) - 19.0) / 19.5)[None, None, :]
    r = np.sqrt(x * x + y * y + z * z)
    mask = r < 1.0
    n_in = int(mask.sum())
    # static image: bright cortex-like rim, darker centre, a coil-like bias, texture
    rim = 1.0 + 0.12 * np.exp(-(((r - 0.85) / 0.08) ** 2))
    bias = 1.0 + 0.15 * _smooth_field((x, y, z), rng, 3)
    texture = 0.05 * rng.standard_normal(SHAPE, dtype=np.float32)
    base = (1000.0 * (0.9 + 0.1 * r) * rim * bias * (1.0 + texture))[mask].astype(np.float32)
    # temporal: a slow global drift, a spatially varying slow oscillation, a
    # block-design response (30 s on / 30 s off) in a small region, noise
    t = np.arange(volumes, dtype=np.float32) * TR
    drift = 0.01 * t / max(t[-1], 1.0) + 0.004 * np.cos(2 * np.pi * t / 180.0)
    wobble_amp = (0.003 * (1 + _smooth_field((x, y, z), rng, 2)))[mask]
    wobble = np.sin(2 * np.pi * t / 97.0 + 1.3)
    region = ((x - 0.45) ** 2 + (y + 0.2) ** 2 + (z - 0.3) ** 2 < 0.04) & mask
    response_amp = np.where(region, 0.02, 0.0)[mask].astype(np.float32)
    block = ((t // 30.0) % 2 == 1).astype(np.float32)
    noise_sd = np.float32(18.0)

    affine = np.diag([*VOXEL_MM, 1.0])
    affine[:3, 3] = [-(nx - 1) * VOXEL_MM[0] / 2, -(ny - 1) * VOXEL_MM[1] / 2,
                     -(nz - 1) * VOXEL_MM[2] / 2]
    header = nib.Nifti1Header()
    header.set_data_shape((*SHAPE, volumes))
    header.set_data_dtype(np.int16)
    header.set_zooms((*VOXEL_MM, TR))
    header.set_xyzt_units("mm", "sec")
    header.set_dim_info(freq=0, phase=1, slice=2)
    header.set_qform(affine, code=1)
    header.set_sform(affine, code=1)
    header.set_data_offset(352)
    header.set_slope_inter(1.0, 0.0)
    volume = np.zeros(SHAPE, dtype=np.int16, order="F")
    with gzip.GzipFile(image, "wb", compresslevel=GZIP_LEVEL, mtime=0) as fh:
        fh.write(header.binaryblock)
        fh.write(b"\0" * 4)  # no extensions
        for i in range(volumes):
            gain = 1.0 + drift[i] + wobble_amp * wobble[i] + response_amp * block[i]
            values = base * gain + noise_sd * rng.standard_normal(n_in, dtype=np.float32)
            volume[mask] = np.rint(values).astype(np.int16)
            fh.write(volume.tobytes(order="F"))

    timing = slice_timing(Protocol(n_slices=SHAPE[2], order="interleaved",
                                   repetition_time=TR, decimals=4))
    (root / "dataset_description.json").write_text(
        json.dumps({"Name": "Invented finger-tapping benchmark run", "BIDSVersion": "1.10.0"},
                   indent=2))
    image.with_name(image.name.replace(".nii.gz", ".json")).write_text(json.dumps(
        {"TaskName": "fingertap", "RepetitionTime": TR, "SliceTiming": timing,
         "EchoTime": 0.03}, indent=2))
    check = nib.load(image)
    assert check.shape == (*SHAPE, volumes), check.shape
    stamp.write_text(json.dumps(wanted))
    print(f"generated {image} ({image.stat().st_size / MIB:.0f} MiB, "
          f"{n_in / mask.size:.0%} of voxels in the head) in "
          f"{time.perf_counter() - started:.1f} s", flush=True)
    return root


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


def correct_cmd(dataset: Path, out: Path, *extra: str) -> list[str]:
    return [*slicetime_command(), "correct", str(dataset), "--out", str(out), *extra]


def run_correct(label: str, dataset: Path, work: Path, tag: str, *extra: str) -> Measurement:
    out = work / f"out-{tag}"
    shutil.rmtree(out, ignore_errors=True)
    result = measure(label, correct_cmd(dataset, out, *extra), work / "logs" / f"{tag}.log")
    produced = out / SUBJECT_PATH.with_name(
        SUBJECT_PATH.name.replace("_bold", "_desc-timealigned_bold"))
    if not produced.is_file():
        raise SystemExit(f"{label}: no output at {produced}")
    shutil.rmtree(out, ignore_errors=True)
    return result


def run_baseline(dataset: Path, work: Path, tag: str) -> Measurement:
    out = work / f"baseline-{tag}.nii.gz"
    out.unlink(missing_ok=True)
    result = measure("baseline", [sys.executable, "-c", BASELINE, str(dataset / SUBJECT_PATH),
                                  str(out)], work / "logs" / f"baseline-{tag}.log")
    out.unlink(missing_ok=True)
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


def _median(values: list[Measurement]) -> float:
    return statistics.median(m.wall_s for m in values)


def _peak(values: list[Measurement]) -> int:
    return max(m.peak_rss_bytes for m in values)


def _summary(values: list[Measurement]) -> dict[str, Any]:
    return {"wall_s_median": round(_median(values), 3),
            "wall_s": [round(m.wall_s, 3) for m in values],
            "cpu_s": [round(m.user_s + m.sys_s, 3) for m in values],
            "peak_rss_mib": round(_peak(values) / MIB, 1),
            "runs": [asdict(m) for m in values]}


def _row(name: str, values: list[Measurement], base_wall: float, f32: int) -> str:
    wall, peak = _median(values), _peak(values)
    cpu = statistics.median(m.user_s + m.sys_s for m in values)
    return (f"{name:<28} {wall:8.2f} {cpu:8.2f} {wall / base_wall:8.2f} "
            f"{peak / MIB:9.0f} {peak / f32:8.2f}")


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--work", type=Path, default=REPO / "bench-results" / "work",
                        help="folder for the cached run, outputs and logs")
    parser.add_argument("--out", type=Path, default=REPO / "bench-results" / "correct.json")
    parser.add_argument("--volumes", type=int, default=600)
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--warmup", type=int, default=1,
                        help="unmeasured baseline + correct runs first")
    parser.add_argument("--cap", default="160M", help="--max-memory value for the capped run")
    parser.add_argument("--profile", action=argparse.BooleanOptionalAction, default=True,
                        help="also time the phases of one run and cProfile another")
    parser.add_argument("--top", type=int, default=25, help="cProfile rows shown")
    args = parser.parse_args()
    from slicetime.pipelines.correct import parse_size

    work: Path = args.work.resolve()
    work.mkdir(parents=True, exist_ok=True)
    dataset = make_run(work / f"ds-v{args.volumes}", args.volumes)
    image = dataset / SUBJECT_PATH
    f32 = int(np.prod(SHAPE)) * args.volumes * 4
    cap = parse_size(args.cap)
    print(f"run: {image.name} {[*SHAPE, args.volumes]} int16, "
          f"{image.stat().st_size / MIB:.0f} MiB compressed, float32 array {f32 / MIB:.0f} MiB; "
          f"{os.cpu_count()} CPUs", flush=True)

    overhead = [measure("overhead", [sys.executable, "-c", OVERHEAD],
                        work / "logs" / f"overhead-{i}.log") for i in range(args.repeat)]
    for i in range(args.warmup):  # page cache, CPU frequency, first-run effects
        run_baseline(dataset, work, f"warmup-{i}")
        run_correct("correct (warm-up)", dataset, work, f"warmup-{i}")
    baseline: list[Measurement] = []
    fourier: list[Measurement] = []
    for i in range(args.repeat):
        baseline.append(run_baseline(dataset, work, str(i)))
        print(f"  baseline #{i + 1}: {baseline[-1].wall_s:6.2f} s, "
              f"{baseline[-1].peak_rss_bytes / MIB:5.0f} MiB", flush=True)
        fourier.append(run_correct("correct (fourier)", dataset, work, f"fourier-{i}"))
        print(f"  correct  #{i + 1}: {fourier[-1].wall_s:6.2f} s, "
              f"{fourier[-1].peak_rss_bytes / MIB:5.0f} MiB", flush=True)
    cubic = [run_correct("correct --method cubic", dataset, work, "cubic", "--method", "cubic")]
    capped = [run_correct(f"correct --max-memory {args.cap}", dataset, work, "capped",
                          "--max-memory", args.cap)]

    base_wall = _median(baseline)
    over_peak = _peak(overhead)
    time_ratio = _median(fourier) / base_wall
    mem_ratio = _peak(fourier) / f32
    cap_limit = cap + over_peak
    targets = {
        "time_ratio": {"value": round(time_ratio, 3), "target": "<= 0.5",
                       "met": time_ratio <= 0.5},
        "peak_over_float32": {"value": round(mem_ratio, 3), "target": "< 2",
                              "met": mem_ratio < 2},
        "max_memory_peak_over_cap_plus_overhead": {
            "value": round(_peak(capped) / cap_limit, 3), "target": "<= 1",
            "cap_mib": round(cap / MIB, 1), "overhead_mib": round(over_peak / MIB, 1),
            "peak_mib": round(_peak(capped) / MIB, 1), "met": _peak(capped) <= cap_limit},
    }

    print()
    print(f"{'command':<28} {'wall s':>8} {'cpu s':>8} {'÷ base':>8} {'peak MiB':>9} "
          f"{'÷ f32':>8}")
    print("-" * 74)
    for name, values in (("imports only (overhead)", overhead), ("baseline (nibabel)", baseline),
                         ("correct (fourier)", fourier), ("correct --method cubic", cubic),
                         (f"correct --max-memory {args.cap}", capped)):
        print(_row(name, values, base_wall, f32))
    print(f"(wall: median of {args.repeat} for overhead, baseline and fourier, else one run; "
          "peak: the largest)")
    print()
    print(f"time  correct / baseline      {time_ratio:6.3f}  (target ≤ 0.5)  "
          f"{'MET' if targets['time_ratio']['met'] else 'NOT MET'}")
    print(f"peak  correct / float32 array {mem_ratio:6.3f}  (target < 2)    "
          f"{'MET' if targets['peak_over_float32']['met'] else 'NOT MET'}")
    print(f"--max-memory {args.cap}: peak {_peak(capped) / MIB:.0f} MiB vs cap "
          f"{cap / MIB:.0f} MiB + overhead {over_peak / MIB:.0f} MiB = {cap_limit / MIB:.0f} MiB  "
          f"{'MET' if targets['max_memory_peak_over_cap_plus_overhead']['met'] else 'NOT MET'}")

    profile: dict[str, Any] = {}
    if args.profile:
        for key, method, run_cap in (("fourier", "fourier", None),
                                     ("max_memory", "fourier", cap)):
            phases = phase_profile(dataset, work, method, run_cap, f"phases-{key}")
            profile[f"phases_{key}"] = phases
            title = "fourier" if run_cap is None else f"fourier, --max-memory {args.cap}"
            print(f"\nphases of one correct ({title}; in-process wall clock; "
                  f"imports {phases['imports_s']:.2f} s, correct_paths "
                  f"{phases['correct_paths_s']:.2f} s; peak RSS "
                  f"{phases['peak_rss_before_bytes'] / MIB:.0f} MiB before correct_paths, "
                  f"{phases['peak_rss_bytes'] / MIB:.0f} MiB after):")
            print(f"  {'phase':<48} {'wall s':>7} {'share':>6} {'calls':>6} "
                  f"{'peak +MiB':>9} {'peak MiB':>9}")
            for name, entry in sorted(phases["phases"].items()):
                share = entry["s"] / phases["correct_paths_s"]
                after = entry["peak_after_bytes"]
                print(f"  {name:<48} {entry['s']:7.2f} {share:6.1%} {entry['calls']:6d} "
                      f"{entry['peak_raised_bytes'] / MIB:9.0f} "
                      f"{after / MIB if after else float('nan'):9.0f}")
            print("  (peak +MiB: how much the peak RSS rose inside the phase; peak MiB: the "
                  "highest peak it left; nested phases count in their parents too)")
        profiled = cprofile(dataset, work, args.top)
        profile["cprofile"] = profiled
        print(f"\ncProfile of one correct_paths call (fourier, after the imports; main "
              f"thread only, the gzip helper threads appear as lock waits; total "
              f"{profiled['total_s']:.2f} s; {profiled['file']})")
        _print_profile_rows(f"top {args.top} by cumulative time:", profiled["top_by_cumtime"])
        _print_profile_rows(f"top {args.top} by own time:", profiled["top_by_tottime"])
        imports = import_times(15)
        profile["slowest_imports"] = imports
        print("\nslowest imports of the correct command (python -X importtime, cumulative):")
        for row in imports:
            print(f"  {row['cumulative_s']:6.3f} s  {row['module']}")

    out: Path = args.out
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(json.dumps({
        "machine": platform.platform(), "python": platform.python_version(),
        "cpus": os.cpu_count(),
        "run": {"shape": [*SHAPE, args.volumes], "dtype": "int16", "tr_s": TR,
                "compressed_mib": round(image.stat().st_size / MIB, 1),
                "float32_mib": round(f32 / MIB, 1), "gzip_level": GZIP_LEVEL},
        "repeat": args.repeat,
        "overhead": _summary(overhead), "baseline": _summary(baseline),
        "correct_fourier": _summary(fourier), "correct_cubic": _summary(cubic),
        "correct_max_memory": _summary(capped) | {"cap": args.cap},
        "targets": targets, "profile": profile,
    }, indent=2))
    print(f"\nwritten {out}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
