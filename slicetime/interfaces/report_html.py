"""The HTML audit report: one self-contained page (inline CSS, inline SVG, a little script).

Layout, top to bottom:

1. a header with the dataset and the totals;
2. the overview: runs with errors / warnings / notes, the schemes in use per
   run group (grouped like the dataset rules group runs, but runs whose names are
   not BIDS names apart: ``report_source.run_group``), the outliers (``dataset/*`` findings), and
   a collapsed gallery of every distinct timing diagram;
3. the dataset picture: subjects down, the other entities (session, task,
   acquisition, run, ...) across; each cell shows the run's scheme tag and worst
   severity and links to the run;
4. one collapsed section per run: facts, where each value came from, the timing
   diagram and the findings, with a severity filter and a name search.

Each distinct timing diagram is drawn once, as an SVG ``<symbol>`` in a hidden
block at the top of the page, and every run that has it shows it with
``<use href="#dg-N">``. Every string from the data passes through
``safe_text.xml_safe`` (control characters and undecodable bytes become visible
escapes) and then ``html.escape``. A Content-Security-Policy allows no network
access at all and only the page's own script (by its hash, computed from the script
file's bytes). The style and the script are package data files,
``slicetime/data/report.css`` and ``slicetime/data/report.js``, embedded in the page.
What the page needs of each run (its drawing, facts and sources) is taken while the
audit streams, by ``report_html_parts``; this module lays the page out from it.

The script reads and writes its state in the URL fragment
(``report.html#severity=error&q=sub-01``), so a filtered view can be shared, and
marks ``<body data-ready="1">`` when it has run. Printing opens every shown
section and hides the controls.
"""

from __future__ import annotations

import base64
import datetime
import hashlib
import html
import io
import os
from collections import Counter, defaultdict
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from functools import cache
from typing import IO, Any

from slicetime import __version__
from slicetime.codes import package_data
from slicetime.interfaces.grouping import (
    Grouping,
    counts_phrase,
    group_findings,
    listed_paths,
    runs_phrase,
)
from slicetime.interfaces.plots import COLOURS
from slicetime.interfaces.report_html_parts import OWN_SIDECAR, DiagramCollector, ValueTable
from slicetime.interfaces.report_source import (
    NOT_BIDS,
    NOT_BIDS_LABEL,
    MemorySource,
    ReportSource,
    display_path,
    encode,
    group_label,
    report_root,
    run_group,
    several_roots,
)
from slicetime.interfaces.report_stream import evidence_text
from slicetime.interfaces.safe_text import xml_safe
from slicetime.interfaces.screen import strip_path_prefix, timing_tr_text
from slicetime.model import Severity
from slicetime.pipelines.audit import AuditResult, AuditTotals, RunFacts
from slicetime.rules.dataset import PROTOCOL_ENTITIES
from slicetime.words import agree

#: fills for scheme tags in the dataset picture and the runs table (our own muted
#: palette: lavender, aqua, teal, mint, lilac, mauve grey, periwinkle, pale green), reused
#: in turn. No fill may read as a severity: each is at least 10 CIEDE2000 units from a
#: tint of every severity colour at the fill's lightness (tests/test_report_colours.py)
TAG_FILLS = (
    "#cdb9e0",
    "#aaeef7",
    "#89ccd1",
    "#afefe5",
    "#f7d9fe",
    "#c8bdce",
    "#d6d3fd",
    "#c0edd0",
)
NO_TIMING_FILL = "#e4e4e4"

#: the mark of each severity beside a cell or a finding
SEVERITY_GLYPH = {Severity.ERROR: "✕", Severity.WARNING: "△", Severity.NOTE: "•"}


def esc(text: object, *, one_line: bool = True) -> str:
    """Data text for an attribute value: visible escapes for unsafe characters, then
    entity escaping of markup characters and both quotes."""
    return html.escape(xml_safe(text, one_line=one_line), quote=True)


def txt(text: object, *, one_line: bool = True) -> str:
    """Data text for element content: as :func:`esc`, but quotes stay as they are
    (they end nothing outside an attribute), which keeps evidence readable and small."""
    return html.escape(xml_safe(text, one_line=one_line), quote=False)


