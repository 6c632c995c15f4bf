"""Reports written as a stream, from a ``report_source.ReportSource`` (the run
objects encoded once, as each run finishes, and read back in order with what the
dataset rules added): the JSON, JSON Lines, TSV, text and JUnit writers and their
registry (:data:`WRITERS`). No writer holds every run; ``report_html`` renders from
the same source. Text and TSV pass each string they print through
``safe_text.xml_safe``.
"""

from __future__ import annotations

import json
import os
from collections import Counter, defaultdict
from collections.abc import Callable, Iterable, Iterator
from dataclasses import dataclass
from typing import IO, Any, NamedTuple

from slicetime import __version__
from slicetime.interfaces import screen
from slicetime.interfaces.grouping import (
    LISTED_RUNS,
    SEVERITIES,
    Grouper,
    Grouping,
    SharedFinding,
    counts_phrase,
    group_findings,
    listed_paths,
    runs_phrase,
)
from slicetime.interfaces.report_source import (
    ReportSource,
    display_path,
    encode,
    group_label,
    report_root,
    run_group,
    several_roots,
)
from slicetime.interfaces.safe_text import xml_safe
from slicetime.model import FailOn, ResolvedTiming, Severity
from slicetime.numbers import fixed, plain
from slicetime.numbers import shown as shown_number
from slicetime.pipelines.audit import AuditTotals, RunFacts
from slicetime.words import count, plural_of

# --------------------------------------------------------------------------- JSON


def _head(totals: AuditTotals) -> dict[str, Any]:
    # "root" is display text (the dataset names) kept for the contract; "datasets" pairs
    # each root path with its name, so no reader has to match "roots" to "dataset_names"
    return {"tool": {"name": "slicetime", "version": __version__},
            "root": report_root(totals), "roots": totals.roots,
            "dataset_names": [totals.names.get(r, r) for r in totals.roots],
            "datasets": [{"root": r, "name": totals.names.get(r, r)} for r in totals.roots]}


def _summary(totals: AuditTotals, grouping: Grouping) -> dict[str, Any]:
    return {"runs": totals.runs, **totals.counts, "ignored": totals.ignored,
            "distinct": grouping.distinct, "runs_affected": grouping.runs_affected}


def shared_object(group: SharedFinding) -> dict[str, Any]:
    """A shared finding in the JSON reports: the finding once, its root and its runs."""
    return {"finding": group.finding, "root": group.root, "runs": group.paths}


def _grouped_lines(source: ReportSource, grouper: Grouper) -> Iterator[str]:
    """The source's lines, each run with findings also handed to ``grouper``."""
    facts = source.totals.facts
    for index, line in enumerate(source.lines()):
        if any(facts[index].counts):
            grouper.add(index, json.loads(line))
        yield line


def write_json(source: ReportSource, out: IO[str]) -> None:
    """The JSON report (contract: ``data/report.schema.json``; same keys and order
    as ``report_json.audit_object``), one run object per line."""
    totals = source.totals
    head = _head(totals)
    grouper = Grouper(totals)
    out.write("{\n")
    for key, value in head.items():
        out.write(f"  {encode(key)}: {encode(value)},\n")
    out.write('  "runs": [')
    first = True
    for line in _grouped_lines(source, grouper):
        out.write("\n    " if first else ",\n    ")
        out.write(line)
        first = False
    out.write("\n  ],\n" if not first else "],\n")
    findings = [f.to_json() for f in totals.dataset_findings]
    out.write('  "dataset_findings": [')
    out.write(",".join(f"\n    {encode(f)}" for f in findings))
    out.write("\n  ],\n" if findings else "],\n")
    out.write(f'  "policies": {encode(totals.policies)},\n')
    grouping = grouper.finish()
    out.write('  "shared_findings": [')
    out.write(",".join(f"\n    {encode(shared_object(g))}" for g in grouping.shared))
    out.write("\n  ],\n" if grouping.shared else "],\n")
    out.write(f'  "summary": {encode(_summary(totals, grouping))}\n')
    out.write("}\n")


