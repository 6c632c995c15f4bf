"""Applying the lab policy to runs and findings. Pure: no I/O.

The policy itself is in :mod:`slicetime.policy.model` (the value types) and
:mod:`slicetime.policy.loading` (its format and the loader). This module, in the
same layer as the rest of the package (it needs only the catalogue of codes, never
the rules):

* :func:`check_protocol` compares one run with the protocol the policy
  expects for it and returns ``policy/*`` findings;
* :func:`apply_overrides_and_ignores` applies the ``[levels]`` table and the
  ``[[waive]]`` entries to any findings (reader, run and dataset findings
  alike) and returns the kept ones and the ignored ones
  (:class:`PolicyOutcome`), so a report can say how many the policy hid;
* :func:`apply_policy` does both for one run;
* registers the ``policy/*`` codes so ``slicetime explain`` documents them.

Choosing the protocol of a run (:func:`select_protocol`): among the
``[[protocols]]`` whose ``match`` selects the run, the one with the most
``match`` keys wins. When several tie for most specific, they are used if
they expect the same things (the first is named in findings); if they
disagree, the run gets one ``policy/ambiguous-protocol`` finding and no other
protocol checks, because any choice would be a guess.

What each expectation is compared with (a run without a usable schedule still
gets the checks its header and sidecar allow):

``repetition_time``
    the schedule's TR (sidecar ``RepetitionTime``, else header ``pixdim[4]``);
    without a schedule the same precedence over the raw values. Runs timed by
    ``VolumeTiming`` have no TR and are not checked. Differences up to the
    protocol's ``tolerance`` (default 0.003 s) are accepted.
``slices``
    the image's extent along the slice axis (header ``dim``): the schedule's
    axis, else the sidecar's ``SliceEncodingDirection``, else the protocol's
    ``slice_encoding_direction``, else ``k`` (the BIDS default).
``multiband_factor``
    the size of the excitation groups the slice times form (when there is
    more than one group of equal size); else a declared whole-number
    ``MultibandAccelerationFactor``; else not checked.
``scheme``
    the inferred scheme's label (exact label) or its order (family: regular
    schemes only; ``sequential`` means step 1, ``interleaved`` step 2 or more).
    Needs slice times. Labels describe the order of data-array indices.
``slice_encoding_direction``
    the schedule's axis and direction; without a schedule the sidecar's
    ``SliceEncodingDirection``; when it is absent the BIDS default ``k``
    (which is then reported as not matching a protocol that expects another).

Severity overrides replace the severity of every finding with that code
(an exact code beats a pattern). Ignore entries drop a finding when one of
their ``codes`` matches its code and one of their ``paths`` matches the run's
dataset-relative path; for findings about the dataset as a whole (``path``
None) the finding's own ``file`` is matched instead, and a finding without a
file only matches patterns that match everything (``**``). Ignoring happens
before severity overrides; an ignored finding keeps its original severity.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Iterator
from dataclasses import dataclass
from typing import Any, cast

from slicetime.codes import RULES, Hit, to_finding
from slicetime.model import AXES, Axis, Finding, RunRecord, RunView, Scheme, Source
from slicetime.numbers import as_written, secs
from slicetime.policy.model import ExpectedProtocol, IgnoreEntry, Policy
from slicetime.schemes.labels import SchemeFamily, scheme_family
from slicetime.schemes.resolve import is_number, parse_direction

__all__ = [
    "ExpectedProtocol",
    "IgnoreEntry",
    "IgnoredFinding",
    "Policy",
    "PolicyOutcome",
    "ProtocolChoice",
    "apply_overrides_and_ignores",
    "apply_policy",
    "check_protocol",
    "dataset_codes_judged",
    "judge",
    "observed",
    "select_protocol",
]

_SLACK = 1e-9  # float noise when comparing with a tolerance

_OWN_ENTRY = (
    "If the run was acquired with another protocol on purpose, give it its own [[protocols]] "
    "entry with a more specific match (or waive the code for it with a reason)."
)

# --------------------------------------------------------------------------- results


@dataclass(frozen=True)
class IgnoredFinding:
    """A finding the policy dropped, and the ``[[waive]]`` entry that dropped it."""

    finding: Finding
    entry: IgnoreEntry

    @property
    def reason(self) -> str:
        return self.entry.reason


@dataclass(frozen=True)
class PolicyOutcome:
    """Findings after the policy: those kept (severities overridden) and those ignored."""

    kept: tuple[Finding, ...] = ()
    ignored: tuple[IgnoredFinding, ...] = ()

    def ignored_by_reason(self) -> dict[str, int]:
        """How many findings each ignore reason dropped (in file order of first use)."""
        counts: dict[str, int] = {}
        for item in self.ignored:
            counts[item.reason] = counts.get(item.reason, 0) + 1
        return counts


@dataclass(frozen=True)
class ProtocolChoice:
    """The protocol that applies to a run, or the disagreeing candidates when ambiguous."""

    protocol: ExpectedProtocol | None
    tied: tuple[ExpectedProtocol, ...] = ()


# --------------------------------------------------------------------------- applying


def select_protocol(policy: Policy, record: RunView) -> ProtocolChoice:
    """The most specific protocol selecting ``record`` (see the module docstring)."""
    matching = [
        p for p in policy.protocols if p.selects(record.entities, record.datatype, record.suffix)
    ]
    if not matching:
        return ProtocolChoice(None)
    top = max(p.specificity for p in matching)
    best = [p for p in matching if p.specificity == top]
    first = best[0]
    same = all(
        p.expectations() == first.expectations() and p.tolerance == first.tolerance
        for p in best[1:]
    )
    return ProtocolChoice(first) if same else ProtocolChoice(None, tuple(best))


#: which dataset consensus each stated protocol value takes over
_JUDGED_BY = (
    ("repetition_time", "dataset/outlier-tr"),
    ("slices", "dataset/outlier-slices"),
    ("scheme", "dataset/outlier-scheme"),
    ("multiband_factor", "dataset/outlier-scheme"),
)


def dataset_codes_judged(policy: Policy, record: RunView) -> frozenset[str]:
    """The dataset consensus codes that do not apply to ``record`` because the protocol
    the policy selects for it states that value: the run is judged by the protocol
    (``policy/*``), not by the majority of its task and acquisition, and it does not
    count towards that majority either. A stated multiband factor takes over the scheme
    consensus too (the scheme label includes the factor). A run whose protocols tie is
    judged by none of them."""
    protocol = select_protocol(policy, record).protocol
    if protocol is None:
        return frozenset()
    return frozenset(code for key, code in _JUDGED_BY if getattr(protocol, key) is not None)


def check_protocol(policy: Policy, record: RunRecord) -> list[Finding]:
    """``policy/*`` findings for one run against the protocol the policy expects for it."""
    choice = select_protocol(policy, record)
    if choice.tied:
        return [
            to_finding(
                RULES["policy/ambiguous-protocol"], record, _ambiguous(policy, record, choice.tied)
            )
        ]
    protocol = choice.protocol
    if protocol is None:
        return []
    return [to_finding(RULES[code], record, hit)
            for code, hit in _protocol_hits(policy, protocol, record)]


def apply_overrides_and_ignores(
    policy: Policy, path: str | None, findings: Iterable[Finding]
) -> PolicyOutcome:
    """Drop ignored findings and apply severity overrides.

    ``path`` is the run's dataset-relative path (``RunRecord.path``); pass None
    for findings about the whole dataset, whose own ``file`` is matched then.
    """
    kept: list[Finding] = []
    ignored: list[IgnoredFinding] = []
    for finding in findings:
        where = path if path is not None else (finding.file or "")
        entry = policy.ignore_entry(where, finding.code)
        if entry is not None:
            ignored.append(IgnoredFinding(finding, entry))
            continue
        severity = policy.severity_for(finding.code)
        if severity is not None and severity != finding.severity:
            finding = finding.with_severity(severity)
        kept.append(finding)
    return PolicyOutcome(tuple(kept), tuple(ignored))


def apply_policy(policy: Policy, record: RunRecord, findings: Iterable[Finding]) -> PolicyOutcome:
    """The run's findings plus its protocol findings, after overrides and ignores."""
    everything = [*findings, *check_protocol(policy, record)]
    return apply_overrides_and_ignores(policy, record.path, everything)


# --------------------------------------------------------------------------- the checks


def _evidence(
    policy: Policy,
    protocol: ExpectedProtocol,
    record: RunRecord,
    expected: Any,
    found: Any,
    **extra: Any,
) -> dict[str, Any]:
    evidence: dict[str, Any] = {
        "expected": expected,
        "found": found,
        "protocol": dict(protocol.match),
        "protocol_entry": protocol.key_path,
        "run": record.path,
    }
    if protocol.name:
        evidence["protocol_name"] = protocol.name
    if policy.file:
        evidence["policy"] = policy.file
    evidence.update(extra)
    return evidence


def _differs(
    policy: Policy,
    protocol: ExpectedProtocol,
    record: RunRecord,
    expected: Any,
    found: Any,
    said: str,
    wanted: str,
    field: str,
    *,
    hint: str | None = None,
    file: str | None = None,
    **extra: Any,
) -> Hit:
    """The hit of a run whose value differs from its protocol's: ``said`` (what the
    run has) "but" the protocol "expects" ``wanted`` (``expected`` as people read it),
    with the comparison's evidence (:func:`_evidence`, ``extra`` last)."""
    return Hit(
        f"{said} but {protocol.describe()} expects {wanted}",
        field,
        _evidence(policy, protocol, record, expected, found, **extra),
        hint=hint,
        file=file,
    )


def _source_file(source: Source | None, record: RunRecord) -> str:
    if source is not None and source.file:
        return source.file
    return record.path


def _found_tr(record: RunRecord) -> tuple[float, Source] | None:
    """The run's resolved repetition time (seconds) and where it came from."""
    timing = record.timing
    if timing.repetition_time is None:
        return None
    return timing.repetition_time, timing.repetition_source or Source("derived",
                                                                       "RepetitionTime")


def _check_tr(policy: Policy, protocol: ExpectedProtocol, record: RunRecord, expected: float,
              found: tuple[float, Source]) -> Hit | None:
    tr, source = found
    if abs(tr - expected) <= protocol.tolerance + _SLACK:
        return None
    from_header = source.kind == "header"
    what = (
        "the header's pixdim[4] gives a repetition time of" if from_header else "RepetitionTime is"
    )
    hint = None
    stated = secs(tr)
    if abs(tr / 1000 - expected) <= protocol.tolerance + _SLACK:
        # milliseconds are never called seconds
        hint = (f"{as_written(tr)} looks like milliseconds: {secs(tr / 1000)} is the "
                "protocol's value.")
        stated = f"{as_written(tr)} (milliseconds?)"
    return _differs(policy, protocol, record, expected, tr, f"{what} {stated}", secs(expected),
                    "pixdim[4]" if from_header else "RepetitionTime", hint=hint,
                    file=_source_file(source, record), source=source.describe(),
                    tolerance=protocol.tolerance)


def _found_slices(record: RunRecord, fallback: str | None = None) -> tuple[int, Axis] | None:
    """The image's extent along the slice axis (see the module docstring), with the axis."""
    header = record.header
    if header is None:
        return None
    axis: Axis
    if record.schedule is not None:
        axis = record.schedule.axis
    else:
        parsed = parse_direction(record.metadata.get("SliceEncodingDirection"))
        if parsed is not None:
            axis = parsed[0]
        elif fallback is not None:
            axis = cast(Axis, fallback[0])  # validated on loading
        else:
            axis = "k"
    index = AXES.index(axis)
    return (header.shape[index] if len(header.shape) > index else 1), axis


def _check_slices(policy: Policy, protocol: ExpectedProtocol, record: RunRecord, expected: int,
                  seen: tuple[int, Axis]) -> Hit | None:
    found, axis = seen
    if found == expected or record.header is None:
        return None
    return _differs(policy, protocol, record, expected, found,
                    f"the image has {found} slices along {axis}", str(expected),
                    f"dim[{AXES.index(axis) + 1}]", file=record.path, axis=axis,
                    shape=list(record.header.shape))


def _found_multiband(record: RunRecord) -> tuple[int, bool] | None:
    """The multiband factor (see the module docstring) and whether the slice times gave it."""
    scheme = record.scheme
    if (
        scheme is not None
        and len(scheme.groups) > 1
        and scheme.evidence.get("kind") != "unequal-groups"
    ):
        return scheme.multiband_factor, True
    declared = record.metadata.get("MultibandAccelerationFactor")
    if is_number(declared) and declared == int(declared) and declared >= 1:
        return int(declared), False
    return None


def _check_multiband(policy: Policy, protocol: ExpectedProtocol, record: RunRecord,
                     expected: int, seen: tuple[int, bool]) -> Hit | None:
    declared = record.metadata.get("MultibandAccelerationFactor")
    if seen[1]:
        found = seen[0]
        if found == expected:
            return None
        field = "SliceTiming" if record.timing_origin == "sidecar" else "slice_code"
        source = record.schedule.sources.get("SliceTiming") if record.schedule else None
        return _differs(policy, protocol, record, expected, found,
                        f"the slice times form excitation groups of {found} (multiband "
                        f"factor {found})", str(expected), field,
                        file=_source_file(source, record), declared=declared,
                        **{"from": "slice times"})
    found = seen[0]
    if found == expected:
        return None
    return _differs(policy, protocol, record, expected, found,
                    f"MultibandAccelerationFactor is {found}", str(expected),
                    "MultibandAccelerationFactor", **{"from": "MultibandAccelerationFactor"})


def _family_matches(family: SchemeFamily, record: RunRecord) -> bool:
    scheme = record.scheme
    if scheme is None or not scheme.regular or scheme.step is None or scheme.ascending is None:
        return False
    if family.kind is not None and (family.kind == "sequential") != (scheme.step == 1):
        return False
    return family.ascending is None or family.ascending == scheme.ascending


def _check_scheme(policy: Policy, protocol: ExpectedProtocol, record: RunRecord, expected: str,
                  scheme: Scheme) -> Hit | None:
    family = scheme_family(expected)
    if family is not None:
        if _family_matches(family, record):
            return None
        wanted = f"an order of the family {expected!r}"
    else:
        if scheme.label == expected:
            return None
        wanted = f"{expected!r}"
    extra: dict[str, Any] = {"family": family is not None}
    if "order_label" in scheme.evidence:
        extra["order_label"] = scheme.evidence["order_label"]
    if "reason" in scheme.evidence:
        extra["irregular"] = scheme.evidence["reason"]
    field = "SliceTiming" if record.timing_origin == "sidecar" else "slice_code"
    source = record.schedule.sources.get("SliceTiming") if record.schedule else None
    return _differs(policy, protocol, record, expected, scheme.label,
                    f"the slice times describe {scheme.label!r}", wanted, field,
                    hint="Scheme labels describe the order of data-array indices (after "
                    "SliceEncodingDirection); `slicetime show` prints this run's scheme. "
                    + _OWN_ENTRY, file=_source_file(source, record), **extra)


def _found_direction(record: RunRecord) -> tuple[str, Source | None] | None:
    """The slice axis and direction (see the module docstring) and where it came from."""
    schedule = record.schedule
    source: Source | None
    if schedule is not None:
        found = schedule.axis + ("-" if schedule.direction == "-" else "")
        source = schedule.sources.get("SliceEncodingDirection")
    else:
        value = record.metadata.get("SliceEncodingDirection")
        if value is None:
            found, source = "k", Source("default", "k")
        elif parse_direction(value) is not None:
            found = str(value)
            source = Source(
                "sidecar",
                "SliceEncodingDirection",
                record.metadata_sources.get("SliceEncodingDirection"),
            )
        else:
            return None  # reported as axis/unknown-direction
    return found, source


def _check_direction(policy: Policy, protocol: ExpectedProtocol, record: RunRecord,
                     expected: str, seen: tuple[str, Source | None]) -> Hit | None:
    found, source = seen
    if found == expected:
        return None
    kind = source.kind if source is not None else "sidecar"
    if kind == "default":
        text = f"SliceEncodingDirection is absent (BIDS default {found})"
        file = record.sidecar_chain[-1] if record.sidecar_chain else record.path
    elif kind == "header":
        text = f"the header's dim_info gives slice axis {found}"
        file = record.path
    else:
        text = f"SliceEncodingDirection is {found}"
        file = _source_file(source, record)
    return _differs(policy, protocol, record, expected, found, text, expected,
                    "SliceEncodingDirection",
                    hint=f'Set "SliceEncodingDirection": "{expected}" in the sidecar if the '
                    "protocol is right for this run. " + _OWN_ENTRY, file=file,
                    source=source.describe() if source is not None else None)


def _ambiguous(policy: Policy, record: RunRecord, tied: tuple[ExpectedProtocol, ...]) -> Hit:
    return Hit(
        f"{len(tied)} equally specific protocols of the lab policy select this run and "
        "disagree: " + "; ".join(p.describe() for p in tied),
        None,
        {
            "protocols": [
                {"entry": p.key_path, "match": dict(p.match), **p.expectations()} for p in tied
            ],
            "run": record.path,
            **({"policy": policy.file} if policy.file else {}),
        },
        file=record.path,
    )


def observed(record: RunRecord) -> dict[str, Any]:
    """What each expectation is compared with for this run (the module docstring), None
    where it is not checked: the values a policy written from the dataset states."""
    tr = _found_tr(record)
    slices = _found_slices(record)
    multiband = _found_multiband(record)
    direction = _found_direction(record)
    return {
        "repetition_time": tr[0] if tr is not None else None,
        "slices": slices[0] if slices is not None else None,
        "multiband_factor": multiband[0] if multiband is not None else None,
        "scheme": record.scheme.label if record.scheme is not None else None,
        "slice_encoding_direction": direction[0] if direction is not None else None,
    }


def judge(protocol: ExpectedProtocol, record: RunRecord) -> list[tuple[str, Hit]]:
    """The ``policy/*`` hits of one run against one protocol (no selection)."""
    return list(_protocol_hits(Policy(), protocol, record))


@dataclass(frozen=True)
class _Check:
    """One expectation of a protocol: its code, the protocol's key, what of the run it
    is compared with (None: not checked, see the module docstring) and the comparison
    (a hit when they differ)."""

    code: str
    key: str
    found: Callable[[RunRecord, ExpectedProtocol], Any]
    compare: Callable[[Policy, ExpectedProtocol, RunRecord, Any, Any], Hit | None]


_CHECKS = (
    _Check("policy/tr-mismatch", "repetition_time", lambda r, p: _found_tr(r), _check_tr),
    _Check("policy/slice-count", "slices",
           lambda r, p: _found_slices(r, p.slice_encoding_direction), _check_slices),
    _Check("policy/multiband-mismatch", "multiband_factor",
           lambda r, p: _found_multiband(r), _check_multiband),
    _Check("policy/scheme-mismatch", "scheme", lambda r, p: r.scheme, _check_scheme),
    _Check("policy/direction-mismatch", "slice_encoding_direction",
           lambda r, p: _found_direction(r), _check_direction),
)


def _protocol_hits(policy: Policy, protocol: ExpectedProtocol,
                   record: RunRecord) -> Iterator[tuple[str, Hit]]:
    """(code, hit) of every expectation the protocol states, the run has a value for,
    and the value differs from, in the order of :data:`_CHECKS`."""
    for check in _CHECKS:
        expected = getattr(protocol, check.key)
        if expected is None:
            continue
        found = check.found(record, protocol)
        if found is None:
            continue
        hit = check.compare(policy, protocol, record, expected, found)
        if hit is not None:
            yield check.code, hit
