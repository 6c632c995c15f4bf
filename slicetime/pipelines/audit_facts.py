"""The compact run view a streamed audit keeps for every run (:class:`RunFacts`) and
the interning that lets thousands of them share their headers, entities and timing.

:mod:`slicetime.pipelines.audit` builds them while it streams the runs.
"""

from __future__ import annotations

import dataclasses
import operator
import os
import sys
from collections.abc import Callable, Mapping, Sequence
from typing import Any

from slicetime.model import (
    Counts,
    Finding,
    HeaderInfo,
    ResolvedTiming,
    RunRecord,
    Scheme,
    SliceSchedule,
    Source,
    TimingViews,
    UnitVerdict,
)
from slicetime.readers.entities import sidecar_path
from slicetime.rules.registry import fold_roots


class RunFacts(TimingViews):
    """The compact view of a run (:class:`slicetime.model.RunView`) that a streamed
    audit keeps for every run while it writes the rest: what the dataset rules, the
    policy's protocol selection and the report summaries read (path, root, entities,
    suffix, datatype and interned header, resolved timing, scheme and source map),
    plus the run's severity counts and its root causes. A dataset rule that needs
    another attribute adds it to ``RunView`` and here (``tests/test_report_stream.py``
    runs the dataset rules on facts and on full records and compares). Values that
    many runs share (timings, schemes, headers, source maps) are interned, so
    100,000 runs cost a few tens of MB.
    """

    __slots__ = ("_abs", "_sources", "content_missing", "counts", "datatype", "entities",
                 "fold_roots", "header", "path", "root", "scheme", "suffix", "timing")

    def __init__(self, record: RunRecord, counts: Counts, shared: Interner,
                 findings: Sequence[Finding] = (), content: Any = None) -> None:
        self.path = record.path
        self.root = shared.text(record.root)
        # what can be told from the run's path is not stored again for each run: the
        # absolute path (root/path) and the run's own sidecar among the sources
        self._abs = None if record.abs_path == _joined(self.root, self.path) else record.abs_path
        self.entities = shared.mapping(record.entities)
        self.datatype = shared.text(record.datatype) if record.datatype else record.datatype
        # the runs of one judged content (``content``: the audit memo's ``Content``) have
        # the same sources (the own sidecar as _OWN), suffix, header but its size, timing
        # and scheme: interned once per content
        known = shared.of_content(content) if content is not None else None
        if known is None:
            own = sidecar_path(record.path)
            self._sources = shared.mapping(
                {k: _OWN if v == own else v for k, v in record.metadata_sources.items()
                 if k in _FACT_SOURCES})
            self.suffix = shared.text(record.suffix)
            self.header = shared.header(record.header)
            self.timing = shared.timing(record.timing)
            self.scheme = shared.scheme(record.scheme, self.timing.schedule)
            if content is not None:
                shared.learn_content(content, (self._sources, self.suffix, self.header,
                                               self.timing, self.scheme))
        else:
            self._sources, self.suffix, self.header, self.timing, self.scheme = known
        self.content_missing = record.content_missing
        self.counts = counts  # (errors, warnings, notes) of the run's own findings
        #: (code, field) of the run's own findings that fold others into them, in order
        self.fold_roots = fold_roots(findings)

    @property
    def abs_path(self) -> str:
        return self._abs if self._abs is not None else _joined(self.root, self.path)

    @property
    def metadata_sources(self) -> Mapping[str, str]:
        """The sidecar that gave each value the dataset rules may name (a new dict)."""
        own = sidecar_path(self.path)
        return {k: own if v == _OWN else v for k, v in self._sources.items()}

    def worst(self) -> str:
        """The worst severity among the run's findings, or ``none``."""
        e, w, n = self.counts
        return "error" if e else "warning" if w else "note" if n else "none"


def _joined(root: str, path: str) -> str:
    return root + path if root.endswith(os.sep) else root + os.sep + path


#: stands for the run's own sidecar in RunFacts' sources (not a path: it holds a NUL)
_OWN = "\0own sidecar"

#: metadata sources a dataset finding may name as its file
_FACT_SOURCES = frozenset({"SliceTiming", "RepetitionTime", "VolumeTiming", "DelayTime",
                           "AcquisitionDuration", "SliceEncodingDirection",
                           "MultibandAccelerationFactor", "EchoTime", "TaskName"})


#: a header's content for interning and the audit's content memo: every field but the
#: size on disk (which no check reads)
HEADER_KEY = operator.attrgetter(
    *[f.name for f in dataclasses.fields(HeaderInfo) if f.name != "file_size"])


#: objects an Interner recognises by identity (see ``Interner._identities``)
IDENTITIES_KEPT = 1024
#: judged contents an Interner keeps the interned facts of (see ``RunFacts``)
CONTENTS_KEPT = 4096


