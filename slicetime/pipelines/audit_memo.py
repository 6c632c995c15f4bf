"""The audit's content memo: what depends only on what a run's header and sidecars
hold is worked out once per distinct content, not once per run.

A study has hundreds of runs whose headers agree field for field and whose merged
sidecars hold the same values (inherited from the same files, or their own sidecars
byte for byte alike: ``SidecarStore.parsed`` makes those one parsed value). For
such runs the resolved timing, the inferred scheme and the findings of every run
check that reads the content (all but :data:`slicetime.rules.bindings.NAME_CODES`,
which read the run's name or its source series) are the same, except for the
files they name: the run itself and its own sidecar.

So the memo evaluates the first run of each content with two tokens in place of
those names (:data:`RUN`, :data:`OWN`; they hold a NUL, which no path holds), keeps
the result, and gives every run of that content the result with the tokens
replaced by its own names. The checks pass names through (they print them or set
them as a finding's file) and never look inside them; a result in which a token
is found anywhere else than where it can be replaced whole (a token cut by a
shortened text, a value of an unexpected type) is not reused: each such run is
evaluated as it is. The key is everything the evaluation reads: the header (every
field but the size on disk, which no check reads), each metadata key with its
value (a scalar by type and value, a parsed array or object by identity: one
parsed value is shared by every run that inherits it, and the memo keeps it
alive), the sidecar that gave each value (the run's own as :data:`OWN`), the
chain of sidecars, the overridden values, the suffix and whether the content is
missing. ``tests/test_audit_memo.py`` compares reports made with and without it.
"""

from __future__ import annotations

import dataclasses
import operator
import weakref
from collections.abc import Mapping, Sequence
from typing import Any, TypeVar

from slicetime.model import (
    Finding,
    HeaderInfo,
    ResolvedTiming,
    RunRecord,
    Scheme,
    Severity,
    Source,
)
from slicetime.pipelines.audit_facts import HEADER_KEY
from slicetime.readers.entities import sidecar_path
from slicetime.readers.inheritance import SidecarStore
from slicetime.readers.sidecar import FrozenDict, FrozenList
from slicetime.rules.bindings import check_run_part
from slicetime.schemes.resolve import infer_run_scheme, resolve_timing

_T = TypeVar("_T")

#: a content whose arrays and objects hold more items in all is not remembered (the
#: memo keeps what it remembers alive: a few thousand small sidecars, not large ones)
_HELD_ITEMS = 4096

#: a private switch: False evaluates every run as it is (the tests compare both ways)
ENABLED = True
#: distinct contents remembered per walk and process
MEMO_KEPT = 4096
#: after this many distinct contents, the memo stops remembering new ones unless at
#: least as many runs have reused one (a study whose runs all differ gains nothing)
_TRIAL = 256

#: stands for the run's own name in a remembered result
RUN = "\0run\0"
#: stands for the run's own sidecar in a remembered result
OWN = "\0own sidecar\0"

_SCALARS: frozenset[type] = frozenset({str, int, bool, type(None)})
_PLAIN: frozenset[type] = frozenset({int, float, bool, type(None), Severity})
_MAPPINGS: frozenset[type] = frozenset({dict, FrozenDict})
_SEQUENCES: frozenset[type] = frozenset({list, tuple, FrozenList})
_FROZEN: frozenset[type] = frozenset({FrozenList, FrozenDict})


def _value_key(value: Any) -> tuple[Any, Any]:
    kind = type(value)
    if kind in _SCALARS:
        return (kind, value)
    if kind is float:
        return (float, value.hex())  # -0.0 and 0.0 apart
    return (None, id(value))  # a parsed array or object: one object per parse


def _held_items(metadata: Mapping[str, Any]) -> int:
    return sum(len(v) for v in metadata.values() if type(v) in _FROZEN)


def _scan(value: Any) -> int:
    """0: no token in ``value``; 1: tokens, each whole in a text, in containers
    :func:`_put` rebuilds; 2: anything else with a NUL (a token cut short, or held
    where it cannot be replaced)."""
    kind = type(value)
    if kind is str:
        if "\0" not in value:
            return 0
        return 2 if "\0" in value.replace(RUN, "").replace(OWN, "") else 1
    if kind in _PLAIN:
        return 0
    if kind in _MAPPINGS:
        return max((max(_scan(k), _scan(v)) for k, v in value.items()), default=0)
    if kind in _SEQUENCES:
        return max((_scan(v) for v in value), default=0)
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        found = max((_scan(getattr(value, f.name)) for f in dataclasses.fields(value)),
                    default=0)
        return 2 if found else 0  # not rebuilt by _put
    return 2 if "\0" in repr(value) else 0  # any other value: not rebuilt either


def _put(value: Any, names: Mapping[str, str]) -> Any:
    """``value`` with every token replaced by its name (containers rebuilt as they were;
    only values :func:`_scan` gives 1 or 0)."""
    kind = type(value)
    if kind is str:
        if "\0" not in value:
            return value
        for token, name in names.items():
            value = value.replace(token, name)
        return value
    if kind in _PLAIN or _scan(value) == 0:
        return value
    if kind in _MAPPINGS:
        return kind({_put(k, names): _put(v, names) for k, v in value.items()})
    return kind([_put(v, names) for v in value])


