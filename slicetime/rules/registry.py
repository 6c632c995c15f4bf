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
from slicetime.model import Finding, RunRecord, RunView, Severity

RunCheck = Callable[[RunRecord], Iterable["Hit"]]
DatasetCheck = Callable[[Sequence[RunView]], Iterable["DatasetHit"]]


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


def to_finding(rule: Rule, record: RunView | None, hit: Hit) -> Finding:
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
    records: Sequence[RunView], exempt: Mapping[str, Set[str]] | None = None
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


#: (code, field) of a finding whose rule folds others into it: a run's root cause
FoldRoot = tuple[str, str | None]


def is_fold_root(code: str) -> bool:
    return code in RULES and bool(RULES[code].subsumes)


def fold_roots(findings: Sequence[Finding]) -> tuple[FoldRoot, ...]:
    """The root causes among a run's findings, in order (numbered by :func:`fold`)."""
    return tuple((f.code, f.field) for f in findings if is_fold_root(f.code))


def _owners(findings: Sequence[Finding], roots: Sequence[FoldRoot] | None
            ) -> tuple[dict[int, int], list[int]]:
    """{position of a folded finding: its root's number}, and the positions of the roots
    among ``findings`` (empty when ``roots`` are given)."""
    own = roots is None
    positions: list[int] = []
    if roots is None:
        positions = [i for i, f in enumerate(findings) if is_fold_root(f.code)]
        roots = [(findings[i].code, findings[i].field) for i in positions]
    owner: dict[int, int] = {}
    if not roots:
        return owner, positions
    # roots first, in order (an absorbed root absorbs nothing), then the rest
    taken = set(positions)
    for i in positions + [i for i in range(len(findings)) if i not in taken]:
        for number, (code, field_) in enumerate(roots):
            if own and (positions[number] == i or positions[number] in owner):
                continue
            if folds_into(code, field_, findings[i]):
                owner[i] = number
                break
    return owner, positions


def fold(
    findings: Sequence[Finding], roots: Sequence[FoldRoot]
) -> tuple[tuple[Finding, ...], tuple[tuple[int, Finding], ...]]:
    """The one folding decision, for findings that come after the run's own were folded
    (the dataset rules'): which of them follow from one of the run's root causes
    ``roots`` (:func:`fold_roots`: a rule that declares ``subsumes``, on the same
    ``field``). Returns the findings kept and the folded ones with their root's number."""
    owner, _ = _owners(findings, roots)
    return (tuple(f for i, f in enumerate(findings) if i not in owner),
            tuple((owner[i], findings[i]) for i in sorted(owner)))


def attach_folded(findings: Sequence[Finding],
                  folded: Sequence[tuple[int, Finding]]) -> list[Finding]:
    """``findings`` with each folded finding listed under its root's
    ``evidence["folded"]`` (:func:`folded_entry`; roots numbered as :func:`fold_roots`)."""
    if not folded:
        return list(findings)
    by_root: dict[int, list[Finding]] = {}
    for number, finding in folded:
        by_root.setdefault(number, []).append(finding)
    out: list[Finding] = []
    number = 0
    for finding in findings:
        if is_fold_root(finding.code):
            absorbed = by_root.get(number)
            number += 1
            if absorbed:
                before = list(finding.evidence.get("folded", []))
                finding = dataclasses.replace(finding, evidence={
                    **finding.evidence, "folded": before + [folded_entry(f) for f in absorbed]})
        out.append(finding)
    return out


def fold_consequences(findings: Sequence[Finding]) -> list[Finding]:
    """Fold a run's findings that follow from a root cause among them into it (the same
    decision as :func:`fold`; a root never folds into itself, and a root folded into an
    earlier one folds nothing): they leave the list and are listed under
    ``evidence["folded"]`` of the root, so one cause is reported once. Order is kept."""
    owner, positions = _owners(findings, None)
    if not owner:
        return list(findings)
    kept_roots = {n: new for new, n in enumerate(
        n for n, p in enumerate(positions) if p not in owner)}
    kept = [f for i, f in enumerate(findings) if i not in owner]
    return attach_folded(kept, [(kept_roots[owner[i]], findings[i]) for i in sorted(owner)])


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
                  "evidence instead of reported again): " + ", ".join(sorted(rule.subsumes))]
    return "\n".join(lines)


__all__ = ["CHECKED", "RENAMED", "RULES", "Checked", "DatasetCheck", "DatasetHit", "Hit",
           "Rule", "RunCheck", "Scope", "check_dataset", "check_run", "current_code", "explain",
           "fold_consequences", "folded_entry", "folds_into", "known_codes", "reader_code",
           "renamed", "run_check", "run_rule", "to_finding"]