class Interner:
    """One shared instance per distinct value, so equal facts cost memory once."""

    def __init__(self) -> None:
        self._values: dict[Any, Any] = {}
        #: (id of a value, id of its companion) -> (value, companion, the interned one):
        #: the runs of one content hand in the same timing and scheme objects (the audit's
        #: content memo), which are then not keyed field by field again; the objects are
        #: held, so their ids are not reused meanwhile (at most IDENTITIES_KEPT)
        #: (one table per kind, so runs whose timings differ still learn their schemes)
        self._identities: dict[str, dict[tuple[int, int], tuple[Any, Any, Any]]] = {
            "timing": {}, "scheme": {}}
        #: judged content (``audit_memo.Content``) -> its runs' interned facts
        self._contents: dict[Any, tuple[Any, ...]] = {}

    def of_content(self, content: Any) -> tuple[Any, ...] | None:
        """The interned facts of the runs of ``content`` (see ``RunFacts``), or None."""
        return self._contents.get(content)

    def learn_content(self, content: Any, facts: tuple[Any, ...]) -> None:
        if len(self._contents) < CONTENTS_KEPT:  # the content objects are held meanwhile
            self._contents[content] = facts

    def _known(self, kind: str, value: Any, companion: Any) -> Any:
        hit = self._identities[kind].get((id(value), id(companion)))
        return hit[2] if hit is not None and hit[0] is value and hit[1] is companion \
            else None

    def _learn(self, kind: str, value: Any, companion: Any, interned: Any) -> Any:
        table = self._identities[kind]
        if len(table) < IDENTITIES_KEPT:
            table[(id(value), id(companion))] = (value, companion, interned)
        return interned

    def _one(self, key: Any, make: Callable[[], Any]) -> Any:
        found = self._values.get(key)
        if found is None:
            found = self._values[key] = make()
        return found

    def text(self, value: str) -> str:
        key = ("s", value)
        found = self._values.get(key)
        if found is None:
            found = self._values[key] = value
        return found

    def mapping(self, value: Mapping[str, Any]) -> Mapping[str, Any]:
        # the keys (one tuple per distinct set) and text values interned: every run's parse
        # made its own copies of the same few words ("sub", "SliceTiming", a subject's
        # label); the lookup key holds no (key, value) pairs, only two flat tuples
        values_ = self._values
        keys = tuple(value)
        found = values_.get(("k", keys))
        if found is None:
            found = values_[("k", keys)] = tuple([sys.intern(k) for k in keys])
        keys = found
        values = tuple([sys.intern(v) if type(v) is str else v for v in value.values()])
        key = ("m", keys, values)
        mapping = values_.get(key)
        if mapping is None:
            mapping = values_[key] = dict(zip(keys, values, strict=True))
        return mapping

    def adopt(self, facts: RunFacts, seen: dict[int, Any]) -> RunFacts:
        """``facts`` made by another interner (in a worker), sharing this one's values.
        ``seen`` (one per batch of results, which keeps them alive) maps the objects
        already adopted to this interner's: the runs of a chunk share their values, and
        unpickling keeps them one object, so each is looked up once per chunk."""

        def one(value: Any, adopt: Callable[[Any], Any]) -> Any:
            if value is None:
                return None
            found = seen.get(id(value))
            if found is None:
                found = seen[id(value)] = adopt(value)
            return found

        facts.root = one(facts.root, self.text)
        facts.entities = one(facts.entities, self.mapping)
        facts._sources = one(facts._sources, self.mapping)
        facts.suffix = one(facts.suffix, self.text)
        if facts.datatype:
            facts.datatype = one(facts.datatype, self.text)
        facts.header = one(facts.header, self.header)
        facts.timing = one(facts.timing, self.timing)
        facts.scheme = one(facts.scheme, lambda v: self.scheme(v, facts.timing.schedule))
        return facts

    def header(self, value: HeaderInfo | None) -> HeaderInfo | None:
        if value is None:
            return None
        key = ("h", *HEADER_KEY(value))  # every field but the size on disk
        found = self._values.get(key)
        if found is None:
            found = self._values[key] = dataclasses.replace(value, file_size=0)
        return found

    def schedule(self, value: SliceSchedule | None) -> SliceSchedule | None:
        if value is None:
            return None
        key = ("t", value.times, value.axis, value.direction, value.repetition_time,
               value.volume_times, value.acquisition_duration, value.delay_time)
        return self._one(
            key, lambda: dataclasses.replace(value, sources={}))

    def timing(self, value: ResolvedTiming) -> ResolvedTiming:
        """The resolved timing without what no fact reader needs (the schedule's sources,
        the problems, the file the TR came from, the verdicts' evidence but whether they
        are usable), shared."""
        known = self._known("timing", value, None)
        if known is not None:
            return known
        return self._learn("timing", value, None, self._timing(value))

    def _timing(self, value: ResolvedTiming) -> ResolvedTiming:
        schedule = self.schedule(value.schedule)
        # the times, the window and what lies outside it follow from the schedule, the
        # TR and the units: the key needs only those
        units = tuple([(k, v.unit, v.usable) for k, v in value.units.items()])
        tr_source = value.repetition_source  # its kind and field, kept (not its file)
        tr_from = None if tr_source is None else Source(tr_source.kind, tr_source.field)
        key = ("r", id(schedule), value.origin, value.axis_length, value.repetition_time,
               value.window_kind, units, tr_from)
        found = self._values.get(key)
        if found is None:
            found = self._values[key] = ResolvedTiming(
                schedule, value.origin, (), value.axis_length, value.repetition_time,
                tr_from,
                value.times, value.window, value.window_kind, value.outside,
                {k: UnitVerdict(k, u, {} if ok else {"usable": False}) for k, u, ok in units})
        return found

    def scheme(self, value: Scheme | None, schedule: SliceSchedule | None) -> Scheme | None:
        if value is None:
            return None
        known = self._known("scheme", value, schedule)
        if known is not None:
            return known
        key = ("c", id(schedule), value.label, value.groups, value.multiband_factor,
               value.regular)
        return self._learn("scheme", value, schedule, self._one(key, lambda: value))
