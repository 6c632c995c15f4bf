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
from rich.text import Text

from slicetime.interfaces import screen
from slicetime.interfaces.diagram import order_diagram
from slicetime.interfaces.progress import progress_reporter  # noqa: F401 (re-exported)
from slicetime.interfaces.safe_text import xml_safe
from slicetime.model import Finding, Severity
from slicetime.numbers import duration, secs
from slicetime.pipelines.audit import AuditResult, RunResult
from slicetime.words import count, encoding_direction

if TYPE_CHECKING:
    from slicetime.pipelines.correct import CorrectResult
    from slicetime.pipelines.fix import FixPlan

#: our own palette: severities read at a glance without shouting
STYLE = {
    Severity.ERROR: "bold red3",
    Severity.WARNING: "dark_orange3",
    Severity.NOTE: "steel_blue",
}
#: the screen module's style names as rich styles
RICH_STYLE = {"error": STYLE[Severity.ERROR], "warning": STYLE[Severity.WARNING],
              "note": STYLE[Severity.NOTE], "bold": "bold", "dim": "dim", "italic": "italic"}


def make_console(file: object = None) -> Console:
    """A console that never wraps by itself: every screen is laid out for
    ``screen.width_for`` (COLUMNS, else the terminal, else no limit) before printing."""
    stream = screen.screen_stream(file if file is not None else sys.stdout)
    width = screen.width_for(stream)
    return Console(
        file=stream,  # a text stream (or its ASCII spelling)
        width=width or 10_000,
        highlight=False,
        soft_wrap=True,
        no_color="NO_COLOR" in os.environ,
        emoji=False,
    )


def fit_width(console: Console) -> int | None:
    """The width the console's lines are laid out for (None: no limit)."""
    return screen.width_for(console.file)


def supports_unicode(console: Console) -> bool:
    """Whether the console's screen may use Unicode (``screen.unicode_wanted``)."""
    return screen.unicode_wanted(console.file)


def emit(console: Console, lines: Iterable[screen.Line]) -> None:
    """Print lines of (text, style) segments."""
    for line in lines:
        text = Text()
        for part, style in line:
            text.append(part, style=RICH_STYLE.get(style or "", None) if style else None)
        console.print(text)


def pairs(rows: Iterable[tuple[str, str | Text]], width: int | None, *,
          indent: str = "") -> list[screen.Line]:
    """Two columns, the names dimmed and padded, the values wrapped under themselves."""
    rows = list(rows)
    if not rows:
        return []
    name_width = max(len(name) for name, _ in rows)
    lead = len(indent) + name_width + 2
    out: list[screen.Line] = []
    for name, value in rows:
        style = value.style if isinstance(value, Text) and isinstance(value.style, str) else None
        plain = value.plain if isinstance(value, Text) else value
        parts = screen.wrap_words(plain, width, first=lead, rest=lead)
        if width is not None and width - lead < 20:  # no room beside: under the name
            out.append([(indent + name, "dim")])
            parts = screen.wrap_words(plain, width, first=len(indent) + 4,
                                      rest=len(indent) + 4)
            out.extend([(indent + "    " + p, _style_name(style))] for p in parts)
            continue
        out.append([(indent + name.ljust(name_width) + "  ", "dim"),
                    (parts[0], _style_name(style))])
        out.extend([(" " * lead + p, _style_name(style))] for p in parts[1:])
    return out


def _style_name(style: str | None) -> str | None:
    return {"bold": "bold", "italic": "italic", "dim": "dim"}.get(style or "")


def finding_lines(findings: Iterable[Finding], indent: str = "  ", *,
                  width: int | None = None, run_path: str | None = None,
                  unicode: bool = True) -> list[screen.Line]:
    """Findings, worst first, laid out as in the text report."""
    from slicetime.interfaces.report_stream import finding_screen_lines

    lines: list[screen.Line] = []
    for f in sorted(findings, key=lambda f: -f.severity.rank):
        lines.extend(finding_screen_lines(f.to_json(), width, run_path=run_path,
                                          indent=indent, unicode=unicode))
    return lines


