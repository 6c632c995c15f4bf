"""Checks on a run's file name (pure: the name is part of the record)."""

from __future__ import annotations

from collections.abc import Iterator

from slicetime.model import RunRecord
from slicetime.readers.entities import looks_like_run, run_name_problem
from slicetime.rules.registry import Hit


def bad_run_name(record: RunRecord) -> Iterator[Hit]:
    name = record.path.rsplit("/", 1)[-1]
    folder = record.path.rsplit("/", 2)[-2] if "/" in record.path else ""
    if not looks_like_run(name, folder):
        return
    problem = run_name_problem(name)
    if problem is not None:
        yield Hit(
            f"'{name}' is not a valid BIDS run name: {problem}",
            None,
            {"name": name, "problem": problem},
            file=record.path,
        )
