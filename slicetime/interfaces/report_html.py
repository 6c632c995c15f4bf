"""The HTML audit report: one self-contained page (inline CSS, inline SVG, a little script).

Layout, top to bottom:

1. a header with the dataset and the totals;
2. the overview: runs with errors / warnings / notes, the schemes in use per
   run group (grouped like the dataset rules group runs,
   ``rules.dataset.protocol_key``), the outliers (``dataset/*`` findings), and
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
access at all and only the page's own script (by its hash).

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
from array import array
from collections import Counter, defaultdict
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from typing import IO, Any

from slicetime import __version__
from slicetime.interfaces.plots import COLOURS, DiagramSpec, diagram_spec, render_svg
from slicetime.interfaces.report_stream import (
    MemorySource,
    ReportSource,
    display_path,
    encode,
    grounds_text,
    group_label,
    report_root,
    run_line,
)
from slicetime.interfaces.safe_text import xml_safe
from slicetime.interfaces.screen import strip_path_prefix
from slicetime.model import RunRecord, Severity
from slicetime.numbers import duration, secs
from slicetime.pipelines.audit import AuditResult, AuditTotals, RunFacts, RunResult
from slicetime.readers.entities import sidecar_path
from slicetime.rules.dataset import PROTOCOL_ENTITIES, protocol_key
from slicetime.words import agree, count, encoding_direction

#: fills for scheme tags in the dataset picture (our own muted palette), reused in turn
TAG_FILLS = (
    "#cfe3e0",
    "#f3dcb5",
    "#d9d3ec",
    "#d6e6c3",
    "#f2cfc8",
    "#c9d8ea",
    "#ece3c0",
    "#e3cfe0",
    "#cde0d3",
    "#e6d6c9",
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


@dataclass
class Drawings:
    """Distinct timing diagrams, each drawn once and referenced by id."""

    ids: dict[DiagramSpec, str] = field(default_factory=dict)
    users: Counter[str] = field(default_factory=Counter)

    def add(self, spec: DiagramSpec) -> str:
        ident = self.ids.get(spec)
        if ident is None:
            ident = f"dg-{len(self.ids) + 1}"
            self.ids[spec] = ident
        self.users[ident] += 1
        return ident

    def symbols(self) -> tuple[str, dict[str, tuple[float, float]]]:
        """The hidden SVG block holding one ``<symbol>`` per distinct diagram."""
        parts = ['<svg class="sprite" aria-hidden="true" focusable="false"><defs>']
        sizes: dict[str, tuple[float, float]] = {}
        for spec, ident in self.ids.items():
            body, (w, h) = render_svg(spec, prefix=f"{ident}-")
            sizes[ident] = (w, h)
            parts.append(f'<symbol id="{ident}" viewBox="0 0 {w:g} {h:g}">{body}</symbol>')
        parts.append("</defs></svg>")
        return "".join(parts), sizes


def _use(ident: str, size: tuple[float, float], caption: str) -> str:
    w, h = size
    return (
        f'<svg class="diagram" viewBox="0 0 {w:g} {h:g}" role="img" '
        f'aria-label="{esc(caption)}"><use href="#{ident}" width="{w:g}" '
        f'height="{h:g}"/></svg>'
    )


# --------------------------------------------------------------------------- grouping


def _column_key(record: RunRecord, suffixes: int) -> str:
    parts = [f"{k}-{v}" for k, v in record.entities.items() if k != "sub"]
    if suffixes > 1 or not parts:
        parts.append(record.suffix or "(no suffix)")
    return " ".join(parts)


@dataclass(frozen=True)
class _Tag:
    text: str
    cls: str  # the CSS class that gives its fill
    label: str


def _chip(tag: _Tag) -> str:
    return f'<span class="chip {tag.cls}">{txt(tag.text)}</span>'


# --------------------------------------------------------------------------- phase 1


class _Table:
    """Distinct values, each stored once and referred to by its index."""

    def __init__(self) -> None:
        self.index: dict[Any, int] = {}
        self.values: list[Any] = []

    def __call__(self, value: Any) -> int:
        found = self.index.get(value)
        if found is None:
            found = self.index[value] = len(self.values)
            self.values.append(value)
        return found


def _run_facts(record: RunRecord) -> tuple[tuple[str, str], ...]:
    """The facts a run's section lists (name, text), as plain text for the page."""
    schedule = record.schedule
    header = record.header
    facts: list[tuple[str, str]] = []
    if header is not None:
        facts.append(("shape", " × ".join(str(d) for d in header.shape)))
    tr = record.timing.repetition_time  # resolved: the sidecar's, else the header's
    if tr is not None:
        facts.append(("repetition time", secs(tr)))
    if schedule is not None:
        facts.append(("slice axis", encoding_direction(schedule.axis, schedule.direction) + (
            " (SliceTiming lists the highest index first)" if schedule.direction == "-" else "")))
        if schedule.delay_time:
            facts.append(("DelayTime", secs(schedule.delay_time)))
        if schedule.volume_times:
            facts.append(("volume times",
                          f"{count(len(schedule.volume_times), 'onset')} (VolumeTiming)"))
        facts.append(("timing from", xml_safe(record.timing_origin or "")))
    scheme = record.scheme
    if scheme is not None:
        detail = _plural(len(scheme.groups), "excitation group")
        if scheme.spacing:
            detail += f", one every {duration(scheme.spacing)}"
        facts.append(("scheme", f"{xml_safe(scheme.label)} · {detail}"))
    else:
        facts.append(("scheme", "unknown: no usable slice timing"))
    return tuple(facts)


