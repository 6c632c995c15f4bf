"""fix --apply and --undo on N sidecars: time per file must not grow with N.

Builds N run sidecars with SliceTiming in milliseconds, plans the repair of
every one (the splice editor, as `fix` does), then times ``apply_plan``
(lock, checks of every file, backups, one journal, atomic writes) and
``undo`` for each size. The audit that `fix` runs first is measured by
``bench_audit.py``; this isolates the writing side, which used to rewrite the
whole journal after every file (quadratic).

    python benchmarks/bench_fix.py [--sizes 2000,20000] [--out bench-results/fix.json]

Reports seconds and milliseconds per file per size, and the ratio of the
per-file time of the largest size to that of the smallest: about 1 means
linear scaling (fsync costs dominate and vary between disks; the ratio is
what matters).
"""

from __future__ import annotations

import argparse
import hashlib
import json
import platform
import shutil
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from slicetime.pipelines.fix import FileChange, FixPlan, apply_plan, undo
from slicetime.pipelines.json_splice import splice
from slicetime.schemes.generate import Protocol, slice_timing


def make_plan(root: Path, n_files: int) -> FixPlan:
    root.mkdir(parents=True)
    (root / "dataset_description.json").write_text(
        json.dumps({"Name": "bench", "BIDSVersion": "1.10.0"}))
    seconds = list(slice_timing(Protocol(n_slices=40, order="interleaved",
                                         repetition_time=2.0, decimals=4)))
    plan = FixPlan()
    for i in range(n_files):
        rel = f"sub-{i // 4:05d}/func/sub-{i // 4:05d}_task-t{i % 4}_bold.json"
        path = root / rel
        path.parent.mkdir(parents=True, exist_ok=True)
        text = json.dumps({"TaskName": f"t{i % 4}", "RepetitionTime": 2.0,
                           "SliceTiming": [round(t * 1000, 3) for t in seconds]}, indent=2)
        path.write_text(text)
        after = splice(text, [("SliceTiming", seconds)])
        plan.changes.append(FileChange(str(root), rel, text, after,
                                       hashlib.sha256(text.encode()).hexdigest()))
    return plan


def measure(n_files: int, work: Path) -> dict[str, float]:
    root = work / f"ds-{n_files}"
    plan = make_plan(root, n_files)
    start = time.perf_counter()
    result = apply_plan(plan, backup_dir=work / f"backups-{n_files}")
    applied = time.perf_counter() - start
    assert len(result.written) == n_files and result.journal is not None
    start = time.perf_counter()
    undone = undo(result.journal)
    undone_s = time.perf_counter() - start
    assert len(undone.restored) == n_files
    shutil.rmtree(root)
    shutil.rmtree(work / f"backups-{n_files}")
    return {"files": n_files, "apply_s": applied, "undo_s": undone_s,
            "apply_ms_per_file": 1000 * applied / n_files,
            "undo_ms_per_file": 1000 * undone_s / n_files}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", default="2000,20000")
    parser.add_argument("--out", type=Path)
    args = parser.parse_args()
    sizes = sorted(int(s) for s in args.sizes.split(","))
    rows = []
    with tempfile.TemporaryDirectory(prefix="slicetime-bench-fix-") as tmp:
        for n in sizes:
            row = measure(n, Path(tmp))
            rows.append(row)
            print(f"{n:>7} files: apply {row['apply_s']:7.2f} s "
                  f"({row['apply_ms_per_file']:.3f} ms/file), undo {row['undo_s']:7.2f} s "
                  f"({row['undo_ms_per_file']:.3f} ms/file)", flush=True)
    first, last = rows[0], rows[-1]
    ratio = {"apply": last["apply_ms_per_file"] / first["apply_ms_per_file"],
             "undo": last["undo_ms_per_file"] / first["undo_ms_per_file"]}
    print(f"per-file time, {last['files']} vs {first['files']} files: apply ×{ratio['apply']:.2f}, "
          f"undo ×{ratio['undo']:.2f} (1 = linear)")
    if args.out:
        args.out.parent.mkdir(parents=True, exist_ok=True)
        args.out.write_text(json.dumps({"machine": platform.platform(), "rows": rows,
                                        "per_file_ratio": ratio}, indent=2) + "\n")


if __name__ == "__main__":
    main()