def write_jsonl(source: ReportSource, out: IO[str]) -> None:
    """JSON Lines (schema: ``data/report-lines.schema.json``): every line one object
    with one key: ``report`` (first: tool, root, roots, policies), ``run`` (one per
    run, the contract's run object, in report order), ``dataset_finding`` (one per
    finding about the dataset as a whole), ``summary`` (last: the line that says
    the report is complete). Before the summary, one ``shared_finding`` per finding of a
    file several runs share (told once, with its runs; the runs keep it too)."""
    totals = source.totals
    grouper = Grouper(totals)
    out.write(encode({"report": {**_head(totals), "policies": totals.policies}}) + "\n")
    for line in _grouped_lines(source, grouper):
        out.write('{"run":')
        out.write(line)
        out.write("}\n")
    for finding in totals.dataset_findings:
        out.write(encode({"dataset_finding": finding.to_json()}) + "\n")
    grouping = grouper.finish()
    for group in grouping.shared:
        out.write(encode({"shared_finding": shared_object(group)}) + "\n")
    out.write(encode({"summary": _summary(totals, grouping)}) + "\n")


# --------------------------------------------------------------------------- TSV

TSV_COLUMNS = ("path", "dataset", "task", "scheme", "repetition_time",
               "repetition_time_source", "slices", "multiband_factor", "errors", "warnings",
               "notes", "codes", "applies_to")


def _cell(value: object) -> str:
    if value is None:
        return ""
    return xml_safe(value if isinstance(value, str) else plain(value, 9)
                    if isinstance(value, float) else str(value))


def write_tsv(source: ReportSource, out: IO[str]) -> None:
    """One row per run (tab-separated, header row first), then one row per finding of a
    file several runs share, told once: its ``path`` is that file, ``applies_to`` the
    number of runs it applies to (empty on run rows), and the run rows count and list
    only the findings of their own. So the severity columns add up to the JSON report's
    ``summary.distinct`` without its dataset findings. ``dataset`` is filled only when
    the runs come from several roots (one name, repeated on every row, told nothing).
    Tabs, line breaks and control characters in values are written as visible escapes
    (``\\t``, ``\\n``), so every row is one line with exactly the header's columns.
    ``codes`` lists the distinct finding codes, sorted, separated by commas;
    ``repetition_time_source`` says what gave ``repetition_time`` (``header``: the
    image header's only, no sidecar gives it), as in the JSON report."""
    totals = source.totals
    grouping = group_findings(source)
    several = several_roots(totals)
    out.write("\t".join(TSV_COLUMNS) + "\n")
    for index, obj in source.objects():
        facts = totals.facts[index]
        scheme = obj.get("scheme") or {}
        times = obj.get("slice_times")
        slices = len(times) if times else facts.axis_length
        codes = ",".join(sorted({f["code"] for f in grouping.own(index, obj["findings"])}))
        dataset = totals.names.get(facts.root, facts.root) if several else None
        row = (obj["path"], dataset,
               obj.get("entities", {}).get("task"), scheme.get("label"),
               obj.get("repetition_time"), obj.get("repetition_time_source"), slices,
               scheme.get("multiband_factor"),
               *grouping.own_counts(index, facts.counts), codes, None)
        out.write("\t".join(_cell(v) for v in row) + "\n")
    for group in grouping.shared:
        f = group.finding
        counts = tuple(int(f["severity"] == s) for s in SEVERITIES)
        dataset = totals.names.get(group.root, group.root) if several else None
        row = (f["file"], dataset, None, None, None, None, None, None, *counts, f["code"],
               len(group.runs))
        out.write("\t".join(_cell(v) for v in row) + "\n")


# --------------------------------------------------------------------------- text

_COLOUR = {"error": "1;31", "warning": "33", "note": "34", "bold": "1", "dim": "2",
           "italic": "3"}