def _plural(n: int, word: str) -> str:
    return f"{n} {word}{'' if n == 1 else 's'}"


# --------------------------------------------------------------------------- diagrams


def _use(ident: str, size: tuple[float, float], caption: str) -> str:
    w, h = size
    return (
        f'<svg class="diagram" viewBox="0 0 {w:g} {h:g}" role="img" '
        f'aria-label="{esc(caption)}"><use href="#{ident}" width="{w:g}" '
        f'height="{h:g}"/></svg>'
    )


# --------------------------------------------------------------------------- grouping


@dataclass(frozen=True)
class _Tag:
    text: str
    cls: str  # the CSS class that gives its fill
    label: str


def _chip(tag: _Tag) -> str:
    return f'<span class="chip {tag.cls}">{txt(tag.text)}</span>'


# --------------------------------------------------------------------------- sections


def _scheme_tags(facts: Sequence[RunFacts]) -> dict[str | None, _Tag]:
    """A short numbered tag and a fill for every scheme label, most common first."""
    counts = Counter(f.scheme.label if f.scheme else None for f in facts)
    tags: dict[str | None, _Tag] = {}
    number = 0
    for label, _ in sorted(counts.items(), key=lambda kv: (-kv[1], kv[0] or "")):
        if label is None:
            tags[None] = _Tag("–", "t0", "no usable slice timing")
            continue
        number += 1
        tags[label] = _Tag(str(number), f"t{(number - 1) % len(TAG_FILLS) + 1}", label)
    return tags


def _summary_cards(totals: AuditTotals, drawings: int, grouping: Grouping) -> str:
    facts = totals.facts
    with_sev = [sum(1 for f in facts if f.counts[k]) for k in range(3)]
    clean = sum(1 for f in facts if not any(f.counts))
    counts = grouping.distinct  # a finding of a shared file counted once
    cards = [
        ("runs", str(len(facts)), "runs audited", ""),
        ("error", str(with_sev[0]), "runs with errors",
         f"{_plural(counts['error'], 'error')} in all"),
        ("warning", str(with_sev[1]), "runs with warnings",
         f"{_plural(counts['warning'], 'warning')} in all"),
        ("note", str(with_sev[2]), "runs with notes", f"{_plural(counts['note'], 'note')} in all"),
        ("clean", str(clean), "runs without findings", ""),
        ("drawings", str(drawings), "distinct timing diagrams", ""),
    ]
    out = ['<div class="cards">']
    for cls, number, what, extra in cards:
        link = f' href="#severity={cls}"' if cls in ("error", "warning", "note", "clean") else ""
        tag = "a" if link else "div"
        out.append(
            f'<{tag} class="card {cls}"{link}><span class="num">{number}</span>'
            f'<span class="what">{what}</span>'
            + (f'<span class="extra">{extra}</span>' if extra else "")
            + f"</{tag}>"
        )
    out.append("</div>")
    if totals.ignored:
        out.append(
            f'<p class="muted">{_plural(totals.ignored, "finding")} ignored by the lab '
            f"policy {agree(totals.ignored, 'is')} not shown.</p>"
        )
    return "".join(out)


def _group_name(key: tuple[str, ...], totals: AuditTotals, many_roots: bool) -> str:
    label = group_label(key)
    return f"{totals.names.get(key[0], key[0])} · {label}" if many_roots else label