#: in the page's sources table: the run's own sidecar (the run's last element names it)
OWN_SIDECAR = -2


def _source_texts(record: RunRecord) -> tuple[str, ...]:
    """Where each value came from: key, value, key, value, …"""
    sources: dict[str, str] = {}
    if record.schedule is not None:
        sources.update({k: v.describe() for k, v in record.schedule.sources.items()})
    for key in ("MultibandAccelerationFactor", "TaskName", "EchoTime"):
        if key in record.metadata_sources:
            sources[key] = record.metadata_sources[key]
    return tuple(text for pair in sources.items() for text in pair)


@dataclass(frozen=True)
class RunParts:
    """What the page needs of one run's full record, as plain values: made where the
    run is audited (a worker process), so that the record need not travel."""

    spec: DiagramSpec
    facts: tuple[tuple[str, str], ...]
    sources: tuple[str, ...]  # key, value, key, value, …
    chain: tuple[str, ...]
    own: str  # the run's own sidecar (path as reports show it)


#: equal diagrams of the runs a worker audits made one object (sent once per chunk)
_SPECS: dict[DiagramSpec, DiagramSpec] = {}


def page_parts(record: RunRecord) -> RunParts:
    spec = diagram_spec(record)
    if len(_SPECS) >= 1024:
        _SPECS.clear()
    spec = _SPECS.setdefault(spec, spec)
    return RunParts(spec, _run_facts(record), _source_texts(record), record.sidecar_chain,
                    sidecar_path(record.path))


def line_and_parts(result: RunResult) -> tuple[str, RunParts]:
    """A run's report line and page parts: ``audit_stream(prepare=...)`` with ``--html``."""
    return run_line(result), page_parts(result.record)


class DiagramCollector:
    """What the HTML report needs from each full run record, taken while the audit
    streams (the records are not kept): its drawing, its facts, its sources and
    sidecars. Each distinct value (and string) is stored once; what is unique to
    a run (its own sidecar's name) costs one string."""

    def __init__(self) -> None:
        self.drawings = Drawings()
        self.examples: dict[str, int] = {}
        self.strings = _Table()
        self.facts = _Table()
        self.sources = _Table()
        self.run_drawing = array("I")
        self.run_facts = array("I")
        self.run_sources = array("I")
        self.run_own = array("i")  # the run's own sidecar (a string index), or -1

    def add(self, run: RunResult) -> None:
        self.add_parts(page_parts(run.record))

    def add_parts(self, parts: RunParts) -> None:
        ident = self.drawings.add(parts.spec)
        self.examples.setdefault(ident, len(self.run_drawing))
        self.run_drawing.append(int(ident[3:]) - 1)
        self.run_facts.append(self.facts(parts.facts))
        # the run's own sidecar is OWN_SIDECAR in its sources and chain, so runs that take
        # their values the same way share one entry of the sources table
        own = parts.own
        used = False

        def index(text: str) -> int:
            nonlocal used
            if text == own:
                used = True
                return OWN_SIDECAR
            return self.strings(xml_safe(text))

        chain = tuple(index(s) for s in parts.chain)
        sources = tuple(index(text) for text in parts.sources)
        self.run_sources.append(self.sources((sources, chain)))
        self.run_own.append(self.strings(xml_safe(own)) if used else -1)


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