_RANK = {"error": 3, "warning": 2, "note": 1}
#: the head of the text report's table (one row per run group)
GROUP_HEAD = "run group"


class _Paint:
    def __init__(self, out: IO[str]) -> None:
        tty = bool(getattr(out, "isatty", lambda: False)())
        self.on = tty and "NO_COLOR" not in os.environ

    def __call__(self, text: str, style: str | None) -> str:
        if not self.on or not style or not text:
            return text
        return f"\x1b[{_COLOUR[style]}m{text}\x1b[0m"


def _plural(n: int, word: str) -> str:
    return count(n, word)


def _tr_text(timings: Iterable[ResolvedTiming]) -> str:
    """The TRs of a run group (at most three), and how many of its runs have the
    header's TR only (``ResolvedTiming.repetition_origin``)."""
    timings = list(timings)
    unusable = sum(1 for t in timings if t.repetition_unusable)
    if unusable:  # a sidecar TR no unit makes plausible is shown so, not divided
        rest = _tr_text(t for t in timings if not t.repetition_unusable)
        if rest == "—":
            return screen.TR_NOT_USABLE
        return f"{rest}; {count(unusable, 'run')} {screen.TR_NOT_USABLE}"
    given = [(t.repetition_time, t.repetition_origin) for t in timings if t.repetition_time]
    known = sorted({round(v, 3) for v, _ in given})
    if not known:
        return "—"
    shown = ", ".join(fixed(v, 3) for v in known[:3]) + (", …" if len(known) > 3 else "")
    header = sum(1 for _, origin in given if origin == "header")
    if not header:
        return f"{shown} s"
    if header == len(given):
        return f"{shown} s ({screen.HEADER_ONLY})"
    return f"{shown} s ({count(header, 'run')}: {screen.HEADER_ONLY})"


def finding_screen_lines(f: dict[str, Any], width: int | None, *, run_path: str | None = None,
                         indent: str = "  ", unicode: bool = True) -> list[screen.Line]:
    """One finding (a JSON finding object) laid out for a screen of ``width``."""
    where = xml_safe(f.get("file") or "")
    if f.get("field"):
        field = xml_safe(f["field"])
        where = f"{where} › {field}" if where else field
    message = screen.strip_path_prefix(f["message"], f.get("file"), run_path)
    return screen.finding_lines(
        f["severity"], xml_safe(f["code"]), xml_safe(message, one_line=False), where or None,
        xml_safe(f["hint"], one_line=False) if f.get("hint") else None, width,
        indent=indent, unicode=unicode)


def _value_text(value: Any, limit: int = 12) -> str:
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int | float):
        return shown_number(value)
    if isinstance(value, list | tuple):
        shown = ", ".join(_value_text(v, limit) for v in value[:limit])
        return shown + (f", … ({len(value)} in all)" if len(value) > limit else "")
    if isinstance(value, dict):
        return "; ".join(f"{k.replace('_', ' ')} {_value_text(v, limit)}"
                         for k, v in value.items())
    return xml_safe(value)


def evidence_text(evidence: dict[str, Any]) -> str:
    """A finding's evidence for people: one ``name: value`` line per entry (names with
    spaces, numbers without float noise, long lists cut), and the findings folded into
    it as ``also: code (severity): message`` lines."""
    lines: list[str] = []
    for key, value in evidence.items():
        if key == "folded" and isinstance(value, list):
            lines.extend(f"also: {xml_safe(f.get('code'))} ({xml_safe(f.get('severity'))}): "
                         f"{xml_safe(f.get('message'), one_line=False)}"
                         for f in value if isinstance(f, dict))
            continue
        lines.append(f"{xml_safe(key).replace('_', ' ')}: {_value_text(value)}")
    return "\n".join(lines)


def _finding_text(f: dict[str, Any], paint: _Paint, width: int | None = None,
                  run_path: str | None = None, indent: str = "  ") -> str:
    return screen.paint_lines(finding_screen_lines(f, width, run_path=run_path,
                                                   indent=indent), paint)


