"""The runs of one audit for the report writers, as a stream.

A streamed audit (``pipelines.audit.audit_stream``) hands each run's result to
:meth:`RunSpool.add`, which encodes the contract's run object as one line of
compact JSON into a temporary file (:func:`run_line`: the values many runs share
encoded once). When every run is done, the dataset rules have added findings to a
few runs (``AuditTotals.extras``); a :class:`ReportSource` reads the lines back in
order and splices those findings in. :class:`MemorySource` gives the same lines for
a finished in-memory audit. The writers (``report_stream``, ``report_html``) render
from a source; only the small per-run facts stay in memory. The names reports give
runs, roots and run groups are here too.

Escaping: JSON escapes control characters itself; the only strings it cannot
encode as UTF-8 are lone surrogates (file-name bytes that are not UTF-8).
They are replaced in the encoded line, once, by the visible escape that
``escapes.json_safe`` gives (``\\xff``), so no value is walked.
"""

from __future__ import annotations

import json
import os
import re
import tempfile
from collections.abc import Callable, Iterator, Sequence
from typing import IO, Any

from slicetime.escapes import SURROGATE, escape_surrogate
from slicetime.model import Counts, Finding, Scheme
from slicetime.numbers import json_times
from slicetime.pipelines.audit import AuditResult, AuditTotals, RunFacts, RunResult, dataset_names
from slicetime.pipelines.audit_memo import OWN, RUN, Content
from slicetime.readers.entities import run_name_problem, sidecar_path
from slicetime.rules.dataset import protocol_key

_ENCODER = json.JSONEncoder(ensure_ascii=False, allow_nan=False, separators=(",", ":"))


def _visible(match: re.Match[str]) -> str:
    # inside an encoded JSON string: a backslash (escaped) and the visible escape
    return "\\" + escape_surrogate(match)


def encode(value: Any) -> str:
    """Compact JSON, one line, encodable as UTF-8 (see the module docstring)."""
    text = _ENCODER.encode(value)
    return SURROGATE.sub(_visible, text) if SURROGATE.search(text) else text


def run_line(run: RunResult) -> str:
    """The contract's run object of ``run`` as one line of JSON: the same text as
    ``encode(run_object(run))``, with the values many runs share (the slice times and
    the scheme) encoded once per distinct value, and the line of a run without findings
    whose content the audit judged once (``run.content``) filled in from that content's
    line (:func:`_templated`)."""
    if run.content is not None and not run.findings:
        line = _templated(run)
        if line is not None:
            return line
    return _run_line(run)


def _run_line(run: RunResult) -> str:
    from slicetime.interfaces.report_json import run_parts

    head, origin, tail = run_parts(run)
    record = run.record
    times = _times_text(record.schedule.times) if record.schedule is not None else "null"
    scheme = _scheme_text(record.scheme) if record.scheme is not None else "null"
    first, last, middle = _ENCODER.encode(head), _ENCODER.encode(tail), _ENCODER.encode(origin)
    text = (f'{first[:-1]},"slice_times":{times},"timing_origin":{middle},"scheme":{scheme},'
            f'{last[1:]}')
    # the shared values' texts were made by encode(): only the run's own parts are searched
    odd = SURROGATE.search(first) or SURROGATE.search(last) or SURROGATE.search(middle)
    return SURROGATE.sub(_visible, text) if odd else text


#: the tokens of a judged content's record (audit_memo.RUN, OWN) as JSON encodes them
_RUN_TEXT = _ENCODER.encode(RUN)[1:-1]
_OWN_TEXT = _ENCODER.encode(OWN)[1:-1]
#: where a content's line (no entities, no findings) takes the run's entities
_ENTITIES_AT = ',"entities":{},"sidecars":['
#: content -> its line with the tokens (None: not filled in); held, emptied when full
_templates: dict[Content, tuple[str, str] | None] = {}


