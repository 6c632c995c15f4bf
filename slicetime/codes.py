"""The catalogue of finding codes, and the one way to make a finding.

Every code a report can contain is registered here once, with its severity, its
documentation, where it is checked and whether ``slicetime fix`` repairs it
(:class:`Rule`). :func:`make_finding` is the only constructor of findings outside
this module and :mod:`slicetime.model`: it refuses a code nobody registered, and
it gives the registered severity unless the call states another one that the
registration allows (``also_severities``), so the severity ``explain`` documents
is the one a report shows.

Who registers what (a code is registered in the lowest layer that emits it, so the
emitter can always import its registration):

* the readers' codes (``file/*``, ``sidecar/*``, ``inherit/ambiguous``,
  ``source/unreadable``): :mod:`slicetime.readers.codes`;
* ``policy/invalid``: :mod:`slicetime.policy.loading`;
* every check of the rules layer, and the batch, correction and verify codes:
  :mod:`slicetime.rules` (``run_rule``, ``dataset_rule``, ``reader_code`` of
  :mod:`slicetime.rules.registry`, which extend this catalogue).

Pure: no I/O. The check functions of run and dataset rules are stored on their
:class:`Rule` but typed loosely here (the rules layer owns their types).
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass
from typing import Any, Literal

from slicetime.model import Finding, Severity

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
    """One registered code: its documentation, severity and (for checks) its function."""

    code: str
    title: str
    severity: Severity
    rationale: str
    fix: str | None
    scope: Scope
    #: the check (a run or dataset check of :mod:`slicetime.rules.registry`), or None
    #: when the code is raised elsewhere (readers, batch, correct, verify)
    check: Callable[..., Any] | None = None
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


#: every registered code, in registration order
RULES: dict[str, Rule] = {}
#: former codes still understood for one release (lab policies, ``explain``): old -> new
RENAMED: dict[str, str] = {}


def register(rule: Rule) -> Rule:
    """Add ``rule`` to the catalogue; a code is registered once, as ``area/short-name``."""
    if rule.code in RULES:
        raise RuntimeError(f"finding code registered twice: {rule.code}")
    area, _, name = rule.code.partition("/")
    if not area or not name or rule.code != rule.code.lower():
        raise RuntimeError(f"finding codes are lower-case area/short-name: {rule.code!r}")
    if rule.checked not in CHECKED:
        raise RuntimeError(f"{rule.code}: unknown place of checking {rule.checked!r}")
    if rule.severity in rule.also_severities:
        raise RuntimeError(f"{rule.code}: also_severities repeats the registered severity")
    RULES[rule.code] = rule
    return rule


def declare(
    code: str,
    *,
    title: str,
    severity: Severity,
    rationale: str,
    fix: str | None = None,
    standard: str | None = None,
    checked: Checked = "reading",
    fixable: bool = False,
    also_severities: Iterable[Severity] = (),
    timing_in_doubt: bool = False,
) -> Rule:
    """Register a code raised outside the rules' checks (no check function): by the
    readers (the default), the batch, verify, correct or the source cross-check."""
    return register(Rule(code, title, severity, rationale, fix, "reader", None, standard,
                         checked=checked, fixable=fixable,
                         also_severities=frozenset(also_severities),
                         timing_in_doubt=timing_in_doubt))


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


__all__ = ["CHECKED", "RENAMED", "RULES", "Checked", "Rule", "Scope", "UnknownCode", "declare",
           "make_finding", "register", "rule_of"]
