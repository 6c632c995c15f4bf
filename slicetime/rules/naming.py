"""Checks on a run's file name (pure: the name is part of the record)."""

from __future__ import annotations

from collections.abc import Iterator

from slicetime.model import RunRecord, Severity
from slicetime.readers.entities import looks_like_run, run_name_problem
from slicetime.rules.registry import Hit, run_rule


@run_rule(
    "file/bad-run-name",
    title="a file that looks like a functional run has a name that is not a BIDS name",
    severity=Severity.WARNING,
    rationale=(
        "BIDS names runs sub-<label>[_<key>-<label>...]_<suffix>.nii[.gz], with letters and "
        "digits only in keys, labels and the suffix. A name such as task-rest-eyes, "
        "acq-1.5mm or '_bold (copy)' is not parsed by tools that select runs by their "
        "entities, so the run silently drops out of their analyses, and the inheritance "
        "principle cannot give it the dataset's shared sidecars (slicetime reads only the "
        "sidecars it can match). slicetime reports every such file rather than skipping it: "
        "any .nii or .nii.gz in a func, perf or dwi folder, and any NIfTI whose name has "
        "bold, cbv, phase, asl, dwi, sbref or m0scan as a word."
    ),
    fix="Rename the file (and its sidecar) to a valid BIDS name, e.g. task-resteyes, "
    "acq-1p5mm; delete copies that are not meant to be part of the dataset.",
)
def bad_run_name(record: RunRecord) -> Iterator[Hit]:
    name = record.path.rsplit("/", 1)[-1]
    folder = record.path.rsplit("/", 2)[-2] if "/" in record.path else ""
    if not looks_like_run(name, folder):
        return
    problem = run_name_problem(name)
    if problem is not None:
        yield Hit(
            f"{name!r} is not a valid BIDS run name: {problem}",
            None,
            {"name": name, "problem": problem},
            file=record.path,
        )
