"""Tricky but valid runs get no warning or error; derivatives are not runs."""

from __future__ import annotations

from pathlib import Path

from slicetime.pipelines.audit import audit_paths
from slicetime.schemes.generate import Protocol, slice_timing
from tests.helpers_bids import write_description, write_run

F = "sub-01/func/sub-01_task-{}_bold.nii.gz"


def test_tricky_valid_runs_are_clean(tmp_path: Path) -> None:
    root = tmp_path / "ds"
    write_description(root)
    st = slice_timing(Protocol(n_slices=12, order="interleaved", repetition_time=2.0))
    # xyzt_units in ms (NIfTI-1 nifti1.h): pixdim[4] = 2000 ms is a 2 s TR
    write_run(root, F.format("msunits"), shape=(4, 4, 12, 5), tr=2.0, time_unit="msec",
              sidecar={"RepetitionTime": 2.0, "SliceTiming": st})
    # BIDS SliceEncodingDirection k-: the list starts at the highest slice
    write_run(root, F.format("negdir"), shape=(4, 4, 12, 5), tr=2.0,
              sidecar={"RepetitionTime": 2.0, "SliceTiming": st,
                       "SliceEncodingDirection": "k-"})
    mb = slice_timing(Protocol(n_slices=12, multiband=3, order="interleaved",
                               repetition_time=1.0, decimals=4))
    write_run(root, F.format("multiband"), shape=(4, 4, 12, 5), tr=1.0,
              sidecar={"RepetitionTime": 1.0, "SliceTiming": mb,
                       "MultibandAccelerationFactor": 3})
    sparse = slice_timing(Protocol(n_slices=12, repetition_time=3.0, active_time=2.0))
    write_run(root, F.format("sparse"), shape=(4, 4, 12, 5), tr=3.0,
              sidecar={"RepetitionTime": 3.0, "DelayTime": 1.0, "SliceTiming": sparse})
    # slices along j, with dim_info saying so
    write_run(root, F.format("jaxis"), shape=(4, 12, 4, 5), tr=2.0, dim_info=(None, None, 1),
              sidecar={"RepetitionTime": 2.0, "SliceTiming": st,
                       "SliceEncodingDirection": "j"})
    # common practice (no source): converters round slice times to 2.5 ms steps
    rounded = [round(t / 0.0025) * 0.0025 for t in slice_timing(
        Protocol(n_slices=36, order="interleaved", repetition_time=1.7))]
    write_run(root, F.format("rounded"), shape=(4, 4, 36, 5), tr=1.7,
              sidecar={"RepetitionTime": 1.7, "SliceTiming": rounded})
    # BIDS VolumeTiming with SliceTiming giving the acquisition time
    write_run(root, F.format("voltiming"), shape=(4, 4, 12, 5), tr=2.0,
              sidecar={"VolumeTiming": [0.0, 2.5, 5.5, 8.0, 11.0], "SliceTiming": st})
    # a derivative folder with a broken file must not be audited
    bad = root / "derivatives" / "prep" / F.format("msunits")
    bad.parent.mkdir(parents=True)
    bad.write_bytes(b"not an image")
    result = audit_paths([root])
    assert len(result.runs) == 7
    assert not any("derivatives" in r.record.path for r in result.runs)
    for run in result.runs:
        serious = [f.one_line() for f in run.findings if f.severity.value != "note"]
        assert serious == [], run.record.path
        assert run.record.scheme is not None and run.record.scheme.regular, run.record.path
