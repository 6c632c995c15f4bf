"""``slicetime pin``: write the dataset's protocol, as it is, as a lab policy.

Per task and acquisition (and suffix, when it is not ``bold``), the runs are
read as the audit reads them and each expectation of the policy format
(:data:`slicetime.policy.model.EXPECTATION_KEYS`) takes the value a strict
majority of the runs has (the value the policy checks compare, from
:func:`slicetime.policy.checks.observed`). A key without a strict majority is
left out and said so in a comment. The runs that disagree with the written
values are listed as comments under their entry, each with the ``policy/*``
code the written policy will give it: the list is made by the policy's own
checks (:func:`slicetime.policy.checks.judge`), so the policy applied to the
same dataset reports exactly those runs.

Runs with no usable timing (an image that could not be read, e.g. an empty or
not-retrieved file; slice times that could not be resolved) give no values: they
are left out and listed as comments under their entry.

Only the expected protocols (``version`` and ``[[protocols]]``) are written;
severities and ignore entries are the lab's to add. Comment lines fit 80 columns
(a single path longer than that stays whole).
"""

from __future__ import annotations

import json
import textwrap
from collections import Counter, defaultdict
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from slicetime.model import RunRecord, implausible_repetition
from slicetime.numbers import plain
from slicetime.pipelines.audit import audit_paths
from slicetime.policy.checks import judge, observed
from slicetime.policy.model import EXPECTATION_KEYS, ExpectedProtocol
from slicetime.schemes.labels import label_multiband, label_problem, normalise_label
from slicetime.words import agree, count

__all__ = ["PinnedEntry", "pin_protocols", "policy_text"]

#: the suffix most runs have; others are named in the match
_DEFAULT_SUFFIX = "bold"
#: the width comment lines fit
_WIDTH = 80


@dataclass
class PinnedEntry:
    """One ``[[protocols]]`` entry: its match, the majority's values, and the runs
    (path, code, what the run has) that disagree with them."""

    match: dict[str, str]
    runs: int
    values: dict[str, Any] = field(default_factory=dict)
    disagreeing: list[tuple[str, str, str]] = field(default_factory=list)
    left_out: list[str] = field(default_factory=list)
    #: runs with no usable timing (path, why), which gave no values
    unusable: list[tuple[str, str]] = field(default_factory=list)

    @property
    def name(self) -> str:
        parts = [f"{k}-{v}" for k, v in self.match.items() if k != "suffix"]
        return "_".join([*parts, self.match.get("suffix", _DEFAULT_SUFFIX)])


def _majority(values: Sequence[Any]) -> tuple[Any, int] | None:
    known = [v for v in values if v is not None]
    if not known:
        return None
    value, votes = Counter(known).most_common(1)[0]
    return (value, votes) if votes * 2 > len(known) else None


def _key(value: Any) -> Any:
    return round(value, 6) if isinstance(value, float) else value


def _no_usable_timing(record: RunRecord) -> str | None:
    """Why the run cannot tell its protocol, or None when it can: its image header was
    not read (empty, not retrieved, unreadable) or its slice times were not resolved."""
    if record.header is None:
        return "its image could not be read (empty, not retrieved or unreadable)"
    if record.schedule is None:
        return "its slice times could not be resolved"
    tr = record.timing.repetition_time
    implausible = implausible_repetition(tr) if tr is not None else None
    if implausible is not None:  # the audit's tr/implausible: no protocol to state
        return f"its repetition time, {plain(tr)} s, is {implausible}"
    return None


def _entry(match: dict[str, str], records: Sequence[RunRecord]) -> PinnedEntry:
    unusable = [(r.path, why) for r in records if (why := _no_usable_timing(r)) is not None]
    records = [r for r in records if _no_usable_timing(r) is None]
    entry = PinnedEntry(match, len(records), unusable=sorted(unusable))
    seen = [observed(r) for r in records]
    for key in EXPECTATION_KEYS:
        found = _majority([_key(s[key]) for s in seen])
        known = sum(s[key] is not None for s in seen)
        if found is None:
            if known:
                entry.left_out.append(f"{key}: no value is held by more than half of the "
                                      f"{count(known, 'run')} that {agree(known, 'has')} "
                                      "one")
            continue
        value = found[0]
        if key == "scheme" and label_problem(normalise_label(value)) is not None:
            entry.left_out.append(f"scheme: {value!r} cannot be stated as a policy label")
            continue
        entry.values[key] = value
    implied = label_multiband(normalise_label(entry.values["scheme"])) \
        if "scheme" in entry.values else None
    if implied is not None and entry.values.get("multiband_factor", implied) != implied:
        entry.left_out.append("scheme: the majority's label implies another multiband factor "
                              "than the majority's")
        del entry.values["scheme"]
    protocol = ExpectedProtocol(index=0, match=dict(match), name=entry.name,
                                **entry.values)
    for record in sorted(records, key=lambda r: r.path):
        for code, hit in judge(protocol, record):
            entry.disagreeing.append((record.path, code, _shown(hit.evidence.get("found"))))
    return entry