def _table(rows: list[tuple[str, ...]], head: tuple[str, ...], right: set[int],
           styles: tuple[str | None, ...], width: int | None, paint: _Paint) -> list[str]:
    """Columns padded to their widest cell; the last column wrapped under itself, or,
    when the fixed columns leave it too little room, every row as a short block."""
    fixed_cols = len(head) - 1
    widths = [max(len(r[c]) for r in [head, *rows]) for c in range(fixed_cols)]
    lead = sum(widths) + 2 * fixed_cols
    last_room = None if width is None else width - lead

    def cells(row: tuple[str, ...], row_styles: tuple[str | None, ...]) -> str:
        out = []
        for c in range(fixed_cols):
            cell = row[c].rjust(widths[c]) if c in right else row[c].ljust(widths[c])
            style = row_styles[c] if c < len(row_styles) else None
            out.append(paint(cell, style) if row[c] not in ("0", "") else cell)
        return "  ".join(out) + "  "

    lines: list[str] = []
    if last_room is None or last_room >= 24:
        lines.append(paint(cells(head, ()) + head[-1], "bold"))
        for row in rows:
            parts = screen.wrap_words(row[-1], width, first=lead, rest=lead)
            lines.append(cells(row, styles) + parts[0])
            lines.extend(" " * lead + part for part in parts[1:])
        return lines
    assert width is not None
    if lead - 2 <= width:  # the last column under each row
        lines.append(paint(cells(head, ()).rstrip(), "bold"))
        for row in rows:
            lines.append(cells(row, styles).rstrip())
            for i, part in enumerate(screen.wrap_words(f"{head[-1]}: {row[-1]}", width,
                                                       first=4, rest=6)):
                lines.append(("    " if i == 0 else "      ") + part)
        return lines
    for row in rows:  # narrower still: the group on its own line, the rest under it
        lines.append(paint(screen.shorten_path(row[0], width), "bold"))
        facts = "  ".join(f"{head[c]} {row[c]}" for c in range(1, fixed_cols))
        for part in screen.wrap_words(facts, width, first=4, rest=4):
            lines.append("    " + part)
        for i, part in enumerate(screen.wrap_words(f"{head[-1]}: {row[-1]}", width,
                                                   first=4, rest=6)):
            lines.append(("    " if i == 0 else "      ") + part)
    return lines


def _run_head(name: str, rest: str, width: int | None, paint: _Paint) -> list[str]:
    """A run's line: the path, then scheme, TR and counts; when they do not fit,
    the path on its own line (shortened in the middle) and the rest under it."""
    if width is None or len(name) + 2 + len(rest) <= width:
        return [f"{paint(name, 'bold')}  {rest}"]
    lines = [paint(screen.shorten_path(name, width), "bold")]
    lines.extend("    " + part for part in screen.wrap_words(rest, width, first=4, rest=4))
    return lines


def _scheme_label(facts: RunFacts) -> str:
    scheme = facts.scheme
    return scheme.label if scheme is not None else "no usable timing"


def write_text(source: ReportSource, out: IO[str], *, show_all: bool = False,
               show_notes: bool = True, width: int | bool | None = True) -> None:
    """The text report: a summary per run group, then the runs that have findings
    (every run with ``show_all``), the dataset findings and the summary line. Counts
    are exact: notes hidden with ``show_notes=False`` are still counted (in the
    summary line; the table then has no notes column). ``width``: True to fit
    ``out`` (see ``screen.width_for``), None for no limit, or a number."""
    totals = source.totals
    out = screen.screen_stream(out)  # ASCII mode: "x" for "×", "->" for "→", ...
    paint = _Paint(out)
    fit: int | None = screen.width_for(out) if width is True else (
        None if width is False else width)
    kinds = ("error", "warning", "note") if show_notes else ("error", "warning")
    for line in _group_table(totals, kinds, fit, paint):
        out.write(line + "\n")
    grouping = group_findings(source)
    _write_runs(source, grouping, out, paint, fit, show_all=show_all, show_notes=show_notes)
    _write_closing(totals, grouping, out, paint, fit, show_notes=show_notes)


