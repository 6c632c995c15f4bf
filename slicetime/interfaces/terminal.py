"""Terminal output for people: one run in detail (show), a dataset summary (audit).

Uses rich so that colour appears only on a terminal, ``NO_COLOR`` is honoured
and piped output is plain text.
"""

from __future__ import annotations

import os
import sys
from collections.abc import Iterable
from typing import TYPE_CHECKING

from rich.console import Console
from rich.table import Table
from rich.text import Text

from slicetime.interfaces.diagram import order_diagram
from slicetime.interfaces.progress import (  # noqa: F401 (re-exported)
    _periodic_lines,
    progress_reporter,
)
from slicetime.interfaces.safe_text import xml_safe
from slicetime.model import Finding, Severity
from slicetime.pipelines.audit import AuditResult, RunResult

if TYPE_CHECKING:
    from slicetime.pipelines.correct import CorrectResult
    from slicetime.pipelines.fix import FixPlan

#: our own palette: severities read at a glance without shouting
STYLE = {
    Severity.ERROR: "bold red3",
    Severity.WARNING: "dark_orange3",
    Severity.NOTE: "steel_blue",
}
BADGE = {Severity.ERROR: "ERR", Severity.WARNING: "WRN", Severity.NOTE: "NTE"}


def make_console(file: object = None) -> Console:
    stream = file if file is not None else sys.stdout
    is_tty = bool(getattr(stream, "isatty", lambda: False)())
    return Console(
        file=stream,  # type: ignore[arg-type]
        width=None if is_tty else int(os.environ.get("COLUMNS", "120")),
        highlight=False,
        soft_wrap=True,
        no_color="NO_COLOR" in os.environ,
        emoji=False,
    )


def supports_unicode(console: Console) -> bool:
    encoding = (console.encoding or "").lower()
    return "utf" in encoding and os.environ.get("SLICETIME_ASCII") is None


def _ms(value: float) -> str:
    return f"{value * 1000:.1f} ms" if value < 1 else f"{value:g} s"


def finding_lines(findings: Iterable[Finding], indent: str = "  ") -> list[Text]:
    lines = []
    for f in sorted(findings, key=lambda f: -f.severity.rank):
        line = Text(indent)
        line.append(f"{BADGE[f.severity]} ", style=STYLE[f.severity])
        line.append(f"{f.code}", style="bold")
        where = xml_safe(f.file or "")
        if f.field:
            where = f"{where} › {xml_safe(f.field)}" if where else xml_safe(f.field)
        line.append(f"  {xml_safe(f.message, one_line=False)}")
        if where:
            line.append(f"\n{indent}    at {where}", style="dim")
        if f.hint:
            line.append(f"\n{indent}    → {xml_safe(f.hint, one_line=False)}", style="italic")
        lines.append(line)
    return lines


def render_show(run: RunResult, console: Console) -> None:
    """The detailed view of one run."""
    record = run.record
    schedule = record.schedule
    header = record.header
    console.print(Text(xml_safe(record.path), style="bold"))
    facts = Table.grid(padding=(0, 2))
    facts.add_column(style="dim", no_wrap=True)
    facts.add_column()
    if header is not None:
        facts.add_row("shape", " × ".join(str(d) for d in header.shape)
                       + f"   (NIfTI-{header.version}{', gzip' if header.compressed else ''})")
    if schedule is not None:
        facts.add_row("slice axis", f"{schedule.axis} ({schedule.direction})"
                      + ("   SliceTiming lists the highest index first"
                         if schedule.direction == "-" else ""))
        if schedule.repetition_time is not None:
            facts.add_row("repetition time", f"{schedule.repetition_time:g} s")
        if schedule.volume_times:
            facts.add_row("volume times", f"{len(schedule.volume_times)} onsets (VolumeTiming)")
        if schedule.acquisition_window is not None and schedule.delay_time:
            facts.add_row("acquisition window", f"{schedule.acquisition_window:g} s "
                          f"(DelayTime {schedule.delay_time:g} s)")
    scheme = record.scheme
    if scheme is not None:
        detail: list[str] = []
        if scheme.spacing:
            detail.append(f"one excitation every {_ms(scheme.spacing)}")
        detail.append(f"{len(scheme.groups)} excitation group"
                      f"{'s' if len(scheme.groups) != 1 else ''}")
        if scheme.evidence.get("unit_note"):
            detail.append(str(scheme.evidence["unit_note"]))
        facts.add_row("scheme", Text(scheme.label, style="bold") + Text(
            "   " + ", ".join(detail), style="dim"))
    elif header is not None:
        facts.add_row("scheme", Text("unknown: no usable slice timing", style="italic"))
    console.print(facts)

    if schedule is not None:
        console.print(Text("\nwhere each value came from", style="dim"))
        src = Table.grid(padding=(0, 2))
        src.add_column(no_wrap=True)
        src.add_column(style="dim")
        for key, source in schedule.sources.items():
            src.add_row(f"  {key}", xml_safe(source.describe()))
        console.print(src)
        console.print(Text("\nacquisition order (slice index ↑, time within the volume →)"
                           if supports_unicode(console) else
                           "\nacquisition order (slice index up, time within the volume right)",
                           style="dim"))
        factor = 0.001 if scheme is not None and scheme.evidence.get("assumed_unit") == "ms" \
            else 1.0  # SliceTiming in milliseconds: drawn in seconds, as the scheme reads it
        for line in order_diagram([t * factor for t in schedule.times],
                                  schedule.acquisition_window or schedule.repetition_time,
                                  unicode=supports_unicode(console)):
            console.print("  " + line)
    if run.findings:
        console.print(Text("\nfindings", style="dim"))
        for line in finding_lines(run.findings):
            console.print(line)
    else:
        console.print(Text("\nno findings", style="dim"))