def _templated(run: RunResult) -> str | None:
    """The run's line from its judged content's line: the content's record (the tokens
    in place of the run's path and own sidecar, no entities) encoded once, then the
    names and the entities put in. The first run of a content checks the filled-in line
    against its line made in full; a content whose lines differ is never filled in.
    None: make the line in full (a name that holds a lone surrogate, a content not
    filled in)."""
    content = run.content
    assert content is not None
    record = run.record
    path, own = record.path, sidecar_path(record.path)
    if SURROGATE.search(path) or SURROGATE.search(own):
        return None
    if content in _templates:
        made = _templates[content]
        if made is None:
            return None
    else:
        text = _run_line(RunResult(content.record, []))
        head, found, tail = text.rpartition(_ENTITIES_AT)
        made = (head, tail) if found else None
        if made is not None and _filled(made, path, own, record.entities) != _run_line(run):
            made = None
        if len(_templates) >= _FRAGMENTS_MAX:
            _templates.clear()
        _templates[content] = made
        if made is None:
            return None
    entities = _ENCODER.encode(record.entities)
    if SURROGATE.search(entities):
        return None
    return _filled(made, path, own, record.entities, entities)


def _filled(made: tuple[str, str], path: str, own: str, entities: Any,
            encoded: str | None = None) -> str:
    head, tail = made
    path_text, own_text = _ENCODER.encode(path)[1:-1], _ENCODER.encode(own)[1:-1]
    return (head.replace(_RUN_TEXT, path_text).replace(_OWN_TEXT, own_text)
            + ',"entities":' + (encoded if encoded is not None else _ENCODER.encode(entities))
            + ',"sidecars":[' + tail.replace(_RUN_TEXT, path_text).replace(_OWN_TEXT, own_text))


#: encodings of shared values; emptied when full, so memory stays bounded
_FRAGMENTS_MAX = 4096
_times_texts: dict[tuple[float, ...], str] = {}
_scheme_texts: dict[int, tuple[Scheme, str]] = {}  # id -> (the scheme, its text)


def _times_text(times: tuple[float, ...]) -> str:
    if type(times) is not tuple:
        return encode(json_times(times))
    text = _times_texts.get(times)
    if text is None:
        if len(_times_texts) >= _FRAGMENTS_MAX:
            _times_texts.clear()
        text = _times_texts[times] = encode(json_times(times))
    return text


def _scheme_text(scheme: Scheme) -> str:
    # a Scheme is immutable but not hashable (its evidence is a dict): known by identity,
    # the object kept beside its text so that its id cannot be reused meanwhile
    hit = _scheme_texts.get(id(scheme))
    if hit is not None and hit[0] is scheme:
        return hit[1]
    if len(_scheme_texts) >= _FRAGMENTS_MAX:
        _scheme_texts.clear()
    text = encode(scheme.to_json())
    _scheme_texts[id(scheme)] = (scheme, text)
    return text


# --------------------------------------------------------------------------- sources


def _completed(obj: dict[str, Any], more: Sequence[Finding] | None,
               folded: Sequence[tuple[int, Finding]] | None) -> dict[str, Any]:
    """A streamed run object with what the dataset rules found: findings added, and
    those that follow from one of the run's root causes listed under that root's
    ``evidence["folded"]``: the decision was made once (``rules.registry.fold``, in the
    audit), this only writes it into the JSON, as ``attach_folded`` does in memory."""
    from slicetime.rules.registry import folded_entry, is_fold_root

    findings = obj["findings"]
    if folded:
        roots = [d for d in findings if is_fold_root(d["code"])]
        for number, finding in folded:
            evidence = roots[number].setdefault("evidence", {})
            evidence.setdefault("folded", []).append(folded_entry(finding))
    if more:
        findings.extend(f.to_json() for f in more)
    return obj


class ReportSource:
    """The runs of one audit for the writers: facts in memory, objects on demand."""

    def __init__(self, totals: AuditTotals, root_given: str) -> None:
        self.totals = totals
        self.root_given = root_given

    def _raw(self) -> Iterator[str]:
        raise NotImplementedError

    def lines(self) -> Iterator[str]:
        """Every run's final object as one line of JSON (no newline), in order."""
        extras, folds = self.totals.extras, self.totals.folds
        for index, line in enumerate(self._raw()):
            more, folded = extras.get(index), folds.get(index)
            if more or folded:
                line = encode(_completed(json.loads(line), more, folded))
            yield line

    def objects(self, wanted: Callable[[int], bool] | None = None
                ) -> Iterator[tuple[int, dict[str, Any]]]:
        """(index, run object) for every run, or only those ``wanted`` accepts."""
        extras, folds = self.totals.extras, self.totals.folds
        for index, line in enumerate(self._raw()):
            if wanted is not None and not wanted(index):
                continue
            obj = json.loads(line)
            more, folded = extras.get(index), folds.get(index)
            if more or folded:
                obj = json.loads(encode(_completed(obj, more, folded)))
            yield index, obj

    def close(self) -> None:
        """Release the spool, if any."""


