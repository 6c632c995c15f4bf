"""The rule registry: every finding code, with its documentation and its check.

A rule is a small function registered under a stable code. Run rules take a
:class:`RunRecord` and yield :class:`Hit` values; dataset rules take every
record. The registry turns hits into :class:`Finding` objects carrying the
rule's code and default severity, so a rule cannot invent an unregistered
code. Codes raised while reading files (``file/*``, ``sidecar/*``,
``inherit/*``) are registered as documentation-only rules, so ``slicetime
explain`` covers every code a report can contain.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable, Iterable, Mapping, Sequence, Set
from dataclasses import dataclass
from typing import Any, cast

from slicetime.codes import (
    CHECKED,
    RENAMED,
    RULES,
    Checked,
    Rule,
    Scope,
    declare,
    make_finding,
    register,
)
from slicetime.model import Finding, RunRecord, Severity

RunCheck = Callable[[RunRecord], Iterable["Hit"]]
DatasetCheck = Callable[[Sequence[RunRecord]], Iterable["DatasetHit"]]


@dataclass(frozen=True)
class Hit:
    """What a run rule reports; the registry adds code and severity."""

    message: str
    field: str | None = None
    evidence: Mapping[str, Any] = dataclasses.field(default_factory=dict)
    hint: str | None = None
    file: str | None = None  # defaults to the sidecar that supplied ``field``, else the run
    severity: Severity | None = None  # overrides the rule's default for this hit


@dataclass(frozen=True)
class DatasetHit:
    """What a dataset rule reports about one run (or about the dataset: run=None).

    ``run`` is the run's ``abs_path``: relative paths repeat across dataset roots.
    """

    run: str | None
    hit: Hit


def current_code(code: str) -> str:
    """The code as it is named now (a former name gives its new code)."""
    return RENAMED.get(code, code)


def renamed(old: str, new: str) -> None:
    """Keep the former code ``old`` understood as ``new`` (lab policies, ``explain``)."""
    if old in RULES or old in RENAMED:
        raise RuntimeError(f"finding code {old!r} is still in use")
    RENAMED[old] = new


def known_codes() -> frozenset[str]:
    """Every code a lab policy may name: the registered ones and their former names."""
    return frozenset(RULES) | frozenset(RENAMED)


#: the run rules with a check, in registry order (what :func:`check_run` runs)
_RUN_CHECKS: list[tuple[Rule, RunCheck]] = []


def _register(rule: Rule) -> None:
    register(rule)
    if rule.scope == "run" and rule.check is not None:
        _RUN_CHECKS.append((rule, cast(RunCheck, rule.check)))  # scope "run": a RunCheck


def run_check(code: str) -> Callable[[RunCheck], RunCheck]:
    """Attach a check over one run to a code registered below the rules layer (a reader
    code that a run rule reports again, e.g. ``source/unreadable``)."""

    def decorate(check: RunCheck) -> RunCheck:
        rule = dataclasses.replace(RULES[code], scope="run", check=check)
        RULES[code] = rule
        _RUN_CHECKS.append((rule, check))
        return check

    return decorate


def run_rule(
    code: str,
    *,
    title: str,
    severity: Severity,
    rationale: str,
    fix: str | None = None,
    standard: str | None = None,
    subsumes: Iterable[str] = (),
    checked: Checked = "metadata",
    fixable: bool = False,
    also_severities: Iterable[Severity] = (),
    timing_in_doubt: bool = False,
) -> Callable[[RunCheck], RunCheck]:
    """Register a check over one run. ``subsumes``: codes that follow from this one's
    finding on the same run and field (see :func:`fold_consequences`); ``checked``:
    where the check happens (:data:`CHECKED`); ``fixable``: ``slicetime fix`` repairs
    it (:mod:`slicetime.rules.repairs`); ``also_severities``: severities a hit may
    state instead of ``severity`` (``Hit.severity``); ``timing_in_doubt``: a finding
    puts the slice times in doubt, so ``correct`` refuses the run unless the doubt is
    accepted (``Rule.timing_in_doubt``)."""

    def decorate(check: RunCheck) -> RunCheck:
        _register(Rule(code, title, severity, rationale, fix, "run", check, standard,
                       frozenset(subsumes), checked, fixable, frozenset(also_severities),
                       timing_in_doubt))
        return check

    return decorate


def dataset_rule(
    code: str, *, title: str, severity: Severity, rationale: str, fix: str | None = None,
    checked: Checked = "dataset", fixable: bool = False,
    also_severities: Iterable[Severity] = (), timing_in_doubt: bool = False,
) -> Callable[[DatasetCheck], DatasetCheck]:
    """Register a check over all runs of a dataset (keywords as :func:`run_rule`)."""

    def decorate(check: DatasetCheck) -> DatasetCheck:
        _register(Rule(code, title, severity, rationale, fix, "dataset", check,
                       checked=checked, fixable=fixable,
                       also_severities=frozenset(also_severities),
                       timing_in_doubt=timing_in_doubt))
        return check

    return decorate


#: document a code raised outside the rules (no check function): by the readers, the
#: batch (``checked="batch"``), verify, correct or the source cross-check
reader_code = declare


def to_finding(rule: Rule, record: RunRecord | None, hit: Hit) -> Finding:
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


def check_run(record: RunRecord) -> list[Finding]:
    """Reading findings plus every run rule's findings, in registry order."""
    findings = list(record.findings)
    for rule, check in _RUN_CHECKS:
        for hit in check(record):
            findings.append(to_finding(rule, record, hit))
    return findings


