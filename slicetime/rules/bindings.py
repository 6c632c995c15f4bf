"""Every check of the rules layer, bound to the code it reports: one explicit table.

The codes, their severities and documentation are declared in the catalogue
(:mod:`slicetime.codes`, ``slicetime/data/codes.toml``); this module says which
function checks each code declared with ``scope = "run"`` or ``scope = "dataset"``,
and in which order :func:`check_run` and :func:`check_dataset` run them (the order
of a run's findings in every report). A test keeps the two tables in step: every
run or dataset code has exactly one check here, and no other code has one.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence, Set

from slicetime.codes import RULES, Rule, to_finding
from slicetime.model import Finding, RunRecord, RunView
from slicetime.rules import dataset, header, naming, source, timing
from slicetime.rules.registry import DatasetCheck, RunCheck

#: (code, check over one run), in the order check_run runs them
RUN_CHECKS: tuple[tuple[str, RunCheck], ...] = (
    ("inherit/timing-override", dataset.timing_override),
    ("file/series-shape", header.series_shape),
    ("header/tr-disagrees", header.tr_mismatch),
    ("header/tr-unset", header.tr_unset),
    ("header/time-units-unknown", header.time_units),
    ("axis/dim-info-mismatch", header.dim_info_mismatch),
    ("header/slice-code-mismatch", header.slice_code_mismatch),
    ("file/not-retrieved", header.not_retrieved),
    ("file/bad-run-name", naming.bad_run_name),
    ("source/no-match", source.no_match),
    ("source/ambiguous", source.ambiguous),
    ("source/unreadable", source.unreadable),
    ("source/files-skipped", source.files_skipped),
    ("source/geometry-differs", source.geometry_differs),
    ("source/mixed-folder", source.mixed_folder),
    ("source/no-times", source.no_times),
    ("source/times-absent", source.times_absent),
    ("source/reversed", source.reversed_times),
    ("source/times-differ", source.times_differ),
    ("source/tr-differs", source.tr_differs),
    ("source/multiband-differs", source.multiband_differs),
    *((code, timing.problem_check(code)) for code in timing.PROBLEM_CODES),
    ("timing/missing", timing.missing),
    ("timing/corrected-still-timed", timing.corrected_still_timed),
    ("timing/from-header", timing.from_header),
    ("timing/negative", timing.negative),
    ("timing/units-ms", timing.units_ms),
    ("timing/exceeds-tr", timing.exceeds_tr),
    ("timing/exceeds-acquisition", timing.exceeds_acquisition),
    ("timing/all-equal", timing.all_equal),
    ("timing/duplicates", timing.duplicates),
    ("timing/uneven", timing.uneven),
    ("scheme/unrecognised-order", timing.unrecognised),
    ("scheme/multiband-mismatch", timing.multiband_mismatch),
    ("scheme/multiband-undeclared", timing.multiband_undeclared),
    ("tr/missing", timing.tr_missing),
    ("tr/both-present", timing.tr_both),
    ("tr/volume-timing-delay", timing.vt_delay),
    ("tr/volume-timing-acquisition", timing.vt_acq),
    ("tr/volume-timing-order", timing.vt_order),
    ("tr/frame-duration-conflict", timing.tr_frame_duration),
    ("tr/deprecated-acquisition-duration", timing.deprecated_acq),
    ("tr/units-ms", timing.tr_units),
    ("tr/implausible", timing.tr_implausible),
)

#: (code, check over all runs of a dataset), in the order check_dataset runs them
DATASET_CHECKS: tuple[tuple[str, DatasetCheck], ...] = (
    ("dataset/outlier-scheme", dataset.outlier_scheme),
    ("dataset/outlier-tr", dataset.outlier_tr),
    ("dataset/outlier-slices", dataset.outlier_slices),
    ("dataset/duplicate-run", dataset.duplicate_run),
    ("dataset/echo-mismatch", dataset.echo_mismatch),
)

_RUN: tuple[tuple[Rule, RunCheck], ...] = tuple((RULES[c], check) for c, check in RUN_CHECKS)
_DATASET: tuple[tuple[Rule, DatasetCheck], ...] = tuple(
    (RULES[c], check) for c, check in DATASET_CHECKS)


def check_run(record: RunRecord) -> list[Finding]:
    """Reading findings plus every run check's findings, in the order of :data:`RUN_CHECKS`."""
    findings = list(record.findings)
    for rule, check in _RUN:
        for hit in check(record):
            findings.append(to_finding(rule, record, hit))
    return findings


#: the run checks that read the run's name or its source series, not only what its
#: header and sidecars hold (the others may be judged once per distinct content:
#: ``pipelines.audit_memo``)
NAME_CODES: frozenset[str] = frozenset(
    code for code, _check in RUN_CHECKS
    if code == "file/bad-run-name" or code.startswith("source/"))


def check_run_part(record: RunRecord, *, by_name: bool) -> list[tuple[int, Finding]]:
    """The findings of the run checks of :data:`NAME_CODES` (``by_name``) or of all the
    others, each with its check's place in :data:`RUN_CHECKS`: :func:`check_run` is the
    reading findings plus both parts in that order."""
    out: list[tuple[int, Finding]] = []
    # the source checks judge the run's source series: without one they find nothing
    checks = _BY_CONTENT if not by_name else _BY_NAME_ONLY if record.source is None \
        else _BY_NAME_ALL
    for place, rule, check in checks:
        for hit in check(record):
            out.append((place, to_finding(rule, record, hit)))
    return out


_PLACED = [(place, rule, check) for place, (rule, check) in enumerate(_RUN)]
_BY_CONTENT = tuple(p for p in _PLACED if p[1].code not in NAME_CODES)
_BY_NAME_ALL = tuple(p for p in _PLACED if p[1].code in NAME_CODES)
_BY_NAME_ONLY = tuple(p for p in _BY_NAME_ALL if not p[1].code.startswith("source/"))


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
    for rule, check in _DATASET:
        left_out = (exempt or {}).get(rule.code)
        considered = [r for r in records if r.abs_path not in left_out] if left_out else records
        for dhit in check(considered):
            record = by_path.get(dhit.run) if dhit.run else None
            finding = to_finding(rule, record, dhit.hit)
            if dhit.run is None:
                overall.append(finding)
            else:
                per_run.setdefault(dhit.run, []).append(finding)
    return per_run, overall


__all__ = ["DATASET_CHECKS", "NAME_CODES", "RUN_CHECKS", "check_dataset", "check_run",
           "check_run_part"]
