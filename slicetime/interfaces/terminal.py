"""Terminal output for people: one run in detail (show), a dataset summary (audit).

Uses rich so that colour appears only on a terminal, ``NO_COLOR`` is honoured
and piped output is plain text.
"""

from __future__ import annotations

import os
import sys
import time
from collections.abc import Callable, Iterable, Iterator
from contextlib import contextmanager

from rich.console import Console
from rich.table import Table
from rich.text import Text

from slicetime.interfaces.diagram import order_diagram
from slicetime.interfaces.safe_text import xml_safe
from slicetime.model import Finding, Severity
from slicetime.pipelines.audit import AuditResult, RunResult
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


@contextmanager
def progress_reporter(
    what: str, *, every: float = 10.0
) -> Iterator[Callable[[int, int, int], None] | None]:
    """Progress on stderr: a bar (runs done, failures, time left) on a terminal; on
    anything else (CI logs, batch jobs) one line every ``every`` seconds."""
    if not sys.stderr.isatty():
        yield _periodic_lines(what, every)
        return
    from rich.progress import (
        BarColumn,
        MofNCompleteColumn,
        Progress,
        TextColumn,
        TimeRemainingColumn,
    )

    bar = Progress(f"[dim]{what}[/dim]", BarColumn(), MofNCompleteColumn(),
                   TextColumn("{task.fields[failed]}"), TimeRemainingColumn(),
                   console=Console(stderr=True), transient=True)
    task = bar.add_task(what, total=None, failed="")
    with bar:
        def update(done: int, total: int, failed: int) -> None:
            bar.update(task, completed=done, total=total,
                       failed=f"[{STYLE[Severity.ERROR]}]{failed} failed" if failed else "")

        yield update


def _periodic_lines(what: str, every: float) -> Callable[[int, int, int], None]:
    started = time.monotonic()
    last = [started]

    def update(done: int, total: int, failed: int) -> None:
        now = time.monotonic()
        if now - last[0] < every or done >= total:
            return
        last[0] = now
        elapsed = now - started
        left = elapsed / done * (total - done) if done else float("nan")
        eta = f", about {left:.0f} s left" if done else ""
        print(f"slicetime: {what}: {done}/{total} runs, {failed} failed{eta}",
              file=sys.stderr, flush=True)

    return update


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


def render_audit(result: AuditResult, console: Console, *, show_notes: bool = True) -> None:
    """A table of runs with their scheme and counts, then the findings per run."""
    table = Table(title=None, show_edge=False, pad_edge=False, header_style="bold")
    table.add_column("run", overflow="fold")
    table.add_column("scheme", overflow="fold")
    table.add_column("TR", justify="right", no_wrap=True)
    for sev in Severity:
        table.add_column(BADGE[sev], justify="right", style=STYLE[sev], no_wrap=True)
    for run in result.runs:
        record = run.record
        counts = {s: 0 for s in Severity}
        for f in run.findings:
            counts[f.severity] += 1
        tr = record.schedule.repetition_time if record.schedule else None
        table.add_row(
            xml_safe(record.path),
            record.scheme.label if record.scheme else "—",
            f"{tr:g}" if tr else "—",
            *(str(counts[s]) if counts[s] else "" for s in Severity),
        )
    console.print(table)
    for run in result.runs:
        shown = [f for f in run.findings if show_notes or f.severity != Severity.NOTE]
        if shown:
            console.print(Text(f"\n{xml_safe(run.record.path)}", style="bold"))
            for line in finding_lines(shown):
                console.print(line)
    if result.dataset_findings:
        console.print(Text("\ndataset", style="bold"))
        for line in finding_lines(result.dataset_findings):
            console.print(line)
    policy_line = policy_summary(result)
    if policy_line:
        console.print(Text(f"\n{xml_safe(policy_line)}", style="dim"))
    counts = result.counts()
    summary = Text(f"\n{len(result.runs)} run{'s' if len(result.runs) != 1 else ''} audited: ")
    for i, sev in enumerate(Severity):
        if i:
            summary.append(", ")
        summary.append(f"{counts[sev.value]} {sev.value}{'s' if counts[sev.value] != 1 else ''}",
                       style=STYLE[sev] if counts[sev.value] else None)
    console.print(summary)


def policy_summary(result: AuditResult) -> str | None:
    """One line: the policy file(s) used, the findings they ignored and the runs their
    protocols judged instead of the dataset majority; None without a policy."""
    files = sorted(set(result.policies.values()))
    if not files:
        return None
    ignored = result.ignored_count()
    judged = result.judged_by_policy
    return (f"policy {', '.join(files)}: {ignored} finding{'s' if ignored != 1 else ''} "
            f"ignored, {judged} run{'s' if judged != 1 else ''} judged by its protocols "
            "instead of the dataset majority")


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