def _group_table(totals: AuditTotals, kinds: tuple[str, ...], fit: int | None,
                 paint: _Paint) -> list[str]:
    """The table of run groups (``run_group``): runs, TR, how many runs have
    findings of each of ``kinds``, the schemes (with how many runs have each when
    they differ)."""
    several = several_roots(totals)
    groups: dict[tuple[str, ...], list[int]] = defaultdict(list)
    for index, facts in enumerate(totals.facts):
        groups[run_group(facts)].append(index)
    if not groups:
        return []
    rows = []
    for key, members in sorted(groups.items()):
        schemes = Counter(_scheme_label(totals.facts[i]) for i in members)
        scheme_text = "; ".join(
            f"{xml_safe(label)} ×{n}" if len(schemes) > 1 else xml_safe(label)
            for label, n in sorted(schemes.items(), key=lambda kv: (-kv[1], kv[0])))
        trs = _tr_text(totals.facts[i].timing for i in members)
        # runs, not findings: how many of the group's runs have one of each severity
        sums = [sum(1 for i in members if totals.facts[i].counts[k])
                for k in range(len(kinds))]
        root_label = f"[{totals.names.get(key[0], key[0])}]" if several else None
        rows.append((xml_safe(group_label(key, root_label)), str(len(members)), trs,
                     *(str(s) for s in sums), scheme_text))
    head = (GROUP_HEAD, "runs", "TR", *(f"with {plural_of(k)}" for k in kinds),
            "schemes")
    right = {1, *range(3, 3 + len(kinds))}
    return _table(rows, head, right, (None, None, None, *kinds), fit, paint)


def _write_runs(source: ReportSource, grouping: Grouping, out: IO[str], paint: _Paint,
                fit: int | None, *, show_all: bool, show_notes: bool) -> None:
    """The runs with findings of their own (every run with ``show_all``): each run's
    line, then its findings, worst first."""
    totals = source.totals
    several = several_roots(totals)

    def own_counts(index: int) -> tuple[int, int, int]:
        return grouping.own_counts(index, totals.facts[index].counts)

    def listed(index: int) -> bool:
        if show_all:
            return True
        e, w, n = own_counts(index)
        return bool(e or w or (n and show_notes))

    with_own = sum(1 for i in range(len(totals.facts)) if listed(i)) if not show_all else 0
    if totals.facts:
        if show_all:
            title = f"\nevery run ({totals.runs})"
        elif grouping.shared:
            title = (f"\nruns with findings of their own ({with_own} of {totals.runs}; "
                     "--all lists every run)")
        else:
            title = (f"\nruns with findings ({with_own} of {totals.runs}; "
                     "--all lists every run)")
        out.write(paint(title, "bold") + "\n")
    for index, obj in source.objects(listed):
        facts = totals.facts[index]
        scheme = (obj.get("scheme") or {}).get("label") or "no usable timing"
        tr = obj.get("repetition_time")
        e, w, n = own_counts(index)
        counts = ", ".join(_plural(c, s) for c, s in ((e, "error"), (w, "warning"), (n, "note"))
                           if c)
        shared_here = sum(grouping.shared_counts.get(index, (0, 0, 0)))
        if shared_here:
            told = f"{_plural(shared_here, 'finding')} of a shared file, below"
            counts = f"{counts}; {told}" if counts else told
        counts = counts or "no findings"
        name = display_path(totals, facts, xml_safe(obj["path"]), several=several)
        shown_tr = screen.timing_tr_text(facts.timing) \
            if tr or facts.timing.repetition_unusable else None
        tr_text = f"  TR {shown_tr}" if shown_tr else ""
        rest = f"{xml_safe(scheme)}{tr_text}  ({counts})"
        for line in _run_head(name, rest, fit, paint):
            out.write(line + "\n")
        shown = [f for f in grouping.own(index, obj["findings"])
                 if show_notes or f["severity"] != "note"]
        shown.sort(key=lambda f: -_RANK[f["severity"]])
        for f in shown:
            out.write(_finding_text(f, paint, fit, run_path=obj["path"]) + "\n")