class RunSpool(ReportSource):
    """Run lines in a temporary file (deleted on close), written as runs finish."""

    def __init__(self, root_given: str) -> None:
        super().__init__(AuditTotals(roots=[]), root_given)
        self._file: IO[str] = tempfile.TemporaryFile(
            "w+", encoding="utf-8", newline="\n", buffering=1 << 20)

    def add(self, run: RunResult) -> None:
        self.add_line(run_line(run))

    def add_line(self, line: str) -> None:
        """A run's line made elsewhere (``audit_stream(prepare=run_line)``)."""
        self._file.write(line)
        self._file.write("\n")

    def _raw(self) -> Iterator[str]:
        self._file.flush()
        self._file.seek(0)
        for line in self._file:
            yield line[:-1]
        self._file.seek(0, os.SEEK_END)

    def close(self) -> None:
        self._file.close()


class MemorySource(ReportSource):
    """A finished :class:`AuditResult` (every finding already in its runs)."""

    def __init__(self, result: AuditResult, root_given: str) -> None:
        from slicetime.pipelines.audit_facts import Interner

        shared = Interner()
        totals = AuditTotals(roots=list(result.roots), names=dataset_names(result.roots),
                             policies=dict(result.policies),
                             dataset_findings=list(result.dataset_findings),
                             counts=result.counts(), ignored=result.ignored_count(),
                             judged_by_policy=result.judged_by_policy)
        totals.facts = [RunFacts(r.record, Counts.of(r.findings), shared)
                        for r in result.runs]
        missing = {f.root for f in totals.facts} - set(totals.names)
        if missing:
            totals.names.update(dataset_names(missing))
        super().__init__(totals, root_given)
        self._runs = result.runs

    def _raw(self) -> Iterator[str]:
        for run in self._runs:
            yield run_line(run)


# --------------------------------------------------------------------------- naming


def report_root(totals: AuditTotals) -> str:
    """The report's ``root``: the dataset name(s), never ``.``."""
    roots = list(dict.fromkeys([*totals.roots, *(f.root for f in totals.facts)]))
    return ", ".join(totals.names.get(r, r) for r in roots)


def several_roots(totals: AuditTotals) -> bool:
    return len({f.root for f in totals.facts}) > 1


def display_path(totals: AuditTotals, facts: RunFacts, path: str, *, several: bool) -> str:
    """A run's path as reports show it: with the dataset name in front when the
    runs come from more than one root (two ``sub-01`` must not look the same)."""
    return f"[{totals.names.get(facts.root, facts.root)}] {path}" if several else path


#: the suffix place of the group of runs whose names are not BIDS names (no valid
#: suffix holds a space; sorts after every valid suffix)
NOT_BIDS = "~ not BIDS"
#: how reports name that group
NOT_BIDS_LABEL = "file names that are not valid BIDS names"


def run_group(facts: RunFacts) -> tuple[str, ...]:
    """The group a report puts a run in: its protocol (``rules.dataset.protocol_key``),
    or, when its file name is not a valid BIDS name (``readers.entities.run_name_problem``
    decides), one group per root and datatype for all such runs: their suffix and
    entities name no protocol."""
    if run_name_problem(facts.path.rpartition("/")[2]) is not None:
        return (facts.root, facts.datatype or "", NOT_BIDS)
    return protocol_key(facts)


def group_label(key: tuple[str, ...], root_label: str | None = None) -> str:
    """How reports name a group of runs (a :func:`run_group`): datatype, the entities
    that define the protocol and the suffix, after ``root_label`` when given."""
    datatype, suffix = key[1], key[2]
    parts = [p for p in key[3:] if not p.endswith("-")]
    name = NOT_BIDS_LABEL if suffix == NOT_BIDS else "_".join([*parts, suffix or "(no suffix)"])
    if datatype:
        name = f"{datatype}: {name}"
    return f"{root_label} {name}" if root_label else name
