"""Audit cost per run with shared top-level sidecars against one sidecar per run.

Both layouts hold the same runs and the same metadata (issue 17, item 4): in
``shared`` the fields sit in one top-level sidecar per task and each run has a
one-field own sidecar (as in ``bench_audit.py``); in ``per-run`` every run's own
sidecar holds all its fields (about 55, as a converter writes them). Both are
audited in one process, alternately (``--repeat`` times, the median kept), and
the ratio of the per-run cost to the shared cost is printed.

    python benchmarks/bench_sidecar_layouts.py [--runs 2000] [--repeat 3] [--profile]
                                               [--out bench-results/sidecar_layouts.json]
"""

from __future__ import annotations

import argparse
import cProfile
import gzip
import json
import platform
import pstats
import shutil
import statistics
import sys
import tempfile
import time
from pathlib import Path

import nibabel as nib
import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from slicetime.pipelines.audit import audit_paths
from slicetime.schemes.generate import Protocol, slice_timing


def make_dataset(root: Path, n_runs: int, per_run: bool) -> None:
    root.mkdir(parents=True)
    (root / "dataset_description.json").write_text(
        json.dumps({"Name": "bench", "BIDSVersion": "1.10.0"}))
    st = slice_timing(Protocol(n_slices=40, order="interleaved", repetition_time=2.0,
                               decimals=4))
    timing = {"RepetitionTime": 2.0, "SliceTiming": st, "SliceEncodingDirection": "k",
              "MultibandAccelerationFactor": 1}
    # what a converter writes beside every run (invented values, common BIDS fields)
    own_extra = {
        "Modality": "MR", "MagneticFieldStrength": 3, "ImagingFrequency": 123.2,
        "Manufacturer": "Invented", "ManufacturersModelName": "Model Nine",
        "InstitutionName": "Northfield Imaging Lab", "DeviceSerialNumber": "00000",
        "StationName": "SCANNER1", "SoftwareVersions": "syngo-free 1.0",
        "MRAcquisitionType": "2D", "SeriesDescription": "bold run", "ProtocolName": "bold",
        "ScanningSequence": "EP", "SequenceVariant": "SK", "ScanOptions": "FS",
        "SequenceName": "epfid2d1_64", "ImageType": ["ORIGINAL", "PRIMARY", "M", "ND"],
        "SeriesNumber": 5, "AcquisitionTime": "10:11:12.500000", "SliceThickness": 3,
        "SpacingBetweenSlices": 3.3, "SAR": 0.0912, "EchoTime": 0.03, "FlipAngle": 77,
        "PartialFourier": 1, "BaseResolution": 64, "ShimSetting": [1, -2, 3, 400, 5, -6, 7, 8],
        "TxRefAmp": 250.1, "PhaseResolution": 1, "ReceiveCoilName": "HeadNeck_20",
        "CoilString": "HE1-4", "PulseSequenceDetails": "%Invented%\\ep2d_bold",
        "PercentPhaseFOV": 100, "PercentSampling": 100, "EchoTrainLength": 64,
        "PhaseEncodingSteps": 64, "AcquisitionMatrixPE": 64, "ReconMatrixPE": 64,
        "BandwidthPerPixelPhaseEncode": 30.5, "EffectiveEchoSpacing": 0.000512,
        "DerivedVendorReportedEchoSpacing": 0.000512, "TotalReadoutTime": 0.0323,
        "PixelBandwidth": 2300, "DwellTime": 3.4e-06, "PhaseEncodingDirection": "j-",
        "ImageOrientationPatientDICOM": [1, 0, 0, 0, 0.99, -0.12],
        "InPlanePhaseEncodingDirectionDICOM": "COL", "ConversionSoftware": "made-up",
        "ConversionSoftwareVersion": "v1.0.0",
    }
    if not per_run:
        for task in ("a", "b"):
            (root / f"task-{task}_bold.json").write_text(
                json.dumps({**own_extra, **timing, "TaskName": task}, indent=2))
    img = nib.Nifti1Image(np.zeros((8, 8, 40, 4), np.int16), np.eye(4))
    img.header.set_xyzt_units("mm", "sec")
    img.header.set_zooms((3.0, 3.0, 3.0, 2.0))
    img.header.set_dim_info(slice=2)
    payload = gzip.compress(img.to_bytes(), compresslevel=1, mtime=0)
    per_subject = 4
    for i in range((n_runs + per_subject - 1) // per_subject):
        for ses in ("1", "2"):
            func = root / f"sub-{i:05d}" / f"ses-{ses}" / "func"
            func.mkdir(parents=True)
            for task in ("a", "b"):
                stem = f"sub-{i:05d}_ses-{ses}_task-{task}_bold"
                (func / f"{stem}.nii.gz").write_bytes(payload)
                own = ({**own_extra, **timing, "TaskName": task} if per_run
                       else {"EchoTime": 0.03})
                (func / f"{stem}.json").write_text(json.dumps(own, indent=2))


def timed(root: Path) -> tuple[float, int]:
    start = time.perf_counter()
    result = audit_paths([root], jobs=1)
    return time.perf_counter() - start, len(result.runs)


def main() -> int:
    parser = argparse.ArgumentParser()
    parser.add_argument("--runs", type=int, default=2000)
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--profile", action="store_true", help="print the top of a profile")
    parser.add_argument("--out", default="bench-results/sidecar_layouts.json")
    args = parser.parse_args()
    work = Path(tempfile.mkdtemp(prefix="slicetime-bench-"))
    try:
        roots = {}
        for layout in ("shared", "per-run"):
            roots[layout] = work / layout
            make_dataset(roots[layout], args.runs, layout == "per-run")
        times: dict[str, list[float]] = {k: [] for k in roots}
        runs = 0
        timed(roots["shared"])  # warm the file cache and the imports
        for _ in range(max(1, args.repeat)):
            for layout, root in roots.items():
                seconds, runs = timed(root)
                times[layout].append(seconds)
        shared = statistics.median(times["shared"])
        per_run = statistics.median(times["per-run"])
        row = {"runs": runs, "shared_ms_per_run": round(shared / runs * 1e3, 3),
               "per_run_ms_per_run": round(per_run / runs * 1e3, 3),
               "ratio_per_run_to_shared": round(per_run / shared, 2),
               "spread_s": {k: [round(min(v), 3), round(max(v), 3)] for k, v in times.items()}}
        print(f"{runs} runs: shared {row['shared_ms_per_run']} ms/run, one sidecar per run "
              f"{row['per_run_ms_per_run']} ms/run, ratio {row['ratio_per_run_to_shared']}")
        if args.profile:
            profile = cProfile.Profile()
            profile.runcall(audit_paths, [roots["per-run"]], jobs=1)
            pstats.Stats(profile).sort_stats("cumulative").print_stats(35)
    finally:
        shutil.rmtree(work, ignore_errors=True)
    out = Path(args.out)
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(json.dumps({"machine": platform.platform(), "python":
                               platform.python_version(), "layouts": row}, indent=2))
    print(f"written {out}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