def _write_closing(totals: AuditTotals, grouping: Grouping, out: IO[str], paint: _Paint,
                   fit: int | None, *, show_notes: bool) -> None:
    """After the runs: the findings of shared files (each once, with its runs), the
    dataset findings, the policy line and the summary line."""
    shared = [g for g in grouping.shared if show_notes or g.severity != "note"]
    if shared:
        out.write(paint("\nfindings of shared files (each told once, with the runs it "
                        "applies to)", "bold") + "\n")
        several = several_roots(totals)
        for group in shared:
            out.write(_finding_text(group.finding, paint, fit) + "\n")
            for line in shared_runs_lines(group, grouping, totals, fit, several=several):
                out.write(line + "\n")
    if totals.dataset_findings:
        out.write(paint("\ndataset", "bold") + "\n")
        for finding in sorted(totals.dataset_findings, key=lambda f: -f.severity.rank):
            if finding.severity is Severity.NOTE and not show_notes:
                continue
            out.write(_finding_text(json.loads(encode(finding.to_json())), paint, fit) + "\n")
    policy_line = policy_summary(totals)
    if policy_line:
        out.write("\n")
        for i, part in enumerate(screen.wrap_words(xml_safe(policy_line), fit, rest=2)):
            out.write(paint(part if i == 0 else "  " + part, "dim") + "\n")
    out.write("\n")
    plain_line = summary_line(totals, grouping)
    if fit is None or len(plain_line) <= fit:
        out.write(summary_line(totals, grouping, paint) + "\n")
    else:
        for i, part in enumerate(screen.wrap_words(plain_line, fit, rest=2)):
            out.write(("" if i == 0 else "  ") + part + "\n")


def shared_runs_lines(group: SharedFinding, grouping: Grouping, totals: AuditTotals,
                      width: int | None, *, several: bool, indent: str = "  ") -> list[str]:
    """The runs a shared finding applies to, under the finding: ``applies to all 6 runs
    of task-chirp_bold``, or the count and the runs' paths (at most
    ``grouping.LISTED_RUNS`` on a screen of limited width; every one without a limit)."""
    pad = indent + " " * screen.FINDING_INDENT
    phrase = runs_phrase(group, grouping, totals)
    if phrase.startswith("all "):
        return [f"{pad}applies to {phrase}"]
    paths = [display_path(totals, totals.facts[i], xml_safe(p), several=several)
             for i, p in zip(group.runs, group.paths, strict=True)]
    shown, more = listed_paths(paths, None if width is None else LISTED_RUNS)
    lines = [f"{pad}applies to {phrase}:"]
    room = None if width is None else width - len(pad) - 2
    lines.extend(f"{pad}  {screen.shorten_path(p, room)}" for p in shown)
    if more:
        lines.append(f"{pad}  and {more} more (the JSON report lists every run)")
    return lines


def policy_summary(totals: AuditTotals) -> str | None:
    """One line: the policy file(s) used, the findings they ignored and the runs their
    protocols judged instead of the dataset majority; None without a policy."""
    files = sorted(set(totals.policies.values()))
    if not files:
        return None
    ignored, judged = totals.ignored, totals.judged_by_policy
    return (f"policy {', '.join(files)}: {count(ignored, 'finding')} ignored, "
            f"{count(judged, 'run')} judged by its protocols instead of the dataset majority")


