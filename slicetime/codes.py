"""The catalogue of finding codes, and the one way to make a finding.

Every code a report can contain is declared once, in one table shipped with the
package (``slicetime/data/codes.toml``): its severity, its documentation, where it is
checked and whether ``slicetime fix`` repairs it. This module loads the table when
it is imported, so :data:`RULES` is complete after ``import slicetime.codes`` alone,
whichever layer asks. :func:`make_finding` is the only constructor of findings outside
this module and :mod:`slicetime.model`: it refuses a code the table does not declare,
and it gives the declared severity unless the call states another one that the
declaration allows (``also_severities``), so the severity ``explain`` documents is
the one a report shows.

The checks themselves are functions of the rules layer, bound to their codes in one
table (:mod:`slicetime.rules.bindings`); a check reports :class:`Hit` values, which
:func:`to_finding` turns into findings of its code.

Pure: no I/O but reading the package's own table once (through a cache of the parsed
table in the user's cache folder: see :func:`_parsed_table`).
"""

from __future__ import annotations

import contextlib
import dataclasses
import marshal
import os
import sys
import zlib
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any, Literal, get_args

from slicetime.model import Finding, RunView, Severity

Scope = Literal["run", "dataset", "reader"]

#: where a code's check really happens, as ``slicetime explain`` says it; every
#: registration declares one (run, dataset and reader registrations have a default)
CHECKED = {
    "metadata": "in each run's metadata (its sidecars and header)",
    "dataset": "across the dataset (runs compared with each other)",
    "reading": "while reading the files",
    "data": "in the image data",
    "batch": "in the batch (a worker that ran the run)",
    "source": "against the source DICOM series",
    "policy": "in the lab policy",
    "correcting": "while correcting",
}
Checked = Literal["metadata", "dataset", "reading", "data", "batch", "source", "policy",
                  "correcting"]


class UnknownCode(LookupError):
    """A finding was made with a code nobody registered (a bug, never a user mistake)."""


@dataclass(frozen=True)
class Rule:
    """One declared code: its documentation, its severity, where it is checked."""

    code: str
    title: str
    severity: Severity
    rationale: str
    fix: str | None
    #: run or dataset: checked by a function of the rules layer bound to the code
    #: (:mod:`slicetime.rules.bindings`); reader: raised elsewhere (readers, policy,
    #: batch, correct, verify)
    scope: Scope
    #: the standard's check this rule covers, when one exists (for docs and tests)
    standard: str | None = None
    #: codes that follow from this rule's finding: on the same run and field they are
    #: folded into it (listed in its evidence) instead of reported again
    subsumes: frozenset[str] = frozenset()
    #: where the check happens (a key of :data:`CHECKED`)
    checked: Checked = "metadata"
    #: whether ``slicetime fix`` repairs a finding of this code
    fixable: bool = False
    #: severities a call may state instead of ``severity`` (e.g. a warning that becomes
    #: an error for a timing field); any other stated severity is refused
    also_severities: frozenset[Severity] = frozenset()
    #: whether a finding of this code puts the run's slice times themselves in doubt
    #: (another source contradicts them: the header, the source series, the image
    #: data, the lab's protocol or the dataset's other runs); ``correct`` refuses such
    #: a run at warning level or above unless the user accepts the doubt
    #: (:func:`slicetime.rules.correction.timing_doubts`)
    timing_in_doubt: bool = False

    @property
    def checked_text(self) -> str:
        return CHECKED[self.checked]


#: the table of declarations (package data), loaded once below
CATALOGUE_FILE = "data/codes.toml"


def _declaration(code: str, entry: Mapping[str, Any]) -> Rule:
    """One table entry as a :class:`Rule`; a malformed entry is a bug of the package."""
    known = {"title", "severity", "also_severities", "scope", "checked", "fixable",
             "timing_in_doubt", "subsumes", "standard", "rationale", "fix"}
    area, _, name = code.partition("/")
    problems = [
        f"unknown keys {sorted(set(entry) - known)}" if set(entry) - known else "",
        "codes are lower-case area/short-name" if not area or not name
        or code != code.lower() else "",
        f"unknown place of checking {entry.get('checked')!r}"
        if entry.get("checked") not in CHECKED else "",
        f"unknown scope {entry.get('scope')!r}"
        if entry.get("scope") not in get_args(Scope) else "",
    ]
    if any(problems):
        raise RuntimeError(f"{CATALOGUE_FILE} [{code}]: " + "; ".join(p for p in problems if p))
    severity = Severity(entry["severity"])
    also = frozenset(Severity(s) for s in entry.get("also_severities", ()))
    if severity in also:
        raise RuntimeError(f"{CATALOGUE_FILE} [{code}]: also_severities repeats the severity")
    return Rule(code, entry["title"], severity, entry["rationale"], entry.get("fix"),
                entry["scope"], entry.get("standard"), frozenset(entry.get("subsumes", ())),
                entry["checked"], entry.get("fixable", False), also,
                entry.get("timing_in_doubt", False))


def package_data(name: str) -> bytes:
    """The bytes of ``slicetime/data/<name>``, through the package's loader (as
    :mod:`importlib.resources` would read them, without its 20 ms of imports)."""
    loader = __spec__.loader if __spec__ is not None else None
    path = os.path.join(os.path.dirname(__file__), "data", name)
    get_data = getattr(loader, "get_data", None)
    if get_data is None:  # pragma: no cover - every file-system or zip loader has it
        with open(path, "rb") as fh:
            return fh.read()
    data: bytes = get_data(path)
    return data