def _summary_cards(totals: AuditTotals, drawings: int) -> str:
    facts = totals.facts
    with_sev = [sum(1 for f in facts if f.counts[k]) for k in range(3)]
    clean = sum(1 for f in facts if not any(f.counts))
    counts = totals.counts
    cards = [
        ("runs", str(len(facts)), "audited", ""),
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
        groups[protocol_key(facts)].append(i)  # type: ignore[arg-type]  # RunFacts quacks
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


def _gallery(collector: DiagramCollector, sizes: dict[str, tuple[float, float]],
             totals: AuditTotals) -> str:
    figures = []
    drawings = collector.drawings
    for spec, ident in drawings.ids.items():
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
    parts = [f"{k}-{v}" for k, v in facts.entities.items() if k != "sub"]
    if suffixes > 1 or not parts:
        parts.append(facts.suffix or "(no suffix)")
    return " ".join(parts)


def _page_data(source: ReportSource, collector: DiagramCollector,
               tags: dict[str | None, _Tag], sizes: dict[str, tuple[float, float]]
               ) -> Iterator[str]:
    """The compact data the page's script renders from (JSON, safe inside a script
    element). Every string is stored once in ``s`` and referred to by index; a run
    is ``[path, tag, drawing, errors, warnings, notes, row, column, facts, sources,
    findings, own sidecar]`` (``OWN_SIDECAR`` in a sources entry stands for the last);
    a finding ``[code, rank, message, file, field, evidence, hint]``
    (-1 for none)."""
    totals = source.totals
    strings = collector.strings
    several = len({f.root for f in totals.facts}) > 1
    suffixes = len({f.suffix for f in totals.facts})
    tag_index = {label: i for i, label in enumerate(tags)}
    subjects = _Table()
    columns = _Table()
    found = source.objects(lambda i: any(totals.facts[i].counts))
    pending = next(found, None)

    def opt(value: str | None, *, one_line: bool = True) -> int:
        return -1 if value is None or value == "" else strings(xml_safe(value, one_line=one_line))

    # the runs first, each written as it is made: the string table they add to comes last
    yield '{"runs":['
    for index, facts in enumerate(totals.facts):
        findings: list[list[int]] = []
        if pending is not None and pending[0] == index:
            ordered = sorted(pending[1]["findings"], key=lambda f: -_RANK[f["severity"]])
            for f in ordered:
                grounds = f.get("grounds") or f.get("evidence")
                findings.append([
                    strings(xml_safe(f["code"])), _RANK[f["severity"]],
                    opt(strip_path_prefix(f["message"], f.get("file"), pending[1]["path"]),
                        one_line=False),
                    opt(f.get("file")), opt(f.get("field")),
                    opt(grounds_text(grounds) if grounds else None, one_line=False),
                    opt(f.get("hint"), one_line=False),
                ])
            pending = next(found, None)
        sub = facts.entities.get("sub")
        name = display_path(totals, facts, facts.path, several=several)
        row = [
            strings(xml_safe(name)),
            tag_index[facts.scheme.label if facts.scheme else None],
            collector.run_drawing[index], *facts.counts,
            subjects(f"sub-{xml_safe(sub)}" if sub is not None else "(no subject)"),
            columns(xml_safe(_column_of(facts, suffixes))),
            collector.run_facts[index], collector.run_sources[index],
            findings, collector.run_own[index],
        ]
        yield ("," if index else "") + _safe_in_script(encode(row))
    drawings = [[ident, *sizes[ident], xml_safe(spec.caption())]
                for spec, ident in collector.drawings.ids.items()]
    row_order = sorted(range(len(subjects.values)), key=lambda i: subjects.values[i])
    col_order = sorted(range(len(columns.values)), key=lambda i: columns.values[i])
    rest = encode({
        "tags": [[t.text, t.cls, xml_safe(t.label)] for t in tags.values()],
        "drawings": drawings,
        "facts": collector.facts.values,
        "subjects": subjects.values, "subject_order": row_order,
        "columns": columns.values, "column_order": col_order,
        "own_sidecar": OWN_SIDECAR,
    })
    yield "]," + _safe_in_script(rest[1:-1])
    # the two tables that grow with the runs, a block at a time (never one huge string)
    for key, values in (("sources", collector.sources.values), ("s", strings.values)):
        yield f',"{key}":['
        for start in range(0, len(values), _BLOCK):
            yield ("," if start else "") + _safe_in_script(
                encode(values[start:start + _BLOCK])[1:-1])
        yield "]"
    yield "}"


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
        "A run without usable timing shows a dashed box that says why.</li></ul>"
        "</section>"
    )