def render_show(run: RunResult, console: Console) -> None:
    """The detailed view of one run."""
    record = run.record
    schedule = record.schedule
    header = record.header
    width = fit_width(console)
    unicode = supports_unicode(console)
    console.print(Text(screen.shorten_path(xml_safe(record.path), width, unicode=unicode),
                       style="bold"))
    facts: list[tuple[str, str | Text]] = []
    if header is not None:
        facts.append(("shape", " × ".join(str(d) for d in header.shape)
                      + f"   (NIfTI-{header.version}{', gzip' if header.compressed else ''})"))
    if schedule is not None:
        facts.append(("slice axis", encoding_direction(schedule.axis, schedule.direction)
                      + ("   (SliceTiming lists the highest index first)"
                         if schedule.direction == "-" else "")))
    timing = record.timing
    tr_text = screen.timing_tr_text(timing)  # resolved: the sidecar's, else the header's
    if tr_text is not None:
        facts.append(("repetition time", tr_text))
    if schedule is not None:
        if schedule.volume_times:
            facts.append(("volume times",
                          f"{count(len(schedule.volume_times), 'onset')} (VolumeTiming)"))
        if timing.window is not None and schedule.delay_time:
            facts.append(("acquisition window", f"{secs(timing.window)} "
                          f"(DelayTime {secs(schedule.delay_time)})"))
    scheme = record.scheme
    if scheme is not None:
        detail: list[str] = []
        if scheme.spacing:
            detail.append(f"one excitation every {duration(scheme.spacing)}")
        detail.append(count(len(scheme.groups), "excitation group"))
        if scheme.evidence.get("unit_note"):
            detail.append(str(scheme.evidence["unit_note"]))
        facts.append(("scheme", f"{scheme.label}   {', '.join(detail)}"))
    elif header is not None:
        facts.append(("scheme", Text("unknown: no usable slice timing", style="italic")))
    emit(console, pairs(facts, width))

    if schedule is not None:
        console.print(Text("\nwhere each value came from", style="dim"))
        emit(console, [[(p, None if s == "dim" else "dim") for p, s in line] for line in
                       pairs([(key, xml_safe(source.describe()))
                              for key, source in schedule.sources.items()],
                             width, indent="  ")])
        console.print(Text("\nacquisition order (slice index ↑, time within the volume →)"
                           if unicode else
                           "\nacquisition order (slice index up, time within the volume right)",
                           style="dim"))
        timing = record.timing  # drawn in seconds, as resolved
        for line in order_diagram(list(timing.times or schedule.times),
                                  timing.window or timing.repetition_time,
                                  unicode=unicode):
            console.print("  " + line)
    if run.findings:
        console.print(Text("\nfindings", style="dim"))
        emit(console, finding_lines(run.findings, width=width, run_path=record.path,
                                    unicode=unicode))
    else:
        console.print(Text("\nno findings", style="dim"))