def summary_line(totals: AuditTotals, grouping: Grouping,
                 paint: Callable[[str, str | None], str] | None = None) -> str:
    """``N runs audited: 3 errors on 3 runs, 1 warning on 2 runs, 0 notes`` (a finding
    of a shared file counted once, with the runs each severity touches; plus what the
    policy ignored)."""
    paint = paint or (lambda text, _style: text)
    texts = counts_phrase(grouping.distinct, grouping.runs_affected)
    parts = [paint(text, s if grouping.distinct[s] else None)
             for text, s in zip(texts, SEVERITIES, strict=True)]
    line = f"{_plural(totals.runs, 'run')} audited: {', '.join(parts)}"
    if totals.ignored:
        line += f" ({_plural(totals.ignored, 'finding')} ignored by the lab policy)"
    return line


# --------------------------------------------------------------------------- JUnit


class _Suite(NamedTuple):
    """One ``<testsuite>`` of the JUnit report: a dataset root's runs (its shared
    findings and, with one root, the dataset findings), or, with several roots, the
    dataset findings of all of them."""

    name: str
    root: str
    label: str | None  # the dataset's name, for the properties and the class names
    members: list[int]  # indices of its runs
    with_dataset: bool


class _JunitTally:
    """What fails at a ``--fail-on`` threshold, counted the same way for each suite
    and for the whole report."""

    def __init__(self, totals: AuditTotals, grouping: Grouping, threshold: FailOn) -> None:
        self.totals, self.grouping, self.threshold = totals, grouping, threshold
        self.shared_of: dict[str, list[SharedFinding]] = defaultdict(list)
        for group in grouping.shared:
            self.shared_of[group.root].append(group)
        self.dataset_fails = any(threshold.fails(f.severity) for f in totals.dataset_findings)

    def tests(self, suite: _Suite) -> int:
        return len(suite.members) + len(self.shared_of[suite.root]) + suite.with_dataset

    def failures(self, suite: _Suite) -> int:
        facts = self.totals.facts
        runs = sum(self.threshold.reached(self.grouping.own_counts(i, facts[i].counts))
                   for i in suite.members)
        shared = sum(self.threshold.fails(Severity(g.severity))
                     for g in self.shared_of[suite.root])
        return runs + shared + (suite.with_dataset and self.dataset_fails)


def _junit_suites(totals: AuditTotals, roots: list[str]) -> list[_Suite]:
    """One suite per root with runs; with several roots, one more for the dataset
    findings of all of them (one root: its suite holds them)."""
    from slicetime.interfaces.report_junit import SUITE_NAME

    several = len(roots) > 1
    per_root: dict[str, list[int]] = defaultdict(list)
    for index, facts in enumerate(totals.facts):
        per_root[facts.root].append(index)
    suites: list[_Suite] = []
    for root in roots:
        members = per_root.get(root, [])
        if several and not members:
            continue
        suites.append(_Suite(f"{SUITE_NAME}: {root}" if several else SUITE_NAME, root,
                             totals.names.get(root, root), members, not several))
    if several:
        suites.append(_Suite(f"{SUITE_NAME}: all datasets", ", ".join(roots), None, [], True))
    return suites


