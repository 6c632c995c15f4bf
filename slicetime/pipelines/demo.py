"""The built-in invented study that ``slicetime demo`` tours (the tour itself, which
prints, is :mod:`slicetime.interfaces.demo_tour`).

Everything here is made up: the "Fernhill Centre for Listening Research" and
its "Quiet Rooms" study do not exist. Three participants, two sessions, four
tasks with a mix of protocols (interleaved from 0, interleaved from 1 in a
sparse protocol, multiband ×3, sequential), small BOLD-like data (a canonical
response to events, slow drift, physiological-like fluctuations and noise,
every slice sampled at its own time), and the metadata defects the audit
exists for, planted the way they happen in practice:

* a converter wrote one run's SliceTiming in milliseconds;
* one participant's folder overrides the task's inherited timing;
* the multiband factor of the multiband task was left out;
* one header's TR is in milliseconds but labelled seconds;
* one file was cut short in a copy.

Seeded, so every build of the study is the same.

The output folder carries a marker file (:data:`MARKER`): an earlier demo
output is rebuilt cleanly (the demo's own entries removed first), and any
other folder that exists and is not empty is refused, so ``demo --out`` never
writes into a dataset.
"""

from __future__ import annotations

import json
import shutil
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import nibabel as nib
import numpy as np

from slicetime.pipelines.simulate import RunSimulation, simulate_run
from slicetime.schemes.generate import Protocol, array_times, slice_timing

STUDY = "Quiet Rooms (invented study of the invented Fernhill Centre for Listening Research)"
VOLUMES = 48
SEED = 20261201
#: the file that marks a folder as a demo output (so that it may be rebuilt)
MARKER = ".slicetime-demo"
#: what the demo writes at the top of its output folder
ENTRIES = ("quiet-rooms", "quiet-rooms-fixed", "fix-backups", "audit.json", "audit.html")


def prepare_output(out: Path) -> str | None:
    """Make ``out`` ready for a demo: created, or an earlier demo output emptied of the
    demo's own entries. Returns why it is refused (nothing touched), or None."""
    if out.is_symlink() or (out.exists() and not out.is_dir()):
        return f"{out}: exists and is not a folder; give demo --out a new folder"
    # a folder that holds only the demo's entries is an earlier output too (made before
    # the marker existed)
    if out.exists() and not (out / MARKER).is_file() and \
            not {p.name for p in out.iterdir()} <= set(ENTRIES):
        return (f"{out}: exists, is not empty and is not an earlier demo output (no {MARKER} "
                "in it); give demo --out a new or empty folder")
    out.mkdir(parents=True, exist_ok=True)
    for name in ENTRIES:
        entry = out / name
        if entry.is_dir() and not entry.is_symlink():
            shutil.rmtree(entry)
        elif entry.exists() or entry.is_symlink():
            entry.unlink()
    (out / MARKER).write_text("made by slicetime demo; the demo may rebuild this folder\n",
                              encoding="utf-8")
    return None


@dataclass(frozen=True)
class DemoRun:
    relpath: str
    protocol: Protocol
    sidecar: dict[str, Any] = field(default_factory=dict)
    header_tr: float | None = None  # value written to pixdim[4]; None = the protocol's TR
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
        # sparse: 16 slices in the first 1.5 s of a 3 s TR, odd slices first
        "tone": Protocol(n_slices=16, order="interleaved", start=1, repetition_time=3.0,
                         active_time=1.5),
    }