def render_audit(result: AuditResult, console: Console, *, show_notes: bool = True,
                 show_all: bool = False) -> None:
    """The text report of a finished audit (see ``report_stream.write_text``)."""
    from slicetime.interfaces.report_source import MemorySource
    from slicetime.interfaces.report_stream import write_text

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
    width = fit_width(console)
    unicode = supports_unicode(console)
    pad = " " * 11
    for run in result.runs:
        items = []
        if run.ok and run.output:
            items.append(f"{'→' if unicode else '->'} {xml_safe(run.output.rsplit('/', 1)[-1])}")
        if run.reference is not None and run.ok:
            items.append(f"(reference {secs(run.reference)})")
        tail = "".join(f"  {item}" for item in items)
        path = xml_safe(run.path)
        line = Text()
        line.append(f"{run.status:<10}", style=OUTCOME_STYLE[run.status])
        if width is None or 11 + len(path) + len(tail) <= width:
            line.append(" " + path)
            line.append(tail, style="dim")
            console.print(line)
        else:  # the path on the status line, shortened; the output under it
            line.append(" " + screen.shorten_path(path, width - 11, unicode=unicode))
            console.print(line)
            for part in screen.wrap_items(items, width, first=11, rest=11) if items else ():
                console.print(Text(pad + part, style="dim"))
        if run.reason:  # the path is on the line above: not again
            reason, paste = screen.split_pasteable(
                screen.strip_path_prefix(run.reason, run.path))
            for part in screen.wrap_words(xml_safe(reason), width, first=11, rest=13):
                console.print(Text(pad + part))
            if paste is not None:  # whole, on its own line, even wider than the screen
                console.print(Text(pad + "  " + xml_safe(paste)), soft_wrap=True)
        for warning in run.warnings:
            for i, part in enumerate(screen.wrap_words(f"warning: {xml_safe(warning)}", width,
                                                       first=11, rest=13)):
                console.print(Text(pad + ("" if i == 0 else "  ") + part,
                                   style="dark_orange3"))
        for doubt in run.accepted:
            said = (f"accepted doubt {doubt['code']} ({xml_safe(doubt['accepted_by'])}): "
                    f"{xml_safe(doubt['message'])}")
            for i, part in enumerate(screen.wrap_words(said, width, first=11, rest=13)):
                console.print(Text(pad + ("" if i == 0 else "  ") + part, style="dim"))
    for finding in result.batch_findings():
        for part in screen.wrap_words(f"error: {xml_safe(finding.message)}", width):
            console.print(Text(part, style="red"))
    counts = result.counts()
    parts = [f"{counts[k]} {k}" for k in ("corrected", "up-to-date", "refused", "failed")
             if counts[k]]
    total = len(result.runs)
    where = (f"outputs in {xml_safe(result.out)}" if any(r.ok for r in result.runs)
             else "nothing was written")
    summary = f"{count(total, 'run')}: {', '.join(parts) or 'nothing to do'}; {where}"
    console.print()
    for i, part in enumerate(screen.wrap_words(summary, width, rest=2)):
        console.print(Text(("" if i == 0 else "  ") + part))
    hand_off = result.hand_off()
    if hand_off is not None:
        for i, part in enumerate(screen.wrap_words(hand_off, width, rest=2)):
            console.print(Text(("" if i == 0 else "  ") + part))


def render_fix_plan(plan: FixPlan, console: Console, apply_hint: str | None = None) -> None:
    """Every planned file: what changes and why (rule, evidence, runs), then the diff;
    last, when changes are planned, ``apply_hint`` (the command that writes them)."""
    width = fit_width(console)
    unicode = supports_unicode(console)
    for change in plan.changes:
        runs = change.runs
        extra = f"  ({'new file; ' if change.sha256_before is None else ''}" \
                f"{count(len(runs), 'run')})"
        name = xml_safe(change.file)
        if width is not None and len(name) + len(extra) > width:
            name = screen.shorten_path(name, max(width - len(extra), 20), unicode=unicode)
        head = Text(name, style="bold")
        head.append(extra, style="dim")
        console.print(head)
        seen: set[tuple[str, str]] = set()
        for repair in change.repairs:
            if (repair.code, repair.field) in seen:
                continue
            seen.add((repair.code, repair.field))
            for i, part in enumerate(screen.wrap_words(
                    f"{repair.code}: {repair.field} from {xml_safe(repair.source)}", width,
                    first=2, rest=6)):
                console.print(Text(("  " if i == 0 else "      ") + part))
        room = None if width is None else width - 8
        for run in runs[:10]:
            console.print(Text(f"    run {screen.shorten_path(xml_safe(run), room)}",
                               style="dim"))
        if len(runs) > 10:
            console.print(Text(f"    {'…' if unicode else '...'} and "
                               f"{count(len(runs) - 10, 'more run')}", style="dim"))
        for line in change.diff().splitlines():
            style = ("green4" if line.startswith("+") and not line.startswith("+++")
                     else "red3" if line.startswith("-") and not line.startswith("---")
                     else "dim" if line.startswith("@@") else None)
            text = xml_safe(line)
            if width is not None and len(text) > width:
                # a diff line is not reflowed (it must stay one line): cut, with a mark
                text = text[: width - 1] + ("…" if unicode else "~")
            console.print(Text(text, style=style or ""))
        console.print()
    if plan.unplanned:
        console.print(Text(f"not planned ({count(len(plan.unplanned), 'fixable finding')})",
                           style="bold"))
        for item in plan.unplanned:
            for i, part in enumerate(screen.wrap_words(xml_safe(item.line()), width, first=2,
                                                       rest=4)):
                console.print(Text(("  " if i == 0 else "    ") + part,
                                   style=STYLE[Severity.WARNING]))
    for note in plan.notes:
        for i, part in enumerate(screen.wrap_words(f"note: {xml_safe(note)}", width, rest=6)):
            console.print(Text(("" if i == 0 else "      ") + part, style=STYLE[Severity.NOTE]))
    left = left_unfixed(plan)
    if left:
        console.print(Text(f"left as they are ({count(sum(n for _, n, _ in left), 'finding')} "
                           "this plan does not repair):", style="bold"))
        for code, n, why in left:
            for i, part in enumerate(screen.wrap_words(f"{code} ×{n}: {why}", width, first=2,
                                                       rest=6)):
                console.print(Text(("  " if i == 0 else "      ") + part))
    total = len(plan.changes)
    console.print(Text(f"{count(total, 'file')} to change"
                       + ("" if total or plan.unplanned else " — nothing to fix")))
    if total and apply_hint:
        for i, part in enumerate(screen.wrap_words(apply_hint, width, rest=4)):
            console.print(Text(("" if i == 0 else "    ") + part, style="bold"), soft_wrap=True)