def write_junit(source: ReportSource, out: IO[str], *, fail_on: str) -> None:
    """The JUnit XML report (layout in ``report_junit``), written suite by suite."""
    import xml.etree.ElementTree as ET

    from slicetime.interfaces import report_junit as junit

    threshold = FailOn.parse(fail_on)
    totals = source.totals
    grouping = group_findings(source)
    roots = list(dict.fromkeys([*totals.roots, *(f.root for f in totals.facts)]))
    if not roots:
        roots = [source.root_given]
    several = len(roots) > 1
    tally = _JunitTally(totals, grouping, threshold)
    suites = _junit_suites(totals, roots)
    tests = sum(tally.tests(suite) for suite in suites)
    failures = sum(tally.failures(suite) for suite in suites)
    common = {"path_given": source.root_given, "fail_on": fail_on,
              "slicetime_version": __version__}
    out.write('<?xml version="1.0" encoding="UTF-8"?>\n')
    out.write(f'<testsuites name="slicetime" tests="{tests}" failures="{failures}" '
              'errors="0" skipped="0">\n')
    for suite in suites:
        root, name, members = suite.root, suite.label, suite.members
        element = ET.Element("testsuite", name=xml_safe(suite.name),
                             tests=str(tally.tests(suite)),
                             failures=str(tally.failures(suite)), errors="0", skipped="0")
        text = ET.tostring(element, encoding="unicode")
        out.write("  " + text[: -len(" />")] + ">\n")
        props = ET.Element("properties")
        prop_values = {"root": root, **({"dataset": name} if name else {}), **common}
        for key, value in prop_values.items():
            ET.SubElement(props, "property", name=key, value=xml_safe(value))
        _write_element(out, props, ET)
        wanted = set(members)
        for index, obj in source.objects(wanted.__contains__) if members else ():
            holder = ET.Element("x")
            path = obj["path"]
            folder = junit.folder_of(path)
            classname = f"{name}/{folder}" if several and name else folder
            junit.add_testcase(holder, classname, path, grouping.own(index, obj["findings"]),
                               threshold)
            _write_element(out, holder[0], ET)
        for group in tally.shared_of[root]:
            holder = ET.Element("x")
            file = group.finding["file"]
            folder = junit.folder_of(file)
            classname = f"{name}/{folder}" if several and name else folder
            junit.add_testcase(holder, classname, f"{file}: {group.finding['code']}",
                               [group.finding], threshold,
                               more_out=shared_runs_text(group, grouping, totals))
            _write_element(out, holder[0], ET)
        if suite.with_dataset:
            holder = ET.Element("x")
            junit.add_testcase(holder, ".", junit.DATASET_CASE,
                               [f.to_json() for f in totals.dataset_findings], threshold)
            _write_element(out, holder[0], ET)
        out.write("  </testsuite>\n")
    out.write("</testsuites>\n")


def shared_runs_text(group: SharedFinding, grouping: Grouping, totals: AuditTotals) -> str:
    """The runs a shared finding applies to, as plain lines (every run named)."""
    phrase = runs_phrase(group, grouping, totals)
    if phrase.startswith("all "):
        return f"applies to {phrase}\n"
    return f"applies to {phrase}:\n" + "".join(f"  {xml_safe(p)}\n" for p in group.paths)


def _write_element(out: IO[str], element: Any, ET: Any) -> None:
    ET.indent(element, space="  ", level=2)
    out.write("    " + ET.tostring(element, encoding="unicode").rstrip() + "\n")


@dataclass(frozen=True)
class ReportStyle:
    """What the writers other than JSON take from the command line."""

    fail_on: str = "error"  # junit: the severity that makes a test case fail
    show_all: bool = False  # text: every run, not only the runs with findings
    show_notes: bool = True  # text: the notes too


ReportWriter = Callable[[ReportSource, IO[str], ReportStyle], None]

#: the report formats (``audit --format``), in the order help lists them: name -> writer.
#: A writer added here is a choice of ``--format`` (the command line reads this registry).
WRITERS: dict[str, ReportWriter] = {
    "text": lambda source, out, style: write_text(source, out, show_all=style.show_all,
                                                  show_notes=style.show_notes),
    "json": lambda source, out, style: write_json(source, out),
    "jsonl": lambda source, out, style: write_jsonl(source, out),
    "tsv": lambda source, out, style: write_tsv(source, out),
    "junit": lambda source, out, style: write_junit(source, out, fail_on=style.fail_on),
}


def write_report(fmt: str, source: ReportSource, out: IO[str],
                 style: ReportStyle | None = None) -> None:
    """Write the report in format ``fmt`` (a key of :data:`WRITERS`)."""
    WRITERS[fmt](source, out, style if style is not None else ReportStyle())


__all__ = [
    "TSV_COLUMNS", "WRITERS", "ReportStyle", "ReportWriter", "summary_line", "write_json",
    "write_jsonl", "write_junit", "write_report", "write_text", "write_tsv",
]
