"""The guided tour that ``slicetime demo`` runs over the invented study
(:mod:`slicetime.pipelines.demo` builds it).

The tour: show one run, audit the study (terminal and HTML), ask the images
whether the overriding participant's claimed order is true, plan the repairs,
apply them to a copy, audit the copy again, correct the copy, and say where
everything is. Seeded, so every run of the demo is the same.
"""

from __future__ import annotations

import shutil
from pathlib import Path
from typing import Any

from slicetime.interfaces.report_json import audit_object, dumps
from slicetime.interfaces.terminal import (
    make_console,
    render_audit,
    render_correct,
    render_fix_plan,
    render_show,
)
from slicetime.pipelines.audit import audit_one, audit_paths
from slicetime.pipelines.correct import CorrectOptions, correct_paths
from slicetime.pipelines.demo import STUDY, build_demo_dataset, demo_runs
from slicetime.pipelines.fix import apply_plan, plan_fix, reaudit
from slicetime.pipelines.verify import verify_run


def run_demo(out: Path) -> int:
    """The guided tour; returns 0. Everything is written under ``out``."""
    console = make_console()
    out.mkdir(parents=True, exist_ok=True)
    dataset = out / "quiet-rooms"
    build_demo_dataset(dataset)
    console.print(f"[bold]slicetime demo[/bold]: {STUDY}\n"
                  f"dataset written to {dataset}\n")
    for run in demo_runs():
        if run.story:
            console.print(f"  planted: {run.relpath}: {run.story}")
    console.print("  planted: sub-03 overrides the hum timing for all its sessions\n"
                  "  planted: task-chirp_bold.json leaves out the multiband factor\n")

    example = dataset / "sub-01/ses-1/func/sub-01_ses-1_task-chirp_bold.nii.gz"
    console.rule("1. slicetime show (one run)")
    render_show(audit_one(dataset, example), console)

    console.rule("2. slicetime audit (the whole study)")
    result = audit_paths([dataset])
    render_audit(result, console)
    report = out / "audit.json"
    report.write_text(dumps(audit_object(result, str(dataset))) + "\n", encoding="utf-8")
    html = _html_report(result, str(dataset), out / "audit.html")

    console.rule("3. slicetime verify (do the images agree with sub-03's override?)")
    for session in ("1", "2"):
        rel = f"sub-03/ses-{session}/func/sub-03_ses-{session}_task-hum_bold.nii.gz"
        _, verdict = verify_run(dataset, dataset / rel)
        console.print(f"{verdict.finding.code:<20} {rel}: {verdict.finding.message}")
    console.print("the sidecar override says 'descending'; the slices' own time courses say "
                  "otherwise: fix cannot settle which is true, a person must\n")

    console.rule("4. slicetime fix (the plan, on a copy of the study)")
    fixed = out / "quiet-rooms-fixed"
    if fixed.exists():
        shutil.rmtree(fixed)
    shutil.copytree(dataset, fixed)
    plan = plan_fix([fixed])
    render_fix_plan(plan, console)
    applied = apply_plan(plan, backup_dir=out / "fix-backups")
    left = reaudit(plan)
    console.print(f"applied to {len(applied.written)} files of the copy; re-audit: "
                  + ("clean for the repaired codes" if not left else
                     f"{len(left)} findings left"))
    after = audit_paths([fixed])

    console.rule("5. slicetime correct (runs with trustworthy timing)")
    aligned = fixed / "derivatives" / "slicetime"
    if aligned.exists():
        shutil.rmtree(aligned)
    corrected = correct_paths([fixed], CorrectOptions(out=aligned, threads=0))
    render_correct(corrected, console)

    console.rule("where everything is")
    before_counts, after_counts = result.counts(), after.counts()
    lines = [
        f"the study, as planted:      {dataset}",
        f"audit report (JSON):        {report}",
        *([f"audit report (HTML):        {html}   <- open this first"] if html else []),
        f"the repaired copy:          {fixed}  (errors {before_counts['error']} -> "
        f"{after_counts['error']}, warnings {before_counts['warning']} -> "
        f"{after_counts['warning']})",
        f"backups and undo journal:   {applied.journal}",
        f"corrected runs:             {aligned}",
        "next: slicetime explain timing/units-ms, or slicetime show on any run",
    ]
    for line in lines:
        console.print(line)
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