#: distinct pieces of advice fix's list of findings left alone prints per code (a hint
#: may name a run's own values, so a large dataset could have one per run)
HINTS_SHOWN = 3


def left_unfixed(plan: FixPlan) -> list[tuple[str, int, str]]:
    """The errors and warnings of the plan's audit, on the runs under the given paths,
    that no planned change repairs: (code, how many, why), in code order (the runs the
    plan was not asked about are not counted; the dataset's own findings only when every
    run was given). Why: fix repairs sidecar metadata only, so a code it cannot repair
    says what to do instead, in the finding's own hint (the catalogue's text unless the
    check knew better, as for a TR that is no TR in any unit; the catalogue's for a
    finding without one: one line per distinct hint); a repairable one it did not plan
    is explained by the plan's notes."""
    from slicetime.rules import RULES

    if plan.audit is None:
        return []
    repaired = {(r.root, r.run, r.code) for change in plan.changes for r in change.repairs}
    given = plan.given
    runs = [run for run in plan.audit.runs
            if given is None or (run.record.root, run.record.path) in given]
    left = [finding for run in runs for finding in run.findings
            if finding.severity is not Severity.NOTE
            and (run.record.root, run.record.path, finding.code) not in repaired]
    if len(runs) == len(plan.audit.runs):
        left += [f for f in plan.audit.dataset_findings if f.severity is not Severity.NOTE]
    counts: dict[tuple[str, str], int] = {}
    for finding in left:
        rule = RULES.get(finding.code)
        if rule is not None and rule.fixable:
            why = ("repairable, but not planned here (listed above with the reason)"
                   if any(u.code == finding.code for u in plan.unplanned)
                   else "repairable, but not planned here (see the notes above)")
        else:
            # the finding's own hint; one without (a reader's) has the catalogue's text
            todo = finding.hint or (rule.fix if rule is not None else None) \
                or f"see slicetime explain {finding.code}"
            why = f"not a sidecar repair: {todo}"
        counts[(finding.code, why)] = counts.get((finding.code, why), 0) + 1
    out: list[tuple[str, int, str]] = []
    for code in sorted({code for code, _ in counts}):
        whys = sorted(((n, why) for (c, why), n in counts.items() if c == code),
                      key=lambda item: (-item[0], item[1]))
        out += [(code, n, why) for n, why in whys[:HINTS_SHOWN]]
        rest = sum(n for n, _ in whys[HINTS_SHOWN:])
        if rest:  # advice that names each run's own values: the audit lists it per run
            others = count(len(whys) - HINTS_SHOWN, "other hint")
            out.append((code, rest, f"not a sidecar repair: {others}, each for its runs' "
                        "own values (see slicetime audit)"))
    return out