def render_audit(result: AuditResult, console: Console, *, show_notes: bool = True,
                 show_all: bool = False) -> None:
    """The text report of a finished audit (see ``report_stream.write_text``)."""
    from slicetime.interfaces.report_stream import MemorySource, write_text

    write_text(MemorySource(result, ""), console.file, show_notes=show_notes, show_all=show_all)


#: how each correction outcome is shown
OUTCOME_STYLE = {
    "corrected": "green4",
    "up-to-date": "steel_blue",
    "refused": "dark_orange3",
    "failed": "bold red3",
}


def render_correct(result: CorrectResult, console: Console) -> None:
    """One line per run (status, output, reference time), reasons under it, a summary."""
    for run in result.runs:
        line = Text()
        line.append(f"{run.status:<10}", style=OUTCOME_STYLE[run.status])
        line.append(" " + xml_safe(run.path))
        if run.ok and run.output:
            line.append(f"  → {xml_safe(run.output.rsplit('/', 1)[-1])}", style="dim")
        if run.reference is not None and run.ok:
            line.append(f"  (reference {run.reference:.4g} s)", style="dim")
        console.print(line)
        if run.reason:
            console.print(Text(f"           {xml_safe(run.reason)}"))
        for warning in run.warnings:
            console.print(Text(f"           warning: {xml_safe(warning)}", style="dark_orange3"))
    counts = result.counts()
    parts = [f"{counts[k]} {k}" for k in ("corrected", "up-to-date", "refused", "failed")
             if counts[k]]
    total = len(result.runs)
    where = (f"outputs in {xml_safe(result.out)}" if any(r.ok for r in result.runs)
             else "nothing was written")
    console.print(Text(f"\n{total} run{'s' if total != 1 else ''}: "
                       f"{', '.join(parts) or 'nothing to do'}; {where}"))


def render_fix_plan(plan: FixPlan, console: Console) -> None:
    """Every planned file: what changes and why (rule, evidence, runs), then the diff."""
    for change in plan.changes:
        runs = change.runs
        head = Text(xml_safe(change.file), style="bold")
        head.append(f"  ({'new file; ' if change.sha256_before is None else ''}"
                    f"{len(runs)} run{'s' if len(runs) != 1 else ''})", style="dim")
        console.print(head)
        seen: set[tuple[str, str]] = set()
        for repair in change.repairs:
            if (repair.code, repair.field) in seen:
                continue
            seen.add((repair.code, repair.field))
            console.print(Text(f"  {repair.code}: {repair.field} from {repair.source}"))
        for run in runs[:10]:
            console.print(Text(f"    run {xml_safe(run)}", style="dim"))
        if len(runs) > 10:
            console.print(Text(f"    … and {len(runs) - 10} more runs", style="dim"))
        for line in change.diff().splitlines():
            style = ("green4" if line.startswith("+") and not line.startswith("+++")
                     else "red3" if line.startswith("-") and not line.startswith("---")
                     else "dim" if line.startswith("@@") else None)
            console.print(Text(xml_safe(line), style=style))
        console.print()
    for note in plan.notes:
        console.print(Text(f"note: {xml_safe(note)}", style=STYLE[Severity.NOTE]))
    total = len(plan.changes)
    console.print(Text(f"{total} file{'s' if total != 1 else ''} to change"
                       + ("" if total else " — nothing to fix")))
