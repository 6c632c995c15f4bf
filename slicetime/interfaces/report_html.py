"""The HTML audit report: one self-contained page (inline CSS, inline SVG, a little script).

Layout, top to bottom:

1. a header with the dataset and the totals;
2. the overview: runs with errors / warnings / notes, the schemes in use per
   task and acquisition (grouped like the dataset rules group runs,
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
import json
import os
from collections import Counter, defaultdict
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field

from slicetime import __version__
from slicetime.interfaces.plots import COLOURS, DiagramSpec, diagram_spec, render_svg
from slicetime.interfaces.report_json import run_object
from slicetime.interfaces.safe_text import sanitise, xml_safe
from slicetime.model import Finding, RunRecord, Severity, worst
from slicetime.pipelines.audit import AuditResult, RunResult
from slicetime.rules.dataset import PROTOCOL_ENTITIES, protocol_key

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


def _worst_name(findings: Sequence[Finding]) -> str:
    level = worst(list(findings))
    return level.value if level is not None else "none"


def _scheme_name(record: RunRecord) -> str | None:
    return record.scheme.label if record.scheme is not None else None


def _group_label(key: tuple[str, ...], many_roots: bool) -> str:
    root, datatype, suffix = key[0], key[1], key[2]
    parts = [p for p in key[3:] if not p.endswith("-")]
    name = "_".join([*parts, suffix or "(no suffix)"])
    if datatype:
        name = f"{datatype}: {name}"
    return f"{root} · {name}" if many_roots else name


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


def _scheme_tags(runs: Sequence[RunResult]) -> dict[str | None, _Tag]:
    """A short numbered tag and a fill for every scheme label, most common first."""
    counts = Counter(_scheme_name(r.record) for r in runs)
    tags: dict[str | None, _Tag] = {}
    number = 0
    for label, _ in sorted(counts.items(), key=lambda kv: (-kv[1], kv[0] or "")):
        if label is None:
            tags[None] = _Tag("–", "t0", "no usable slice timing")
            continue
        number += 1
        tags[label] = _Tag(str(number), f"t{(number - 1) % len(TAG_FILLS) + 1}", label)
    return tags


def _chip(tag: _Tag) -> str:
    return f'<span class="chip {tag.cls}">{txt(tag.text)}</span>'


# --------------------------------------------------------------------------- sections


def _summary_cards(result: AuditResult, drawings: int) -> str:
    runs = result.runs
    with_sev = {
        s: sum(1 for r in runs if any(f.severity is s for f in r.findings)) for s in Severity
    }
    clean = sum(1 for r in runs if not r.findings)
    counts = result.counts()
    cards = [
        ("runs", str(len(runs)), "audited", ""),
        (
            "error",
            str(with_sev[Severity.ERROR]),
            "runs with errors",
            f"{_plural(counts['error'], 'error')} in all",
        ),
        (
            "warning",
            str(with_sev[Severity.WARNING]),
            "runs with warnings",
            f"{_plural(counts['warning'], 'warning')} in all",
        ),
        (
            "note",
            str(with_sev[Severity.NOTE]),
            "runs with notes",
            f"{_plural(counts['note'], 'note')} in all",
        ),
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
    ignored = result.ignored_count()
    if ignored:
        out.append(
            f'<p class="muted">{_plural(ignored, "finding")} ignored by the lab '
            "policy are not shown.</p>"
        )
    return "".join(out)


def _schemes_table(result: AuditResult, tags: dict[str | None, _Tag], ids: dict[int, str]) -> str:
    groups: dict[tuple[str, ...], list[int]] = defaultdict(list)
    for i, run in enumerate(result.runs):
        groups[protocol_key(run.record)].append(i)
    many_roots = len({k[0] for k in groups}) > 1
    rows = []
    for key, members in sorted(groups.items()):
        per_label = Counter(_scheme_name(result.runs[i].record) for i in members)
        cells = []
        for label, count in sorted(per_label.items(), key=lambda kv: (-kv[1], kv[0] or "")):
            first = next(i for i in members if _scheme_name(result.runs[i].record) == label)
            name = txt(label) if label is not None else "<em>no usable slice timing</em>"
            cells.append(
                f'<li>{_chip(tags[label])} {name} <span class="muted">'
                f'{_plural(count, "run")}, e.g. <a href="#{ids[first]}">'
                f"{txt(result.runs[first].record.path)}</a></span></li>"
            )
        mixed = len(per_label) > 1
        row_class = ' class="mixed"' if mixed else ""
        rows.append(
            f'<tr{row_class}><th scope="row">'
            f"{txt(_group_label(key, many_roots))}</th><td>{len(members)}</td>"
            f'<td><ul class="plain">{"".join(cells)}</ul>'
            + ('<span class="flag">more than one scheme</span>' if mixed else "")
            + "</td></tr>"
        )
    entities = ", ".join(PROTOCOL_ENTITIES)
    return (
        f'<p class="muted">Runs are grouped by dataset, datatype, suffix and the '
        f"entities {entities}, as the consistency rules group them.</p>"
        '<table class="schemes"><thead><tr><th>task and acquisition</th><th>runs</th>'
        f"<th>schemes</th></tr></thead><tbody>{''.join(rows)}</tbody></table>"
    )


def _outliers(result: AuditResult, ids: dict[int, str]) -> str:
    items = []
    for i, run in enumerate(result.runs):
        for f in run.findings:
            if f.code.startswith("dataset/"):
                items.append(
                    f'<li class="sev-{f.severity.value}"><a href="#{ids[i]}">'
                    f"{txt(run.record.path)}</a> <code>{txt(f.code)}</code> "
                    f"{txt(f.message, one_line=False)}</li>"
                )
    wide = "".join(
        f'<li class="sev-{f.severity.value}"><code>{txt(f.code)}</code> '
        f"{txt(f.file or '')} {txt(f.message, one_line=False)}</li>"
        for f in result.dataset_findings
    )
    out = []
    if items:
        out.append(f'<ul class="outliers">{"".join(items)}</ul>')
    else:
        out.append(
            '<p class="muted">No run differs from the others of its task and acquisition.</p>'
        )
    if wide:
        out.append(
            f'<h3>Findings about the dataset as a whole</h3><ul class="outliers">{wide}</ul>'
        )
    return "".join(out)


def _gallery(
    drawings: Drawings,
    sizes: dict[str, tuple[float, float]],
    examples: dict[str, int],
    result: AuditResult,
    ids: dict[int, str],
) -> str:
    figures = []
    for spec, ident in drawings.ids.items():
        first = examples[ident]
        figures.append(
            f"<figure>{_use(ident, sizes[ident], spec.caption())}<figcaption>"
            f"{txt(spec.caption())}: {_plural(drawings.users[ident], 'run')}, e.g. "
            f'<a href="#{ids[first]}">{txt(result.runs[first].record.path)}</a>'
            "</figcaption></figure>"
        )
    return (
        f'<details class="gallery"><summary>Every distinct timing diagram '
        f"({len(figures)})</summary>{''.join(figures)}</details>"
    )


def _picture(result: AuditResult, tags: dict[str | None, _Tag], ids: dict[int, str]) -> str:
    suffixes = len({r.record.suffix for r in result.runs})
    cells: dict[tuple[str, str], list[int]] = defaultdict(list)
    subjects: set[str] = set()
    columns: set[str] = set()
    for i, run in enumerate(result.runs):
        sub = run.record.entities.get("sub")
        row = f"sub-{sub}" if sub is not None else "(no subject)"
        col = _column_key(run.record, suffixes)
        subjects.add(row)
        columns.add(col)
        cells[(row, col)].append(i)
    cols = sorted(columns)
    head = "".join(f'<th scope="col"><span>{txt(c)}</span></th>' for c in cols)
    body = []
    for row in sorted(subjects):
        tds = []
        for col in cols:
            links = []
            for i in cells.get((row, col), []):
                run = result.runs[i]
                tag = tags[_scheme_name(run.record)]
                level = worst(run.findings)
                glyph = SEVERITY_GLYPH[level] if level is not None else ""
                sev = level.value if level is not None else "none"
                title = f"{run.record.path} · {tag.label} · " + (
                    ", ".join(_plural(n, s.value) for s, n in _severity_counts(run.findings))
                    or "no findings"
                )
                links.append(
                    f'<a class="cell {tag.cls} sev-{sev}" href="#{ids[i]}" '
                    f'title="{esc(title)}">'
                    f"{txt(tag.text)}<b>{glyph}</b></a>"
                )
            tds.append(f"<td>{''.join(links)}</td>")
        body.append(f'<tr><th scope="row">{txt(row)}</th>{"".join(tds)}</tr>')
    legend = "".join(f"<li>{_chip(tag)} {txt(tag.label)}</li>" for tag in tags.values())
    sev_legend = "".join(
        f'<li><span class="cell sev-{s.value}">1<b>{SEVERITY_GLYPH[s]}</b></span> worst finding '
        f"is {'an' if s is Severity.ERROR else 'a'} {s.value}</li>"
        for s in Severity
    )
    return (
        '<div class="picture-wrap"><table class="picture"><thead><tr><th></th>'
        f"{head}</tr></thead><tbody>{''.join(body)}</tbody></table></div>"
        f'<div class="legends"><ul class="plain legend">{legend}</ul>'
        f'<ul class="plain legend">{sev_legend}<li><span class="cell sev-none">1<b></b></span>'
        " no findings</li></ul></div>"
    )


def _severity_counts(findings: Iterable[Finding]) -> list[tuple[Severity, int]]:
    counts = Counter(f.severity for f in findings)
    return [(s, counts[s]) for s in Severity if counts[s]]


def _finding_item(f: Finding) -> str:
    where = []
    if f.file:
        where.append(f"<span>file <code>{txt(f.file)}</code></span>")
    if f.field:
        where.append(f"<span>field <code>{txt(f.field)}</code></span>")
    evidence = f.to_json()["evidence"]
    parts = [
        f'<li class="finding sev-{f.severity.value}" data-severity="{f.severity.value}">',
        f'<div class="fhead"><span class="sev">{SEVERITY_GLYPH[f.severity]} '
        f'{f.severity.value}</span> <code class="code">{txt(f.code)}</code></div>',
        f'<p class="msg">{txt(f.message, one_line=False)}</p>',
    ]
    if where:
        parts.append(f'<p class="where">{" ".join(where)}</p>')
    if evidence:
        text = json.dumps(sanitise(evidence), ensure_ascii=False, allow_nan=False)
        parts.append(f'<pre class="evidence">{txt(text, one_line=False)}</pre>')
    if f.hint:
        parts.append(f'<p class="hint">{txt(f.hint, one_line=False)}</p>')
    parts.append("</li>")
    return "".join(parts)


def _run_section(
    run: RunResult,
    ident: str,
    drawing: str,
    size: tuple[float, float],
    spec: DiagramSpec,
    tags: dict[str | None, _Tag],
) -> str:
    record = run.record
    obj = run_object(run)
    schedule = record.schedule
    tag = tags[_scheme_name(record)]
    worst_name = _worst_name(run.findings)
    badges = (
        "".join(
            f'<span class="badge sev-{s.value}">{_plural(n, s.value)}</span>'
            for s, n in _severity_counts(run.findings)
        )
        or '<span class="badge sev-none">no findings</span>'
    )
    facts: list[tuple[str, str]] = []
    if obj["shape"]:
        facts.append(("shape", " × ".join(str(d) for d in obj["shape"])))
    if obj["repetition_time"] is not None:
        facts.append(("repetition time", f"{obj['repetition_time']:g} s"))
    if schedule is not None:
        facts.append(
            (
                "slice axis",
                f"{schedule.axis}{schedule.direction}"
                + (
                    " (SliceTiming lists the highest index first)"
                    if schedule.direction == "-"
                    else ""
                ),
            )
        )
        if schedule.delay_time:
            facts.append(("DelayTime", f"{schedule.delay_time:g} s"))
        if schedule.volume_times:
            facts.append(("volume times", f"{len(schedule.volume_times)} onsets (VolumeTiming)"))
        facts.append(("timing from", txt(record.timing_origin or "")))
    scheme = record.scheme
    if scheme is not None:
        detail = _plural(len(scheme.groups), "excitation group")
        if scheme.spacing:
            detail += f", one every {scheme.spacing * 1000:.4g} ms"
        facts.append(
            (
                "scheme",
                f"{_chip(tag)} <strong>{txt(scheme.label)}</strong> "
                f'<span class="muted">{detail}</span>',
            )
        )
    else:
        facts.append(("scheme", f"{_chip(tag)} <em>unknown: no usable slice timing</em>"))
    if record.sidecar_chain:
        facts.append(
            ("sidecars", " → ".join(f"<code>{txt(s)}</code>" for s in record.sidecar_chain))
        )
    fact_rows = "".join(f"<dt>{name}</dt><dd>{value}</dd>" for name, value in facts)
    sources = "".join(
        f'<tr><th scope="row">{txt(k)}</th><td><code>{txt(v)}</code></td></tr>'
        for k, v in obj["sources"].items()
    )
    findings = "".join(
        _finding_item(f) for f in sorted(run.findings, key=lambda f: -f.severity.rank)
    )
    return (
        f'<details class="run" id="{ident}" data-name="{esc(record.path.lower())}" '
        f'data-worst="{worst_name}">'
        f'<summary><span class="mark sev-{worst_name}"></span>'
        f'<code class="path">{txt(record.path)}</code> {_chip(tag)}'
        f'<span class="label">{txt(tag.label)}</span>{badges}</summary>'
        '<div class="run-body"><div class="cols"><div>'
        f'<dl class="facts">{fact_rows}</dl>'
        + (
            f'<h4>where each value came from</h4><table class="sources">{sources}</table>'
            if sources
            else ""
        )
        + f'</div><figure class="timing">{_use(drawing, size, spec.caption())}'
        + (f"<figcaption>{txt(spec.caption())}</figcaption>" if spec.kind == "schedule" else "")
        + "</figure></div>"
        + (
            f'<h4>findings</h4><ol class="findings">{findings}</ol>'
            if findings
            else '<p class="muted">No findings.</p>'
        )
        + "</div></details>"
    )


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


def render_html(result: AuditResult, root_given: str, *, generated: str | None = None) -> str:
    """The whole report as one HTML document (a string)."""
    ids = {i: f"run-{i + 1}" for i in range(len(result.runs))}
    tags = _scheme_tags(result.runs)
    drawings = Drawings()
    run_drawings: list[tuple[str, DiagramSpec]] = []
    examples: dict[str, int] = {}
    for i, run in enumerate(result.runs):
        spec = diagram_spec(run.record)
        ident = drawings.add(spec)
        examples.setdefault(ident, i)
        run_drawings.append((ident, spec))
    sprite, sizes = drawings.symbols()
    sections = "".join(
        _run_section(
            run, ids[i], run_drawings[i][0], sizes[run_drawings[i][0]], run_drawings[i][1], tags
        )
        for i, run in enumerate(result.runs)
    )
    counts = result.counts()
    stamp = generated if generated is not None else _generated_stamp()
    title = f"slicetime audit · {xml_safe(root_given)}"
    script = _SCRIPT
    digest = base64.b64encode(hashlib.sha256(script.encode("utf-8")).digest()).decode()
    policy = (
        "default-src 'none'; style-src 'unsafe-inline'; img-src data:; "
        f"script-src 'sha256-{digest}'; base-uri 'none'; form-action 'none'"
    )
    roots = "".join(f"<code>{txt(r)}</code> " for r in result.roots)
    policies = "".join(
        f"<li><code>{txt(r)}</code>: <code>{txt(p)}</code></li>" for r, p in result.policies.items()
    )
    return "".join(
        [
            '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">',
            f'<meta http-equiv="Content-Security-Policy" content="{policy}">',
            '<meta name="viewport" content="width=device-width, initial-scale=1">',
            f'<meta name="generator" content="slicetime {esc(__version__)}">',
            f"<title>{html.escape(title)}</title><style>{_css()}</style></head>",
            '<body data-ready="0">',
            sprite,
            '<header class="top"><div class="brand">slicetime · slice-timing audit</div>',
            f"<h1>{txt(root_given)}</h1>",
            f'<p class="muted">{_plural(len(result.runs), "run")} · '
            f"{_plural(counts['error'], 'error')}, {_plural(counts['warning'], 'warning')}, "
            f"{_plural(counts['note'], 'note')} · dataset root {roots}· written {txt(stamp)} "
            f"by slicetime {txt(__version__)}</p>",
            (
                f'<p class="muted">Lab policy: </p><ul class="plain muted">{policies}</ul>'
                if policies
                else ""
            ),
            '<nav class="no-print"><a href="#overview">overview</a><a href="#picture">dataset '
            'picture</a><a href="#runs">runs</a><a href="#reading">how to read a diagram</a>'
            "</nav></header><main>",
            '<section id="overview"><h2>Overview</h2>',
            _summary_cards(result, len(drawings.ids)),
            "<h3>Schemes in use per task and acquisition</h3>",
            _schemes_table(result, tags, ids),
            "<h3>Outliers</h3>",
            _outliers(result, ids),
            _gallery(drawings, sizes, examples, result, ids),
            "</section>",
            '<section id="picture"><h2>Dataset picture</h2><p class="muted">One row per '
            "subject, one column per session, task, acquisition and run. The number is the "
            "scheme (legend below), the colour the scheme, the mark the worst finding: a subject "
            "whose cells differ from the column stands out.</p>",
            _picture(result, tags, ids),
            "</section>",
            '<section id="runs"><h2>Runs</h2>',
            '<div class="controls" role="search"><label>Show <select id="severity-filter">'
            '<option value="all">all runs</option><option value="error">runs with errors'
            '</option><option value="warning">runs with warnings or errors</option>'
            '<option value="note">runs with any finding</option><option value="clean">runs '
            'without findings</option></select></label><label>Find <input id="run-search" '
            'type="search" placeholder="part of a run name" autocomplete="off"></label>'
            '<button type="button" id="open-shown">open shown</button><button type="button" '
            'id="close-all">close all</button><span id="shown-count" aria-live="polite">'
            f"{_plural(len(result.runs), 'run')}</span></div>",
            '<p class="print-only" id="print-filter"></p>',
            f'<div class="run-list">{sections}</div>',
            "</section>",
            _reading_guide(),
            "</main>",
            f"<script>{script}</script></body></html>\n",
        ]
    )


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
h1{margin:.2rem 0;font-size:1.5rem;word-break:break-all}
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
summary .path{font-weight:600;word-break:break-all}
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
dl.facts dt{color:var(--muted)}dl.facts dd{margin:0;word-break:break-all}
table.sources th{font-weight:400;color:var(--muted);text-align:left;padding-right:.8rem}
table.sources td{word-break:break-all}
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
pre.evidence{margin:.2rem 0;padding:.3rem .5rem;background:#fff;border:1px dashed var(--line);
white-space:pre-wrap;word-break:break-all;font-size:.8rem}
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


_SCRIPT = """
(function () {
  "use strict";
  var body = document.body;
  var runs = Array.prototype.slice.call(document.querySelectorAll("details.run"));
  var select = document.getElementById("severity-filter");
  var search = document.getElementById("run-search");
  var count = document.getElementById("shown-count");
  var printNote = document.getElementById("print-filter");
  var rank = {none: 0, note: 1, warning: 2, error: 3};
  var levels = ["all", "error", "warning", "note", "clean"];

  function apply() {
    var level = select.value;
    var words = search.value.toLowerCase().split(/\\s+/).filter(Boolean);
    var shown = 0;
    runs.forEach(function (run) {
      var w = rank[run.getAttribute("data-worst")] || 0;
      var ok = level === "all" || (level === "clean" ? w === 0 : w >= rank[level]);
      if (ok && words.length) {
        var name = run.getAttribute("data-name");
        ok = words.every(function (word) { return name.indexOf(word) >= 0; });
      }
      run.hidden = !ok;
      if (ok) { shown += 1; }
    });
    count.textContent = shown + " of " + runs.length + " runs shown";
    body.setAttribute("data-severity", level);
    var parts = [];
    if (level !== "all") { parts.push(select.options[select.selectedIndex].text); }
    if (words.length) { parts.push("names containing \\u201c" + search.value + "\\u201d"); }
    printNote.textContent = parts.length ? "Printed with a filter: " + parts.join(", ") +
      " (" + shown + " of " + runs.length + " runs)." : "";
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
    var target = text && document.getElementById(text);
    if (target && target.tagName === "DETAILS") {
      target.hidden = false;
      target.open = true;
      target.scrollIntoView();
    }
  }

  select.addEventListener("change", function () { apply(); store(); });
  search.addEventListener("input", function () { apply(); store(); });
  window.addEventListener("hashchange", fromFragment);
  document.getElementById("open-shown").addEventListener("click", function () {
    runs.forEach(function (run) { if (!run.hidden) { run.open = true; } });
  });
  document.getElementById("close-all").addEventListener("click", function () {
    runs.forEach(function (run) { run.open = false; });
  });
  var wasOpen = [];
  window.addEventListener("beforeprint", function () {
    wasOpen = runs.map(function (run) { return run.open; });
    runs.forEach(function (run) { if (!run.hidden) { run.open = true; } });
  });
  window.addEventListener("afterprint", function () {
    runs.forEach(function (run, i) { run.open = wasOpen[i] || false; });
  });
  apply();
  fromFragment();
  body.setAttribute("data-ready", "1");
})();
"""


def write_html(
    result: AuditResult,
    path: str | os.PathLike[str],
    *,
    root_given: str,
    generated: str | None = None,
) -> None:
    """Render the report and write it atomically (a temporary file beside it, fsync,
    then a rename), so a reader never sees half a report. OSError propagates."""
    text = render_html(result, root_given, generated=generated)
    target = os.fspath(path)
    folder = os.path.dirname(os.path.abspath(target))
    tmp = os.path.join(folder, f".{os.path.basename(target)}.tmp-{os.getpid()}")
    try:
        with open(tmp, "w", encoding="utf-8") as fh:
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, target)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


__all__ = ["Drawings", "esc", "render_html", "write_html"]
