"""The guided tour that ``slicetime demo`` runs over the invented study
(:mod:`slicetime.pipelines.demo` builds it).

The tour: show one run, audit the study (terminal and HTML), ask the images
whether the overriding participant's claimed order is true, plan the repairs,
apply them to a copy, audit the copy again, correct the copy (the runs whose
timing stays in doubt are refused, and the tour says how a doubt is accepted), and
say where everything is. Seeded, so every run of the demo is the same.
"""

from __future__ import annotations

import os
import shutil
import sys
from pathlib import Path
from typing import Any

import click

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
from slicetime.pipelines.correct import CorrectOptions
from slicetime.pipelines.correct_batch import correct_paths
from slicetime.pipelines.demo import STUDY, build_demo_dataset, demo_runs, prepare_output
from slicetime.pipelines.errors import DOUBT_CODE
from slicetime.pipelines.fix import apply_plan, plan_fix, reaudit
from slicetime.pipelines.signals import test_point
from slicetime.pipelines.verify import verify_run
from slicetime.rules.correction import doubts_timing
from slicetime.words import count


class DemoRefused(click.ClickException):
    """``demo --out`` names a folder that is not the demo's to write (exit 2)."""

    exit_code = 2


class DemoInterrupted(KeyboardInterrupt):
    """Ctrl-C during the tour: :attr:`what` says at which step, and that ``out`` holds
    the demo's files so far, incomplete (the demo rebuilds the folder when rerun); the
    command prints it with ``shared.interrupted``."""

    def __init__(self, step: str, out: Path, complete: bool) -> None:
        super().__init__("interrupted")
        if complete:
            self.what = (f"while the demo's last summary was printed; every file of the "
                         f"demo is written in {out}")
        else:
            self.what = (f"during the demo ({step}); {out} holds only part of the demo's "
                         f"files (rerun slicetime demo --out {out} to rebuild it)")


def command_name() -> str:
    """How to call slicetime from this shell: ``slicetime`` when it is on PATH, else the
    path of the command installed beside this Python (e.g. ``.venv/bin/slicetime``)."""
    here = Path(sys.executable).parent / "slicetime"
    found = shutil.which("slicetime")
    if found is not None or not here.exists():
        return "slicetime"
    try:
        shown = os.path.relpath(here)
    except ValueError:
        return str(here)
    return shown if not shown.startswith("..") else str(here)


class _Tour:
    """The tour's screen: wrapped lines and numbered section rules."""

    def __init__(self) -> None:
        self.console = make_console()
        self.width = fit_width(self.console)
        #: the step under way, for the one line a Ctrl-C gets (:class:`DemoInterrupted`)
        self.step = "preparing the output folder"
        #: every file of the demo written (only the last summary is left to print)
        self.complete = False

    def say(self, text: str, indent: int = 0) -> None:
        for i, part in enumerate(screen.wrap_words(text, self.width, first=indent,
                                                   rest=indent + 4)):
            self.console.print(" " * (indent if i == 0 else indent + 4) + part, markup=False)

    def rule(self, title: str) -> None:
        self.step = title.split(" (")[0]
        test_point(f"demo:{title.split('.')[0]}")  # tests: Ctrl-C as the step starts
        self.console.print()  # every section starts after one blank line
        self.console.print(f"── {title} "
                           + "─" * max(3, min(self.width or 72, 72) - len(title) - 4))


def run_demo(out: Path) -> int:
    """The guided tour; returns 0. Everything is written under ``out``."""
    tour = _Tour()
    try:
        refused = prepare_output(out)
        if refused is not None:
            raise DemoRefused(refused)
        _tour(tour, out)
    except KeyboardInterrupt:
        raise DemoInterrupted(tour.step, out, tour.complete) from None
    return 0


def _tour(tour: _Tour, out: Path) -> None:
    """The steps of :func:`run_demo`, in order, everything written under ``out``."""
    dataset = out / "quiet-rooms"
    tour.step = "writing the invented study"
    test_point("demo:build")
    build_demo_dataset(dataset)
    _introduce(tour, dataset, out)

    example = dataset / "sub-01/ses-1/func/sub-01_ses-1_task-chirp_bold.nii.gz"
    tour.rule("1. slicetime show (one run)")
    render_show(audit_one(dataset, example), tour.console)

    tour.rule("2. slicetime audit (the whole study)")
    result = audit_paths([dataset])
    render_audit(result, tour.console)
    report = out / "audit.json"
    report.write_text(dumps(audit_object(result, str(dataset))) + "\n", encoding="utf-8")
    html = _html_report(result, str(dataset), out / "audit.html")

    _verify_step(tour, dataset)
    fixed, journal = _fix_step(tour, dataset, out)
    after = audit_paths([fixed])
    aligned = _correct_step(tour, fixed)

    tour.complete = True
    tour.rule("where everything is")
    before_counts, after_counts = result.counts(), after.counts()
    _where(tour, [
        ("the study, as planted", str(dataset)),
        ("audit report (JSON)", str(report)),
        *([("audit report (HTML)", f"{html}   (open this first)")] if html else []),
        ("the repaired copy", f"{fixed}  (errors {before_counts['error']} → "
         f"{after_counts['error']}, warnings {before_counts['warning']} → "
         f"{after_counts['warning']})"),
        ("backups and undo journal", str(journal)),
        ("corrected runs", str(aligned)),
    ])