def _schemes_table(totals: AuditTotals, tags: dict[str | None, _Tag]) -> str:
    groups: dict[tuple[str, ...], list[int]] = defaultdict(list)
    for i, facts in enumerate(totals.facts):
        groups[run_group(facts)].append(i)
    many_roots = len({k[0] for k in groups}) > 1
    rows = []
    for key, members in sorted(groups.items()):
        per_label: Counter[str | None] = Counter()
        first: dict[str | None, int] = {}
        for i in members:
            scheme = totals.facts[i].scheme
            label = scheme.label if scheme else None
            per_label[label] += 1
            first.setdefault(label, i)
        cells = []
        for label, n_runs in sorted(per_label.items(), key=lambda kv: (-kv[1], kv[0] or "")):
            name = txt(label) if label is not None else "<em>no usable slice timing</em>"
            example = totals.facts[first[label]].path
            cells.append(
                f'<li>{_chip(tags[label])} {name} <span class="muted">'
                f'{_plural(n_runs, "run")}, e.g. <a href="#run-{first[label] + 1}">'
                f"{txt(example)}</a></span></li>"
            )
        mixed = len(per_label) > 1
        row_class = ' class="mixed"' if mixed else ""
        rows.append(
            f'<tr{row_class}><th scope="row">'
            f"{txt(_group_name(key, totals, many_roots))}</th><td>{len(members)}</td>"
            f'<td><ul class="plain">{"".join(cells)}</ul>'
            + ('<span class="flag">more than one scheme</span>' if mixed else "")
            + "</td></tr>"
        )
    entities = ", ".join(PROTOCOL_ENTITIES)
    return (
        f'<p class="muted">Runs are grouped by dataset, datatype, suffix and the '
        f"entities {entities}, as the consistency rules group them.</p>"
        '<table class="schemes"><thead><tr><th>run group</th><th>runs</th>'
        f"<th>schemes</th></tr></thead><tbody>{''.join(rows)}</tbody></table>"
    )


def _wide_findings(totals: AuditTotals) -> str:
    wide = "".join(
        f'<li class="sev-{f.severity.value}"><code>{txt(f.code)}</code> '
        f"{txt(f.file or '')} {txt(f.message, one_line=False)}</li>"
        for f in totals.dataset_findings
    )
    return (f'<h3>Findings about the dataset as a whole</h3><ul class="outliers">{wide}</ul>'
            if wide else "")


def _shared_findings(grouping: Grouping, totals: AuditTotals) -> str:
    """Each finding of a file several runs share, once, with the runs it applies to."""
    if not grouping.shared:
        return ""
    items = []
    for group in grouping.shared:
        f = group.finding
        phrase = runs_phrase(group, grouping, totals)
        shown, more = listed_paths(list(zip(group.runs, group.paths, strict=True)), 50)
        links = "" if phrase.startswith("all ") else (
            '<ul class="plain runs-of">' + "".join(
                f'<li><a href="#run-{i + 1}">{txt(p)}</a></li>' for i, p in shown)
            + (f"<li>and {more} more</li>" if more else "") + "</ul>")
        where = txt(f.get("file") or "") + (f" › {txt(f['field'])}" if f.get("field") else "")
        items.append(
            f'<li class="finding sev-{f["severity"]}"><div class="fhead"><span class="sev">'
            f'{SEVERITY_GLYPH[Severity(f["severity"])]} {f["severity"]}</span> '
            f'<code class="code">{txt(f["code"])}</code></div>'
            f'<p class="msg">{txt(f["message"], one_line=False)}</p>'
            f'<p class="where"><code>{where}</code></p>'
            + (f'<p class="hint">{txt(f["hint"], one_line=False)}</p>' if f.get("hint") else "")
            + f'<p class="applies">applies to {txt(phrase)}</p>{links}</li>')
    return ("<h3>Findings of shared files</h3><p class=\"muted\">A file several runs inherit "
            "gives each of them the same finding: it is told once here, with the runs it "
            f'applies to.</p><ol class="findings shared">{"".join(items)}</ol>')


def _gallery(collector: DiagramCollector, sizes: dict[str, tuple[float, float]],
             totals: AuditTotals) -> str:
    figures = []
    drawings = collector.drawings
    for spec, ident in drawings.ids.items():
        if spec.kind != "schedule":
            continue  # no drawing: not a diagram
        first = collector.examples[ident]
        figures.append(
            f"<figure>{_use(ident, sizes[ident], spec.caption())}<figcaption>"
            f"{txt(spec.caption())}: {_plural(drawings.users[ident], 'run')}, e.g. "
            f'<a href="#run-{first + 1}">{txt(totals.facts[first].path)}</a>'
            "</figcaption></figure>"
        )
    return (
        f'<details class="gallery"><summary>Every distinct timing diagram '
        f"({len(figures)})</summary>{''.join(figures)}</details>"
    )


