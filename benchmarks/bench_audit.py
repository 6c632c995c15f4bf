"""Audit throughput: the whole command as typed, against a whole-process baseline.

Every measurement is a separate process started as a user starts it, timed from
the outside (wall time and peak resident memory from ``/usr/bin/time``, or from
``resource.getrusage(RUSAGE_CHILDREN)`` where it is missing):

* baseline: a script that indexes the dataset with pybids' ``BIDSLayout``,
  asks it for every run's metadata and loads every header with nibabel, then
  prints a JSON report of the timing fields (what a lab would write by hand);
* slicetime: ``slicetime audit DATASET --format F > report`` for F in json,
  jsonl, text, and ``--html report.html --quiet`` for the HTML report;
* the bare-scan floor (``SCAN``): an ``os.scandir`` walk that reads each header's
  first bytes and ``json.loads`` each sidecar, nothing else; every slicetime
  figure is also given as a multiple of it (``over_scan``), measured in the same
  rounds, in wall time and in CPU time (``over_scan_cpu``: user + system seconds
  of the command and every process it started, from ``getrusage``; on a shared
  machine the load of others lengthens wall times, not CPU times);
* ``json@1``, ``text@1``: the same reports with ``--jobs 1``, so the default's
  choice of workers is compared with one worker in the same rounds
  (``over_one_worker``: below 1 the default won).

Two layouts: ``shared`` (the timing in top-level sidecars, each run a small
sidecar of its own) and ``per-run`` (every run's own sidecar holds all of its
timing, nothing inherited). Sizes: 2,000 and 20,000 runs by default; ``--huge``
adds 100,000 runs (per-run layout, the memory target). The baseline runs at
sizes up to ``--baseline-max`` (default 2,000: pybids takes minutes beyond).
Also measured: a single-run audit (the pre-commit case) as a whole command,
its import time (``python -X importtime``), and, for comparison with the
earlier table, the audit inside this process (``audit_paths``, no report).

    python benchmarks/bench_audit.py [--sizes 2000,20000] [--huge] [--repeat 3]
                                     [--out bench-results/audit.json]

Absolute seconds vary between machines and with the load of a shared one; the
ratios (baseline ÷ slicetime, measured alternately in one run) are what the
targets are about.
"""

from __future__ import annotations

import argparse
import gzip
import json
import os
import platform
import re
import resource
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import nibabel as nib
import numpy as np

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO))

from slicetime.schemes.generate import Protocol, slice_timing  # noqa: E402

FORMATS = ("json", "jsonl", "text", "html", "json@1", "text@1")
TIME = "/usr/bin/time" if os.access("/usr/bin/time", os.X_OK) else None

BASELINE = r'''
import json, sys, warnings
import nibabel as nib
from bids import BIDSLayout

warnings.simplefilter("ignore")
layout = BIDSLayout(sys.argv[1], validate=False)
out = []
for f in layout.get(suffix="bold", extension=[".nii.gz", ".nii"], return_type="filename"):
    md = layout.get_metadata(f)
    hdr = nib.load(f).header
    out.append({"path": f, "zooms": [float(z) for z in hdr.get_zooms()],
                "dim_info": [d if d is None else int(d) for d in hdr.get_dim_info()],
                "SliceTiming": md.get("SliceTiming"), "RepetitionTime": md.get("RepetitionTime")})
json.dump({"runs": out}, sys.stdout)
'''


# The bare-scan floor of an audit: walk the tree with os.scandir, read each image
# header's first bytes (a gzip member decoded only as far as the 352-byte header),
# json.loads each sidecar; print how many of each were read. No rules, no report.
SCAN = r'''
import json, os, sys, zlib

def walk(folder, counts):
    with os.scandir(folder) as entries:
        for entry in entries:
            name = entry.name
            if entry.is_dir(follow_symlinks=False):
                walk(entry.path, counts)
            elif name.endswith((".nii.gz", ".nii")):
                with open(entry.path, "rb") as fh:
                    head = fh.read(4096)
                if name.endswith(".gz"):
                    head = zlib.decompressobj(31).decompress(head, 352)
                counts[0] += len(head) >= 348
            elif name.endswith(".json"):
                with open(entry.path, "rb") as fh:
                    counts[1] += isinstance(json.loads(fh.read()), dict)

counts = [0, 0]
walk(sys.argv[1], counts)
print(json.dumps({"headers": counts[0], "sidecars": counts[1]}))
'''