@dataclasses.dataclass(frozen=True)
class _Timing:
    timing: ResolvedTiming
    scheme: Scheme | None
    usable: bool
    #: whether the schedule's sources, the TR's source name a token
    in_schedule: bool
    in_tr: bool
    keep: Any  # what was read (the metadata, or the merged parsed sidecars): alive while
    #           their ids are keys


def _named(source: Source, names: Mapping[str, str]) -> Source:
    file = source.file
    return _changed(source, file=names[file]) if file is not None and file in names else source


def _changed(value: _T, **changes: Any) -> _T:
    """A copy of the frozen dataclass instance ``value`` with ``changes`` (what
    :func:`dataclasses.replace` gives, for classes without ``__post_init__``, without
    running ``__init__``: this is done for every run)."""
    copy = object.__new__(type(value))
    copy.__dict__.update(value.__dict__)
    copy.__dict__.update(changes)
    return copy


class Content:
    """One judged content of a walk: the runs that carry the same object (``RunResult.
    content``) have the same header (but its size on disk), merged sidecars, timing,
    scheme, suffix and content findings, and differ only in their names (their path,
    entities and own sidecar) and in what their names are judged by. ``record`` is the
    content's record with the tokens :data:`RUN` and :data:`OWN` for those names and no
    entities or findings. Consumers (the report line, the run facts) may keep what they
    make of a content by this object, which they then hold. It never travels to another
    process: pickled, it becomes None there."""

    __slots__ = ("record",)

    def __init__(self, record: RunRecord) -> None:
        self.record = record

    def __reduce__(self) -> tuple[Any, ...]:
        return (_no_content, ())


def _no_content() -> None:
    return None


class ContentMemo:
    """The memo of one walk in one process (see the module docstring)."""

    def __init__(self) -> None:
        self._timings: dict[Any, _Timing] = {}
        self._checks: dict[Any, tuple[tuple[tuple[int, Finding, bool], ...], Content] | None] \
            = {}
        #: the judged content of the run whose findings were given last (None when they
        #: were worked out for that run alone)
        self.content: Content | None = None
        self.reused = 0
        #: the run whose timing was given last: its name, its content's key and entry,
        #: and whether the key is of the merged sidecars (``Resolution.merged``)
        self._last: tuple[str, Any, _Timing, bool] | None = None

    def _remembers(self, table: Mapping[Any, Any]) -> bool:
        held = len(table)
        return held < MEMO_KEPT and (held < _TRIAL or self.reused >= held)

    def timing_of(self, metadata: Mapping[str, Any], sources: Mapping[str, str],
                  header: HeaderInfo | None, display: str,
                  merged: Sequence[tuple[str, Any]] | None = None,
                  ) -> tuple[ResolvedTiming, Scheme | None]:
        """What :func:`resolve_timing` and :func:`infer_run_scheme` give the run.
        ``merged``: the sidecars (names) and parsed values (objects) the metadata and
        its sources were merged from, in order (``Resolution.merged``), or None."""
        own = sidecar_path(display)
        head = None if header is None else HEADER_KEY(header)
        keep: Any
        if merged is not None:
            # the metadata, its sources, the chain and the overridden values follow from
            # the merged sidecars alone: their names (the run's own as OWN) and their
            # parsed values by identity (kept alive below), not every key and value
            key: tuple[Any, ...] = (head, tuple([(OWN if shown == own else shown, id(data))
                                                 for shown, data in merged]))
            keep = tuple([data for _shown, data in merged])
        else:
            key = (head, tuple([(k, _value_key(v)) for k, v in metadata.items()]),
                   tuple([(k, OWN if v == own else v) for k, v in sources.items()]))
            keep = dict(metadata)
        entry = self._timings.get(key)
        if entry is None:
            if not self._remembers(self._timings) or _held_items(metadata) > _HELD_ITEMS:
                self._last = None
                return _cold(metadata, sources, header, display)
            canonical = {k: OWN if v == own else v for k, v in sources.items()}
            entry = self._timings[key] = _evaluate(metadata, canonical, header, keep)
        else:
            self.reused += 1
        if not entry.usable:
            self._last = None
            return _cold(metadata, sources, header, display)
        self._last = (display, key, entry, merged is not None)
        if not (entry.in_schedule or entry.in_tr):
            return entry.timing, entry.scheme
        names = {RUN: display, OWN: own}
        timing = entry.timing
        schedule = timing.schedule
        if entry.in_schedule and schedule is not None:
            schedule = _changed(schedule, sources={
                k: _named(s, names) for k, s in schedule.sources.items()})
        tr_source = timing.repetition_source
        if entry.in_tr and tr_source is not None:
            tr_source = _named(tr_source, names)
        return _changed(timing, schedule=schedule, repetition_source=tr_source), entry.scheme

    def findings(self, record: RunRecord) -> list[Finding]:
        """What :func:`slicetime.rules.check_run` gives ``record`` (built with
        :meth:`timing_of` just before)."""
        last, self._last = self._last, None
        self.content = None
        if last is None or last[0] != record.path or record.source is not None:
            return _cold_findings(record)
        own = sidecar_path(record.path)
        key: tuple[Any, ...]
        if last[3]:  # keyed by the merged sidecars: the chain and the overrides follow
            key = (last[1], record.suffix, record.content_missing)
        else:
            key = (last[1],
                   tuple([OWN if s == own else s for s in record.sidecar_chain]),
                   tuple([(k, tuple([(OWN if s == own else s, _value_key(v))
                                     for s, v in shadowed]))
                          for k, shadowed in record.overridden.items()]),
                   record.suffix, record.content_missing)
        if key in self._checks:
            judged = self._checks[key]
            self.reused += 1
        elif self._remembers(self._checks):
            judged = self._checks[key] = _evaluate_checks(record, own, last[2])
        else:
            return _cold_findings(record)
        if judged is None:
            return _cold_findings(record)
        found, self.content = judged
        names = {RUN: record.path, OWN: own}
        parts = [(place, _put_finding(f, names) if named else f)
                 for place, f, named in found]
        parts.extend(check_run_part(record, by_name=True))
        parts.sort(key=operator.itemgetter(0))  # stable: a check's findings keep their order
        return [*record.findings, *(f for _place, f in parts)]