def _column_of(facts: RunFacts, suffixes: int) -> str:
    if run_group(facts)[2] == NOT_BIDS:  # its entities and suffix name no protocol
        return NOT_BIDS_LABEL
    parts = [f"{k}-{v}" for k, v in facts.entities.items() if k not in ("sub", "ses")]
    if suffixes > 1 or not parts:
        parts.append(facts.suffix or "(no suffix)")
    return " ".join(parts)


def _page_data(source: ReportSource, collector: DiagramCollector,
               tags: dict[str | None, _Tag], sizes: dict[str, tuple[float, float]],
               grouping: Grouping) -> Iterator[str]:
    """The compact data the page's script renders from (JSON, safe inside a script
    element). Every string is stored once in ``s`` and referred to by index; a run
    is ``[path, tag, drawing, errors, warnings, notes, row, column, facts, sources,
    findings, own sidecar, TR text, slices, TR in seconds, shared findings]``
    (``OWN_SIDECAR`` in a sources entry stands for the own sidecar; the findings are
    the run's own, the shared ones are indices into ``shared``); a finding ``[code,
    rank, message, file, field, evidence, hint]`` (-1 for none); a row of the
    dataset picture is a subject, or a subject's session."""
    totals = source.totals
    strings = collector.strings
    several = several_roots(totals)
    suffixes = len({f.suffix for f in totals.facts})
    tag_index = {label: i for i, label in enumerate(tags)}
    subjects = ValueTable()
    columns = ValueTable()
    found = source.objects(lambda i: any(totals.facts[i].counts))
    pending = next(found, None)
    shared_of: dict[int, list[int]] = defaultdict(list)
    for number, group in enumerate(grouping.shared):
        for i in group.runs:
            shared_of[i].append(number)

    def opt(value: str | None, *, one_line: bool = True) -> int:
        return -1 if value is None or value == "" else strings(xml_safe(value, one_line=one_line))

    # the runs first, each written as it is made: the string table they add to comes last
    yield '{"runs":['
    for index, facts in enumerate(totals.facts):
        findings: list[list[int]] = []
        if pending is not None and pending[0] == index:
            findings = _finding_rows(grouping.own(index, pending[1]["findings"]),
                                     pending[1]["path"], strings, opt)
            pending = next(found, None)
        sub = facts.entities.get("sub")
        ses = facts.entities.get("ses")
        name = display_path(totals, facts, facts.path, several=several)
        subject = f"sub-{xml_safe(sub)}" if sub is not None else "(no subject)"
        if ses is not None:  # sessions are rows of their subject: the columns stay few
            subject += f" · ses-{xml_safe(ses)}"
        tr = facts.timing.repetition_time  # resolved, in seconds
        slices = len(facts.schedule.times) if facts.schedule is not None else (
            facts.axis_length or -1)
        row = [
            strings(xml_safe(name)),
            tag_index[facts.scheme.label if facts.scheme else None],
            collector.run_drawing[index], *facts.counts,
            subjects(subject),
            columns(xml_safe(_column_of(facts, suffixes))),
            collector.run_facts[index], collector.run_sources[index],
            findings, collector.run_own[index],
            opt(timing_tr_text(facts.timing)),
            slices, tr if tr else -1,
            shared_of.get(index, []),
        ]
        yield ("," if index else "") + _safe_in_script(encode(row))
    yield "]," + _safe_in_script(
        encode(_page_tables(collector, tags, sizes, subjects, columns, grouping))[1:-1])
    # the two tables that grow with the runs, a block at a time (never one huge string)
    for key, values in (("sources", collector.sources.values), ("s", strings.values)):
        yield f',"{key}":['
        for start in range(0, len(values), _BLOCK):
            yield ("," if start else "") + _safe_in_script(
                encode(values[start:start + _BLOCK])[1:-1])
        yield "]"
    yield "}"


def _finding_rows(own: list[dict[str, Any]], run_path: str, strings: ValueTable,
                  opt: Callable[..., int]) -> list[list[int]]:
    """A run's own findings for the page, worst first: ``[code, rank, message, file,
    field, evidence, hint]`` as indices into ``strings`` (``opt``: -1 for none)."""
    rows = []
    for f in sorted(own, key=lambda f: -_RANK[f["severity"]]):
        evidence = f.get("evidence")
        rows.append([
            strings(xml_safe(f["code"])), _RANK[f["severity"]],
            opt(strip_path_prefix(f["message"], f.get("file"), run_path), one_line=False),
            opt(f.get("file")), opt(f.get("field")),
            opt(evidence_text(evidence) if evidence else None, one_line=False),
            opt(f.get("hint"), one_line=False),
        ])
    return rows