def _css() -> str:
    fills = "".join(
        f".t{i}{{background:{fill}}}" for i, fill in enumerate((NO_TIMING_FILL, *TAG_FILLS))
    )
    return (
        fills
        + """
:root{--ink:#263238;--muted:#5f6b6d;--paper:#fbfaf7;--line:#d9d6cf;--accent:#1f6f78;
--error:#b3261e;--warning:#a86a12;--note:#3d6a99;--clean:#4f7d4a}
*{box-sizing:border-box}
[hidden]{display:none!important}
body{margin:0;background:var(--paper);color:var(--ink);font:15px/1.45 system-ui,sans-serif}
code,pre{font-family:ui-monospace,monospace;font-size:.92em}
header.top{padding:1.2rem 2rem .6rem;border-bottom:3px solid var(--accent);background:#fff}
.brand{font-size:.8rem;letter-spacing:.08em;text-transform:uppercase;color:var(--accent)}
h1{margin:.2rem 0;font-size:1.5rem;overflow-wrap:anywhere}
h2{margin:2rem 0 .6rem;font-size:1.25rem;border-bottom:1px solid var(--line)}
h3{margin:1.4rem 0 .4rem;font-size:1.05rem}
h4{margin:.9rem 0 .3rem;font-size:.9rem;color:var(--muted);font-weight:600}
main{padding:0 2rem 3rem;max-width:1400px}
nav a{margin-right:1.2rem;color:var(--accent)}
a{color:var(--accent)}
.muted{color:var(--muted)}
.plain{list-style:none;padding:0;margin:.2rem 0}
.plain li{margin:.15rem 0}
.cards{display:flex;flex-wrap:wrap;gap:.8rem;margin:1rem 0}
.card{display:flex;flex-direction:column;min-width:9.5rem;padding:.6rem .9rem;background:#fff;
border:1px solid var(--line);border-left:6px solid var(--accent);border-radius:4px;
color:inherit;text-decoration:none}
.card .num{font-size:1.7rem;font-weight:700}
.card .what{font-size:.85rem}.card .extra{font-size:.75rem;color:var(--muted)}
.card.error{border-left-color:var(--error)}.card.warning{border-left-color:var(--warning)}
.card.note{border-left-color:var(--note)}.card.clean{border-left-color:var(--clean)}
.chip{display:inline-block;min-width:1.6em;padding:0 .35em;border-radius:3px;
text-align:center;font-weight:700;font-size:.85em;border:1px solid #0002}
table{border-collapse:collapse}
table.schemes{width:100%;background:#fff}
table.schemes th,table.schemes td{border:1px solid var(--line);padding:.35rem .6rem;
text-align:left;vertical-align:top}
table.schemes tr.mixed th{border-left:5px solid var(--warning)}
.flag{display:inline-block;margin-top:.2rem;font-size:.75rem;color:var(--warning);
font-weight:600}
ul.outliers{padding-left:1.2rem}
ul.outliers li.sev-error::marker{color:var(--error)}
ul.outliers li.sev-warning::marker{color:var(--warning)}
details.gallery{margin:1.2rem 0}
details.gallery figure{display:inline-block;width:min(100%,620px);margin:.5rem 1rem .5rem 0;
vertical-align:top}
.picture-wrap{overflow:auto;max-height:70vh;border:1px solid var(--line);background:#fff}
table.picture{font-size:.8rem}
table.picture th{position:sticky;top:0;background:#fff;font-weight:600;padding:.2rem .4rem;
white-space:nowrap}
table.picture tbody th{left:0;position:sticky;text-align:right}
table.picture td{padding:1px 2px;text-align:center;white-space:nowrap}
.cell{display:inline-block;min-width:2.6em;padding:0 .25em;margin:1px;border-radius:3px;
border:2px solid transparent;color:var(--ink);text-decoration:none;font-weight:600}
.cell b{margin-left:.2em;font-weight:700}
.cell.sev-error{border-color:var(--error)}.cell.sev-error b{color:var(--error)}
.cell.sev-warning{border-color:var(--warning)}.cell.sev-warning b{color:var(--warning)}
.cell.sev-note b{color:var(--note)}
.legends{display:flex;flex-wrap:wrap;gap:2.5rem;margin:.6rem 0;font-size:.85rem}
.controls{position:sticky;top:0;z-index:2;display:flex;flex-wrap:wrap;gap:1rem;
align-items:center;padding:.5rem .7rem;background:#eef4f1;border:1px solid var(--line);
border-radius:4px;margin-bottom:.6rem}
.controls input{width:16rem}
#shown-count{color:var(--muted);font-size:.85rem}
details.run{background:#fff;border:1px solid var(--line);border-radius:4px;margin:.3rem 0}
details.run>summary{cursor:pointer;padding:.35rem .6rem;display:flex;flex-wrap:wrap;
gap:.5rem;align-items:center}
details.run[open]>summary{border-bottom:1px solid var(--line)}
summary .path{font-weight:600;overflow-wrap:anywhere}
summary .label{color:var(--muted);font-size:.85rem}
.mark{width:.7rem;height:.7rem;border-radius:50%;background:var(--clean);flex:none}
.mark.sev-error{background:var(--error)}.mark.sev-warning{background:var(--warning)}
.mark.sev-note{background:var(--note)}
.badge{font-size:.75rem;padding:0 .45em;border-radius:8px;border:1px solid currentColor}
.badge.sev-error{color:var(--error)}.badge.sev-warning{color:var(--warning)}
.badge.sev-note{color:var(--note)}.badge.sev-none{color:var(--clean)}
.run-body{padding:.4rem .9rem .8rem}
.cols{display:flex;flex-wrap:wrap;gap:1.5rem}
.cols>div{flex:1 1 22rem;min-width:0}
figure.timing{flex:2 1 34rem;margin:0}
svg.diagram{width:100%;height:auto;display:block;max-width:900px}
svg.sprite symbol *{stroke-linejoin:round;stroke-linecap:butt}
svg.sprite{position:absolute;width:0;height:0;overflow:hidden}
figcaption{font-size:.8rem;color:var(--muted)}
dl.facts{display:grid;grid-template-columns:max-content 1fr;gap:.15rem .9rem;margin:0}
dl.facts dt{color:var(--muted)}dl.facts dd{margin:0;overflow-wrap:anywhere}
table.sources th{font-weight:400;color:var(--muted);text-align:left;padding-right:.8rem}
table.sources td{overflow-wrap:anywhere}
ol.findings{list-style:none;padding:0;margin:0}
.finding{border-left:4px solid var(--note);padding:.3rem .7rem;margin:.4rem 0;
background:#f7f8f8}
.finding.sev-error{border-left-color:var(--error)}
.finding.sev-warning{border-left-color:var(--warning)}
.finding .sev{font-weight:700;text-transform:uppercase;font-size:.75rem}
.finding.sev-error .sev{color:var(--error)}.finding.sev-warning .sev{color:var(--warning)}
.finding.sev-note .sev{color:var(--note)}
.finding p{margin:.15rem 0;white-space:pre-wrap;word-break:break-word}
.finding .where{font-size:.85rem;color:var(--muted)}
.finding .where span{margin-right:1rem}
.finding .hint::before{content:"what to do: ";font-weight:600}
p.grounds{margin:.2rem 0;padding:.3rem .5rem;background:#fff;border-left:3px solid var(--line);
white-space:pre-line;overflow-wrap:anywhere;font-size:.8rem}
.guide .swatch{display:inline-block;width:.9em;height:.9em;margin-right:.5em;
vertical-align:middle;border-radius:2px}
.print-only{display:none}
@media print{
body{background:#fff;font-size:10pt}
.controls,.no-print,details.gallery{display:none!important}
.print-only{display:block}
header.top{border-bottom-width:1px}
.picture-wrap{max-height:none;overflow:visible}
details.run{border-color:#999}
details.run>summary,figure,.finding,dl.facts{break-inside:avoid}
details.run>.run-body{display:block}
details::details-content{content-visibility:visible;display:contents}
.cols{flex-wrap:nowrap;gap:.8rem}.cols>div{flex:1 1 40%}figure.timing{flex:1 1 60%}
body{font-size:9pt}
a{color:inherit;text-decoration:none}
main{padding:0 .5rem}
}
"""
    )


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
    totals = source.totals
    tags = _scheme_tags(totals.facts)
    sprite, sizes = collector.drawings.symbols()
    counts = totals.counts
    stamp = generated if generated is not None else _generated_stamp()
    name = report_root(totals)
    title = f"slicetime audit · {xml_safe(name)}"
    digest = base64.b64encode(hashlib.sha256(_SCRIPT.encode("utf-8")).digest()).decode()
    policy = (
        "default-src 'none'; style-src 'unsafe-inline'; img-src data:; "
        f"script-src 'sha256-{digest}'; base-uri 'none'; form-action 'none'"
    )
    roots = "".join(f"<code>{txt(r)}</code> " for r in totals.roots)
    policies = "".join(
        f"<li><code>{txt(r)}</code>: <code>{txt(p)}</code></li>" for r, p in totals.policies.items()
    )
    n = totals.runs
    out.write("".join([
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">',
        f'<meta http-equiv="Content-Security-Policy" content="{policy}">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f'<meta name="generator" content="slicetime {esc(__version__)}">',
        f"<title>{html.escape(title)}</title><style>{_css()}</style></head>",
        '<body data-ready="0">',
        sprite,
        '<header class="top"><div class="brand">slicetime · slice-timing audit</div>',
        f"<h1>{txt(name)}</h1>",
        f'<p class="muted">{_plural(n, "run")} · '
        f"{_plural(counts['error'], 'error')}, {_plural(counts['warning'], 'warning')}, "
        f"{_plural(counts['note'], 'note')} · dataset root {roots}· path given "
        f"<code>{txt(source.root_given)}</code> · written {txt(stamp)} "
        f"by slicetime {txt(__version__)}</p>",
        (f'<p class="muted">Lab policy: </p><ul class="plain muted">{policies}</ul>'
         if policies else ""),
        '<nav class="no-print"><a href="#overview">overview</a><a href="#picture">dataset '
        'picture</a><a href="#runs">runs</a><a href="#reading">how to read a diagram</a>'
        "</nav></header><main>",
        '<section id="overview"><h2>Overview</h2>',
        _summary_cards(totals, len(collector.drawings.ids)),
        "<h3>Schemes in use per run group</h3>",
        _schemes_table(totals, tags),
        "<h3>Outliers</h3>",
        '<div id="outliers"><p class="muted">No run differs from the others of its task and '
        "acquisition.</p></div>",
        _wide_findings(totals),
        _gallery(collector, sizes, totals),
        "</section>",
        '<section id="picture"><h2>Dataset picture</h2><p class="muted">One row per '
        "subject, one column per session, task, acquisition and run. The number is the "
        "scheme (legend below), the colour the scheme, the mark the worst finding: a subject "
        "whose cells differ from the column stands out.</p>",
        '<div class="picture-wrap"><table class="picture" id="picture-table"></table></div>',
        _legends(tags),
        "</section>",
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
        '<div id="pinned"></div><div class="run-list" id="run-list"></div>',
        f'<p class="no-print"><button type="button" id="more" hidden>list {PAGE} more'
        "</button></p>",
        "</section>",
        _reading_guide(),
        "</main>",
        '<script type="application/json" id="report-data">',
    ]))
    for part in _page_data(source, collector, tags, sizes):
        out.write(part)
    out.write(f"</script><script>{_SCRIPT}</script></body></html>\n")