def _payload() -> bytes:
    """One tiny gzipped NIfTI-1 file (8×8×40×4 int16), written once and copied."""
    img = nib.Nifti1Image(np.zeros((8, 8, 40, 4), np.int16), np.eye(4))
    img.header.set_xyzt_units("mm", "sec")
    img.header.set_zooms((3.0, 3.0, 3.0, 2.0))
    img.header.set_dim_info(slice=2)
    return gzip.compress(img.to_bytes(), compresslevel=1, mtime=0)


def make_dataset(root: Path, n_runs: int, layout: str) -> None:
    """n_runs BOLD runs: subjects × 2 sessions × 2 tasks. ``shared``: timing in
    top-level sidecars, each run a one-key sidecar; ``per-run``: each run's own
    sidecar holds all its timing. The image bytes are written directly (one
    compressed payload copied), so 100,000 runs take seconds, not minutes."""
    root.mkdir(parents=True)
    (root / "dataset_description.json").write_text(
        json.dumps({"Name": "bench", "BIDSVersion": "1.10.0"}))
    st = slice_timing(Protocol(n_slices=40, order="interleaved", repetition_time=2.0,
                               decimals=4))
    shared = layout == "shared"
    if shared:
        for task in ("a", "b"):
            (root / f"task-{task}_bold.json").write_text(
                json.dumps({"RepetitionTime": 2.0, "SliceTiming": st, "TaskName": task}))
    payload = _payload()
    per_subject = 4  # 2 sessions × 2 tasks
    written = 0
    for i in range((n_runs + per_subject - 1) // per_subject):
        for ses in ("1", "2"):
            func = os.path.join(root, f"sub-{i:06d}", f"ses-{ses}", "func")
            os.makedirs(func)
            for task in ("a", "b"):
                if written >= n_runs:
                    break
                stem = os.path.join(func, f"sub-{i:06d}_ses-{ses}_task-{task}_bold")
                with open(stem + ".nii.gz", "wb") as fh:
                    fh.write(payload)
                side = {"EchoTime": 0.03} if shared else {
                    "RepetitionTime": 2.0, "SliceTiming": st, "TaskName": task,
                    "EchoTime": 0.03}
                with open(stem + ".json", "w") as fh:
                    fh.write(json.dumps(side))
                written += 1


def _command() -> list[str]:
    script = Path(sys.executable).with_name("slicetime")
    return [str(script)] if script.exists() else [sys.executable, "-m", "slicetime"]


#: CPU seconds (user + system) of the last command measured, workers included
LAST_CPU = [0.0]


def _children_cpu() -> float:
    usage = resource.getrusage(resource.RUSAGE_CHILDREN)
    return usage.ru_utime + usage.ru_stime


def measure(command: list[str], stdout: Path) -> tuple[float, float]:
    """(wall seconds, peak resident MiB) of one command, stdout to a file; its CPU
    seconds (every process it started included: they are waited for) in ``LAST_CPU``.
    CPU time is what the ratios are given in beside wall time: on a shared machine
    other people's work lengthens the wall time of whatever runs, not its CPU time."""
    cpu = _children_cpu()
    if TIME:
        stats = stdout.with_suffix(".time")
        with open(stdout, "wb") as out:
            subprocess.run([TIME, "-f", "%e %M", "-o", str(stats), *command], stdout=out,
                           stderr=subprocess.DEVNULL, check=False)
        LAST_CPU[0] = _children_cpu() - cpu
        wall, kib = stats.read_text().split()[-2:]
        return float(wall), int(kib) / 1024
    before = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    start = time.perf_counter()
    with open(stdout, "wb") as out:
        subprocess.run(command, stdout=out, stderr=subprocess.DEVNULL, check=False)
    wall = time.perf_counter() - start
    LAST_CPU[0] = _children_cpu() - cpu
    # ru_maxrss of children is the largest so far: exact only when this one is larger
    peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    return wall, (peak if peak > before else float("nan")) / 1024


def slicetime_command(root: Path, fmt: str, work: Path) -> tuple[list[str], Path]:
    base = [*_command(), "audit", str(root), "--fail-on", "never", "--no-progress"]
    if "@" in fmt:  # FORMAT@JOBS: the same report with --jobs given (against the default)
        fmt, jobs = fmt.split("@")
        base += ["--jobs", jobs]
    if fmt == "html":
        return [*base, "--html", str(work / "report.html"), "--quiet"], work / "stdout.txt"
    return [*base, "--format", fmt], work / f"report.{fmt}"


def in_process(root: Path) -> float:
    from slicetime.pipelines.audit import audit_paths

    start = time.perf_counter()
    audit_paths([root])
    return time.perf_counter() - start


def single_run(work: Path, repeat: int) -> dict[str, object]:
    """The pre-commit case: one run, the whole command, and where its start-up goes."""
    root = work / "one"
    make_dataset(root, 1, "per-run")
    run = next(root.rglob("*_bold.nii.gz"))
    command = [*_command(), "audit", str(run)]
    walls = [measure(command, work / "one.txt")[0] for _ in range(repeat)]
    imports = subprocess.run([sys.executable, "-X", "importtime", "-m", "slicetime", "audit",
                              str(run)], capture_output=True, text=True, check=False).stderr
    top: dict[str, int] = {}
    for line in imports.splitlines():
        m = re.match(r"import time:\s+\d+ \|\s+(\d+) \|( *)(\S+)", line)
        if m and len(m.group(2)) <= 2:
            top[m.group(3)] = int(m.group(1))
    python = [measure([sys.executable, "-c", "pass"], work / "py.txt")[0] for _ in range(repeat)]
    heavy = [name for name in ("numpy", "scipy", "rich", "jsonschema", "matplotlib", "nibabel",
                               "dask") if re.search(rf"\| +{name}$", imports, re.M)]
    return {"wall_s": round(statistics.median(walls), 3),
            "python_startup_s": round(statistics.median(python), 3),
            "heavy_imports": heavy,
            "largest_imports_ms": {k: round(v / 1000) for k, v in
                                   sorted(top.items(), key=lambda kv: -kv[1])[:8]}}


def _shown(key: str, v: dict[str, Any]) -> str:
    """One figure of a row as the progress line prints it."""
    return (f"{key} {v['wall_s']:.2f} s {v['peak_mib']:.0f} MiB"
            + (f" ×{v['ratio']}" if "ratio" in v else "")
            + (f" {v['over_scan']}× scan (CPU {v['over_scan_cpu']}×)" if "over_scan" in v
               else "")
            + (f" {v['over_one_worker']}× one worker" if "over_one_worker" in v else ""))


def main() -> int:
    parser = argparse.ArgumentParser()
    parser.add_argument("--sizes", default="2000,20000")
    parser.add_argument("--huge", action="store_true",
                        help="also 100,000 runs (per-run layout): several minutes")
    parser.add_argument("--layouts", default="shared,per-run")
    parser.add_argument("--formats", default=",".join(FORMATS),
                        help="report formats; FORMAT@N also runs it with --jobs N (json@1, "
                        "text@1 give the default's ratio to one worker)")
    parser.add_argument("--baseline-max", type=int, default=2000)
    parser.add_argument("--repeat", type=int, default=3,
                        help="measurements at the smallest size; the median is reported")
    parser.add_argument("--out", default="bench-results/audit.json")
    args = parser.parse_args()
    # measure what an installed slicetime costs: pip writes the bytecode at install time,
    # but this machine sets PYTHONDONTWRITEBYTECODE, so every start would compile the
    # package again (about 0.07 s of a one-run audit) unless it is compiled once here
    import compileall

    import slicetime

    compileall.compile_dir(str(Path(slicetime.__file__).parent), quiet=1)
    sizes = [int(s) for s in args.sizes.split(",")]
    layouts = args.layouts.split(",")
    formats = args.formats.split(",")
    rows = []
    work = Path(tempfile.mkdtemp(prefix="slicetime-bench-"))
    plan = [(n, layout) for n in sizes for layout in layouts]
    if args.huge:
        plan.append((100_000, "per-run"))
    try:
        one = single_run(work, max(3, args.repeat))
        print(f"one run: {one['wall_s']} s whole command (python alone "
              f"{one['python_startup_s']} s); heavy imports: {one['heavy_imports'] or 'none'}",
              flush=True)
        baseline_script = work / "baseline.py"
        baseline_script.write_text(BASELINE)
        scan_script = work / "scan.py"
        scan_script.write_text(SCAN)
        for n, layout in plan:
            root = work / f"ds-{layout}-{n}"
            started = time.perf_counter()
            make_dataset(root, n, layout)
            made = time.perf_counter() - started
            repeat = max(1, args.repeat) if n == min(sizes) else 1
            times: dict[str, list[float]] = {}
            cpus: dict[str, list[float]] = {}
            peaks: dict[str, float] = {}

            def take(key: str, command: list[str], out: Path, times: dict[str, list[float]]
                    = times, cpus: dict[str, list[float]] = cpus,
                    peaks: dict[str, float] = peaks) -> None:
                wall, peak = measure(command, out)
                times.setdefault(key, []).append(wall)
                cpus.setdefault(key, []).append(LAST_CPU[0])
                peaks[key] = max(peaks.get(key, 0.0), peak)

            for _ in range(repeat):  # alternating rounds: each figure meets the same load
                take("scan", [sys.executable, str(scan_script), str(root)], work / "scan.json")
                if n <= args.baseline_max:
                    take("baseline", [sys.executable, str(baseline_script), str(root)],
                        work / "baseline.json")
                for fmt in formats:
                    take(fmt, *slicetime_command(root, fmt, work))
            row: dict[str, object] = {"runs": n, "layout": layout, "repeat": repeat,
                                      "generate_s": round(made, 2),
                                      "load_average": round(os.getloadavg()[0], 1)}
            base = statistics.median(times["baseline"]) if "baseline" in times else None
            base_cpu = statistics.median(cpus["baseline"]) if "baseline" in cpus else None
            floor = statistics.median(times["scan"])
            floor_cpu = statistics.median(cpus["scan"])
            for key, values in times.items():
                wall = statistics.median(values)
                cpu = statistics.median(cpus[key])
                mine = key not in ("baseline", "scan")
                row[key] = {"wall_s": round(wall, 3), "cpu_s": round(cpu, 3),
                            "peak_mib": round(peaks[key], 1),
                            "ms_per_run": round(wall / n * 1000, 3),
                            **({"ratio": round(base / wall, 1)} if base and mine else {}),
                            **({"ratio_cpu": round(base_cpu / cpu, 1)}
                               if base_cpu and mine else {}),
                            **({"over_scan": round(wall / floor, 2),
                                "over_scan_cpu": round(cpu / floor_cpu, 2)} if mine else {})}
                single = f"{key.split('@')[0]}@1"
                if mine and "@" not in key and single in times:  # the default's workers
                    row[key]["over_one_worker"] = round(  # type: ignore[index]
                        wall / statistics.median(times[single]), 2)
            if n == min(sizes):
                row["in_process_s"] = round(statistics.median(
                    in_process(root) for _ in range(repeat)), 3)
                if base:
                    row["in_process_ratio"] = round(base / row["in_process_s"], 1)  # type: ignore[operator]
            html = work / "report.html"
            if html.exists():
                row["html_mib"] = round(html.stat().st_size / 2**20, 2)
            rows.append(row)
            shown = " | ".join(_shown(k, v) for k, v in row.items() if isinstance(v, dict))
            print(f"{n:>7} runs, {layout:<7}: {shown}", flush=True)
            shutil.rmtree(root, ignore_errors=True)
    finally:
        shutil.rmtree(work, ignore_errors=True)
    out = Path(args.out)
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(json.dumps({"machine": platform.platform(), "python": platform.python_version(),
                               "cpus": os.cpu_count(), "load_average": os.getloadavg(),
                               "single_run": one, "audit": rows}, indent=2))
    print(f"written {out}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
