"""What the source cross-check adds to an audit, per run, on a tree of 500 series.

The tree: 100 subjects × 5 runs, each run with its own mosaic series (3 volumes,
one file per volume, headers of nibabel's 32-tile test mosaic with their own
SeriesNumber) under sourcedata/sub-X/; by default the sidecars give SeriesNumber,
``--geometry`` leaves it out, so every run is matched by geometry, TR and volume
count instead (every candidate series of the subject is read). The audit runs in
one process with the check off and on, alternating (median of ``--repeat``).

    python benchmarks/bench_source.py [--runs 500] [--repeat 3] [--geometry]
                                      [--out bench-results/source.json]

Target: the check adds under 20 ms per run.
"""

from __future__ import annotations

import argparse
import gzip
import json
import statistics
import sys
import tempfile
import time
import warnings
from pathlib import Path

import nibabel as nib
import numpy as np
import pydicom

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from slicetime.pipelines.audit import audit_paths
from slicetime.readers.source import SourceOptions

RESTING = Path(nib.__file__).parent / "nicom" / "tests" / "data" / "csa_slice_norm.dcm"
PER_SUBJECT = 5


def make_tree(root: Path, n_runs: int, series_number: bool) -> None:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        from nibabel.nicom import dicomwrappers
        source = pydicom.dcmread(RESTING)
        wrapper = dicomwrappers.wrapper_from_data(source)
        affine = np.diag([-1.0, -1.0, 1.0, 1.0]) @ wrapper.affine
        shape = tuple(wrapper.image_shape)
    root.mkdir(parents=True)
    (root / "dataset_description.json").write_text(json.dumps({"Name": "bench"}))
    image = nib.Nifti1Image(np.zeros((*shape, 3), np.int16), affine)
    image.header.set_xyzt_units("mm", "sec")
    image.header["pixdim"][4] = 2.07
    payload = gzip.compress(image.to_bytes(), compresslevel=1, mtime=0)
    times = [0.0] * shape[2]  # wrong on purpose: every run gets a finding
    for i in range(n_runs):
        subject, task = divmod(i, PER_SUBJECT)
        func = root / f"sub-{subject:03d}" / "func"
        func.mkdir(parents=True, exist_ok=True)
        name = f"sub-{subject:03d}_task-t{task}_bold"
        (func / f"{name}.nii.gz").write_bytes(payload)
        fields = {"RepetitionTime": 2.07, "SliceTiming": times}
        if series_number:
            fields["SeriesNumber"] = task + 1
        (func / f"{name}.json").write_text(json.dumps(fields))
        folder = root / "sourcedata" / f"sub-{subject:03d}" / f"{task + 1:03d}_t{task}"
        folder.mkdir(parents=True)
        source.SeriesNumber = task + 1
        if not series_number and task:
            # different geometry per series, so exactly one fits each run
            source.RepetitionTime = 2070 + 100 * task
        else:
            source.RepetitionTime = 2070
        for volume in range(3):
            source.save_as(folder / f"{volume + 1:04d}.dcm")


def timed(root: Path, mode: str) -> tuple[float, int]:
    started = time.perf_counter()
    result = audit_paths([root], source=SourceOptions(mode=mode))  # type: ignore[arg-type]
    elapsed = time.perf_counter() - started
    found = sum(f.code.startswith("source/") for r in result.runs for f in r.findings)
    return elapsed, found


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--runs", type=int, default=500)
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--geometry", action="store_true")
    parser.add_argument("--out", type=Path)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp) / "ds"
        make_tree(root, args.runs, not args.geometry)
        timed(root, "on")  # imports (pydicom, nibabel) and a warm file cache
        off, on = [], []
        findings = 0
        for _ in range(args.repeat):
            off.append(timed(root, "off")[0])
            seconds, findings = timed(root, "on")
            on.append(seconds)
    t_off, t_on = statistics.median(off), statistics.median(on)
    per_run_ms = (t_on - t_off) / args.runs * 1000
    report = {
        "runs": args.runs, "series": args.runs, "match": "geometry" if args.geometry
        else "SeriesNumber", "audit_off_s": round(t_off, 3), "audit_on_s": round(t_on, 3),
        "added_ms_per_run": round(per_run_ms, 2), "source_findings": findings,
        "target_ms_per_run": 20,
    }
    print(json.dumps(report, indent=2))
    if args.out:
        args.out.parent.mkdir(parents=True, exist_ok=True)
        args.out.write_text(json.dumps(report, indent=2) + "\n")


if __name__ == "__main__":
    main()
