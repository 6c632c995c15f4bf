"""What the checks of the rules layer share: the values they report, former names,
folding and ``explain``.

A check is a small function over one run (:data:`RunCheck`, yielding :class:`Hit`
values) or over all runs of a dataset (:data:`DatasetCheck`, yielding
:class:`DatasetHit`); :mod:`slicetime.rules.bindings` binds each to the code it
reports, declared with its severity and documentation in the catalogue
(:mod:`slicetime.codes`), so a check cannot invent an undeclared code. Codes raised
while reading files (``file/*``, ``sidecar/*``, ``inherit/*``) are declared there
too, so ``slicetime explain`` covers every code a report can contain.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass

from slicetime.codes import (
    CHECKED,
    RENAMED,
    RULES,
    Checked,
    Hit,
    Rule,
    Scope,
    to_finding,
)
from slicetime.model import Finding, RunRecord, RunView

RunCheck = Callable[[RunRecord], Iterable[Hit]]
DatasetCheck = Callable[[Sequence[RunView]], Iterable["DatasetHit"]]


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


def known_codes() -> frozenset[str]:
    """Every code a lab policy may name: the registered ones and their former names."""
    return frozenset(RULES) | frozenset(RENAMED)


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


__all__ = ["CHECKED", "RENAMED", "RULES", "Checked", "DatasetCheck", "DatasetHit", "FoldRoot",
           "Hit", "Rule", "RunCheck", "Scope", "attach_folded", "current_code", "explain",
           "fold", "fold_consequences", "fold_roots", "folded_entry", "folds_into",
           "is_fold_root", "known_codes", "to_finding"]