def _page_tables(collector: DiagramCollector, tags: dict[str | None, _Tag],
                 sizes: dict[str, tuple[float, float]], subjects: ValueTable,
                 columns: ValueTable, grouping: Grouping) -> dict[str, Any]:
    """The page data's small tables, written after the runs: scheme tags, drawings,
    facts, the dataset picture's rows and columns (with their sorted order), the
    shared findings."""
    # a drawing: [symbol id ("" for a run without timing), width, height, caption,
    # caption without the scheme label (a run's section names the scheme once)]
    drawings = [[ident if spec.kind == "schedule" else "", *sizes[ident],
                 xml_safe(spec.caption()), xml_safe(spec.detail())]
                for spec, ident in collector.drawings.ids.items()]
    row_order = sorted(range(len(subjects.values)), key=lambda i: subjects.values[i])
    col_order = sorted(range(len(columns.values)), key=lambda i: columns.values[i])
    return {
        "tags": [[t.text, t.cls, xml_safe(t.label)] for t in tags.values()],
        "drawings": drawings,
        "facts": collector.facts.values,
        "subjects": subjects.values, "subject_order": row_order,
        "columns": columns.values, "column_order": col_order,
        "own_sidecar": OWN_SIDECAR,
        "shared": [[xml_safe(g.finding["code"]), _RANK[g.severity], g.runs]
                   for g in grouping.shared],
    }


#: table entries encoded at once when the page data is written
_BLOCK = 4096


def _safe_in_script(text: str) -> str:
    """JSON text that can sit inside <script>: no "<" (so no "</script" and no
    "<!--"), and no ">" or "&" either; they only occur inside JSON strings, where
    the escapes mean the same characters."""
    return text.replace("<", "\\u003c").replace(">", "\\u003e").replace("&", "\\u0026")


# --------------------------------------------------------------------------- page


def _generated_stamp() -> str:
    """UTC time of writing; SOURCE_DATE_EPOCH (reproducible builds convention) wins."""
    epoch = os.environ.get("SOURCE_DATE_EPOCH")
    try:
        moment = (
            datetime.datetime.fromtimestamp(int(epoch), datetime.timezone.utc)
            if epoch
            else datetime.datetime.now(datetime.timezone.utc)
        )
    except (ValueError, OverflowError, OSError):
        moment = datetime.datetime.now(datetime.timezone.utc)
    return moment.strftime("%Y-%m-%d %H:%M UTC")


def _reading_guide() -> str:
    c = COLOURS
    items = [
        (
            c["slice"],
            "a dot is one slice: its index (data-array order, after "
            "SliceEncodingDirection) up, its acquisition time within the volume across",
        ),
        (
            c["group"],
            "a bar joins the slices of one excitation group (multiband: acquired "
            "at the same moment)",
        ),
        (c["path"], "a faint line follows the excitation groups in acquisition order"),
        (
            c["reference"],
            "the dashed line is the reference time a correction uses by default "
            "(halfway between the first and the last excitation)",
        ),
        (
            c["problem"],
            "crosses mark slices outside the acquisition window (at or after the "
            "TR, or TR − DelayTime for sparse runs, or before 0)",
        ),
        (
            c["uneven"],
            "an ochre band marks a gap between excitation groups that differs "
            "from the usual spacing",
        ),
    ]
    lis = "".join(
        f'<li><span class="swatch" style="background:{colour}"></span>{text}</li>'
        for colour, text in items
    )
    return (
        '<section id="reading"><h2>How to read a timing diagram</h2>'
        f'<ul class="plain guide">{lis}<li>The shaded area is the acquisition window. '
        "A run without usable timing has no diagram: its section says why.</li></ul>"
        "</section>"
    )


