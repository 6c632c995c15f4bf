"""The built-in invented study, and the guided tour that ``slicetime demo`` runs.

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

The tour: show one run, audit the study (terminal and HTML), ask the images
whether the overriding participant's claimed order is true, plan the repairs,
apply them to a copy, audit the copy again, correct the copy, and say where
everything is. Seeded, so every run of the demo is the same.
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
from slicetime.words import count

STUDY = "Quiet Rooms (invented study of the invented Fernhill Centre for Listening Research)"
VOLUMES = 48
SEED = 20261201


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


def run_demo(out: Path) -> int:
    """The guided tour; returns 0. Everything is written under ``out``."""
    from slicetime.interfaces import screen
    from slicetime.interfaces.report_json import audit_object, dumps
    from slicetime.interfaces.terminal import (
        emit,
        finding_lines,
        fit_width,
        make_console,
        render_audit,
        render_correct,
        render_fix_plan,
        render_show,
    )
    from slicetime.pipelines.audit import audit_one, audit_paths
    from slicetime.pipelines.correct import CorrectOptions, correct_paths
    from slicetime.pipelines.fix import apply_plan, plan_fix, reaudit

    console = make_console()
    width = fit_width(console)

    def say(text: str, indent: int = 0) -> None:
        for i, part in enumerate(screen.wrap_words(text, width, first=indent,
                                                   rest=indent + 4)):
            console.print(" " * (indent if i == 0 else indent + 4) + part, markup=False)

    def rule(title: str) -> None:
        console.print(f"── {title} " + "─" * max(3, min(width or 72, 72) - len(title) - 4))

    out.mkdir(parents=True, exist_ok=True)
    dataset = out / "quiet-rooms"
    build_demo_dataset(dataset)
    say(f"slicetime demo: {STUDY}")
    say(f"dataset written to {dataset}")
    console.print()
    for run in demo_runs():
        if run.story:
            say(f"planted: {run.relpath}: {run.story}", 2)
    say("planted: sub-03 overrides the hum timing for all its sessions", 2)
    say("planted: task-chirp_bold.json leaves out the multiband factor", 2)
    console.print()

    example = dataset / "sub-01/ses-1/func/sub-01_ses-1_task-chirp_bold.nii.gz"
    rule("1. slicetime show (one run)")
    render_show(audit_one(dataset, example), console)

    rule("2. slicetime audit (the whole study)")
    result = audit_paths([dataset])
    render_audit(result, console)
    report = out / "audit.json"
    report.write_text(dumps(audit_object(result, str(dataset))) + "\n", encoding="utf-8")
    html = _html_report(result, str(dataset), out / "audit.html")

    rule("3. slicetime verify (do the images agree with sub-03's override?)")
    from slicetime.pipelines.verify import verify_run

    for session in ("1", "2"):
        rel = f"sub-03/ses-{session}/func/sub-03_ses-{session}_task-hum_bold.nii.gz"
        _, verdict = verify_run(dataset, dataset / rel)
        console.print(rel, style="bold", markup=False)
        emit(console, finding_lines([verdict.finding], width=width, run_path=rel))
    say("the sidecar override says 'descending'; the slices' own time courses say "
        "otherwise: fix cannot settle which is true, a person must")
    console.print()

    rule("4. slicetime fix (the plan, on a copy of the study)")
    fixed = out / "quiet-rooms-fixed"
    if fixed.exists():
        shutil.rmtree(fixed)
    shutil.copytree(dataset, fixed)
    plan = plan_fix([fixed])
    render_fix_plan(plan, console)
    applied = apply_plan(plan, backup_dir=out / "fix-backups")
    left = reaudit(plan)
    say(f"applied to {count(len(applied.written), 'file')} of the copy; re-audit: "
        + ("clean for the repaired codes" if not left else
           f"{count(len(left), 'finding')} left"))
    after = audit_paths([fixed])

    rule("5. slicetime correct (runs with trustworthy timing)")
    aligned = fixed / "derivatives" / "slicetime"
    if aligned.exists():
        shutil.rmtree(aligned)
    corrected = correct_paths([fixed], CorrectOptions(out=aligned, threads=0))
    render_correct(corrected, console)

    rule("where everything is")
    before_counts, after_counts = result.counts(), after.counts()
    places = [
        ("the study, as planted", str(dataset)),
        ("audit report (JSON)", str(report)),
        *([("audit report (HTML)", f"{html}   (open this first)")] if html else []),
        ("the repaired copy", f"{fixed}  (errors {before_counts['error']} -> "
         f"{after_counts['error']}, warnings {before_counts['warning']} -> "
         f"{after_counts['warning']})"),
        ("backups and undo journal", str(applied.journal)),
        ("corrected runs", str(aligned)),
    ]
    for name, where in places:
        say(f"{name}:".ljust(27) + where if width is None or 27 + len(where) <= width
            else f"{name}:")
        if width is not None and 27 + len(where) > width:
            say(where, 4)
    say("next: slicetime explain timing/units-ms, or slicetime show on any run")
    return 0


def _html_report(result: Any, root_given: str, path: Path) -> Path | None:
    """The HTML report, when this installation can draw it."""
    try:
        from slicetime.interfaces import report_html
    except ImportError:
        return None
    writer = getattr(report_html, "write_html", None)
    if writer is None:
        return None
    writer(result, path, root_given=root_given)
    return path