def _cold(metadata: Mapping[str, Any], sources: Mapping[str, str], header: HeaderInfo | None,
          display: str) -> tuple[ResolvedTiming, Scheme | None]:
    timing = resolve_timing(metadata, sources, header, display)
    return timing, infer_run_scheme(timing)


def _cold_findings(record: RunRecord) -> list[Finding]:
    parts = [*check_run_part(record, by_name=False), *check_run_part(record, by_name=True)]
    parts.sort(key=operator.itemgetter(0))
    return [*record.findings, *(f for _place, f in parts)]


def _evaluate(metadata: Mapping[str, Any], canonical: Mapping[str, str],
              header: HeaderInfo | None, keep: Any) -> _Timing:
    timing, scheme = _cold(metadata, canonical, header, RUN)
    schedule = timing.schedule
    named = [s for s in (schedule.sources.values() if schedule is not None else ())]
    in_schedule = any(_scan(s.file) for s in named)
    tr_source = timing.repetition_source
    in_tr = tr_source is not None and bool(_scan(tr_source.file))
    rest = dataclasses.replace(
        timing, repetition_source=None,
        schedule=None if schedule is None else dataclasses.replace(schedule, sources={}))
    usable = (_scan(rest) == 0 and _scan(scheme) == 0
              and all(s.file in (None, RUN, OWN) or _scan(s.file) == 0 for s in named)
              and all(_scan(s.kind) == 0 and _scan(s.field) == 0 for s in named)
              and (tr_source is None
                   or _scan(dataclasses.replace(tr_source, file=None)) == 0)
              and (tr_source is None or not in_tr or tr_source.file in (RUN, OWN)))
    return _Timing(timing, scheme, usable, in_schedule, in_tr, keep)


def _evaluate_checks(record: RunRecord, own: str, entry: _Timing
                     ) -> tuple[tuple[tuple[int, Finding, bool], ...], Content] | None:
    """The content checks' findings of ``record`` with its names as tokens and the
    content they judged, or None when they cannot be reused (see :func:`_scan`)."""
    canonical = dataclasses.replace(
        record, path=RUN, abs_path=RUN, entities={}, findings=(),
        metadata_sources={k: OWN if v == own else v for k, v in record.metadata_sources.items()},
        sidecar_chain=tuple(OWN if s == own else s for s in record.sidecar_chain),
        overridden={k: tuple((OWN if s == own else s, v) for s, v in shadowed)
                    for k, shadowed in record.overridden.items()},
        timing=entry.timing, scheme=entry.scheme)
    out: list[tuple[int, Finding, bool]] = []
    for place, finding in check_run_part(canonical, by_name=False):
        seen = max(_scan(finding.code), _scan(finding.message), _scan(finding.file),
                   _scan(finding.field), _scan(finding.evidence), _scan(finding.hint))
        if seen == 2:
            return None
        out.append((place, finding, seen == 1))
    return tuple(out), Content(canonical)


def _put_finding(finding: Finding, names: Mapping[str, str]) -> Finding:
    """The catalogue's finding with the run's names in place of the tokens."""
    return _changed(finding, message=_put(finding.message, names),
                    file=_put(finding.file, names), field=_put(finding.field, names),
                    evidence=_put(finding.evidence, names), hint=_put(finding.hint, names))


#: the memo of each walk in this process (the walk's sidecar store stands for the walk)
_MEMOS: weakref.WeakKeyDictionary[SidecarStore, ContentMemo] = weakref.WeakKeyDictionary()


def memo_for(store: SidecarStore) -> ContentMemo | None:
    """The content memo of the walk ``store`` serves, or None when switched off."""
    if not ENABLED:
        return None
    memo = _MEMOS.get(store)
    if memo is None:
        memo = _MEMOS[store] = ContentMemo()
    return memo