@cache
def page_asset(name: str) -> str:
    """The text of a file the page embeds (``report.css``, ``report.js``), shipped as
    package data under ``slicetime/data``."""
    return package_data(name).decode("utf-8")


def script_hash(script: str) -> str:
    """The Content-Security-Policy source of the page's script: ``sha256-`` and the base64
    of the SHA-256 of its bytes (CSP Level 2, "hash-source")."""
    return "sha256-" + base64.b64encode(hashlib.sha256(script.encode("utf-8")).digest()).decode()


def _css() -> str:
    """The page's style: the tag colours (from :data:`TAG_FILLS`), then ``report.css``."""
    fills = "".join(
        f".t{i}{{background:{fill}}}" for i, fill in enumerate((NO_TIMING_FILL, *TAG_FILLS))
    )
    return fills + "\n" + page_asset("report.css")


def write_html_stream(
    source: ReportSource, collector: DiagramCollector, path: str | os.PathLike[str], *,
    generated: str | None = None,
) -> None:
    """Write the report atomically (a temporary file beside it, fsync, then a rename),
    so a reader never sees half a report. OSError propagates."""
    from slicetime.readers.atomic import atomic_file

    with atomic_file(path) as fh:
        _write_page(source, collector, fh, generated=generated)


def _collect(result: AuditResult) -> DiagramCollector:
    collector = DiagramCollector()
    for run in result.runs:
        collector.add(run)
    return collector


def render_html(result: AuditResult, root_given: str, *, generated: str | None = None) -> str:
    """The whole report of a finished audit as one HTML document (a string)."""
    buffer = io.StringIO()
    _write_page(MemorySource(result, root_given), _collect(result), buffer, generated=generated)
    return buffer.getvalue()


def write_html(
    result: AuditResult,
    path: str | os.PathLike[str],
    *,
    root_given: str,
    generated: str | None = None,
) -> None:
    """:func:`write_html_stream` for a finished audit."""
    write_html_stream(MemorySource(result, root_given), _collect(result), path,
                      generated=generated)


def _write_page(source: ReportSource, collector: DiagramCollector, out: IO[str], *,
                generated: str | None = None) -> None:
    """The whole page: head (style, policy), header, overview, dataset picture, the runs
    section and the reading guide, then the data its script renders and the script."""
    totals = source.totals
    tags = _scheme_tags(totals.facts)
    sprite, sizes = collector.drawings.symbols()
    grouping = group_findings(source)
    stamp = generated if generated is not None else _generated_stamp()
    name = report_root(totals)
    title = f"slicetime audit · {xml_safe(name)}"
    script = page_asset("report.js")
    policy = (
        "default-src 'none'; style-src 'unsafe-inline'; img-src data:; "
        f"script-src '{script_hash(script)}'; base-uri 'none'; form-action 'none'"
    )
    out.write("".join([
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">',
        f'<meta http-equiv="Content-Security-Policy" content="{policy}">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f'<meta name="generator" content="slicetime {esc(__version__)}">',
        f"<title>{html.escape(title)}</title><style>{_css()}</style></head>",
        '<body data-ready="0">',
        sprite,
        _page_header(source, grouping, name, stamp),
        "<main>",
        '<section id="overview"><h2>Overview</h2>',
        _summary_cards(totals, collector.drawings.distinct(), grouping),
        "<h3>Schemes in use per run group</h3>",
        _schemes_table(totals, tags),
        "<h3>Outliers</h3>",
        '<div id="outliers"><p class="muted">No run differs from the others of its task and '
        "acquisition.</p></div>",
        _wide_findings(totals),
        _shared_findings(grouping, totals),
        _gallery(collector, sizes, totals),
        "</section>",
        '<section id="picture"><h2>Dataset picture</h2><p class="muted">One row per '
        "subject (per session when there are sessions), one column per task, acquisition "
        "and run. The number is the scheme (legend below), the colour the scheme, the mark "
        "the worst finding: a row whose cells differ from the column stands out.</p>",
        '<div class="picture-wrap"><table class="picture" id="picture-table"></table></div>',
        _legends(tags),
        "</section>",
        _runs_section(totals.runs),
        _reading_guide(),
        "</main>",
        '<script type="application/json" id="report-data">',
    ]))
    for part in _page_data(source, collector, tags, sizes, grouping):
        out.write(part)
    out.write(f"</script><script>{script}</script></body></html>\n")


