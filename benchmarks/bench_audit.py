"""Audit throughput against a baseline script, in one process and one run.

Baseline: what a lab would write by hand — index the dataset with pybids'
BIDSLayout, then for every BOLD run get its metadata with get_metadata and
load its header with nibabel. slicetime: the full audit (reading, inheritance,
scheme inference, every rule, dataset rules), serially and with 2 processes.

    python benchmarks/bench_audit.py [--sizes 500,2000] [--repeat 3]
                                     [--out bench-results/audit.json]

Reports wall times and ratios (baseline / slicetime); absolute seconds vary
between machines, the ratios are what the targets are about. Each measurement
is repeated (``--repeat``, alternating baseline and slicetime so that a busy
moment on a shared machine hits both) and the median is reported, with the
spread (min and max) beside it in the JSON.
"""

from __future__ import annotations

import argparse
import gzip
import json
import platform
import shutil
import statistics
import sys
import tempfile
import time
import warnings
from pathlib import Path

import nibabel as nib
import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from slicetime.pipelines.audit import audit_paths
from slicetime.schemes.generate import Protocol, slice_timing


def make_dataset(root: Path, n_runs: int) -> None:
    """n_runs BOLD runs: subjects × sessions × 2 tasks, top-level sidecars, some overrides."""
    root.mkdir(parents=True)
    (root / "dataset_description.json").write_text(
        json.dumps({"Name": "bench", "BIDSVersion": "1.10.0"}))
    st = slice_timing(Protocol(n_slices=40, order="interleaved", repetition_time=2.0,
                               decimals=4))
    for task in ("a", "b"):
        (root / f"task-{task}_bold.json").write_text(
            json.dumps({"RepetitionTime": 2.0, "SliceTiming": st, "TaskName": task}))
    img = nib.Nifti1Image(np.zeros((8, 8, 40, 4), np.int16), np.eye(4))
    img.header.set_xyzt_units("mm", "sec")
    img.header.set_zooms((3.0, 3.0, 3.0, 2.0))
    img.header.set_dim_info(slice=2)
    payload = gzip.compress(img.to_bytes(), compresslevel=1, mtime=0)
    per_subject = 4  # 2 sessions × 2 tasks
    for i in range((n_runs + per_subject - 1) // per_subject):
        for ses in ("1", "2"):
            func = root / f"sub-{i:05d}" / f"ses-{ses}" / "func"
            func.mkdir(parents=True)
            for task in ("a", "b"):
                if i * per_subject >= n_runs:
                    break
                stem = f"sub-{i:05d}_ses-{ses}_task-{task}_bold"
                (func / f"{stem}.nii.gz").write_bytes(payload)
                (func / f"{stem}.json").write_text(json.dumps({"EchoTime": 0.03}))


def baseline(root: Path) -> float:
    from bids import BIDSLayout

    start = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        layout = BIDSLayout(str(root), validate=False)
        files = layout.get(suffix="bold", extension=[".nii.gz", ".nii"],
                           return_type="filename")
        for f in files:
            md = layout.get_metadata(f)
            hdr = nib.load(f).header
            _ = (hdr.get_zooms(), hdr.get_dim_info(), md.get("SliceTiming"))
    return time.perf_counter() - start


def ours(root: Path, jobs: int) -> tuple[float, int]:
    start = time.perf_counter()
    result = audit_paths([root], jobs=jobs)
    return time.perf_counter() - start, len(result.runs)


def main() -> int:
    parser = argparse.ArgumentParser()
    parser.add_argument("--sizes", default="500,2000")
    parser.add_argument("--repeat", type=int, default=3,
                        help="measurements of each kind; the median is reported")
    parser.add_argument("--out", default="bench-results/audit.json")
    args = parser.parse_args()
    sizes = [int(s) for s in args.sizes.split(",")]
    repeat = max(1, args.repeat)
    rows = []
    work = Path(tempfile.mkdtemp(prefix="slicetime-bench-"))
    try:
        for n in sizes:
            root = work / f"ds{n}"
            make_dataset(root, n)
            times: dict[str, list[float]] = {"baseline": [], "jobs1": [], "jobs2": []}
            runs = 0
            for _ in range(repeat):
                times["baseline"].append(baseline(root))
                t_one, runs = ours(root, 1)
                times["jobs1"].append(t_one)
                times["jobs2"].append(ours(root, 2)[0])
            t_base, t_one, t_two = (statistics.median(times[k])
                                    for k in ("baseline", "jobs1", "jobs2"))
            row = {"runs": runs, "baseline_s": round(t_base, 3),
                   "slicetime_jobs1_s": round(t_one, 3), "slicetime_jobs2_s": round(t_two, 3),
                   "ratio_jobs1": round(t_base / t_one, 1),
                   "ratio_jobs2": round(t_base / t_two, 1),
                   "slicetime_us_per_run": round(t_one / runs * 1e6),
                   "repeat": repeat,
                   "spread_s": {k: [round(min(v), 3), round(max(v), 3)]
                                for k, v in times.items()}}
            rows.append(row)
            print(f"{runs:>6} runs: baseline {t_base:7.2f} s | slicetime {t_one:6.2f} s "
                  f"(×{row['ratio_jobs1']}) | --jobs 2 {t_two:6.2f} s (×{row['ratio_jobs2']})",
                  flush=True)
    finally:
        shutil.rmtree(work, ignore_errors=True)
    out = Path(args.out)
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(json.dumps({"machine": platform.platform(), "python": platform.python_version(),
                               "cpus": __import__("os").cpu_count(), "audit": rows}, indent=2))
    print(f"written {out}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
