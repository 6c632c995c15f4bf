"""The built-in invented study, and the guided tour that ``slicetime demo`` runs.

Everything here is made up: the "Fernhill Centre for Listening Research" and
its "Quiet Rooms" study do not exist. The dataset is small and seeded, so the
demo is deterministic and fast. It plants the metadata defects that the audit
exists for, the way they happen in practice.
"""

from __future__ import annotations

import json
import shutil
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import nibabel as nib
import numpy as np

from slicetime.schemes.generate import Protocol, slice_timing

STUDY = "Quiet Rooms (invented study of the invented Fernhill Centre for Listening Research)"


@dataclass(frozen=True)
class DemoRun:
    relpath: str
    protocol: Protocol
    sidecar: dict[str, Any] = field(default_factory=dict)
    header_tr: float | None = None  # seconds written to pixdim[4]; None = the protocol's TR
    header_unit: str = "sec"
    truncate: bool = False
    #: what the run demonstrates, printed by the demo
    story: str = ""


def _protocols() -> dict[str, Protocol]:
    return {
        "hum": Protocol(n_slices=20, order="interleaved", start=0, repetition_time=2.0),
        "chirp": Protocol(n_slices=24, order="interleaved", multiband=3, start="auto",
                          repetition_time=1.2),
        "rest": Protocol(n_slices=18, order="sequential", repetition_time=2.5),
    }


def demo_runs() -> list[DemoRun]:
    p = _protocols()
    runs: list[DemoRun] = []
    for sub in ("01", "02", "03"):
        for ses in ("1", "2"):
            base = f"sub-{sub}/ses-{ses}/func/sub-{sub}_ses-{ses}"
            runs.append(DemoRun(f"{base}_task-hum_bold.nii.gz", p["hum"]))
            runs.append(DemoRun(f"{base}_task-chirp_bold.nii.gz", p["chirp"]))
    runs.append(DemoRun("sub-01/ses-1/func/sub-01_ses-1_task-rest_bold.nii.gz", p["rest"],
                        sidecar={"SliceTiming": [t * 1000 for t in slice_timing(p["rest"])]},
                        story="a converter wrote SliceTiming in milliseconds"))
    runs.append(DemoRun("sub-02/ses-1/func/sub-02_ses-1_task-rest_bold.nii.gz", p["rest"],
                        header_tr=2500.0, story="the header's TR is in ms but labelled seconds"))
    return runs


def _write_image(path: Path, protocol: Protocol, run: DemoRun, rng: np.random.Generator) -> None:
    n = protocol.n_slices
    tr = protocol.repetition_time or 2.0
    shape = (12, 12, n, 16)
    t = np.arange(shape[3]) * tr
    data = 800 + 40 * np.sin(2 * np.pi * t / 20.0)[None, None, None, :] \
        + rng.normal(0, 8, size=shape)
    img = nib.Nifti1Image(data.astype(np.int16), np.diag([3.0, 3.0, 3.5, 1.0]))
    hdr = img.header
    hdr.set_dim_info(freq=0, phase=1, slice=2)
    hdr.set_xyzt_units("mm", run.header_unit)
    zooms = list(hdr.get_zooms())
    zooms[3] = run.header_tr if run.header_tr is not None else tr
    hdr.set_zooms(zooms)
    path.parent.mkdir(parents=True, exist_ok=True)
    nib.save(img, str(path))
    if run.truncate:
        raw = path.read_bytes()
        path.write_bytes(raw[: len(raw) // 2])


def build_demo_dataset(root: Path, seed: int = 20261201) -> list[DemoRun]:
    """Write the invented dataset under ``root`` (replacing it) and return its runs."""
    if root.exists():
        shutil.rmtree(root)
    root.mkdir(parents=True)
    rng = np.random.default_rng(seed)
    p = _protocols()
    (root / "dataset_description.json").write_text(json.dumps({
        "Name": STUDY, "BIDSVersion": "1.10.0", "DatasetType": "raw",
        "Authors": ["Fernhill imaging core (invented)"],
    }, indent=2) + "\n")
    (root / "participants.tsv").write_text("participant_id\nsub-01\nsub-02\nsub-03\n")
    top = {
        "hum": {"TaskName": "hum", "RepetitionTime": 2.0, "SliceTiming": slice_timing(p["hum"])},
        "chirp": {"TaskName": "chirp", "RepetitionTime": 1.2,
                  "SliceTiming": slice_timing(p["chirp"])},
        "rest": {"TaskName": "rest", "RepetitionTime": 2.5},
    }
    for task, content in top.items():
        (root / f"task-{task}_bold.json").write_text(json.dumps(content, indent=2) + "\n")
    # sub-03's scanner export overrode the hum timing with a descending list
    override = root / "sub-03" / "sub-03_task-hum_bold.json"
    override.parent.mkdir(parents=True, exist_ok=True)
    override.write_text(json.dumps({"SliceTiming": slice_timing(
        Protocol(n_slices=20, order="sequential", ascending=False, repetition_time=2.0))},
        indent=2) + "\n")
    runs = demo_runs()
    for run in runs:
        path = root / run.relpath
        _write_image(path, run.protocol, run, rng)
        if run.sidecar:
            sidecar = path.with_name(path.name.replace(".nii.gz", ".json"))
            sidecar.write_text(json.dumps(run.sidecar, indent=2) + "\n")
    return runs


def run_demo(out: Path) -> int:
    """Build the dataset, show one run, audit the study, correct what can be. Returns 0."""
    from slicetime.interfaces.report_json import audit_object, dumps
    from slicetime.interfaces.terminal import (
        make_console,
        render_audit,
        render_correct,
        render_show,
    )
    from slicetime.pipelines.audit import audit_one, audit_paths
    from slicetime.pipelines.correct import CorrectOptions, correct_paths

    console = make_console()
    dataset = out / "quiet-rooms"
    build_demo_dataset(dataset)
    console.print(f"[bold]slicetime demo[/bold]: {STUDY}\n"
                  f"dataset written to {dataset}\n")
    example = dataset / "sub-01/ses-1/func/sub-01_ses-1_task-chirp_bold.nii.gz"
    console.rule("slicetime show (one run)")
    render_show(audit_one(dataset, example), console)
    console.rule("slicetime audit (the whole study)")
    result = audit_paths([dataset])
    render_audit(result, console)
    report = out / "audit.json"
    report.write_text(dumps(audit_object(result, str(dataset))) + "\n", encoding="utf-8")
    console.rule("slicetime correct (runs with trustworthy timing only)")
    aligned = dataset / "derivatives" / "slicetime"
    if aligned.exists():
        shutil.rmtree(aligned)
    corrected = correct_paths([dataset], CorrectOptions(out=aligned))
    render_correct(corrected, console)
    console.print(f"\nJSON report: {report}\nTry: slicetime explain timing/units-ms")
    return 0
