"""Memory of the audit when many runs inherit one very large sidecar.

Measured before the change (copies per run): 7.1 MB held per run at 100 runs
(707 MB); after: 26-28 MB in total for 20 to 400 runs (a few kB per run).

A top-level ``task-big_bold.json`` holds a ``SliceTiming`` list of about 13 MB
(issue 13, item 13); every run inherits it. The audit keeps one record per run,
so what each extra run costs shows whether the parsed value is shared (a few
hundred bytes per run) or copied (megabytes per run). Measured with tracemalloc
in one process: the memory still held by the audit result, and the peak.

    python benchmarks/bench_shared_sidecar.py [--runs 50,200,400] [--mb 13]
                                              [--out bench-results/shared_sidecar.json]
"""

from __future__ import annotations

import argparse
import gc
import gzip
import json
import platform
import shutil
import sys
import tempfile
import tracemalloc
from pathlib import Path

import nibabel as nib
import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from slicetime.pipelines.audit import audit_paths


def make_dataset(root: Path, n_runs: int, megabytes: float) -> int:
    """``n_runs`` runs inheriting one top-level sidecar of about ``megabytes`` MB."""
    root.mkdir(parents=True)
    (root / "dataset_description.json").write_text(
        json.dumps({"Name": "bench", "BIDSVersion": "1.10.0"}))
    entry = "1.234567890123, "  # 16 bytes of JSON per value
    count = int(megabytes * 1e6 / len(entry))
    text = '{"RepetitionTime": 2.0, "SliceTiming": [' + entry * (count - 1) + "1.0]}"
    (root / "task-big_bold.json").write_text(text)
    img = nib.Nifti1Image(np.zeros((4, 4, 10, 3), np.int16), np.eye(4))
    img.header.set_xyzt_units("mm", "sec")
    payload = gzip.compress(img.to_bytes(), compresslevel=1, mtime=0)
    for i in range(n_runs):
        func = root / f"sub-{i:04d}" / "func"
        func.mkdir(parents=True)
        (func / f"sub-{i:04d}_task-big_bold.nii.gz").write_bytes(payload)
    return len(text)


def measure(root: Path, jobs: int) -> tuple[int, int, int]:
    """(runs, bytes still held by the result, peak bytes) of one audit (in this process:
    with ``jobs`` > 1 what the workers send back)."""
    gc.collect()
    tracemalloc.start()
    result = audit_paths([root], jobs=jobs)
    gc.collect()
    held, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    runs = len(result.runs)
    del result
    return runs, held, peak


def main() -> int:
    parser = argparse.ArgumentParser()
    parser.add_argument("--runs", default="50,200,400")
    parser.add_argument("--mb", type=float, default=13.0)
    parser.add_argument("--jobs", default="1,2", help="worker processes, one row each")
    parser.add_argument("--out", default="bench-results/shared_sidecar.json")
    args = parser.parse_args()
    rows = []
    work = Path(tempfile.mkdtemp(prefix="slicetime-bench-"))
    try:
        for n in (int(s) for s in args.runs.split(",")):
            root = work / f"ds{n}"
            size = make_dataset(root, n, args.mb)
            for jobs in (int(j) for j in args.jobs.split(",")):
                runs, held, peak = measure(root, jobs)
                rows.append({"runs": runs, "jobs": jobs, "sidecar_bytes": size,
                             "held_mb": round(held / 1e6, 1), "peak_mb": round(peak / 1e6, 1),
                             "held_per_run_kb": round(held / runs / 1e3, 1)})
                print(f"{runs:>5} runs, --jobs {jobs}, sidecar {size / 1e6:.1f} MB: held "
                      f"{held / 1e6:8.1f} MB, peak {peak / 1e6:8.1f} MB, "
                      f"{held / runs / 1e3:9.1f} kB per run", flush=True)
            shutil.rmtree(root)
    finally:
        shutil.rmtree(work, ignore_errors=True)
    out = Path(args.out)
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(json.dumps({"machine": platform.platform(), "rows": rows}, indent=2))
    print(f"written {out}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