def check_dataset(
    records: Sequence[RunRecord], exempt: Mapping[str, Set[str]] | None = None
) -> tuple[dict[str, list[Finding]], list[Finding]]:
    """Dataset rules: (findings per run ``abs_path``, findings about the whole dataset).

    ``exempt`` maps a dataset rule's code to the runs (``abs_path``) that rule must
    leave out: neither counted nor reported (e.g. runs the lab policy judges for that
    value, so the majority of the others does not judge them).
    """
    per_run: dict[str, list[Finding]] = {}
    overall: list[Finding] = []
    by_path = {r.abs_path: r for r in records}
    for rule in RULES.values():
        if rule.scope != "dataset" or rule.check is None:
            continue
        left_out = (exempt or {}).get(rule.code)
        considered = [r for r in records if r.abs_path not in left_out] if left_out else records
        check = cast(DatasetCheck, rule.check)  # scope "dataset": a DatasetCheck
        for dhit in check(considered):
            record = by_path.get(dhit.run) if dhit.run else None
            finding = to_finding(rule, record, dhit.hit)
            if dhit.run is None:
                overall.append(finding)
            else:
                per_run.setdefault(dhit.run, []).append(finding)
    return per_run, overall


def folds_into(root_code: str, root_field: str | None, other: Finding) -> bool:
    """Whether ``other`` follows from a finding ``root_code`` on ``root_field`` of the
    same run (the root's rule declares ``subsumes``)."""
    rule = RULES.get(root_code)
    return rule is not None and other.code in rule.subsumes and other.field == root_field


def folded_entry(finding: Finding) -> dict[str, str]:
    """How a folded finding is listed under its root's ``evidence["folded"]``."""
    return {"code": finding.code, "severity": finding.severity.value, "message": finding.message}


def fold_consequences(findings: Sequence[Finding]) -> list[Finding]:
    """Fold findings that follow from a root cause into it.

    A finding whose rule declares ``subsumes`` absorbs every other finding of the
    same run with one of those codes on the same field: they leave the list and are
    listed under ``evidence["folded"]`` of the root (:func:`folded_entry`), so one
    cause is reported once. Order is kept; a folded finding never absorbs others.
    """
    roots = [i for i, f in enumerate(findings) if f.code in RULES and RULES[f.code].subsumes]
    if not roots:
        return list(findings)
    folded_into: dict[int, list[Finding]] = {}
    taken: set[int] = set()
    for root_index in roots:
        if root_index in taken:
            continue
        root = findings[root_index]
        for i, other in enumerate(findings):
            if i != root_index and i not in taken and folds_into(root.code, root.field, other):
                taken.add(i)
                folded_into.setdefault(root_index, []).append(other)
    result: list[Finding] = []
    for i, finding in enumerate(findings):
        if i in taken:
            continue
        absorbed = folded_into.get(i)
        if absorbed:
            before = list(finding.evidence.get("folded", []))
            finding = dataclasses.replace(finding, evidence={
                **finding.evidence, "folded": before + [folded_entry(f) for f in absorbed]})
        result.append(finding)
    return result


def explain(code: str) -> str:
    """The documentation of one rule, as printed by ``slicetime explain``."""
    rule = RULES[code]
    lines = [
        f"{rule.code} — {rule.title}",
        f"default severity: {rule.severity.value}",
        f"checked: {rule.checked_text}",
        "",
        rule.rationale.strip(),
    ]
    if rule.fix:
        lines += ["", f"what to do: {rule.fix.strip()}"]
    if rule.fixable:
        lines += ["", "slicetime fix repairs this."]
    if rule.timing_in_doubt:
        lines += ["", "it puts the slice times in doubt: slicetime correct refuses a run with "
                  f"this finding (at warning or above) unless you accept it: --accept "
                  f"{rule.code}[:PATTERN], or an [[accept]] entry in the lab policy."]
    if rule.standard:
        lines += ["", f"standard: {rule.standard}"]
    if rule.subsumes:
        lines += ["", "folds in (consequences on the same run and field, listed in its "
                  "grounds instead of reported again): " + ", ".join(sorted(rule.subsumes))]
    return "\n".join(lines)


__all__ = ["CHECKED", "RENAMED", "RULES", "Checked", "DatasetCheck", "DatasetHit", "Hit",
           "Rule", "RunCheck", "Scope", "check_dataset", "check_run", "current_code", "explain",
           "fold_consequences", "folded_entry", "folds_into", "known_codes", "reader_code",
           "renamed", "run_check", "run_rule", "to_finding"]