def _introduce(tour: _Tour, dataset: Path, out: Path) -> None:
    """Where the study is, and what was planted in it."""
    tour.say(f"slicetime demo: {STUDY}")
    tour.say(f"dataset written to {dataset}")
    tour.say(f"open this first when the tour ends: {out / 'audit.html'} (the audit report, "
             "one page)")
    tour.console.print()
    for run in demo_runs():
        if run.story:
            tour.say(f"planted: {run.relpath}: {run.story}", 2)
    tour.say("planted: sub-03 overrides the hum timing for all its sessions", 2)
    tour.say("planted: task-chirp_bold.json leaves out the multiband factor", 2)


def _verify_step(tour: _Tour, dataset: Path) -> None:
    """Step 3: the images asked whether sub-03's claimed order is true."""
    tour.rule("3. slicetime verify (do the images agree with sub-03's override?)")
    for session in ("1", "2"):
        rel = f"sub-03/ses-{session}/func/sub-03_ses-{session}_task-hum_bold.nii.gz"
        _, verdict = verify_run(dataset, dataset / rel)
        tour.console.print(rel, style="bold", markup=False)
        emit(tour.console, finding_lines([verdict.finding], width=tour.width, run_path=rel))
    tour.say("the sidecar override says 'descending'; the slices' own time courses say "
             "otherwise: fix cannot settle which is true, a person must")


def _fix_step(tour: _Tour, dataset: Path, out: Path) -> tuple[Path, Path | None]:
    """Step 4: the repairs planned and applied to a copy; the copy and the journal."""
    tour.rule("4. slicetime fix (the plan, on a copy of the study)")
    fixed = out / "quiet-rooms-fixed"
    if fixed.exists():
        shutil.rmtree(fixed)
    shutil.copytree(dataset, fixed)
    plan = plan_fix([fixed])
    render_fix_plan(plan, tour.console)
    applied = apply_plan(plan, backup_dir=out / "fix-backups")
    left = reaudit(plan)
    tour.say(f"applied to {count(len(applied.written), 'file')} of the copy; re-audit: "
             + ("clean for the repaired codes" if not left else
                f"{count(len(left), 'finding')} left"))
    return fixed, applied.journal


def _correct_step(tour: _Tour, fixed: Path) -> Path:
    """Step 5: the copy corrected; the runs refused for doubt, and how a doubt is
    accepted. Returns where the corrected runs are."""
    tour.rule("5. slicetime correct (runs with trustworthy timing)")
    aligned = fixed / "derivatives" / "slicetime"
    if aligned.exists():
        shutil.rmtree(aligned)
    corrected = correct_paths([fixed], CorrectOptions(out=aligned, threads=0))
    render_correct(corrected, tour.console)
    doubted = [r for r in corrected.runs
               if any(f.code == DOUBT_CODE for f in r.blocking)]
    if not doubted:
        return aligned
    codes = sorted({f.code for r in doubted for f in r.blocking if doubts_timing(f.code)})
    tour.console.print()
    tour.say(f"refused for doubt: {count(len(doubted), 'run')} whose slice times another "
             f"source contradicts ({', '.join(codes)}). Only someone who knows the "
             "acquisition may accept such a doubt, by code and by run, and it is then "
             "recorded in every output it lets through:")
    # a command to paste: whole, on its own line, even wider than the screen
    tour.console.print(f"    slicetime correct {fixed} --out {aligned} "
                       + " ".join(f"--accept '{c}:sub-03/**'" for c in codes),
                       markup=False, soft_wrap=True)
    tour.say("or the same in the lab policy: [[accept]] findings = [...], runs = [...], "
             "reason = \"...\". Here the images contradict sub-03's override (step 3), so "
             "the honest move is to repair the override, not to accept it.")
    return aligned


def _where(tour: _Tour, places: list[tuple[str, str]]) -> None:
    """Where everything is, one line a place (the place under its name when too long),
    and what to try next."""
    width = tour.width
    for name, where in places:
        tour.say(f"{name}:".ljust(27) + where if width is None or 27 + len(where) <= width
                 else f"{name}:")
        if width is not None and 27 + len(where) > width:
            tour.say(where, 4)
    command = command_name()
    tour.say(f"next: {command} explain timing/units-ms, or {command} show on any run")
    if command != "slicetime":
        tour.say(f"(slicetime is not on PATH: call {command}, or first activate the "
                 f"environment: source {Path(command).parent.parent}/bin/activate)")


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