def demo_runs() -> list[DemoRun]:
    p = _protocols()
    runs: list[DemoRun] = []
    for sub in ("01", "02", "03"):
        for ses in ("1", "2"):
            base = f"sub-{sub}/ses-{ses}/func/sub-{sub}_ses-{ses}"
            runs.append(DemoRun(f"{base}_task-hum_bold.nii.gz", p["hum"]))
            runs.append(DemoRun(f"{base}_task-chirp_bold.nii.gz", p["chirp"]))
            runs.append(DemoRun(
                f"{base}_task-tone_bold.nii.gz", p["tone"],
                truncate=(sub, ses) == ("03", "2"),
                story="a copy of this file was cut short" if (sub, ses) == ("03", "2") else "",
            ))
    runs.append(DemoRun("sub-01/ses-1/func/sub-01_ses-1_task-rest_bold.nii.gz", p["rest"],
                        sidecar={"SliceTiming": [round(t * 1000, 3)
                                                 for t in slice_timing(p["rest"])]},
                        story="a converter wrote SliceTiming in milliseconds"))
    runs.append(DemoRun("sub-02/ses-1/func/sub-02_ses-1_task-rest_bold.nii.gz", p["rest"],
                        sidecar={"SliceTiming": slice_timing(p["rest"])},
                        header_tr=2500.0,
                        story="the header's TR is in milliseconds but labelled seconds"))
    runs.append(DemoRun("sub-03/ses-1/func/sub-03_ses-1_task-rest_bold.nii.gz", p["rest"],
                        sidecar={"SliceTiming": slice_timing(p["rest"])}))
    return runs


def _write_image(path: Path, run: DemoRun, index: int) -> None:
    protocol = run.protocol
    tr = protocol.repetition_time or 2.0
    times = list(array_times(protocol))
    sim = RunSimulation(shape=(12, 12, protocol.n_slices, VOLUMES), repetition_time=tr,
                        slice_times=times, amplitude=15.0, drift=6.0, physio=3.0, noise=4.0,
                        seed=SEED + index)
    data, _, _ = simulate_run(sim)
    # a head-like ellipse of signal in every slice, background outside
    i, j = np.meshgrid(np.linspace(-1, 1, 12), np.linspace(-1, 1, 12), indexing="ij")
    inside = (i / 0.85) ** 2 + (j / 0.95) ** 2 <= 1.0
    data[~inside] = 0.0
    img = nib.Nifti1Image(np.round(data).astype(np.int16), np.diag([3.0, 3.0, 3.5, 1.0]))
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


def _write_json(path: Path, content: dict[str, Any]) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(json.dumps(content, indent=2) + "\n")


def build_demo_dataset(root: Path) -> list[DemoRun]:
    """Write the invented dataset under ``root`` (replacing it) and return its runs."""
    if root.exists():
        shutil.rmtree(root)
    root.mkdir(parents=True)
    p = _protocols()
    _write_json(root / "dataset_description.json", {
        "Name": STUDY, "BIDSVersion": "1.10.0", "DatasetType": "raw",
        "Authors": ["Fernhill imaging core (invented)"],
    })
    (root / "participants.tsv").write_text("participant_id\nsub-01\nsub-02\nsub-03\n")
    tone = p["tone"]
    assert tone.repetition_time is not None and tone.active_time is not None
    top = {
        "hum": {"TaskName": "hum", "RepetitionTime": 2.0, "SliceTiming": slice_timing(p["hum"])},
        # the multiband factor was left out of this one
        "chirp": {"TaskName": "chirp", "RepetitionTime": 1.2,
                  "SliceTiming": slice_timing(p["chirp"])},
        "rest": {"TaskName": "rest", "RepetitionTime": 2.5},
        "tone": {"TaskName": "tone", "RepetitionTime": tone.repetition_time,
                 "DelayTime": round(tone.repetition_time - tone.active_time, 6),
                 "SliceTiming": slice_timing(tone)},
    }
    for task, content in top.items():
        _write_json(root / f"task-{task}_bold.json", content)
    # sub-03's scanner export overrode the hum timing with a descending list
    _write_json(root / "sub-03" / "sub-03_task-hum_bold.json", {"SliceTiming": slice_timing(
        Protocol(n_slices=20, order="sequential", ascending=False, repetition_time=2.0))})
    runs = demo_runs()
    for index, run in enumerate(runs):
        path = root / run.relpath
        _write_image(path, run, index)
        if run.sidecar:
            _write_json(path.with_name(path.name.replace(".nii.gz", ".json")), run.sidecar)
    return runs
