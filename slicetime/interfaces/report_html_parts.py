"""What the HTML report needs of each run, taken while the audit streams: the run's
timing diagram (each distinct one drawn once, :class:`Drawings`), the facts its section
lists, where each value came from and its sidecars (:class:`RunParts`, made where the run
is audited, so the full record need not travel), gathered by :class:`DiagramCollector`
with every distinct value stored once. ``report_html`` lays the page out from them."""

from __future__ import annotations

from array import array
from collections import Counter
from dataclasses import dataclass, field
from typing import Any

from slicetime.interfaces.plots import DiagramSpec, diagram_spec, render_svg, slices_phrase
from slicetime.interfaces.report_source import run_line
from slicetime.interfaces.safe_text import xml_safe
from slicetime.interfaces.screen import timing_tr_text
from slicetime.model import RunRecord
from slicetime.numbers import duration, secs
from slicetime.pipelines.audit import RunResult
from slicetime.readers.entities import sidecar_path
from slicetime.words import count, encoding_direction

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

    def distinct(self) -> int:
        """How many real diagrams there are (a run without timing has none: no box)."""
        return sum(1 for spec in self.ids if spec.kind == "schedule")

    def symbols(self) -> tuple[str, dict[str, tuple[float, float]]]:
        """The hidden SVG block holding one ``<symbol>`` per distinct diagram (none for
        the runs without usable timing: their sections say why in a line of text)."""
        parts = ['<svg class="sprite" aria-hidden="true" focusable="false"><defs>']
        sizes: dict[str, tuple[float, float]] = {}
        for spec, ident in self.ids.items():
            if spec.kind != "schedule":
                sizes[ident] = (0.0, 0.0)
                continue
            body, (w, h) = render_svg(spec, prefix=f"{ident}-")
            sizes[ident] = (w, h)
            parts.append(f'<symbol id="{ident}" viewBox="0 0 {w:g} {h:g}">{body}</symbol>')
        parts.append("</defs></svg>")
        return "".join(parts), sizes


# --------------------------------------------------------------------------- runs


class ValueTable:
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
    tr_text = timing_tr_text(record.timing)  # resolved: the sidecar's, else the header's
    if tr_text is not None:
        facts.append(("repetition time", tr_text))
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
        # the label is on the run's row; here what it means
        detail = slices_phrase(scheme.n_slices, scheme.groups)
        if scheme.spacing:
            detail += f", one excitation every {duration(scheme.spacing)}"
        facts.append(("scheme", detail))
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
        self.strings = ValueTable()
        self.facts = ValueTable()
        self.sources = ValueTable()
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