#: runs listed at once; "list more" adds as many again
PAGE = 200


def _page_header(source: ReportSource, grouping: Grouping, name: str, stamp: str) -> str:
    """The page's header: the dataset, the totals, where and when it was audited, the
    lab policies, and the navigation."""
    totals = source.totals
    roots = "".join(f"<code>{txt(r)}</code> " for r in totals.roots)
    policies = "".join(
        f"<li><code>{txt(r)}</code>: <code>{txt(p)}</code></li>" for r, p in totals.policies.items()
    )
    return "".join([
        '<header class="top"><div class="brand">slicetime · slice-timing audit</div>',
        f"<h1>{txt(name)}</h1>",
        f'<p class="muted">{_plural(totals.runs, "run")} audited: '
        f"{txt(', '.join(counts_phrase(grouping.distinct, grouping.runs_affected)))} · "
        f"dataset root {roots}"
        + (f"· audited from <code>{txt(source.root_given)}</code> "
           if source.root_given not in totals.roots else "")
        + f"· written {txt(stamp)} by slicetime {txt(__version__)}</p>",
        (f'<p class="muted">Lab policy: </p><ul class="plain muted">{policies}</ul>'
         if policies else ""),
        '<nav class="no-print"><a href="#overview">overview</a><a href="#picture">dataset '
        'picture</a><a href="#runs">runs</a><a href="#reading">how to read a diagram</a>'
        "</nav></header>",
    ])


def _runs_section(n: int) -> str:
    """The runs section without its runs (the script lists them): the severity filter,
    the search, the table's head and the "list more" button; ``n`` runs in all."""
    return "".join([
        '<section id="runs"><h2>Runs</h2>',
        '<div class="controls" role="search"><label>Show <select id="severity-filter">'
        '<option value="all">all runs</option><option value="error">runs with errors'
        '</option><option value="warning">runs with warnings or errors</option>'
        '<option value="note">runs with any finding</option><option value="clean">runs '
        'without findings</option></select></label><label>Find <input id="run-search" '
        'type="search" placeholder="part of a run name" autocomplete="off"></label>'
        '<button type="button" id="open-shown">open listed</button><button type="button" '
        'id="close-all">close all</button><span id="shown-count" aria-live="polite">'
        f"{_plural(n, 'run')}</span></div>",
        '<p class="print-only" id="print-filter"></p>',
        '<table class="runs pinned"><tbody id="pinned"></tbody></table>'
        '<table class="runs" id="run-table"><thead><tr>'
        '<th scope="col"><button type="button" class="sort" data-sort="name">run</button></th>'
        '<th scope="col"><button type="button" class="sort" data-sort="scheme">scheme'
        '</button></th><th scope="col" class="num"><button type="button" class="sort" '
        'data-sort="tr">TR</button></th><th scope="col" class="num"><button type="button" '
        'class="sort" data-sort="slices">slices</button></th><th scope="col"><button '
        'type="button" class="sort" data-sort="findings">findings</button></th></tr></thead>'
        '<tbody class="run-list" id="run-list"></tbody></table>',
        f'<p class="no-print"><button type="button" id="more" hidden>list {PAGE} more'
        "</button></p>",
        "</section>",
    ])


def _legends(tags: dict[str | None, _Tag]) -> str:
    legend = "".join(f"<li>{_chip(tag)} {txt(tag.label)}</li>" for tag in tags.values())
    sev_legend = "".join(
        f'<li><span class="cell sev-{s.value}">1<b>{SEVERITY_GLYPH[s]}</b></span> worst finding '
        f"is {'an' if s is Severity.ERROR else 'a'} {s.value}</li>"
        for s in Severity
    )
    return (
        f'<div class="legends"><ul class="plain legend">{legend}</ul>'
        f'<ul class="plain legend">{sev_legend}<li><span class="cell sev-none">1<b></b></span>'
        " no findings</li></ul></div>"
    )


_RANK = {"error": 3, "warning": 2, "note": 1}

__all__ = ["esc", "render_html", "write_html", "write_html_stream"]