def _cache_path(source: bytes) -> str:
    """Where the parsed catalogue ``source`` is kept: the user's cache folder
    (``$XDG_CACHE_HOME``, else ``~/.cache``; ``%LOCALAPPDATA%`` on Windows), a file
    named for the running Python (``marshal``'s format may change between versions) and
    for the table's checksum and size, so installations with different catalogues do
    not take turns rewriting one file."""
    base = os.environ.get("XDG_CACHE_HOME") or (
        os.environ.get("LOCALAPPDATA", "") if os.name == "nt" else ""
    ) or os.path.join(os.path.expanduser("~"), ".cache")
    key = f"{zlib.crc32(source):08x}-{len(source)}"
    return os.path.join(base, "slicetime", f"codes-{key}.{sys.implementation.cache_tag}.marshal")


def _parsed_table(source: bytes) -> dict[str, Any]:
    """The TOML table ``source`` parsed, from the cache when the cache was made from
    exactly these bytes (parsing costs about 10 ms a start; the cache's check and load
    well under 1 ms). The cache holds the source bytes beside the table and is used only
    when they are equal, so a stale, edited or corrupt cache file can only cost a parse.
    It is written to a temporary name, then renamed; where it cannot be written (no home,
    a read-only one) the table is parsed at every start, as it was before the cache."""
    path = _cache_path(source)
    try:
        with open(path, "rb") as fh:
            cached = marshal.loads(fh.read())
        if (type(cached) is tuple and len(cached) == 2 and cached[0] == source
                and type(cached[1]) is dict):
            table: dict[str, Any] = cached[1]
            return table
    except (OSError, EOFError, ValueError, TypeError):
        pass
    if sys.version_info >= (3, 11):
        import tomllib
    else:  # pragma: no cover
        import tomli as tomllib
    table = tomllib.loads(source.decode("utf-8"))
    temporary = f"{path}.{os.getpid()}.tmp"
    try:
        os.makedirs(os.path.dirname(path), exist_ok=True)
        with open(temporary, "wb") as fh:
            fh.write(marshal.dumps((source, table)))
        os.replace(temporary, path)
    except (OSError, ValueError):  # unwritable, or a value marshal cannot keep
        with contextlib.suppress(OSError):
            os.unlink(temporary)
    return table


def _load() -> tuple[dict[str, Rule], dict[str, str]]:
    table = dict(_parsed_table(package_data(CATALOGUE_FILE.removeprefix("data/"))))
    renamed = dict(table.pop("renamed", {}))
    rules = {code: _declaration(code, entry) for code, entry in table.items()}
    for old, new in renamed.items():
        if old in rules or new not in rules:
            raise RuntimeError(f"{CATALOGUE_FILE} [renamed]: {old} -> {new}: the former "
                               "name is still declared, or the new one is not")
    for rule in rules.values():
        if not rule.subsumes <= rules.keys():
            raise RuntimeError(f"{CATALOGUE_FILE} [{rule.code}]: subsumes an unknown code")
    return rules, renamed


#: every declared code, in the table's order
RULES: dict[str, Rule]
#: former codes still understood for one release (lab policies, ``explain``): old -> new
RENAMED: dict[str, str]
RULES, RENAMED = _load()


def rule_of(code: str) -> Rule:
    """The registration of ``code``; :class:`UnknownCode` when there is none."""
    rule = RULES.get(code)
    if rule is None:
        raise UnknownCode(f"finding code {code!r} is not registered")
    return rule


def make_finding(
    code: str,
    message: str,
    *,
    file: str | None = None,
    field: str | None = None,
    evidence: Mapping[str, Any] | None = None,
    hint: str | None = None,
    severity: Severity | None = None,
) -> Finding:
    """A finding of the registered code ``code``.

    Parameters
    ----------
    code
        A registered code (:data:`RULES`); :class:`UnknownCode` otherwise.
    message
        One line for people; names the file and the field.
    file, field
        Where the problem is (a display path; a sidecar key or header field).
    evidence
        The values the finding rests on (its ``evidence`` in reports).
    hint
        What to do, when the call knows better than the registration's ``fix``;
        None gives a finding without a hint.
    severity
        A stated override of the registered severity; it must be one of the
        registration's ``also_severities`` (:class:`ValueError` otherwise).
    """
    rule = rule_of(code)
    if severity is None or severity is rule.severity:
        chosen = rule.severity
    elif severity in rule.also_severities:
        chosen = severity
    else:
        raise ValueError(
            f"{code} is registered as {rule.severity.value}; "
            f"{severity.value} is not among its allowed overrides"
        )
    return Finding(code, chosen, message, file, field, dict(evidence or {}), hint)


@dataclass(frozen=True)
class Hit:
    """What a check reports about a run; :func:`to_finding` adds code and severity."""

    message: str
    field: str | None = None
    evidence: Mapping[str, Any] = dataclasses.field(default_factory=dict)
    hint: str | None = None
    file: str | None = None  # defaults to the sidecar that supplied ``field``, else the run
    severity: Severity | None = None  # overrides the rule's default for this hit


def to_finding(rule: Rule, record: RunView | None, hit: Hit) -> Finding:
    """The finding of ``rule``'s code that ``hit`` reports about ``record``."""
    file = hit.file
    if file is None and record is not None:
        if hit.field and hit.field in record.metadata_sources:
            file = record.metadata_sources[hit.field]
        else:
            file = record.path
    return make_finding(rule.code, hit.message, file=file, field=hit.field,
                        evidence=hit.evidence,
                        hint=hit.hint if hit.hint is not None else rule.fix,
                        severity=hit.severity)


__all__ = ["CHECKED", "RENAMED", "RULES", "Checked", "Hit", "Rule", "Scope", "UnknownCode",
           "make_finding", "rule_of", "to_finding"]
