"""Benchmark ``slicetime verify`` on one 64 x 64 x 40 x 300 int16 ``.nii.gz`` run.

Each measurement runs in a fresh process (wall time of ``verify_run``: reading the
header, the streamed reduction and the scoring; peak resident memory of that process).
With ``--against REV`` the same run is also verified by the implementation at git
revision ``REV`` (its ``engines/verify.py`` and ``pipelines/verify.py`` loaded from
git beside the current readers), in the same command, and the ratio is printed.

    .venv/bin/python benchmarks/bench_verify.py --repeat 3 --against 7a347a6
"""

from __future__ import annotations

import argparse
import json
import multiprocessing
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

SHAPE = (64, 64, 40, 300)
TR = 2.0


def write_run(folder: Path) -> Path:
    """A run whose slices sample a shared slow signal and a respiration-like oscillation
    at their own (interleaved) times, plus noise; int16, gzip."""
    import nibabel as nib

    from slicetime.schemes.generate import Protocol, array_times

    nx, ny, nz, nv = SHAPE
    times = np.asarray(array_times(Protocol(nz, "interleaved", True, 2, 0, 1,
                                            repetition_time=TR)))
    rng = np.random.default_rng(0)
    grid = np.arange(0, nv * TR + TR, 0.05)
    slow = np.convolve(rng.normal(size=grid.size), np.hanning(200), "same")
    slow /= slow.std()
    yy, xx = np.mgrid[:nx, :ny]
    inside = ((xx - ny / 2) / (0.45 * ny)) ** 2 + ((yy - nx / 2) / (0.42 * nx)) ** 2 <= 1
    data = np.empty(SHAPE, dtype=np.int16)
    for z in range(nz):
        t = np.arange(nv) * TR + times[z]
        shared = 5 * np.interp(t, grid, slow) + 3 * np.cos(2 * np.pi * 0.27 * t)
        plane = 1000.0 * inside[:, :, None] + shared[None, None, :] * inside[:, :, None]
        plane += rng.normal(0, 20, (nx, ny, nv))
        data[:, :, z, :] = np.round(plane).astype(np.int16)
    root = folder / "ds"
    func = root / "sub-01" / "func"
    func.mkdir(parents=True)
    (root / "dataset_description.json").write_text(
        json.dumps({"Name": "bench", "BIDSVersion": "1.9.0"}), encoding="utf-8")
    image = nib.Nifti1Image(data, np.eye(4))
    image.header.set_xyzt_units("mm", "sec")
    image.header.set_zooms((3.0, 3.0, 3.0, TR))
    path = func / "sub-01_task-bench_bold.nii.gz"
    nib.save(image, path)
    (func / "sub-01_task-bench_bold.json").write_text(json.dumps(
        {"RepetitionTime": TR, "SliceTiming": [round(float(t), 6) for t in times],
         "TaskName": "bench"}), encoding="utf-8")
    return path


def load_revision(rev: str, folder: Path) -> Path:
    """The verify engine and pipeline at ``rev`` as a package ``old_verify`` in ``folder``."""
    package = folder / "old_verify"
    package.mkdir(parents=True)
    (package / "__init__.py").write_text("", encoding="utf-8")
    for name, source in (("engine.py", "slicetime/engines/verify.py"),
                         ("pipeline.py", "slicetime/pipelines/verify.py")):
        text = subprocess.run(["git", "show", f"{rev}:{source}"], check=True,
                              capture_output=True, text=True).stdout
        text = text.replace("from slicetime.engines import verify as ev",
                            "from old_verify import engine as ev")
        (package / name).write_text(text, encoding="utf-8")
    return folder


def _measure(path: str, extra: str | None, queue: multiprocessing.Queue) -> None:
    if extra:
        sys.path.insert(0, extra)
        from old_verify.pipeline import verify_run  # type: ignore[import-not-found]
    else:
        from slicetime.pipelines.verify import verify_run
    from slicetime.readers.dataset import find_root

    file = Path(path)
    start = time.perf_counter()
    _, outcome = verify_run(find_root(file.parent), file)
    seconds = time.perf_counter() - start
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    queue.put({"seconds": seconds, "peak_mib": peak, "verdict": outcome.finding.code})


def measure(path: Path, extra: Path | None) -> dict[str, object]:
    context = multiprocessing.get_context("spawn")
    queue: multiprocessing.Queue = context.Queue()
    process = context.Process(target=_measure,
                              args=(str(path), str(extra) if extra else None, queue))
    process.start()
    result = queue.get()
    process.join()
    return result


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--against", default=None, help="git revision to compare with")
    parser.add_argument("--out", type=Path, default=None, help="write the results as JSON")
    args = parser.parse_args(argv)
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        path = write_run(folder)
        extra = load_revision(args.against, folder / "rev") if args.against else None
        results: dict[str, list[dict[str, object]]] = {"current": []}
        if extra:
            results["previous"] = []
        for _ in range(max(1, args.repeat)):
            # alternate, so that load on the machine affects both alike
            results["current"].append(measure(path, None))
            if extra:
                results["previous"].append(measure(path, extra))
    summary: dict[str, object] = {"shape": list(SHAPE), "repeat": args.repeat}
    for name, items in results.items():
        seconds = sorted(float(r["seconds"]) for r in items)  # type: ignore[arg-type]
        summary[name] = {"median_seconds": round(seconds[len(seconds) // 2], 3),
                         "peak_mib": round(max(float(r["peak_mib"])  # type: ignore[arg-type]
                                               for r in items), 1),
                         "verdict": items[0]["verdict"]}
    if extra:
        current = summary["current"]["median_seconds"]  # type: ignore[index]
        previous = summary["previous"]["median_seconds"]  # type: ignore[index]
        summary["ratio_current_to_previous"] = round(current / previous, 2)
    text = json.dumps(summary, indent=2)
    print(text)
    if args.out:
        args.out.parent.mkdir(parents=True, exist_ok=True)
        args.out.write_text(text + "\n", encoding="utf-8")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
