"""Does ``correct --max-memory CAP`` hold? Peak memory of one run against the cap.

Each measurement runs ``correct_run`` on one run in a fresh child process and
reports, from ``/proc/self/status``, the resident memory after every import and
before the run (``VmRSS``: the interpreter, numpy, scipy, nibabel: what the cap
does not count) and the peak over the whole process (``VmHWM``). The cap bounds
the difference (the run's working memory): README, "Safety" and ``--max-memory``.

    python benchmarks/bench_memory_cap.py                      # 225 MiB float32 run
    python benchmarks/bench_memory_cap.py --shape 64,64,40,300 --caps 16M,64M,256M,1G --gzip

Prints one line per cap: whether the run was buffered on disk, the working
peak, and whether it stayed under the cap. Exit 1 when one did not.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
from pathlib import Path

import nibabel as nib
import numpy as np

MIB = 1 << 20

CHILD = r"""
import json, sys
from pathlib import Path

def status(key):
    for line in open("/proc/self/status"):
        if line.startswith(key + ":"):
            return int(line.split()[1]) * 1024
    return 0

from slicetime.pipelines import correct as mod
from slicetime.pipelines.audit import audit_paths
from slicetime.engines.interpolate import get_engine, prepare

root, out, cap, threads = Path(sys.argv[1]), Path(sys.argv[2]), sys.argv[3], int(sys.argv[4])
runs = audit_paths([root]).runs
prepare(get_engine("fourier"))  # the engine's imports are not working memory either
decisions = []
real_plan = mod.plan_budget
def spy(*args, **kwargs):
    budget = real_plan(*args, **kwargs)
    decisions.append(budget.on_disk)
    return budget
mod.plan_budget = spy
options = mod.CorrectOptions(out=out, max_memory=mod.parse_size(cap) if cap != "none" else None,
                             threads=threads)
out.mkdir(parents=True, exist_ok=True)
base = status("VmRSS")
outcome = mod.correct_run(runs[0], options)
print(json.dumps({"status": outcome.status, "reason": outcome.reason, "base": base,
                  "peak": status("VmHWM"), "on_disk": decisions[-1] if decisions else None}))
"""


def build(root: Path, shape: tuple[int, int, int, int], ext: str) -> None:
    (root / "sub-01" / "func").mkdir(parents=True)
    (root / "dataset_description.json").write_text(
        json.dumps({"Name": "memory bench", "BIDSVersion": "1.9.0"}))
    rng = np.random.default_rng(0)
    data = (1000 + rng.standard_normal(shape, dtype=np.float32)).astype(np.float32)
    image = nib.Nifti1Image(data, np.eye(4))
    image.header.set_zooms((3.0, 3.0, 3.0, 2.0))
    nib.save(image, root / f"sub-01/func/sub-01_task-bench_bold{ext}")
    n = shape[2]
    times = [round(2.0 * ((i * 2) % n + (i * 2) // n) / n, 4) for i in range(n)]  # interleaved
    (root / "sub-01/func/sub-01_task-bench_bold.json").write_text(json.dumps(
        {"RepetitionTime": 2.0, "SliceTiming": times, "TaskName": "bench"}))


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--shape", default="96,96,40,160", help="x,y,z,t (default 225 MiB)")
    parser.add_argument("--caps", default="16M,64M,256M,none")
    parser.add_argument("--gzip", action="store_true", help="a .nii.gz run (default .nii)")
    parser.add_argument("--threads", type=int, default=2,
                        help="engine and gzip threads per run (the CLI uses the CPUs)")
    args = parser.parse_args()
    shape = tuple(int(v) for v in args.shape.split(","))
    assert len(shape) == 4
    f32 = int(np.prod(shape)) * 4
    print(f"run {shape}: {f32 / MIB:.0f} MiB as float32")
    worst = 0
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp) / "ds"
        build(root, shape, ".nii.gz" if args.gzip else ".nii")  # type: ignore[arg-type]
        for cap in args.caps.split(","):
            out = Path(tmp) / f"out-{cap}"
            done = subprocess.run([sys.executable, "-c", CHILD, str(root), str(out), cap,
                                   str(args.threads)],
                                  capture_output=True, text=True, check=False)
            if done.returncode != 0:
                print(f"  cap {cap}: child failed: {done.stderr.strip()[-400:]}")
                worst = 1
                continue
            report = json.loads(done.stdout.strip().splitlines()[-1])
            work = report["peak"] - report["base"]
            limit = None if cap == "none" else int(
                float(cap[:-1]) * {"K": 1 << 10, "M": MIB, "G": 1 << 30}[cap[-1].upper()])
            held = limit is None or work <= limit
            worst |= 0 if held else 1
            print(f"  cap {cap:>5}: {report['status']:<9} on disk={report['on_disk']!s:<5} "
                  f"interpreter {report['base'] / MIB:5.0f} MiB, working peak "
                  f"{work / MIB:6.1f} MiB, total {report['peak'] / MIB:6.0f} MiB"
                  + ("" if limit is None else f"  {'held' if held else 'EXCEEDED'}")
                  + (f"  ({report['reason']})" if report["reason"] else ""))
    return worst


if __name__ == "__main__":
    sys.exit(main())