def _shown(value: Any) -> str:
    if isinstance(value, float):
        return plain(value)
    return str(value)


def pin_protocols(paths: Sequence[Path], **walk: Any) -> tuple[list[PinnedEntry], int]:
    """The entries for the runs under ``paths`` (read as ``audit`` reads them), and the
    number of runs left out because their name has no task."""
    result = audit_paths(list(paths), **walk)
    groups: dict[tuple[str, ...], list[RunRecord]] = defaultdict(list)
    untasked = 0
    for run in result.runs:
        record = run.record
        task = record.entities.get("task")
        if not task:
            untasked += 1
            continue
        acq = record.entities.get("acq")
        groups[(task, acq or "", record.suffix or _DEFAULT_SUFFIX)].append(record)
    entries = []
    for (task, acq, suffix), records in sorted(groups.items()):
        match = {"task": task}
        if acq:
            match["acq"] = acq
        if suffix != _DEFAULT_SUFFIX:
            match["suffix"] = suffix
        entries.append(_entry(match, records))
    return entries, untasked


def _toml_value(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        text = repr(value)
        return text if any(c in text for c in ".en") else text + ".0"
    return json.dumps(str(value), ensure_ascii=False)  # a TOML basic string


def _comment(text: str, indent: str = "") -> list[str]:
    """``text`` as comment lines of at most :data:`_WIDTH` columns (a word longer than
    that, such as a long path, stays whole); later lines are indented two more."""
    flat = text.replace("\n", " ").replace("\r", " ")
    return textwrap.wrap(flat, width=_WIDTH, initial_indent="# " + indent,
                         subsequent_indent="# " + indent + "  ", break_long_words=False,
                         break_on_hyphens=False) or ["#"]


def _agreement(entry: PinnedEntry) -> list[str]:
    """The comment lines on which of the entry's runs agree with it."""
    if not entry.disagreeing:
        return _comment("the only run agrees" if entry.runs == 1
                        else f"all {count(entry.runs, 'run')} agree")
    n = len({p for p, _, _ in entry.disagreeing})
    lines = _comment(f"{n} of {count(entry.runs, 'run')} {agree(n, 'disagrees')}:")
    for path, code, found in entry.disagreeing:
        lines += _comment(path, "  ") + _comment(f"{code} (has {found})", "    ")
    return lines


def _unusable(entry: PinnedEntry) -> list[str]:
    if not entry.unusable:
        return []
    n = len(entry.unusable)
    lines = _comment(f"left out: {count(n, 'run')} with no usable timing (no values taken "
                     f"from {'it' if n == 1 else 'them'}):")
    for path, why in entry.unusable:
        lines += _comment(path, "  ") + _comment(why, "    ")
    return lines


def policy_text(entries: Sequence[PinnedEntry], where: str, untasked: int = 0) -> str:
    """The policy file: ``version``, one ``[[protocols]]`` per entry, and comments."""
    lines = [
        *_comment(f"Lab policy written by `slicetime pin` from {where}."),
        "# Per task and acquisition: the value a majority of the runs has for each",
        "# expectation.",
        "# Review it, keep it beside the dataset (slicetime-policy.toml at its root, or",
        "# pass --policy FILE), and every later deviation becomes a policy/* finding.",
        "# The runs that disagree today are listed under their entry; the audit with this",
        "# policy reports exactly those (fix them, or give them their own entry).",
    ]
    if untasked:
        lines += _comment(f"{count(untasked, 'run')} without a task in "
                          f"{'its' if untasked == 1 else 'their'} name "
                          f"{agree(untasked, 'is')} not covered.")
    lines += ["", "version = 1"]
    for entry in entries:
        if not entry.values:  # the format wants at least one expectation per entry
            lines.append("")
            why = (f"no expectation has a majority of its {count(entry.runs, 'run')}"
                   if entry.runs else "no run has usable timing")
            lines += _comment(f"{entry.name}: {why}; no entry written")
            for note in entry.left_out:
                lines += _comment(f"left out: {note}")
            lines += _unusable(entry)
            continue
        lines += ["", "[[protocols]]", f"name = {_toml_value(entry.name)}"]
        match = ", ".join(f"{k} = {_toml_value(v)}" for k, v in entry.match.items())
        lines.append(f"match = {{ {match} }}")
        for key in EXPECTATION_KEYS:
            if key in entry.values:
                lines.append(f"{key} = {_toml_value(entry.values[key])}")
        for note in entry.left_out:
            lines += _comment(f"left out: {note}")
        lines += _unusable(entry)
        lines += _agreement(entry)
    return "\n".join(lines) + "\n"