#: runs listed at once; "list more" adds as many again
PAGE = 200


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

_SCRIPT = """
(function () {
  "use strict";
  var body = document.body;
  var data = JSON.parse(document.getElementById("report-data").textContent);
  var S = data.s, runs = data.runs;
  var SEV = ["none", "note", "warning", "error"];
  var GLYPH = {error: "\\u2715", warning: "\\u25b3", note: "\\u2022", none: ""};
  var PAGE = 200;
  var select = document.getElementById("severity-filter");
  var search = document.getElementById("run-search");
  var count = document.getElementById("shown-count");
  var printNote = document.getElementById("print-filter");
  var list = document.getElementById("run-list");
  var pinned = document.getElementById("pinned");
  var more = document.getElementById("more");
  var levels = ["all", "error", "warning", "note", "clean"];
  var names = null, matching = [], limit = PAGE, built = {};

  function el(tag, cls, text) {
    var node = document.createElement(tag);
    if (cls) { node.className = cls; }
    if (text !== undefined && text !== null) { node.textContent = text; }
    return node;
  }
  function plural(n, word) { return n + " " + word + (n === 1 ? "" : "s"); }
  function worst(r) { return r[3] ? 3 : r[4] ? 2 : r[5] ? 1 : 0; }
  function str(i) { return i < 0 ? "" : S[i]; }
  function chip(tagIndex) {
    var tag = data.tags[tagIndex];
    return el("span", "chip " + tag[1], tag[0]);
  }
  function use(drawing, caption) {
    var d = data.drawings[drawing], ns = document.querySelector("svg.sprite").namespaceURI;
    var svg = document.createElementNS(ns, "svg");
    svg.setAttribute("class", "diagram");
    svg.setAttribute("viewBox", "0 0 " + d[1] + " " + d[2]);
    svg.setAttribute("role", "img");
    svg.setAttribute("aria-label", caption || d[3]);
    var u = document.createElementNS(ns, "use");
    u.setAttribute("href", "#" + d[0]);
    u.setAttribute("width", d[1]);
    u.setAttribute("height", d[2]);
    svg.appendChild(u);
    return svg;
  }

  function fill(details, i) {
    if (details.getAttribute("data-built")) { return; }
    details.setAttribute("data-built", "1");
    var r = runs[i], d = data.drawings[r[2]];
    var box = el("div", "run-body"), cols = el("div", "cols"), left = el("div");
    var dl = el("dl", "facts");
    data.facts[r[8]].forEach(function (fact) {
      dl.appendChild(el("dt", null, fact[0]));
      var dd = el("dd", null, fact[1]);
      if (fact[0] === "scheme") {
        dd.insertBefore(document.createTextNode(" "), dd.firstChild);
        dd.insertBefore(chip(r[1]), dd.firstChild);
      }
      dl.appendChild(dd);
    });
    var pairs = data.sources[r[9]][0], chain = data.sources[r[9]][1];
    function named(k) { return k === data.own_sidecar ? S[r[11]] : S[k]; }
    if (chain.length) {
      dl.appendChild(el("dt", null, "sidecars"));
      dl.appendChild(el("dd", null, chain.map(named).join(" \u2192 ")));
    }
    left.appendChild(dl);
    if (pairs.length) {
      left.appendChild(el("h4", null, "where each value came from"));
      var table = el("table", "sources");
      for (var k = 0; k < pairs.length; k += 2) {
        var tr = el("tr"), th = el("th", null, S[pairs[k]]), td = el("td");
        th.setAttribute("scope", "row");
        td.appendChild(el("code", null, named(pairs[k + 1])));
        tr.appendChild(th); tr.appendChild(td); table.appendChild(tr);
      }
      left.appendChild(table);
    }
    cols.appendChild(left);
    var figure = el("figure", "timing");
    figure.appendChild(use(r[2]));
    figure.appendChild(el("figcaption", null, d[3]));
    cols.appendChild(figure);
    box.appendChild(cols);
    if (r[10].length) {
      box.appendChild(el("h4", null, "findings"));
      var ol = el("ol", "findings");
      r[10].forEach(function (f) {
        var sev = SEV[f[1]], li = el("li", "finding sev-" + sev);
        li.setAttribute("data-severity", sev);
        var head = el("div", "fhead");
        head.appendChild(el("span", "sev", GLYPH[sev] + " " + sev));
        head.appendChild(document.createTextNode(" "));
        head.appendChild(el("code", "code", S[f[0]]));
        li.appendChild(head);
        li.appendChild(el("p", "msg", str(f[2])));
        if (f[3] >= 0 || f[4] >= 0) {
          var where = el("p", "where");
          if (f[3] >= 0) {
            var a = el("span", null, "file ");
            a.appendChild(el("code", null, S[f[3]]));
            where.appendChild(a);
          }
          if (f[4] >= 0) {
            var b = el("span", null, "field ");
            b.appendChild(el("code", null, S[f[4]]));
            where.appendChild(b);
          }
          li.appendChild(where);
        }
        if (f[5] >= 0) { li.appendChild(el("p", "grounds", S[f[5]])); }
        if (f[6] >= 0) { li.appendChild(el("p", "hint", S[f[6]])); }
        ol.appendChild(li);
      });
      box.appendChild(ol);
    } else {
      box.appendChild(el("p", "muted", "No findings."));
    }
    details.appendChild(box);
  }

  function section(i) {
    var r = runs[i], w = SEV[worst(r)];
    var details = el("details", "run");
    details.id = "run-" + (i + 1);
    details.setAttribute("data-name", S[r[0]].toLowerCase());
    details.setAttribute("data-worst", w);
    var summary = el("summary");
    summary.appendChild(el("span", "mark sev-" + w));
    summary.appendChild(el("code", "path", S[r[0]]));
    summary.appendChild(document.createTextNode(" "));
    summary.appendChild(chip(r[1]));
    summary.appendChild(el("span", "label", data.tags[r[1]][2]));
    var any = false;
    [[r[3], "error"], [r[4], "warning"], [r[5], "note"]].forEach(function (c) {
      if (c[0]) {
        any = true;
        summary.appendChild(el("span", "badge sev-" + c[1], plural(c[0], c[1])));
      }
    });
    if (!any) { summary.appendChild(el("span", "badge sev-none", "no findings")); }
    details.appendChild(summary);
    details.addEventListener("toggle", function () { if (details.open) { fill(details, i); } });
    built[i] = details;
    return details;
  }

  function matches(i, level, words) {
    var w = worst(runs[i]);
    var rank = {note: 1, warning: 2, error: 3};
    if (level === "clean" ? w !== 0 : level !== "all" && w < rank[level]) { return false; }
    if (!words.length) { return true; }
    if (!names) { names = runs.map(function (r) { return S[r[0]].toLowerCase(); }); }
    var name = names[i];
    return words.every(function (word) { return name.indexOf(word) >= 0; });
  }

  function draw() {
    list.textContent = "";
    built = {};
    var shown = matching.slice(0, limit), frag = document.createDocumentFragment();
    shown.forEach(function (i) { frag.appendChild(section(i)); });
    list.appendChild(frag);
    more.hidden = matching.length <= limit;
    count.textContent = matching.length + " of " + runs.length + " runs shown" +
      (matching.length > limit ? " (the first " + limit + " listed)" : "");
  }

  function apply() {
    var level = select.value;
    var words = search.value.toLowerCase().split(/\\s+/).filter(Boolean);
    matching = [];
    for (var i = 0; i < runs.length; i += 1) {
      if (matches(i, level, words)) { matching.push(i); }
    }
    limit = PAGE;
    draw();
    body.setAttribute("data-severity", level);
    var parts = [];
    if (level !== "all") { parts.push(select.options[select.selectedIndex].text); }
    if (words.length) { parts.push("names containing \\u201c" + search.value + "\\u201d"); }
    printNote.textContent = parts.length ? "Printed with a filter: " + parts.join(", ") +
      " (" + matching.length + " of " + runs.length + " runs)." : "";
  }

  function store() {
    var parts = [];
    if (select.value !== "all") { parts.push("severity=" + select.value); }
    if (search.value) { parts.push("q=" + encodeURIComponent(search.value)); }
    var target = parts.length ? "#" + parts.join("&") : location.pathname + location.search;
    try { history.replaceState(null, "", target); } catch (e) { /* a page from disk may refuse */ }
  }

  function fromFragment() {
    var text = location.hash.slice(1);
    if (text.indexOf("=") >= 0) {
      text.split("&").forEach(function (part) {
        var cut = part.indexOf("=");
        var key = part.slice(0, cut), value = "";
        try { value = decodeURIComponent(part.slice(cut + 1).replace(/\\+/g, " ")); }
        catch (e) { value = ""; }
        if (key === "severity" && levels.indexOf(value) >= 0) { select.value = value; }
        if (key === "q") { search.value = value; }
      });
      apply();
      return;
    }
    var m = /^run-(\\d+)$/.exec(text);
    if (m) {
      var i = parseInt(m[1], 10) - 1;
      if (i < 0 || i >= runs.length) { return; }
      var target = built[i];
      if (!target) {
        pinned.textContent = "";
        target = section(i);
        pinned.appendChild(target);
      }
      fill(target, i);
      target.open = true;
      target.scrollIntoView();
    }
  }

  function outliers() {
    var box = document.getElementById("outliers"), ul = el("ul", "outliers"), n = 0, extra = 0;
    runs.forEach(function (r, i) {
      r[10].forEach(function (f) {
        if (S[f[0]].indexOf("dataset/") !== 0) { return; }
        if (n >= 500) { extra += 1; return; }
        n += 1;
        var li = el("li", "sev-" + SEV[f[1]]), a = el("a", null, S[r[0]]);
        a.href = "#run-" + (i + 1);
        li.appendChild(a);
        li.appendChild(document.createTextNode(" "));
        li.appendChild(el("code", null, S[f[0]]));
        li.appendChild(document.createTextNode(" " + str(f[2])));
        ul.appendChild(li);
      });
    });
    if (n) {
      box.textContent = "";
      box.appendChild(ul);
      if (extra) {
        box.appendChild(el("p", "muted", "and " + extra + " more: filter the runs below"));
      }
    }
  }

  function picture() {
    var table = document.getElementById("picture-table");
    var cells = {}, thead = el("thead"), tr = el("tr"), tbody = el("tbody");
    runs.forEach(function (r, i) {
      var key = r[6] + ":" + r[7];
      (cells[key] = cells[key] || []).push(i);
    });
    tr.appendChild(el("th"));
    data.column_order.forEach(function (c) {
      var th = el("th");
      th.setAttribute("scope", "col");
      th.appendChild(el("span", null, data.columns[c]));
      tr.appendChild(th);
    });
    thead.appendChild(tr);
    data.subject_order.forEach(function (s) {
      var row = el("tr"), th = el("th", null, data.subjects[s]);
      th.setAttribute("scope", "row");
      row.appendChild(th);
      data.column_order.forEach(function (c) {
        var td = el("td");
        (cells[s + ":" + c] || []).forEach(function (i) {
          var r = runs[i], tag = data.tags[r[1]], w = SEV[worst(r)];
          var a = el("a", "cell " + tag[1] + " sev-" + w, tag[0]);
          a.href = "#run-" + (i + 1);
          var counts = [];
          if (r[3]) { counts.push(plural(r[3], "error")); }
          if (r[4]) { counts.push(plural(r[4], "warning")); }
          if (r[5]) { counts.push(plural(r[5], "note")); }
          a.title = S[r[0]] + " \\u00b7 " + tag[2] + " \\u00b7 " +
            (counts.join(", ") || "no findings");
          a.appendChild(el("b", null, GLYPH[w]));
          td.appendChild(a);
        });
        row.appendChild(td);
      });
      tbody.appendChild(row);
    });
    table.appendChild(thead);
    table.appendChild(tbody);
  }

  select.addEventListener("change", function () { apply(); store(); });
  search.addEventListener("input", function () { apply(); store(); });
  window.addEventListener("hashchange", fromFragment);
  more.addEventListener("click", function () { limit += PAGE; draw(); });
  document.getElementById("open-shown").addEventListener("click", function () {
    Object.keys(built).forEach(function (i) { fill(built[i], +i); built[i].open = true; });
  });
  document.getElementById("close-all").addEventListener("click", function () {
    Object.keys(built).forEach(function (i) { built[i].open = false; });
  });
  var wasOpen = {};
  window.addEventListener("beforeprint", function () {
    wasOpen = {};
    Object.keys(built).forEach(function (i) {
      wasOpen[i] = built[i].open;
      fill(built[i], +i);
      built[i].open = true;
    });
  });
  window.addEventListener("afterprint", function () {
    Object.keys(built).forEach(function (i) { built[i].open = wasOpen[i] || false; });
  });
  outliers();
  picture();
  apply();
  fromFragment();
  body.setAttribute("data-ready", "1");
})();
"""


__all__ = ["DiagramCollector", "Drawings", "esc", "render_html", "write_html", "write_html_stream"]
